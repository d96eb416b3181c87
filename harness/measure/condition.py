"""What state a channel is in at the nominal step: working, or which way it has failed.

Why it exists: a repair bench sees dead channels more than any other fault, then stages that
oscillate (a parasitic oscillation far above the audio band, or a slow "motorboating"),
mains hum, an output stuck at a rail, a reversed polarity and a gross gain error (common
practice).  Each must be named with its evidence and the run must go on with the other
channels, instead of the analysis of the silent record stopping the run.

Pure: records (volts) in, a :class:`ChannelCondition` out.  Spectra use the 4-term
Blackman-Harris window (Harris, Proc. IEEE 66(1), 1978: highest side lobe -92 dB, so a
tone 60 dB under the test signal is still seen), peak amplitudes from the window's coherent
gain; the test signal's amplitude and phase come from a three-parameter least-squares fit
at the input's frequency (IEEE Std 1241-2010 Annex B.1), which does not need the output to
hold a sine.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from scipy.signal import get_window

from harness.errors import AnalysisError

__all__ = ["DEAD_DB", "GROSS_GAIN_DB", "ChannelCondition", "Mode", "classify_channel"]

Mode = Literal["working", "dead", "stuck", "oscillating", "hum", "reversed_polarity", "gain_error"]

#: Output fundamental this far below the expected one: dead (dB).
DEAD_DB = 40.0
#: Gain this far from the expected one: a gross gain error (dB) — a smaller error is an
#: ordinary out-of-limits measurement and keeps its clipping search.
GROSS_GAIN_DB = 20.0
#: A component not harmonically related to the test signal above this fraction of the
#: expected output's peak: oscillating (-30 dB).
OSCILLATION_REL = 10 ** (-30 / 20)
#: Mains hum (50 or 60 Hz and harmonics, summed rms) above this fraction of the expected
#: output's rms (-40 dB).
HUM_REL = 10 ** (-40 / 20)
#: A spectral peak must also stand this far above the record's median bin to count.
PEAK_OVER_FLOOR = 30.0
#: Output within this fraction of the supply span from a rail, with little AC: stuck.
RAIL_FRACTION = 0.1
#: Harmonics of the test signal that are never counted as another component.
K_MAX = 10
MAINS_HZ = (50.0, 60.0)
#: Polarity is reversed when the phase is this far (degrees) from the expected one.
POLARITY_DEG = 90.0


@dataclass(frozen=True)
class ChannelCondition:
    """The channel's mode at the nominal step and the evidence for it."""

    mode: Mode
    text: str
    evidence: dict[str, Any] = field(default_factory=dict)

    @property
    def working(self) -> bool:
        return self.mode == "working"

    def to_dict(self) -> dict[str, Any]:
        return {"mode": self.mode, "text": self.text, "evidence": dict(self.evidence)}


def _tone(y: np.ndarray, fs: float, f: float) -> complex:
    """Complex peak amplitude of the component at ``f`` (least squares with a DC term and a
    slope, so a DC level still drifting after a change is not read as a slow tone)."""
    n = y.size
    t = (np.arange(n) - (n - 1) / 2) / fs
    w = 2 * np.pi * f * t
    a = np.column_stack([np.cos(w), np.sin(w), np.ones(n), t])
    coef, *_ = np.linalg.lstsq(a, y.astype(float), rcond=None)
    return complex(coef[0], -coef[1])


def _spectrum(y: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray, int]:
    """(frequencies, peak-amplitude spectrum, main-lobe half width in bins)."""
    n = y.size
    win = get_window("blackmanharris", n, fftbins=True)
    i = np.arange(n) - (n - 1) / 2
    trend = np.polyval(np.polyfit(i, y, 1), i)  # a drifting DC level is no tone
    spec = np.abs(np.fft.rfft((y - trend) * win)) * 2.0 / np.sum(win)
    return np.fft.rfftfreq(n, 1.0 / fs), spec, 5


def _near(freqs: np.ndarray, targets: list[float], width_hz: float) -> np.ndarray:
    mask = np.zeros(freqs.size, dtype=bool)
    for f in targets:
        mask |= np.abs(freqs - f) <= width_hz
    return mask


def _strongest_other(y: np.ndarray, fs: float, f0: float) -> tuple[float, float, float] | None:
    """(frequency, peak V, median bin V) of the strongest component that is neither DC, the
    test signal nor one of its harmonics, nor mains; None when the record is too short."""
    if y.size < 64:
        return None
    freqs, spec, half = _spectrum(y, fs)
    df = fs / y.size
    width = (half + 1) * df
    excluded = freqs <= width + 2 * df  # DC and what a record this long cannot resolve
    excluded |= _near(freqs, [k * f0 for k in range(1, K_MAX + 1)], width)
    excluded |= _near(
        freqs, [m * f for f in MAINS_HZ for m in range(1, 7)], max(width, 0.02 * 50.0)
    )
    if excluded.all():
        return None
    s = np.where(excluded, 0.0, spec)
    i = int(np.argmax(s))
    return float(freqs[i]), float(spec[i]), float(np.median(spec[~excluded]))


def _hum(y: np.ndarray, fs: float, f0: float) -> tuple[float, float] | None:
    """(mains frequency, rms of it and its harmonics) where the record resolves mains."""
    n = y.size
    if n / fs < 2.5 / min(MAINS_HZ):  # fewer than 2.5 cycles of 50 Hz: not resolved
        return None
    best: tuple[float, float] | None = None
    resolution = 2.0 * fs / n
    for mains in MAINS_HZ:
        parts = []
        for m in range(1, 7):
            f = m * mains
            if f >= fs / 2 or any(abs(f - k * f0) < 2 * resolution for k in range(1, K_MAX + 1)):
                continue
            parts.append(abs(_tone(y, fs, f)) / math.sqrt(2))
        if parts:
            rms = float(np.sqrt(np.sum(np.square(parts))))
            if best is None or rms > best[1]:
                best = (mains, rms)
    return best


def classify_channel(
    x: np.ndarray,
    y: np.ndarray,
    sample_rate_hz: float,
    frequency_hz: float,
    *,
    expected_gain: float,
    expected_phase_deg: float,
    rails_v: tuple[float, float] | None = None,
    wide: tuple[np.ndarray, float] | None = None,
) -> ChannelCondition:
    """The channel's mode from its nominal record (input ``x``, output ``y``, volts at the
    DUT) and, optionally, a short ``wide`` record of the output (volts, sample rate) taken
    at the scope's highest rate, so an oscillation far above the test frequency is seen at
    its own frequency instead of aliased.  ``expected_gain`` is the model's |gain|,
    ``expected_phase_deg`` 0 or 180; ``rails_v`` (low, high) the supply rails, for a stuck
    output.  Checked in order: oscillating, stuck, dead, hum, reversed polarity, gain.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    fs = float(sample_rate_hz)
    if x.size != y.size or x.size < 16 or not (fs > 0 and frequency_hz > 0):
        raise AnalysisError("classify_channel needs two equal records and positive rates")
    a_in = _tone(x, fs, frequency_hz)
    a_out = _tone(y, fs, frequency_hz)
    if abs(a_in) <= 0:
        raise AnalysisError("no test signal at the input: check the generator and its cable")
    expected_pk = abs(expected_gain) * abs(a_in)
    out_pk = abs(a_out)
    gain = out_pk / abs(a_in)
    gain_db = 20 * math.log10(gain) if gain > 0 else -math.inf
    expected_db = 20 * math.log10(abs(expected_gain))
    ev: dict[str, Any] = {
        "gain_db": gain_db if math.isfinite(gain_db) else None,
        "expected_gain_db": expected_db,
        "output_fundamental_vpk": out_pk,
        "expected_output_vpk": expected_pk,
        "output_dc_v": float(np.mean(y)),
    }

    # a strong component that is not the test signal or its harmonics, at any frequency
    # the records show (the wide record first: it sees what the long one aliases)
    for rec, rate in ((wide if wide is not None else (None, 0.0)), (y, fs)):
        if rec is None:
            continue
        other = _strongest_other(np.asarray(rec, dtype=float), rate, frequency_hz)
        if other is None:
            continue
        f_osc, v_osc, floor = other
        if v_osc > OSCILLATION_REL * expected_pk and v_osc > PEAK_OVER_FLOOR * floor:
            ev.update(
                {
                    "frequency_hz": f_osc,
                    "level_vpk": v_osc,
                    "level_db_re_signal": 20 * math.log10(v_osc / max(expected_pk, 1e-30)),
                    "record_rate_hz": rate,
                }
            )
            return ChannelCondition(
                "oscillating",
                f"oscillating at {_hz(f_osc)}, {v_osc:.3g} V peak at the output",
                ev,
            )

    low_ac = out_pk < 10 ** (-20 / 20) * expected_pk
    if rails_v is not None and low_ac:
        lo, hi = rails_v
        span = hi - lo
        dc = float(np.mean(y))
        for name, rail in (("positive", hi), ("negative", lo)):
            if span > 0 and abs(dc - rail) <= RAIL_FRACTION * span:
                ev.update({"rail": name, "rail_v": rail})
                return ChannelCondition(
                    "stuck", f"output stuck at the {name} rail ({dc:.3g} V)", ev
                )
    if out_pk < 10 ** (-DEAD_DB / 20) * expected_pk:
        return ChannelCondition(
            "dead",
            f"no output: fundamental {out_pk:.3g} V peak, "
            f"{expected_db - gain_db if math.isfinite(gain_db) else math.inf:.0f} dB "
            "below the expected",
            ev,
        )
    hum = _hum(y, fs, frequency_hz)
    if hum is not None and hum[1] > HUM_REL * expected_pk / math.sqrt(2):
        ev.update({"frequency_hz": hum[0], "level_vrms": hum[1]})
        return ChannelCondition(
            "hum", f"mains hum at {hum[0]:g} Hz, {hum[1]:.3g} V rms at the output", ev
        )
    phase = math.degrees(math.atan2((a_out / a_in).imag, (a_out / a_in).real))
    ev["phase_deg"] = phase
    off = abs((phase - expected_phase_deg + 180.0) % 360.0 - 180.0)
    if off > POLARITY_DEG:
        return ChannelCondition(
            "reversed_polarity",
            f"polarity reversed: phase {phase:.0f} deg, expected {expected_phase_deg:.0f}",
            ev,
        )
    if abs(gain_db - expected_db) > GROSS_GAIN_DB:
        return ChannelCondition(
            "gain_error",
            f"gross gain error: {gain_db:.1f} dB, expected {expected_db:.1f} dB",
            ev,
        )
    return ChannelCondition("working", "working", ev)


def _hz(f: float) -> str:
    return f"{f / 1e3:.4g} kHz" if f >= 1e3 else f"{f:.4g} Hz"
