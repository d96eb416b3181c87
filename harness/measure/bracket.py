"""Bracketed level search: THD and gain-compression curves over drive levels, the clipping
threshold and the bracketing search the sequencer runs to find it.

Criteria differ by about 2 dB on a hard clipper (THD 1 % at +0.27 dB over the clip level,
1 dB compression at +2 dB), so every result names its criterion.  Crossings are
interpolated on log THD (or compression in dB) against level in dB.  The search is a pure
function: points measured so far in, next level out; bracket by expansion, then
Illinois false position in dB, safeguarded by bisection, until the bracket is narrower than
the resolution.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal, cast

import numpy as np

from harness.errors import AnalysisError
from harness.measure.units import vrms_to_dbu


@dataclass(frozen=True)
class ClipCriterion:
    """``kind="thd"``: THD reaches ``threshold_percent``; ``kind="compression"``: gain
    falls ``db`` below the small-signal gain."""

    kind: Literal["thd", "compression"] = "thd"
    threshold_percent: float = 1.0
    db: float = 1.0

    def __post_init__(self) -> None:
        if self.kind not in ("thd", "compression"):
            raise AnalysisError(
                f"clip criterion kind must be 'thd' or 'compression': {self.kind!r}"
            )
        if not (self.threshold_percent > 0 and self.db > 0):
            raise AnalysisError("clip criterion thresholds must be positive")

    @property
    def label(self) -> str:
        if self.kind == "thd":
            return f"THD reaches {self.threshold_percent:g} %"
        return f"{self.db:g} dB gain compression"


#: Harmonics 2..10 in THD: the reading's noise floor is the root-sum-square of their 9 bins'
#: noise, two quadrature components each; only the component along the distortion phasor
#: moves the reading, so one reading's standard uncertainty is the floor over sqrt(18)
#: (noise projected on a phasor, common practice).
FLOOR_TO_READING_U = 1.0 / math.sqrt(18.0)


@dataclass(frozen=True)
class StepPoint:
    """One level of the search.  ``thd_u_percent``: standard uncertainty of the THD reading
    from the record's noise (0 when unknown)."""

    level_vrms: float
    thd_percent: float
    gain_db: float
    thd_u_percent: float = 0.0


@dataclass(frozen=True)
class Threshold:
    """Clipping threshold.  ``level_vrms`` is None when not bracketed; then ``below_vrms``
    (highest level that passed) or ``above_vrms`` (lowest that failed) bounds it."""

    level_vrms: float | None
    level_dbu: float | None
    uncertainty_db: float | None
    bracketed: bool
    criterion: ClipCriterion
    below_vrms: float | None = None
    above_vrms: float | None = None
    noise_u_db: float = 0.0  # the part of uncertainty_db the THD readings' noise makes


@dataclass(frozen=True)
class SweepCurves:
    levels_vrms: np.ndarray
    levels_dbu: np.ndarray
    thd_percent: np.ndarray
    gain_db: np.ndarray
    compression_db: np.ndarray
    small_signal_gain_db: float
    thd_u_percent: np.ndarray | None = None


def _as_points(points: Sequence[object]) -> list[StepPoint]:
    out = []
    for p in points:
        if isinstance(p, StepPoint):
            sp = p
        elif hasattr(p, "thd_percent") and hasattr(p, "gain_db") and hasattr(p, "input_vrms"):
            floor = getattr(p, "floor", None)  # a RecordAnalysis: its noise floor sets u
            u = FLOOR_TO_READING_U * float(getattr(floor, "thd_percent", 0.0) or 0.0)
            sp = StepPoint(float(p.input_vrms), p.thd_percent, p.gain_db, u)
        else:
            try:
                lv, thd, g, *rest = cast("tuple[float, float | None, float | None, float]", p)
            except (TypeError, ValueError):
                raise AnalysisError(
                    f"a step point must be (level_vrms, thd, gain_db[, thd_u]): {p!r}"
                ) from None
            if len(rest) > 1:
                raise AnalysisError(
                    f"a step point must be (level_vrms, thd, gain_db[, thd_u]): {p!r}"
                )
            if thd is None or g is None:
                raise AnalysisError(
                    f"step at {float(lv):.4g} V rms has no valid THD/gain (over-range record?)",
                    hint="re-measure with a wider scope range",
                )
            sp = StepPoint(float(lv), float(thd), float(g), float(rest[0]) if rest else 0.0)
        if sp.thd_percent is None or sp.gain_db is None:
            raise AnalysisError(
                f"step at {sp.level_vrms:.4g} V rms has no valid THD/gain (over-range record?)",
                hint="re-measure with a wider scope range",
            )
        vals = (sp.level_vrms, sp.thd_percent, sp.gain_db)
        if not all(math.isfinite(v) for v in vals) or sp.level_vrms <= 0 or sp.thd_percent < 0:
            raise AnalysisError(f"invalid step point {vals!r}")
        out.append(sp)
    return out


def sweep_curves(
    points: Sequence[object], small_signal_gain_db: float | None = None
) -> SweepCurves:
    """THD and gain-compression curves, sorted by level.  Small-signal gain defaults to the
    gain at the lowest level."""
    pts = sorted(_as_points(points), key=lambda p: p.level_vrms)
    if not pts:
        raise AnalysisError("no step points")
    lv = np.array([p.level_vrms for p in pts])
    g = np.array([p.gain_db for p in pts])
    g0 = float(g[0]) if small_signal_gain_db is None else float(small_signal_gain_db)
    return SweepCurves(
        lv,
        np.asarray(vrms_to_dbu(lv)),
        np.array([p.thd_percent for p in pts]),
        g,
        g0 - g,
        g0,
        np.array([p.thd_u_percent for p in pts]),
    )


def _score(c: SweepCurves, criterion: ClipCriterion) -> np.ndarray:
    """Signed distance to the criterion: >= 0 means the criterion is met (clipping)."""
    if criterion.kind == "thd":
        thd = np.maximum(c.thd_percent, 1e-12)
        score: np.ndarray = np.log10(thd) - math.log10(criterion.threshold_percent)
        return score
    return c.compression_db - criterion.db


def _first_crossing(score: np.ndarray) -> int | None:
    """Index i of the first level meeting the criterion with level i-1 below it."""
    hits = np.flatnonzero(score >= 0)
    if hits.size == 0 or hits[0] == 0:
        return None
    return int(hits[0])


def clip_threshold(
    levels_vrms: Sequence[float] | np.ndarray,
    thd_percent: Sequence[float | None] | np.ndarray,
    gain_db: Sequence[float | None] | np.ndarray,
    criterion: ClipCriterion | None = None,
    small_signal_gain_db: float | None = None,
    thd_u_percent: Sequence[float] | None = None,
) -> Threshold:
    """Level at which ``criterion`` is first met, interpolated between the bracketing steps.

    Standard uncertainty: the root-sum-square of the bracket width/√12, the difference
    between interpolating log THD and linear THD (or, for compression, a quadratic through
    three points where available), and the THD readings' own noise (``thd_u_percent``, one
    standard uncertainty per reading) carried through the interpolation: near the criterion
    that is the reading noise over the slope of log THD against level (GUM, JCGM 100:2008
    §5.1.2, law of propagation of uncertainty).
    """
    crit = criterion or ClipCriterion()
    if not (len(levels_vrms) == len(thd_percent) == len(gain_db)):
        raise AnalysisError("levels, THD and gain must have the same length")
    us = list(thd_u_percent) if thd_u_percent is not None else [0.0] * len(levels_vrms)
    if len(us) != len(levels_vrms):
        raise AnalysisError("thd_u_percent must have one value per level")
    c = sweep_curves(
        list(zip(levels_vrms, thd_percent, gain_db, us, strict=True)), small_signal_gain_db
    )
    s = _score(c, crit)
    i = _first_crossing(s)
    if i is None:
        if (s >= 0).any():  # met already at the lowest level
            return Threshold(None, None, None, False, crit, above_vrms=float(c.levels_vrms[0]))
        return Threshold(None, None, None, False, crit, below_vrms=float(c.levels_vrms[-1]))
    x = c.levels_dbu
    x0, x1, s0, s1 = x[i - 1], x[i], s[i - 1], s[i]
    xc = x0 + (x1 - x0) * (-s0) / (s1 - s0)
    if crit.kind == "thd":
        t0, t1, tt = c.thd_percent[i - 1], c.thd_percent[i], crit.threshold_percent
        alt = x0 + (x1 - x0) * (tt - t0) / (t1 - t0) if t1 != t0 else xc
    elif len(x) >= 3:
        j = min(max(i - 1, 0), len(x) - 3)
        coef = np.polyfit(x[j : j + 3], s[j : j + 3], 2)
        roots = [r.real for r in np.roots(coef) if abs(r.imag) < 1e-12 and x0 <= r.real <= x1]
        alt = roots[0] if roots else xc
    else:
        alt = xc
    u_noise = 0.0
    if crit.kind == "thd" and c.thd_u_percent is not None:
        t0, t1 = max(c.thd_percent[i - 1], 1e-12), max(c.thd_percent[i], 1e-12)
        su0 = c.thd_u_percent[i - 1] / (t0 * math.log(10))  # u of log10 THD
        su1 = c.thd_u_percent[i] / (t1 * math.log(10))
        u_noise = float((x1 - x0) / (s1 - s0) ** 2 * math.hypot(s1 * su0, s0 * su1))
    u = math.sqrt(((x1 - x0) / math.sqrt(12)) ** 2 + (xc - alt) ** 2 + u_noise**2)
    level = float(10 ** (xc / 20) * math.sqrt(0.6))
    return Threshold(
        level,
        float(xc),
        float(u),
        True,
        crit,
        below_vrms=float(c.levels_vrms[i - 1]),
        above_vrms=float(c.levels_vrms[i]),
        noise_u_db=u_noise,
    )


@dataclass(frozen=True)
class SearchStep:
    """What to do next: measure ``level_vrms``, or stop (``done``) with ``threshold``."""

    level_vrms: float | None
    done: bool
    bracketed: bool
    reason: str
    threshold: Threshold | None = None


def next_search_level(
    points: Sequence[object],
    criterion: ClipCriterion | None = None,
    *,
    start_vrms: float,
    max_vrms: float,
    resolution_db: float = 0.1,
    expand_db: float = 6.0,
    min_vrms: float | None = None,
    small_signal_gain_db: float | None = None,
) -> SearchStep:
    """Next input level for the clipping-threshold search; never above ``max_vrms``.

    ``points`` in the order measured (the Illinois step uses that order).  Without a
    bracket, step ``expand_db`` up (or down, to ``min_vrms``, default start − 40 dB); with
    one, Illinois false position on the criterion's score against level in dB, kept at least
    10 % of the bracket from either end, bisection when false position stalls.
    """
    crit = criterion or ClipCriterion()
    if not (start_vrms > 0 and max_vrms > 0 and resolution_db > 0 and expand_db > 0):
        raise AnalysisError("start_vrms, max_vrms, resolution_db and expand_db must be positive")
    lo_lim = min_vrms if min_vrms is not None else start_vrms / 100

    def to_db(v: float) -> float:
        return 20 * math.log10(v)

    def from_db(d: float) -> float:
        return float(10 ** (d / 20))

    max_db, min_db = to_db(max_vrms), to_db(lo_lim)
    order = _as_points(points)
    if not order:
        return SearchStep(min(start_vrms, max_vrms), False, False, "first level")
    curves = sweep_curves(order, small_signal_gain_db)
    s = _score(curves, crit)
    x = 20 * np.log10(curves.levels_vrms)
    th = clip_threshold(
        curves.levels_vrms,
        curves.thd_percent,
        curves.gain_db,
        crit,
        curves.small_signal_gain_db,
        None if curves.thd_u_percent is None else [float(v) for v in curves.thd_u_percent],
    )
    i = _first_crossing(s)
    if i is None:
        if (s < 0).all():
            top = float(x[-1])
            if top >= max_db - 1e-9:
                return SearchStep(None, True, False, f"{crit.label} not reached at max_vrms", th)
            return SearchStep(from_db(min(top + expand_db, max_db)), False, False, "expanding up")
        bottom = float(x[0])
        if bottom <= min_db + 1e-9:
            return SearchStep(None, True, False, f"{crit.label} already met at min_vrms", th)
        return SearchStep(from_db(max(bottom - expand_db, min_db)), False, False, "expanding down")
    a, b, fa, fb = float(x[i - 1]), float(x[i]), float(s[i - 1]), float(s[i])
    width = b - a
    if width <= resolution_db:
        return SearchStep(None, True, True, f"bracket {width:.3g} dB <= resolution", th)
    if th.noise_u_db > 0 and width <= 2.0 * th.noise_u_db:
        # narrower steps would only resolve the readings' noise
        return SearchStep(
            None, True, True, f"bracket {width:.3g} dB inside the readings' noise (k = 2)", th
        )
    # Illinois: if the last two measured points fell on the same side, halve the score of
    # the endpoint that stayed (the classic fix for false position's one-sided stall).
    last = [to_db(p.level_vrms) for p in order[-2:]]
    side = [float(np.interp(v, x, s)) >= 0 for v in last]
    if len(last) == 2 and side[0] == side[1] and a <= last[-1] <= b:
        if side[-1]:
            fa *= 0.5
        else:
            fb *= 0.5
    xn = a + width * (-fa) / (fb - fa) if fb != fa else 0.5 * (a + b)
    guard = 0.1 * width
    if not (a + guard <= xn <= b - guard) or width <= 2 * resolution_db:
        # false position hugging an end (it stalls there at a kink), or a bracket already
        # within two resolutions: bisect, which halves it for certain
        xn = 0.5 * (a + b)
    return SearchStep(from_db(min(xn, max_db)), False, True, "refining bracket", th)
