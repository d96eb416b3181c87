"""Decision rules: a measurement, its expanded uncertainty and its limit give a decision.

The rule is the guarded acceptance of ILAC-G8:09/2019 §4.2: the acceptance limit is the
tolerance limit moved inwards by the guard band w = U (expanded uncertainty, k = 2), which
keeps the false-accept risk at a limit under about 2.5 %.  The non-binary form gives four
outcomes, in our own words:

``pass``              inside the limits by more than U;
``conditional pass``  inside the limits, but within U of one (conformance not proven);
``conditional fail``  outside the limits, but within U of one (non-conformance not proven);
``fail``              outside the limits by more than U.

Two more outcomes are not decisions on a value: ``info`` (no limit to decide against) and
``not resolvable`` (the bench cannot see the limit, e.g. a THD limit below its measurement
floor; reported before any signal is applied, never silently passed).

Which outcomes a production line accepts is a :class:`DecisionPolicy`.  The default is
strict: only ``pass`` and ``info`` are accepted, so a conditional pass, a conditional fail
and a limit that cannot be resolved all make the channel FAIL.  A line that accepts the
shared risk can set ``accept_conditional_pass=True`` (ILAC-G8 calls this a statement the
customer must agree to).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from harness.outcomes import ALWAYS_ACCEPTED, Outcome, Verdict

#: Expansion factor of every U in stageproof (about 95 % coverage for a normal distribution).
COVERAGE_K = 2.0


@dataclass(frozen=True)
class DecisionPolicy:
    """Which outcomes count as acceptable for the channel verdict."""

    accept_conditional_pass: bool = False
    accept_conditional_fail: bool = False
    accept_not_resolvable: bool = False

    def accepts(self, outcome: str) -> bool:
        if outcome in ALWAYS_ACCEPTED:
            return True
        if outcome == "conditional pass":
            return self.accept_conditional_pass
        if outcome == "conditional fail":
            return self.accept_conditional_fail
        if outcome == "not resolvable":
            return self.accept_not_resolvable
        return False

    def describe(self) -> str:
        accepted = ["pass"]
        if self.accept_conditional_pass:
            accepted.append("conditional pass")
        if self.accept_conditional_fail:
            accepted.append("conditional fail")
        if self.accept_not_resolvable:
            accepted.append("not resolvable")
        return "ILAC-G8:09/2019 guarded acceptance (w = U, k = 2); accepted outcomes: " + ", ".join(
            accepted
        )


STRICT = DecisionPolicy()


def decide(value: float, low: float | None, high: float | None, uncertainty: float) -> Outcome:
    """Guarded decision of ``value`` against [low, high] with expanded uncertainty U.

    A value exactly U inside a limit is a pass (the acceptance interval is closed); a value
    exactly on a tolerance limit is a conditional pass.  A non-finite value is a fail.
    """
    if low is None and high is None:
        return "info"
    if not math.isfinite(value):
        return "fail"
    u = float(uncertainty)
    if not (math.isfinite(u) and u >= 0):
        raise ValueError(f"expanded uncertainty must be finite and >= 0 (got {uncertainty!r})")
    lo = -math.inf if low is None else float(low)
    hi = math.inf if high is None else float(high)
    if lo > hi:
        raise ValueError(f"limit low {lo:g} is above high {hi:g}")
    if lo <= value <= hi:
        if lo + u <= value <= hi - u:
            return "pass"
        return "conditional pass"
    if value < lo - u or value > hi + u:
        return "fail"
    return "conditional fail"


def conformance_probability(
    value: float, low: float | None, high: float | None, std_uncertainty: float
) -> float:
    """Probability that the true value lies inside the limits, for a normal distribution
    of standard uncertainty u centred on the measured value (JCGM 106:2012 §7.3)."""
    if std_uncertainty <= 0:
        lo = -math.inf if low is None else low
        hi = math.inf if high is None else high
        return 1.0 if lo <= value <= hi else 0.0

    def phi(x: float) -> float:
        return 0.5 * (1.0 + math.erf(x / math.sqrt(2.0)))

    p_hi = 1.0 if high is None else phi((high - value) / std_uncertainty)
    p_lo = 0.0 if low is None else phi((low - value) / std_uncertainty)
    return p_hi - p_lo


def verdict(outcomes: list[str] | tuple[str, ...], policy: DecisionPolicy = STRICT) -> Verdict:
    """A channel (or board) passes only when the policy accepts every outcome."""
    return "PASS" if outcomes and all(policy.accepts(o) for o in outcomes) else "FAIL"


# --- uncertainty budgets ------------------------------------------------------------------
#
# Every budget combines standard uncertainties in quadrature (GUM, JCGM 100:2008 §5.1) and
# returns U = k·u with k = 2.  The terms:
#
# gain (dB):   random part of each sine-fit amplitude, u(A)/A = r/√N with r the fit's
#              residual-to-fundamental rms ratio (THD+N as a fraction, which includes the
#              quantisation noise of the ADC) and N the record length; the quantisation
#              floor q/√12 of each input over √(N/2); the scope's input-to-input gain
#              matching (station figure, rectangular: u = a/√3).
# THD (%):     the record's floor (noise and quantisation in the harmonic bins: spread over
#              the k_max - 1 bins, the bin of the dominant harmonic carries u = floor/√(k-1))
#              and a relative term for the residual of the digitiser-nonlinearity
#              correction and the amplitude estimate (2 %, our estimate).
# threshold (dB): the search bracket's width (the crossing lies anywhere inside it,
#              rectangular: u = w/(2√3)), the level measurement (gain-like term of the input
#              channel) and, where settling was not waited for, the settling shift.


@dataclass(frozen=True)
class BenchUncertainty:
    """Station figures the budgets need; defaults are common practice for an 8-bit
    digitiser (from memory, not a data sheet): inputs matched within ±1 %."""

    input_match_rel: float = 0.01  # half-width of the input-to-input gain mismatch
    thd_relative: float = 0.02  # relative standard uncertainty of a THD reading
    settle_shift_db: float = 0.0  # half-width of the level shift left by incomplete settling


def _db_from_rel(u_rel: float) -> float:
    return 20.0 / math.log(10.0) * u_rel


def amplitude_rel_u(
    residual_ratio: float,
    n_samples: int,
    lsb_v: float | None = None,
    amplitude_v: float | None = None,
) -> float:
    """Relative standard uncertainty of a sine-fit amplitude from one record.

    ``residual_ratio`` is the fit residual rms over the fundamental rms.  For white residual
    of rms σ the least-squares amplitude has u(A) = σ·√(2/N) (IEEE Std 1241-2010 §4.1.4.3);
    with σ = r·A/√2 that is u(A)/A = r/√N.
    """
    n = max(int(n_samples), 1)
    u = abs(residual_ratio) / math.sqrt(n)
    if lsb_v and amplitude_v and amplitude_v > 0:
        q = lsb_v / math.sqrt(12.0)
        u = math.hypot(u, q * math.sqrt(2.0 / n) / amplitude_v)
    return u


def gain_uncertainty_db(
    in_rel_u: float, out_rel_u: float, bench: BenchUncertainty = BenchUncertainty()
) -> float:
    """Expanded uncertainty (k = 2) of a gain in dB from the two amplitude estimates."""
    u_match = bench.input_match_rel / math.sqrt(3.0)
    u_rel = math.sqrt(in_rel_u**2 + out_rel_u**2 + u_match**2)
    return COVERAGE_K * _db_from_rel(u_rel)


def thd_uncertainty_percent(
    thd_percent: float,
    floor_percent: float,
    bench: BenchUncertainty = BenchUncertainty(),
    *,
    harmonics: int = 9,
) -> float:
    """Expanded uncertainty (k = 2) of a THD reading in percent; ``floor_percent`` is the
    record's THD floor over ``harmonics`` harmonic bins."""
    u_floor = max(floor_percent, 0.0) / math.sqrt(max(harmonics, 1))
    u = math.hypot(u_floor, bench.thd_relative * thd_percent)
    return COVERAGE_K * u


def threshold_uncertainty_db(
    bracket_width_db: float,
    level_rel_u: float,
    bench: BenchUncertainty = BenchUncertainty(),
    *,
    settled: bool = True,
    fit_u_db: float = 0.0,
) -> float:
    """Expanded uncertainty (k = 2) of a clipping threshold in dB.

    ``fit_u_db`` is any standard uncertainty the interpolation itself reports.
    """
    u_bracket = max(bracket_width_db, 0.0) / (2.0 * math.sqrt(3.0))
    u_level = _db_from_rel(math.hypot(level_rel_u, bench.input_match_rel / math.sqrt(3.0)))
    u_settle = 0.0 if settled else bench.settle_shift_db / math.sqrt(3.0)
    return COVERAGE_K * math.sqrt(u_bracket**2 + u_level**2 + u_settle**2 + fit_u_db**2)
