"""Harmonic analysis: THD, THD+N and SINAD from the spectrum of one record.

A coherent record (whole number of cycles) is analysed with a rectangular window: each
harmonic sits on exactly one bin.  Otherwise the record is windowed with the 4-term
Blackman-Harris window and the energy of each tone is summed across its main lobe and
divided by the window's energy (Harris 1978).  THD_F = √(Σ V_k²)/V₁ (IEC 61000-2-2 use);
THD+N is everything but DC and the fundamental inside the analysis bandwidth, over V₁;
SINAD = -20 log₁₀(THD+N) (Kester, ADI MT-001).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from harness.errors import AnalysisError
from harness.measure import _checks
from harness.measure.windows import BH4_LOBE_BINS, blackman_harris4

#: A record counts as coherent when it holds an integer number of cycles to within this
#: many cycles: the rectangular window's leakage then costs under ~0.02 % of THD+N.
COHERENT_TOL_CYCLES = 1e-4


def ratio_db(ratio: float) -> float:
    return float(20 * np.log10(ratio)) if ratio > 0 else float("-inf")


@dataclass(frozen=True, eq=False)
class Harmonics:
    """Result of a harmonic analysis.  RMS values in the record's units (volts)."""

    fundamental_hz: float
    fundamental_rms: float
    orders: tuple[int, ...]
    harmonic_rms: np.ndarray = field(repr=False)
    thd_ratio: float
    thdn_ratio: float
    window: str
    coherent: bool
    bandwidth_hz: float
    dc: float
    noise_rms: float

    @property
    def thd_percent(self) -> float:
        return 100.0 * self.thd_ratio

    @property
    def thd_db(self) -> float:
        return ratio_db(self.thd_ratio)

    @property
    def thdn_percent(self) -> float:
        return 100.0 * self.thdn_ratio

    @property
    def thdn_db(self) -> float:
        return ratio_db(self.thdn_ratio)

    @property
    def sinad_db(self) -> float:
        return -ratio_db(self.thdn_ratio)

    @property
    def thd_r_ratio(self) -> float:
        """THD referred to the total RMS: THD_F/√(1+THD_F²)."""
        return float(self.thd_ratio / np.sqrt(1 + self.thd_ratio**2))

    def hd_ratio(self, k: int) -> float:
        """V_k / V_1 of one harmonic order (NaN if that order was not analysed)."""
        if k not in self.orders:
            return float("nan")
        return float(self.harmonic_rms[self.orders.index(k)] / self.fundamental_rms)


def harmonic_orders(
    fundamental_hz: float, k_max: int, sample_rate_hz: float, bandwidth_hz: float
) -> tuple[int, ...]:
    """Orders 2..k_max strictly below Nyquist and not above the analysis bandwidth."""
    if k_max < 1:
        raise AnalysisError(f"k_max must be >= 1, got {k_max}")
    nyq = sample_rate_hz / 2.0
    return tuple(
        k
        for k in range(2, int(k_max) + 1)
        if k * fundamental_hz < nyq * (1 - 1e-9) and k * fundamental_hz <= bandwidth_hz
    )


def harmonic_analysis(
    y: object,
    sample_rate_hz: float,
    fundamental_hz: float,
    *,
    k_max: int = 10,
    bandwidth_hz: float | None = None,
    coherent: bool | None = None,
    subtract_noise: bool | None = None,
) -> Harmonics:
    """Harmonics 2..k_max, THD, THD+N and SINAD from the FFT of a record.

    ``coherent=None`` decides from the record (integer cycles within COHERENT_TOL_CYCLES).
    ``subtract_noise`` (default: only for the windowed analysis) removes the expected noise
    power in each tone's summed lobe, so a windowed harmonic carries about the same noise
    bias as a coherent single bin.
    """
    yy = _checks.as_samples(y, "y")
    fs = _checks.check_rate(sample_rate_hz)
    n = yy.size
    bw = _checks.check_bandwidth(bandwidth_hz, fs)
    f0 = _checks.check_fundamental(fundamental_hz, fs, n, bw)
    cycles = f0 * n / fs
    if coherent is None:
        coherent = abs(cycles - round(cycles)) <= COHERENT_TOL_CYCLES
    orders = harmonic_orders(f0, k_max, fs, bw)
    bw_bin = int(np.floor(bw * n / fs + 1e-9))
    bw_bin = min(bw_bin, n // 2)
    if coherent:
        j = round(cycles)
        spec = np.fft.rfft(yy)
        p = np.abs(spec) ** 2 * (2.0 / n**2)
        p[0] /= 2.0
        if n % 2 == 0:
            p[-1] /= 2.0
        dc = float(spec[0].real / n)
        v1sq = float(p[j])
        vk = np.array([p[k * j] for k in orders])
        inband = p[1 : bw_bin + 1]
        rest = float(inband.sum()) - v1sq
        noise_bin = (rest - float(vk.sum())) / max(bw_bin - 1 - len(orders), 1)
        if subtract_noise:
            vk = np.maximum(vk - noise_bin, 0.0)
        window = "rectangular"
    else:
        L = BH4_LOBE_BINS
        if cycles < 2 * L + 1:
            raise AnalysisError(
                f"record holds {cycles:.3g} cycles: a windowed analysis needs at least "
                f"{2 * L + 1} (main lobes overlap)",
                hint="use a coherent record or the sine-fit analysis (analyze_record)",
            )
        w = blackman_harris4(n)
        spec = np.fft.rfft(yy * w.astype(yy.dtype))
        p = np.abs(spec) ** 2 * (2.0 / (n * float(np.sum(w**2))))
        dc = float(spec[0].real / np.sum(w))
        nb = p.size
        lo_bw, hi_bw = L + 1, bw_bin  # in-band bins beyond the DC lobe

        def lobe(k: int) -> tuple[int, int]:
            """Bin range [a, b) within ±L of the k-th harmonic's centre k·cycles."""
            c = k * cycles
            return max(int(np.ceil(c - L)), 0), min(int(np.floor(c + L)) + 1, nb)

        k_top = int((min(bw_bin, nb - 1 - L)) // cycles)
        if k_top < 1:
            raise AnalysisError("fundamental too close to Nyquist for a windowed analysis")
        noise_mask = np.zeros(nb, dtype=bool)
        noise_mask[lo_bw : hi_bw + 1] = True
        for k in range(1, int((bw_bin + L) // cycles) + 1):
            a, b = lobe(k)
            noise_mask[a:b] = False
        noise_bin = float(p[noise_mask].mean()) if noise_mask.any() else 0.0
        sub = noise_bin if subtract_noise is None or subtract_noise else 0.0

        def tone(k: int) -> float:
            a, b = lobe(k)
            return max(float(p[a:b].sum()) - sub * (b - a), 0.0)

        v1sq = tone(1)
        vk = np.array([tone(k) if k <= k_top else 0.0 for k in orders])
        a1, b1 = lobe(1)
        # The noise hidden under the fundamental's lobe and the DC lobe is put back at the
        # measured density, so THD+N counts the noise of the whole band.
        band = float(p[lo_bw : hi_bw + 1].sum())
        fund_in = float(p[max(a1, lo_bw) : min(b1, hi_bw + 1)].sum())
        hidden = max(min(b1, hi_bw + 1) - max(a1, lo_bw), 0) + min(L, bw_bin)
        rest = band - fund_in + noise_bin * hidden
        window = "blackman-harris-4"
    if v1sq <= 0:
        raise AnalysisError("no fundamental found at the given frequency")
    v1 = np.sqrt(v1sq)
    hr = np.sqrt(vk)
    thd = float(np.sqrt(np.sum(vk)) / v1)
    thdn = float(np.sqrt(max(rest, 0.0)) / v1)
    return Harmonics(
        fundamental_hz=f0,
        fundamental_rms=float(v1),
        orders=orders,
        harmonic_rms=hr,
        thd_ratio=thd,
        thdn_ratio=thdn,
        window=window,
        coherent=bool(coherent),
        bandwidth_hz=bw,
        dc=dc,
        noise_rms=float(np.sqrt(max(noise_bin, 0.0) * max(bw_bin - 1, 1))),
    )
