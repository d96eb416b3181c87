"""Spectrum and waveform views of stored raw records, built on harness.measure.

The analysis itself (sine fit, window, harmonic sums) is harness.measure's; this module only
reduces its results to what a plot can show: a level-in-dBc spectrum decimated to a few
hundred points (peak-preserving, so no harmonic disappears) and a few cycles of waveform.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.errors import AnalysisError
from harness.measure.harmonics import COHERENT_TOL_CYCLES, harmonic_analysis
from harness.measure.sinefit import fit_sine4_uniform
from harness.measure.windows import get_window

#: Spectrum floor shown, dB below the fundamental.
FLOOR_DBC = -160.0


@dataclass(frozen=True)
class SpectrumView:
    frequency_hz: np.ndarray
    level_dbc: np.ndarray
    fundamental_hz: float
    thd_percent: float | None
    window: str
    n_samples: int
    sample_rate_hz: float


def _peak_decimate(x: np.ndarray, y: np.ndarray, max_points: int) -> tuple[np.ndarray, np.ndarray]:
    """Keep the largest value of each group of bins: harmonics survive decimation."""
    if x.size <= max_points:
        return x, y
    group = int(np.ceil(x.size / max_points))
    n = (x.size // group) * group
    yy = y[:n].reshape(-1, group)
    idx = np.argmax(yy, axis=1) + np.arange(yy.shape[0]) * group
    return x[idx], y[idx]


def spectrum_view(
    y: np.ndarray, sample_rate_hz: float, *, max_points: int = 800, k_max: int = 10
) -> SpectrumView:
    """Amplitude spectrum of a record relative to its fundamental, with THD.

    The fundamental comes from a four-parameter sine fit (IEEE 1241 B.2, harness.measure);
    the window follows harness.measure's rule: rectangular for a coherent record, else
    4-term Blackman-Harris.  Raises AnalysisError when the record cannot be analysed.
    """
    yy = np.asarray(y, dtype=np.float64)
    fit = fit_sine4_uniform(yy, sample_rate_hz, harmonics=5)  # harmonics unbias f0
    f0 = float(fit.frequency_hz)
    cycles = f0 * yy.size / sample_rate_hz
    coherent = abs(cycles - round(cycles)) <= COHERENT_TOL_CYCLES
    try:
        thd = harmonic_analysis(yy, sample_rate_hz, f0, k_max=k_max).thd_percent
    except AnalysisError:
        thd = None
    name = "rectangular" if coherent else "blackman-harris-4"
    w = get_window(name, yy.size)
    mag = np.abs(np.fft.rfft((yy - yy.mean()) * w))
    freqs = np.fft.rfftfreq(yy.size, 1.0 / sample_rate_hz)
    k1 = round(cycles)
    lo, hi = max(k1 - 5, 1), min(k1 + 6, mag.size)
    ref = float(mag[lo:hi].max()) if hi > lo else float(mag.max())
    if ref <= 0:
        raise AnalysisError("record is silent: no spectrum to show")
    db = 20 * np.log10(np.maximum(mag / ref, 10 ** (FLOOR_DBC / 20)))
    fx, dy = _peak_decimate(freqs[1:], db[1:], max_points)
    return SpectrumView(fx, dy, f0, thd, name, int(yy.size), float(sample_rate_hz))


def waveform_window(
    sample_rate_hz: float,
    arrays: dict[str, np.ndarray],
    *,
    cycles: float = 3.0,
    max_points: int = 900,
) -> tuple[np.ndarray, dict[str, np.ndarray], float | None]:
    """A few cycles of each array (time in ms) and the fitted frequency of the first one.

    Starting at a rising zero crossing of the first array keeps successive reports alike.
    """
    names = list(arrays)
    first = np.asarray(arrays[names[0]], dtype=np.float64)
    n = first.size
    f0: float | None
    try:
        f0 = float(fit_sine4_uniform(first, sample_rate_hz).frequency_hz)
    except AnalysisError:
        f0 = None
    span = n if f0 is None else min(n, int(np.ceil(cycles * sample_rate_hz / f0)))
    centred = first - first.mean()
    ups = np.flatnonzero((centred[:-1] < 0) & (centred[1:] >= 0))
    start = int(ups[0]) if ups.size and ups[0] + span <= n else 0
    sl = slice(start, start + span)
    step = max(1, span // max_points)
    t_ms = (np.arange(n)[sl][::step] - start) / sample_rate_hz * 1e3
    return t_ms, {k: np.asarray(v, dtype=np.float64)[sl][::step] for k, v in arrays.items()}, f0
