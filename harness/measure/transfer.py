"""Two-probe gain and phase: output relative to input in the same record.

Both channels are fitted at one frequency on one time axis, so the generator's amplitude
error and the trigger position cancel.  The frequency comes from a four-parameter fit of
the input (the cleaner signal); harmonics are fitted too, so a distorted, non-coherent
output does not bias its fundamental.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.errors import AnalysisError
from harness.measure import _checks
from harness.measure.sinefit import _Core, _fit_core, _significance, estimate_omega


@dataclass(frozen=True)
class Transfer:
    """Gain (ratio and dB) and phase (degrees, (−180, 180]) of output over input.
    Phase near ±180° means an inverting stage.  Amplitudes are peak volts at the probe tips."""

    gain: float
    gain_db: float
    phase_deg: float
    frequency_hz: float
    input_vpk: float
    output_vpk: float

    @property
    def inverting(self) -> bool:
        return abs(self.phase_deg) > 90.0


def _check_probe(name: str, value: float) -> float:
    v = float(value)
    if not np.isfinite(v) or v <= 0:
        raise AnalysisError(f"{name} must be a positive attenuation factor, got {value!r}")
    return v


def fit_pair(
    x: np.ndarray,
    y: np.ndarray,
    sample_rate_hz: float,
    frequency_hz: float | None,
    harmonics: int,
) -> tuple[_Core, _Core]:
    """Four-parameter fit of x, then a three-parameter fit of y at the same ω (internal)."""
    n = x.size
    if frequency_hz is None:
        core_in = estimate_omega(x, harmonics)
    else:
        f = _checks.check_fundamental(frequency_hz, sample_rate_hz, n)
        core_in = _fit_core(x, 2 * np.pi * f / sample_rate_hz, harmonics, refine=True)
    _checks.check_fundamental(core_in.omega * sample_rate_hz / (2 * np.pi), sample_rate_hz, n)
    _significance(core_in, n)
    core_out = _fit_core(y, core_in.omega, harmonics, refine=False, grid=core_in.grid)
    _significance(core_out, n)
    return core_in, core_out


def transfer_from_cores(
    core_in: _Core, core_out: _Core, sample_rate_hz: float, in_probe: float, out_probe: float
) -> Transfer:
    a_in = abs(core_in.coef[0]) * in_probe
    a_out = abs(core_out.coef[0]) * out_probe
    gain = a_out / a_in
    phase = float(np.degrees(np.angle(core_out.coef[0] / core_in.coef[0])))
    if phase <= -180.0:
        phase += 360.0
    return Transfer(
        gain=float(gain),
        gain_db=float(20 * np.log10(gain)),
        phase_deg=phase,
        frequency_hz=float(core_in.omega * sample_rate_hz / (2 * np.pi)),
        input_vpk=float(a_in),
        output_vpk=float(a_out),
    )


def transfer_uniform(
    x_in: object,
    y_out: object,
    sample_rate_hz: float,
    frequency_hz: float | None = None,
    *,
    in_probe: float = 1.0,
    out_probe: float = 1.0,
    harmonics: int = 10,
) -> Transfer:
    """:func:`transfer` for a uniform record given by its sample rate."""
    x = _checks.as_samples(x_in, "input")
    y = _checks.as_samples(y_out, "output")
    _checks.same_length(input=x, output=y)
    fs = _checks.check_rate(sample_rate_hz)
    pi, po = _check_probe("in_probe", in_probe), _check_probe("out_probe", out_probe)
    core_in, core_out = fit_pair(x, y, fs, frequency_hz, harmonics)
    return transfer_from_cores(core_in, core_out, fs, pi, po)


def transfer(
    t: object,
    x_in: object,
    y_out: object,
    frequency_hz: float | None = None,
    *,
    in_probe: float = 1.0,
    out_probe: float = 1.0,
    harmonics: int = 10,
) -> Transfer:
    """Gain and phase of ``y_out`` relative to ``x_in`` sampled at times ``t``.

    ``in_probe``/``out_probe``: factor from recorded volts to volts at the probe tip
    (10 for a 10:1 probe when the scope is set to 1×).
    """
    x = _checks.as_samples(x_in, "input")
    y = _checks.as_samples(y_out, "output")
    n = _checks.same_length(input=x, output=y)
    fs, _ = _checks.sample_rate_from_time(t, n)
    return transfer_uniform(
        x, y, fs, frequency_hz, in_probe=in_probe, out_probe=out_probe, harmonics=harmonics
    )
