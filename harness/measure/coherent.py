"""Coherent sampling planner: f = J·fs/N with gcd(J, N) = 1.

With a whole number J of cycles in N samples every harmonic falls on a bin and spectral
leakage vanishes; J coprime with N makes every sample hit a different phase of the cycle,
so quantisation error spreads over all bins instead of piling onto the harmonic bins
(Maxim/ADI application note 1040; Blair, IMTC 2002).  The sequencer sets the generator to
the planned frequency exactly.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

from harness.errors import AnalysisError


@dataclass(frozen=True)
class CoherentPlan:
    frequency_hz: float
    sample_rate_hz: float
    n_samples: int
    cycles: int

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.sample_rate_hz


def _nearest_coprime(j0: float, n: int, lo: int, hi: int) -> int | None:
    """Integer J in [lo, hi] nearest to j0 with gcd(J, n) = 1 (ties: the lower)."""
    centre = round(j0)
    for d in range(0, max(hi - lo, 0) + 2):
        for j in (centre - d, centre + d) if d else (centre,):
            if lo <= j <= hi and math.gcd(j, n) == 1:
                return j
    return None


def plan_coherent(
    target_hz: float,
    sample_rates_hz: Iterable[float],
    record_lengths: Iterable[int],
    *,
    tolerance_rel: float = 0.02,
    min_cycles: int = 3,
    max_cycles: int | None = None,
    k_max: int = 10,
) -> CoherentPlan:
    """Choose (fs, N, J) with |J·fs/N − target| ≤ tolerance_rel·target and gcd(J, N) = 1.

    Preference, in order: harmonics up to ``k_max`` below Nyquist (dropped only if no
    combination allows it), the longest record (lowest noise floor), the highest sample
    rate (widest band for THD+N), then the frequency nearest the target.
    """
    if not (target_hz > 0 and math.isfinite(target_hz)):
        raise AnalysisError(f"target frequency must be positive, got {target_hz!r}")
    if not tolerance_rel >= 0:
        raise AnalysisError(f"tolerance_rel must be >= 0, got {tolerance_rel!r}")
    rates = sorted({float(r) for r in sample_rates_hz if r > 0})
    lengths = sorted({int(n) for n in record_lengths if int(n) > 0})
    if not rates or not lengths:
        raise AnalysisError("plan_coherent needs at least one sample rate and one record length")
    best: tuple[tuple[bool, int, float, float], CoherentPlan] | None = None
    for fs in rates:
        for n in lengths:
            j0 = target_hz * n / fs
            lo = max(min_cycles, math.ceil((1 - tolerance_rel) * target_hz * n / fs - 1e-9), 1)
            hi = math.floor((1 + tolerance_rel) * target_hz * n / fs + 1e-9)
            hi = min(hi, (n - 1) // 2)
            if max_cycles is not None:
                hi = min(hi, max_cycles)
            j = _nearest_coprime(j0, n, lo, hi)
            if j is None:
                continue
            f = j * fs / n
            harmonics_ok = k_max * j < n / 2
            key = (harmonics_ok, n, fs, -abs(f - target_hz))
            if best is None or key > best[0]:
                best = (key, CoherentPlan(f, fs, n, j))
    if best is None:
        raise AnalysisError(
            f"no coherent record within {tolerance_rel:.3g} of {target_hz:.6g} Hz for the "
            f"sample rates {rates} and record lengths {lengths}",
            hint="allow a wider tolerance, longer records or other sample rates",
        )
    return best[1]


def plan_coherent_within(
    target_hz: float,
    sample_rate_hz: float,
    max_points: int,
    *,
    tolerance_rel: float = 0.02,
    min_cycles: int = 3,
    k_max: int = 10,
) -> CoherentPlan:
    """A coherent plan at a sample rate and record length the instrument chose: J cycles in
    the first N <= ``max_points`` samples, gcd(J, N) = 1, J·fs/N within ``tolerance_rel`` of
    the target (Maxim/ADI application note 1040).  Prefers harmonics up to ``k_max`` below
    Nyquist, then the longest record."""
    if not (target_hz > 0 and sample_rate_hz > 0 and max_points >= 2):
        raise AnalysisError(
            f"cannot plan {target_hz!r} Hz at {sample_rate_hz!r} S/s in {max_points!r} points"
        )
    fallback: CoherentPlan | None = None
    j_max = min(int(max_points * target_hz / sample_rate_hz), (max_points - 1) // 2)
    for j in range(j_max, max(min_cycles, 1) - 1, -1):
        n0 = min(max_points, round(j * sample_rate_hz / target_hz))
        for n in sorted({n0, n0 - 1, n0 + 1, n0 - 2, n0 + 2}, key=lambda x: (abs(x - n0), -x)):
            if not 2 <= n <= max_points or math.gcd(j, n) != 1:
                continue
            f = j * sample_rate_hz / n
            if abs(f - target_hz) > tolerance_rel * target_hz:
                continue
            plan = CoherentPlan(f, float(sample_rate_hz), n, j)
            if k_max * j < n / 2:
                return plan
            fallback = fallback or plan
    if fallback is None:
        raise AnalysisError(
            f"no coherent record within {tolerance_rel:.3g} of {target_hz:.6g} Hz in at most "
            f"{max_points} points at {sample_rate_hz:g} S/s",
            hint="allow a wider tolerance or a longer record",
        )
    return fallback
