"""Full analysis of one two-channel record: gain, phase, THD, THD+N, clipping, floor.

Default method "fit": an IEEE 1241 four-parameter fit of the input with harmonics to
k_max, then a three-parameter fit of the output at the same frequency.  The output's
fitted harmonics give THD (exact for any record length, coherent or not); the residual
after DC and fundamental gives THD+N over Nyquist (a valid THD+N estimator).  No FFT is
needed unless an analysis bandwidth below Nyquist is asked for.  Method "fft" uses
:func:`harmonic_analysis` (rectangular window if coherent, Blackman-Harris otherwise).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from harness.errors import AnalysisError, OverRangeError
from harness.measure import _checks
from harness.measure.clipping import ClipEvidence, adc_hits, crest_deficits, judge
from harness.measure.floor import MeasurementFloor, measurement_floor
from harness.measure.harmonics import (
    COHERENT_TOL_CYCLES,
    Harmonics,
    harmonic_analysis,
    harmonic_orders,
)
from harness.measure.transfer import _check_probe, fit_pair, transfer_from_cores


def _num(x: float | None) -> float | None:
    """JSON-ready number: None for None, NaN or infinite."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


@dataclass(frozen=True, eq=False)
class RecordAnalysis:
    """Everything one record supports.  Distortion fields are None when ``over_range``
    (``reason`` says why).  Voltages are at the probe tips."""

    frequency_hz: float
    sample_rate_hz: float
    n_samples: int
    coherent: bool
    method: str
    gain: float | None
    gain_db: float | None
    phase_deg: float
    thd_percent: float | None
    thdn_percent: float | None
    thd_db: float | None
    sinad_db: float | None
    clipped: bool
    clip_side: str | None
    over_range: bool
    reason: str | None
    floor: MeasurementFloor
    output_vrms: float
    input_vrms: float
    harmonics: Harmonics | None = field(repr=False)
    clip: ClipEvidence = field(repr=False)
    #: THD of the output record as recorded, the scope's own harmonics included (percent);
    #: set when ``thd_percent`` is the value with them removed.
    thd_raw_percent: float | None = None
    #: ``thd_percent`` has the digitiser's own harmonics removed (added THD of the board).
    scope_harmonics_removed: bool = False

    @property
    def thd_below_floor(self) -> bool:
        """True when the THD reading cannot be told from the bench's own floor."""
        return self.thd_percent is not None and self.floor.thd_below(self.thd_percent / 100)

    @property
    def thd_report(self) -> str:
        """THD as it may honestly be reported: a value, "< floor", or why not."""
        if self.thd_percent is None:
            return f"not valid: {self.reason}"
        if self.thd_below_floor:
            return f"< {2 * self.floor.thd_percent:.3g} %"
        return f"{self.thd_percent:.4g} %"

    def to_dict(self) -> dict[str, Any]:
        hd = None
        if self.harmonics is not None:
            hd = {
                str(k): _num(100 * v / self.harmonics.fundamental_rms)
                for k, v in zip(self.harmonics.orders, self.harmonics.harmonic_rms, strict=True)
            }
        return {
            "frequency_hz": _num(self.frequency_hz),
            "sample_rate_hz": _num(self.sample_rate_hz),
            "n_samples": self.n_samples,
            "coherent": self.coherent,
            "method": self.method,
            "gain": _num(self.gain),
            "gain_db": _num(self.gain_db),
            "phase_deg": _num(self.phase_deg),
            "thd_percent": _num(self.thd_percent),
            "thd_raw_percent": _num(
                self.thd_percent if self.thd_raw_percent is None else self.thd_raw_percent
            ),
            "scope_harmonics_removed": self.scope_harmonics_removed,
            "thdn_percent": _num(self.thdn_percent),
            "thd_db": _num(self.thd_db),
            "sinad_db": _num(self.sinad_db),
            "thd_below_floor": self.thd_below_floor,
            "thd_report": self.thd_report,
            "hd_percent": hd,
            "clipped": self.clipped,
            "clip_side": self.clip_side,
            "clip_asymmetry": _num(self.clip.asymmetry),
            "over_range": self.over_range,
            "reason": self.reason,
            "floor": {k: _num(v) for k, v in self.floor.to_dict().items()},
            "output_vrms": _num(self.output_vrms),
            "input_vrms": _num(self.input_vrms),
        }


def _adc(name: str, lim: tuple[float, float] | None) -> tuple[float | None, float | None]:
    if lim is None:
        return None, None
    lo, hi = (float(v) for v in lim)
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise AnalysisError(f"{name}: ADC limits must be (min, max) with min < max, got {lim!r}")
    return lo, hi


def analyze_uniform(
    x_in: object,
    y_out: object,
    sample_rate_hz: float,
    *,
    in_adc: tuple[float, float] | None = None,
    out_adc: tuple[float, float] | None = None,
    adc_bits: int | None = None,
    in_probe: float = 1.0,
    out_probe: float = 1.0,
    k_max: int = 10,
    bandwidth_hz: float | None = None,
    frequency_hz: float | None = None,
    method: str = "fit",
    raise_over_range: bool = False,
) -> RecordAnalysis:
    """Analyse a uniform two-channel record (see :func:`analyze_record`)."""
    if method not in ("fit", "fft"):
        raise AnalysisError(f"method must be 'fit' or 'fft', got {method!r}")
    x = _checks.as_samples(x_in, "input")
    y = _checks.as_samples(y_out, "output")
    n = _checks.same_length(input=x, output=y)
    fs = _checks.check_rate(sample_rate_hz)
    pi, po = _check_probe("in_probe", in_probe), _check_probe("out_probe", out_probe)
    bw = _checks.check_bandwidth(bandwidth_hz, fs)
    if k_max < 1:
        raise AnalysisError(f"k_max must be >= 1, got {k_max}")
    if frequency_hz is not None:
        _checks.check_fundamental(frequency_hz, fs, n, bw)
    in_lo, in_hi = _adc("in_adc", in_adc)
    out_lo, out_hi = _adc("out_adc", out_adc)
    lsb_in = (
        (in_hi - in_lo) / 2**adc_bits
        if adc_bits and in_lo is not None and in_hi is not None
        else None
    )
    lsb_out = (
        (out_hi - out_lo) / 2**adc_bits
        if adc_bits and out_lo is not None and out_hi is not None
        else None
    )

    core_in, core_out = fit_pair(x, y, fs, frequency_hz, k_max)
    f = core_in.omega * fs / (2 * np.pi)
    _checks.check_fundamental(f, fs, n, bw)
    cycles = f * n / fs
    coherent = abs(cycles - round(cycles)) <= COHERENT_TOL_CYCLES
    tr = transfer_from_cores(core_in, core_out, fs, pi, po)

    # Residual after DC + fundamental of the output: THD+N and the crest deficits.
    dtype = np.float32 if y.dtype == np.float32 else np.float64
    r1 = y - core_out.model(dtype, orders=1)
    amp = float(abs(core_out.coef[0]))
    phase0 = float(np.angle(core_out.coef[0])) - core_out.omega * core_out.grid.centre
    r1_rms = float(np.sqrt(np.mean(np.square(r1, dtype=np.float64))))
    dpos, dneg, sp, sn = crest_deficits(
        r1, core_out.omega / (2 * np.pi), phase0, amp, residual_rms=r1_rms
    )
    om_hits = adc_hits(y, out_lo, out_hi, lsb_out)
    im_hits = adc_hits(x, in_lo, in_hi, lsb_in)
    clip = judge(dpos, dneg, sp, sn, *om_hits, n)

    v1 = amp / np.sqrt(2)
    orders = harmonic_orders(f, k_max, fs, bw)
    if method == "fit":
        ks = list(core_out.orders)
        hr = np.array([abs(core_out.coef[ks.index(k)]) / np.sqrt(2) for k in orders if k in ks])
        orders = tuple(k for k in orders if k in ks)
        thd = float(np.sqrt(np.sum(hr**2)) / v1)
        if bw >= fs / 2 * (1 - 1e-12):
            thdn = r1_rms / v1
        else:
            thdn = harmonic_analysis(y, fs, f, k_max=k_max, bandwidth_hz=bw).thdn_ratio
        harm = Harmonics(
            fundamental_hz=f,
            fundamental_rms=v1,
            orders=orders,
            harmonic_rms=hr,
            thd_ratio=thd,
            thdn_ratio=thdn,
            window="sine-fit",
            coherent=coherent,
            bandwidth_hz=bw,
            dc=core_out.dc,
            noise_rms=float(np.sqrt(core_out.sum_sq / n)),
        )
    else:
        harm = harmonic_analysis(y, fs, f, k_max=k_max, bandwidth_hz=bw, coherent=coherent)

    # Bench noise for the floor: the residual after all fitted harmonics still holds any
    # harmonics above k_max, so also take the difference estimator (var(Δr)/2 is white
    # noise's variance; slow distortion residue is suppressed) and keep the smaller.
    r_full = y - core_out.model(dtype)
    noise_diff = float(np.sqrt(np.mean(np.square(np.diff(r_full), dtype=np.float64)) / 2))
    noise = min(float(np.sqrt(core_out.sum_sq / n)), noise_diff)
    full_scale = (out_hi - out_lo) if out_lo is not None and out_hi is not None else None
    q = full_scale / 2**adc_bits / np.sqrt(12) if adc_bits and full_scale else 0.0
    floor = measurement_floor(
        adc_bits if full_scale else None,
        full_scale,
        amp,
        float(np.sqrt(max(noise**2 - q**2, 0.0))),
        n,
        k_max,
        bandwidth_fraction=bw / (fs / 2),
    )

    reason = None
    over = clip.over_range or sum(im_hits) > 0
    if over:
        parts = []
        if clip.over_range:
            parts.append(f"output touches the ADC limits in {100 * clip.over_range_fraction:.3g} %")
        if sum(im_hits):
            parts.append(f"input touches the ADC limits in {100 * sum(im_hits) / n:.3g} %")
        reason = (
            " and ".join(parts)
            + " of samples (scope over-range): gain and distortion would be false; "
            "raise the scope's vertical range"
        )
        if raise_over_range:
            raise OverRangeError(reason, hint="raise the scope's vertical range")
    valid = not over
    return RecordAnalysis(
        frequency_hz=f,
        sample_rate_hz=fs,
        n_samples=n,
        coherent=coherent,
        method=method,
        gain=tr.gain if valid else None,
        gain_db=tr.gain_db if valid else None,
        phase_deg=tr.phase_deg,
        thd_percent=harm.thd_percent if valid else None,
        thdn_percent=harm.thdn_percent if valid else None,
        thd_db=harm.thd_db if valid else None,
        sinad_db=harm.sinad_db if valid else None,
        clipped=clip.clipped,
        clip_side=clip.side,
        over_range=over,
        reason=reason,
        floor=floor,
        output_vrms=tr.output_vpk / np.sqrt(2),
        input_vrms=tr.input_vpk / np.sqrt(2),
        harmonics=harm if valid else None,
        clip=clip,
    )


def analyze_record(
    t: object,
    x_in: object,
    y_out: object,
    *,
    in_adc: tuple[float, float] | None = None,
    out_adc: tuple[float, float] | None = None,
    adc_bits: int | None = None,
    in_probe: float = 1.0,
    out_probe: float = 1.0,
    k_max: int = 10,
    bandwidth_hz: float | None = None,
    frequency_hz: float | None = None,
    method: str = "fit",
    raise_over_range: bool = False,
) -> RecordAnalysis:
    """Gain, phase, THD, THD+N, clipping evidence and floor of one two-probe record.

    ``in_adc``/``out_adc``: the scope's ADC limits (recorded units) per channel, if known;
    ``adc_bits`` with them gives the quantisation floor.  ``frequency_hz``: the generator's
    frequency as a start value (refined by the fit).  ``raise_over_range`` raises
    OverRangeError instead of flagging.
    """
    x = _checks.as_samples(x_in, "input")
    y = _checks.as_samples(y_out, "output")
    n = _checks.same_length(input=x, output=y)
    fs, _ = _checks.sample_rate_from_time(t, n)
    return analyze_uniform(
        x,
        y,
        fs,
        in_adc=in_adc,
        out_adc=out_adc,
        adc_bits=adc_bits,
        in_probe=in_probe,
        out_probe=out_probe,
        k_max=k_max,
        bandwidth_hz=bandwidth_hz,
        frequency_hz=frequency_hz,
        method=method,
        raise_over_range=raise_over_range,
    )
