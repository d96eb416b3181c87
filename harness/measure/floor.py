"""What a record of given resolution, range use and noise can honestly show.

Ideal N-bit quantisation: noise q/√12 with q = full scale / 2^N, so a full-scale sine has
SNR = 6.02 N + 1.76 dB (Kester, ADI tutorial MT-001).  THD+N cannot read below the total
noise over the band; THD (harmonic bins only) sees further thanks to the FFT's processing
gain: each coherent bin holds 2σ²/N of the noise power, a windowed lobe sum about
``bins_per_harmonic`` times that.  A reading within FLOOR_MARGIN of the floor cannot be told
from the bench's own noise and is reported as "< floor".
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.errors import AnalysisError

#: A THD reading below FLOOR_MARGIN × floor is indistinguishable from noise (a choice:
#: 2× = 6 dB, where the noise-only reading's spread for 9 bins is about ±3 dB).
FLOOR_MARGIN = 2.0


def quantisation_snr_db(bits: float) -> float:
    """Ideal N-bit quantiser, full-scale sine: 6.02 N + 1.76 dB (ADI MT-001)."""
    return float(20 * np.log10(2.0**bits) + 10 * np.log10(1.5))


@dataclass(frozen=True)
class MeasurementFloor:
    thd_ratio: float
    thdn_ratio: float
    noise_vrms: float
    quantisation_vrms: float

    @property
    def thd_percent(self) -> float:
        return 100 * self.thd_ratio

    @property
    def thdn_percent(self) -> float:
        return 100 * self.thdn_ratio

    @property
    def thd_db(self) -> float:
        return float(20 * np.log10(self.thd_ratio)) if self.thd_ratio > 0 else float("-inf")

    def thd_below(self, thd_ratio: float) -> bool:
        """True if a THD reading cannot be told from the floor."""
        return thd_ratio < FLOOR_MARGIN * self.thd_ratio

    def to_dict(self) -> dict[str, float]:
        return {
            "thd_percent": self.thd_percent,
            "thdn_percent": self.thdn_percent,
            "noise_vrms": self.noise_vrms,
            "quantisation_vrms": self.quantisation_vrms,
        }


def measurement_floor(
    bits: int | None,
    full_scale_vpp: float | None,
    signal_vpk: float,
    noise_vrms: float,
    n_samples: int,
    k_max: int = 10,
    *,
    bandwidth_fraction: float = 1.0,
    bins_per_harmonic: float = 1.0,
) -> MeasurementFloor:
    """THD and THD+N floors of a record: quantisation (if ``bits`` and ``full_scale_vpp``
    are known) plus ``noise_vrms`` of other noise, both treated as white over Nyquist.

    ``bandwidth_fraction`` = analysis bandwidth / Nyquist.  Returns ratios (not percent).
    """
    if signal_vpk <= 0 or not np.isfinite(signal_vpk):
        raise AnalysisError(f"signal_vpk must be positive, got {signal_vpk!r}")
    if n_samples < 2:
        raise AnalysisError(f"n_samples must be >= 2, got {n_samples!r}")
    q_rms = 0.0
    if bits is not None and full_scale_vpp is not None:
        if bits <= 0 or full_scale_vpp <= 0:
            raise AnalysisError("ADC bits and full-scale range must be positive")
        q_rms = full_scale_vpp / 2.0**bits / np.sqrt(12.0)
    sigma = float(np.hypot(q_rms, max(noise_vrms, 0.0)))
    v1 = signal_vpk / np.sqrt(2.0)
    thdn = sigma * np.sqrt(min(max(bandwidth_fraction, 0.0), 1.0)) / v1
    per_bin = sigma**2 * 2.0 / n_samples * bins_per_harmonic
    thd = np.sqrt(max(k_max - 1, 0) * per_bin) / v1
    return MeasurementFloor(float(thd), float(thdn), sigma, float(q_rms))
