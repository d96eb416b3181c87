"""Clipping evidence in one record, without assuming a flat top.

Two separate things:

* over-range: samples at the scope's ADC limits.  The scope, not the board, clipped; no
  distortion figure from such a record is true.
* limiting by the board: near each crest of the fitted fundamental (phase within
  ±``window_deg`` of the crest) the record falls short of the fitted sine.  A stage that
  saturates through an emitter resistor has a bottom that bends back up with more drive
  instead of staying flat; its crest still falls short of the fit, so the test holds.
  The crest deficit is averaged over the window (noise averages out) and compared with a
  threshold and with its own standard error.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from harness.errors import AnalysisError
from harness.measure import _checks
from harness.measure.sinefit import SineFit, estimate_omega

#: Crest shortfall (fraction of the fitted amplitude) above which a half-cycle counts as
#: limited.  At 2 % the crest is visibly short; a hard clip reaches it near THD ≈ 1 %.
DEFICIT_THRESHOLD = 0.02
#: Half-width of the crest window in degrees of the fundamental.
WINDOW_DEG = 30.0
#: The deficit must also exceed this many standard errors.
SIGNIFICANCE = 5.0


@dataclass(frozen=True)
class ClipEvidence:
    over_range: bool
    over_range_fraction: float
    clipped: bool
    side: str | None  # "positive" | "negative" | None
    asymmetry: float  # deficit_negative − deficit_positive (fraction of amplitude)
    deficit_positive: float
    deficit_negative: float
    both_sides: bool
    at_max: int
    at_min: int

    @property
    def reason(self) -> str | None:
        if self.over_range:
            return (
                f"record touches the ADC limits in {100 * self.over_range_fraction:.3g} % of "
                "samples (scope over-range): distortion figures would be false; "
                "raise the scope's vertical range"
            )
        return None


def adc_hits(
    y: np.ndarray, adc_min: float | None, adc_max: float | None, lsb: float | None = None
) -> tuple[int, int]:
    """Samples at or beyond the ADC limits (tolerance half an LSB, or 1 ppm of the range)."""
    if adc_min is None and adc_max is None:
        return 0, 0
    span = (adc_max - adc_min) if adc_min is not None and adc_max is not None else 1.0
    if adc_min is not None and adc_max is not None and adc_max <= adc_min:
        raise AnalysisError(f"ADC limits must satisfy min < max, got ({adc_min}, {adc_max})")
    tol = 0.5 * lsb if lsb else 1e-6 * abs(span)
    at_max = int(np.count_nonzero(y >= adc_max - tol)) if adc_max is not None else 0
    at_min = int(np.count_nonzero(y <= adc_min + tol)) if adc_min is not None else 0
    return at_max, at_min


def crest_deficits(
    residual: np.ndarray,
    cycles_per_sample: float,
    phase0_rad: float,
    amplitude: float,
    window_deg: float = WINDOW_DEG,
    residual_rms: float | None = None,
) -> tuple[float, float, float, float]:
    """(deficit+, deficit−, se+, se−) from the residual y − (offset + fundamental).

    ``phase0_rad`` is the fundamental's phase at sample 0.  The phase of each sample is
    built per block of ~√N samples: block starts as cycle fractions in float64, offsets
    inside a block in float32 (error < 1e-4 cycle, far inside the crest window), then one
    float32 cosine per sample.
    """
    n = residual.size
    b = max(1, int(np.sqrt(n)))
    m = -(-n // b)
    starts = np.arange(m, dtype=np.float64) * (b * cycles_per_sample) + phase0_rad / (2 * np.pi)
    starts -= np.floor(starts)
    inner = (np.arange(b, dtype=np.float64) * cycles_per_sample).astype(np.float32)
    u = starts.astype(np.float32)[:, None] + inner[None, :]
    u *= np.float32(2 * np.pi)
    c = np.cos(u, out=u).reshape(-1)[:n]
    lim = np.float32(np.cos(np.radians(window_deg)))
    pos = c >= lim
    neg = c <= -lim
    npos, nneg = int(np.count_nonzero(pos)), int(np.count_nonzero(neg))
    if npos < 2 or nneg < 2:
        raise AnalysisError("too few samples near the crests to judge clipping")
    r = residual
    if residual_rms is None:
        residual_rms = float(np.sqrt(np.mean(np.square(r, dtype=np.float64))))
    dpos = -float(np.sum(r, where=pos, dtype=np.float64)) / npos / amplitude
    dneg = float(np.sum(r, where=neg, dtype=np.float64)) / nneg / amplitude
    sig = residual_rms
    return dpos, dneg, sig / np.sqrt(npos) / amplitude, sig / np.sqrt(nneg) / amplitude


def judge(
    dpos: float,
    dneg: float,
    se_pos: float,
    se_neg: float,
    at_max: int,
    at_min: int,
    n: int,
    threshold: float = DEFICIT_THRESHOLD,
) -> ClipEvidence:
    lim_pos = dpos >= threshold and dpos >= SIGNIFICANCE * se_pos
    lim_neg = dneg >= threshold and dneg >= SIGNIFICANCE * se_neg
    side = None
    if lim_pos or lim_neg:
        side = "positive" if (lim_pos and (not lim_neg or dpos >= dneg)) else "negative"
    both = lim_pos and lim_neg and min(dpos, dneg) >= 0.5 * max(dpos, dneg)
    hits = at_max + at_min
    return ClipEvidence(
        over_range=hits > 0,
        over_range_fraction=hits / n,
        clipped=bool(lim_pos or lim_neg),
        side=side,
        asymmetry=dneg - dpos,
        deficit_positive=dpos,
        deficit_negative=dneg,
        both_sides=bool(both),
        at_max=at_max,
        at_min=at_min,
    )


def clip_evidence(
    t: object,
    y: object,
    *,
    adc_min: float | None = None,
    adc_max: float | None = None,
    fit: SineFit | None = None,
    lsb: float | None = None,
    window_deg: float = WINDOW_DEG,
    threshold: float = DEFICIT_THRESHOLD,
    harmonics: int = 10,
) -> ClipEvidence:
    """Over-range and half-cycle limiting of one record (see the module docstring).

    ``fit``: a fit of this record (its fundamental, phase and offset are used); by default
    a four-parameter fit with harmonics to ``harmonics`` is made, which gives the true
    Fourier fundamental even on a non-coherent record.
    """
    yy = _checks.as_samples(y, "y")
    fs, t0 = _checks.sample_rate_from_time(t, yy.size)
    at_max, at_min = adc_hits(yy, adc_min, adc_max, lsb)
    n = yy.size
    if fit is None:
        core = estimate_omega(yy, harmonics)
        f = core.omega * fs / (2 * np.pi)
        amp = float(abs(core.coef[0]))
        phase0 = float(np.angle(core.coef[0])) - core.omega * core.grid.centre
        offset = core.dc
    else:
        f, amp, offset = fit.frequency_hz, fit.amplitude, fit.offset
        phase0 = fit.phase_rad + 2 * np.pi * f * t0
    cps = f / fs
    n_idx = np.arange(n, dtype=np.float64)
    fund = offset + amp * np.cos(2 * np.pi * (n_idx * cps) + phase0)
    dpos, dneg, sp, sn = crest_deficits(yy - fund, cps, phase0, amp, window_deg)
    return judge(dpos, dneg, sp, sn, at_max, at_min, n, threshold)
