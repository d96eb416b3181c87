"""Spectral windows and their figures of merit (F. J. Harris, Proc. IEEE 66(1), 1978).

Only two windows are used by the analysis: rectangular for coherent records (every
harmonic falls exactly on a bin) and the 4-term Blackman-Harris (-92 dB side lobes) for
records that are not coherent.  :func:`window_properties` measures a window numerically so
the tests can hold it against Harris's Table I.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: 4-term Blackman-Harris coefficients, minimum side-lobe version (Harris 1978, eq. 33).
BH4_COEFFS: tuple[float, ...] = (0.35875, 0.48829, 0.14128, 0.01168)

#: Bins either side of a tone's centre summed as "the tone" under Blackman-Harris: the main
#: lobe's first nulls are at ±4 bins for a 4-term cosine window; one bin more for margin.
BH4_LOBE_BINS = 5


def cosine_sum(n: int, coeffs: tuple[float, ...]) -> np.ndarray:
    """Periodic (DFT-even) cosine-sum window w[n] = Σ (-1)^k a_k cos(2πkn/N)."""
    x = 2 * np.pi * np.arange(n) / n
    w = np.zeros(n)
    for k, a in enumerate(coeffs):
        w += (-1) ** k * a * np.cos(k * x)
    return w


def blackman_harris4(n: int) -> np.ndarray:
    return cosine_sum(n, BH4_COEFFS)


def get_window(name: str, n: int) -> np.ndarray:
    if name == "rectangular":
        return np.ones(n)
    if name == "hann":
        return cosine_sum(n, (0.5, 0.5))
    if name == "blackman-harris-4":
        return blackman_harris4(n)
    raise ValueError(f"unknown window {name!r}")


@dataclass(frozen=True)
class WindowProperties:
    """Figures of merit in DFT bins / dB (definitions of Harris 1978, section IV)."""

    enbw_bins: float
    highest_sidelobe_db: float
    first_null_bins: float
    half_power_width_bins: float
    scalloping_loss_db: float
    coherent_gain: float


def window_properties(w: np.ndarray, oversample: int = 64) -> WindowProperties:
    """Measure a window: ENBW = N Σw²/(Σw)², side lobes and widths from a zero-padded FFT."""
    w = np.asarray(w, dtype=np.float64)
    n = w.size
    enbw = n * float(np.sum(w**2)) / float(np.sum(w)) ** 2
    spec = np.abs(np.fft.rfft(w, n * oversample))
    spec = spec / spec[0]
    db = 20 * np.log10(np.maximum(spec, 1e-300))
    bins = np.arange(spec.size) / oversample
    # first null: first local minimum of the magnitude
    d = np.diff(spec)
    first_min = int(np.flatnonzero((d[:-1] < 0) & (d[1:] >= 0))[0]) + 1
    sidelobe = float(db[first_min:].max())
    half = float(np.interp(3.0103, -db[:first_min], bins[:first_min])) * 2
    scallop = -float(np.interp(0.5, bins, db))
    return WindowProperties(
        enbw_bins=enbw,
        highest_sidelobe_db=sidelobe,
        first_null_bins=float(bins[first_min]),
        half_power_width_bins=half,
        scalloping_loss_db=scallop,
        coherent_gain=float(np.mean(w)),
    )
