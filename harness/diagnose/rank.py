"""Rank single-fault hypotheses by how well each explains all of a failed board's measurements.

Score of a hypothesis h (lower is better; it is -2 ln of an unnormalised posterior)::

    score(h) = Σ_i ((m_i − p_i(h)) / σ_i)²  +  clip-side term  +  penalty(h)

* m_i measured, p_i(h) the stage model's prediction with the fault applied
  (:mod:`harness.diagnose.predict`); gains, THD and thresholds are compared in dB, DC test
  points in volts, the supply current in amperes.
* σ_i² = (U_i/2)² + σ_tol,i² + σ_model,i²: the stored expanded uncertainty (k = 2) as a
  standard one, the spread of that quantity over good boards (a Monte Carlo of the board's
  tolerances, :func:`tolerance_spread`) and an allowance for the model's own approximation
  (:data:`MODEL_ALLOWANCE`, wider for degraded predictions).  Combining independent standard
  uncertainties in quadrature: GUM (JCGM 100:2008) §5.1.
* A dead channel: gains are floored at :data:`DEAD_DB` below nominal (how dead carries no
  information: it is the bench's noise), and THD / threshold / side are not scored.
* Censored thresholds (criterion not met up to the safe level, or met already at the lowest
  level) score only when the prediction falls on the wrong side of the bound.
* Clip side: a categorical term −2 ln P(observed side), P from the predicted margin between
  the two half-cycles' limits (normal, σ :data:`SIDE_SIGMA_DB`), kept in [0.03, 0.97].
* penalty(h) = −2 ln prior(h) (see :mod:`harness.diagnose.hypotheses`).

Drifts and low beta are fitted per component: a log-spaced grid over the whole span, one
vectorised model evaluation for every component at once, then
``scipy.optimize.minimize_scalar(method="bounded")`` on the log value between the best grid
point's neighbours for the most promising components.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
from scipy.optimize import minimize_scalar

from harness.diagnose.hypotheses import Hypothesis, channel_hypotheses
from harness.diagnose.names import split_key
from harness.diagnose.predict import Predictions, nominal_params, predict_channel
from harness.errors import AnalysisError
from harness.model.board import Board, Channel
from harness.model.params import channel_parameters, sample_arrays
from harness.quantities import (
    CLIP_ABOVE_EVIDENCE,
    CLIP_BELOW_EVIDENCE,
    CLIP_INPUT,
    CLIP_SIDE,
    DB_SCORED_EVIDENCE,
    THD,
    THD_FLOOR_EVIDENCE,
)

#: A channel whose gain is this far below nominal is dead (dB).
DEAD_DB = 40.0
#: Below this the THD reading says nothing (percent), unless the record's floor is higher.
THD_FLOOR_PERCENT = 0.002
#: Standard uncertainty of the predicted margin between the two half-cycles' limits (dB).
SIDE_SIGMA_DB = 1.0
SIDE_P_RANGE = (0.03, 0.97)
#: Standard allowance for the model's approximation: (absolute, relative) per quantity kind,
#: in the scored unit (dB for log quantities, V, A).  Our own figures, from comparing the
#: model with the simulated board's Ebers-Moll physics on the demo boards.
MODEL_ALLOWANCE: dict[str, tuple[float, float]] = {
    "gain_db": (0.1, 0.0),
    "thd_percent": (1.5, 0.0),
    "clip_input_vrms": (0.5, 0.0),
    "dc": (0.02, 0.01),
    "supply_current_a": (50e-6, 0.02),
}
DEGRADED_ALLOWANCE: dict[str, tuple[float, float]] = {
    "gain_db": (1.5, 0.0),
    "dc": (0.15, 0.05),
    "supply_current_a": (200e-6, 0.10),
}
#: Grid points of the drift / beta fits, and how many fits are refined.
GRID_POINTS = 25
REFINE = 4
REFINE_XATOL = 0.02  # in ln(value)
MONTE_CARLO_SAMPLES = 300
#: Channels agreeing with a good board within this many sigma are screened out.
SCREEN_Z = 3.0
MONTE_CARLO_SEED = 20240


class Evidence(NamedTuple):
    """One measurement against one hypothesis (natural units; sigma combined, standard)."""

    name: str
    measured: Any
    predicted: Any
    sigma: float | None

    @property
    def z(self) -> float | None:
        if not isinstance(self.measured, float | int) or not isinstance(
            self.predicted, float | int
        ):
            return None
        if not self.sigma or not math.isfinite(self.predicted):
            return None
        return (self.measured - self.predicted) / self.sigma


@dataclass(frozen=True)
class Candidate:
    """A ranked single-fault hypothesis.  ``score`` = ``chi2`` + ``penalty``;
    ``probability`` is its share of exp(−score/2) over all hypotheses scored."""

    ref: str
    kind: str
    fitted_value: float | None
    score: float
    explained: list[str]
    evidence: list[Evidence]
    detail: str | None = None
    channel: str = ""
    stage: str = ""
    chi2: float = 0.0
    penalty: float = 0.0
    probability: float = 0.0
    contradicts: list[str] = field(default_factory=list)
    degraded: bool = False

    @property
    def spec(self) -> str:
        """The fault in the simulated bench's text form (``R104:drift=1.3``)."""
        if self.kind == "none":
            return "none"
        if self.kind == "drift" and self.fitted_value is not None:
            return f"{self.ref}:drift={self.fitted_value:.3g}"
        if self.kind == "low_beta" and self.fitted_value is not None:
            return f"{self.ref}:low_beta={self.fitted_value:.3g}"
        if self.detail:
            return f"{self.ref}:{self.kind}={self.detail}"
        return f"{self.ref}:{self.kind}"

    def to_dict(self) -> dict[str, Any]:
        return {
            "ref": self.ref,
            "kind": self.kind,
            "detail": self.detail,
            "spec": self.spec,
            "channel": self.channel,
            "stage": self.stage,
            "fitted_value": self.fitted_value,
            "score": self.score,
            "chi2": self.chi2,
            "penalty": self.penalty,
            "probability": self.probability,
            "degraded_prediction": self.degraded,
            "explained": list(self.explained),
            "contradicts": list(self.contradicts),
            "evidence": [
                {
                    "name": e.name,
                    "measured": _j(e.measured),
                    "predicted": _j(e.predicted),
                    "sigma": _j(e.sigma),
                    "z": _j(e.z),
                }
                for e in self.evidence
            ],
        }


def _j(x: Any) -> Any:
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


# --- measurements ---------------------------------------------------------------------------


@dataclass(frozen=True)
class _Obs:
    name: str
    quantity: str
    value: Any
    sigma: float  # standard, scored unit

    @property
    def kind(self) -> str:
        if self.quantity in MODEL_ALLOWANCE:
            return self.quantity
        if self.quantity.startswith("gain_db@"):
            return "gain_db"
        return "dc"


def _to_db(x: float) -> float:
    return 20.0 * math.log10(x) if x > 0 else -math.inf


def _parse(
    measurements: Mapping[str, tuple[Any, float | None]], board: Board
) -> dict[str, list[_Obs]]:
    """Measurements grouped by channel ("" = board-wide), values in the scored unit."""
    names = {c.name for c in board.channels}
    out: dict[str, list[_Obs]] = {}
    for name, item in measurements.items():
        try:
            value, u = item
        except (TypeError, ValueError):
            raise AnalysisError(
                f"measurement {name!r}: expected (value, uncertainty), got {item!r}"
            ) from None
        ch, q = split_key(name)
        if ch and ch not in names:
            raise AnalysisError(
                f"measurement {name!r}: no channel {ch!r} on this board",
                hint=f"channels: {', '.join(sorted(names))}",
            )
        if q == THD_FLOOR_EVIDENCE:
            continue
        if q == CLIP_SIDE.evidence:
            if value in ("positive", "negative"):
                out.setdefault(ch, []).append(_Obs(name, q, value, 0.0))
            continue
        if value is None:
            continue
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise AnalysisError(f"measurement {name!r}: value {value!r} is not a number") from None
        if math.isnan(v) or (not math.isfinite(v) and not q.startswith("gain_db")):
            continue
        s = 0.0 if u is None else abs(float(u)) / 2.0  # stored U is expanded, k = 2
        if q in DB_SCORED_EVIDENCE:
            if v <= 0:
                continue
            s = 20.0 / math.log(10.0) * s / v
            v = _to_db(v)
        if not math.isfinite(s):
            s = 0.0
        out.setdefault(ch, []).append(_Obs(name, q, v, s))
    return out


# --- tolerance spread -------------------------------------------------------------------------


def _scored(q: str, x: np.ndarray) -> np.ndarray:
    if q in DB_SCORED_EVIDENCE:
        with np.errstate(divide="ignore", invalid="ignore"):
            return 20.0 * np.log10(x)
    return x


def tolerance_spread(
    board: Board, ch: Channel, extra_frequencies_hz: Sequence[float] = ()
) -> dict[str, float]:
    """Standard spread of every predicted quantity over good boards (scored unit): half the
    16-84 % span of a seeded Monte Carlo of the board's tolerances."""
    specs = channel_parameters(board, ch)
    rng = np.random.default_rng(MONTE_CARLO_SEED)
    arr = sample_arrays(specs, rng, MONTE_CARLO_SAMPLES)
    rows = [{k: float(v[i]) for k, v in arr.items()} for i in range(MONTE_CARLO_SAMPLES)]
    pred = predict_channel(board, ch, rows, extra_frequencies_hz=extra_frequencies_hz)
    ok = ~pred.dead
    out: dict[str, float] = {}
    for q, x in pred.values.items():
        y = _scored(q, x[ok])
        y = y[np.isfinite(y)]
        if y.size < 10:
            out[q] = 0.0
            continue
        lo, hi = np.percentile(y, [15.865, 84.135])
        out[q] = float(hi - lo) / 2.0
    return out


# --- scoring ---------------------------------------------------------------------------------


@dataclass
class _ChannelModel:
    ch: Channel
    obs: list[_Obs]
    spread: dict[str, float]
    nominal_gain_db: dict[str, float]
    extra_f: tuple[float, ...]
    base: dict[str, float]
    measured_dead: bool = False


def _allow(kind: str, value: np.ndarray | float, degraded: np.ndarray | bool) -> np.ndarray:
    a, r = MODEL_ALLOWANCE.get(kind, (0.0, 0.0))
    da, dr = DEGRADED_ALLOWANCE.get(kind, (a, r))
    v = np.abs(np.asarray(value, dtype=float))
    return np.where(degraded, np.hypot(da, dr * v), np.hypot(a, r * v))


def _terms(
    cm: _ChannelModel, pred: Predictions, supply_other: float, supply_obs: _Obs | None
) -> dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Per measurement: (chi-square contribution, prediction in scored unit, sigma)."""
    n = pred.dead.shape[0]
    out: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
    nan = np.full(n, np.nan)
    for o in cm.obs:
        q = o.quantity
        if q.startswith("gain_db"):
            floor = cm.nominal_gain_db.get(q, cm.nominal_gain_db["gain_db"]) - DEAD_DB
            p = np.where(pred.dead, floor, np.maximum(pred.values.get(q, nan), floor))
            p = np.where(np.isfinite(p), p, floor)
            m = max(o.value, floor)
            s = np.sqrt(
                o.sigma**2 + cm.spread.get(q, 0.0) ** 2 + _allow("gain_db", p, pred.degraded) ** 2
            )
            out[o.name] = ((m - p) ** 2 / s**2, p, s)
        elif q in DB_SCORED_EVIDENCE or q == CLIP_SIDE.evidence:
            bound = q in (CLIP_ABOVE_EVIDENCE, CLIP_BELOW_EVIDENCE)
            src = CLIP_INPUT.evidence if bound else q
            assert src is not None
            raw = pred.values[src]
            unpredicted = pred.dead | ~np.isfinite(raw) | cm.measured_dead
            if q == CLIP_SIDE.evidence:
                side = 1.0 if o.value == "positive" else -1.0
                p_same = 0.5 * (1.0 + _erf(pred.side_margin_db / (SIDE_SIGMA_DB * math.sqrt(2))))
                p_same = np.clip(np.nan_to_num(p_same, nan=0.5), *SIDE_P_RANGE)
                agree = raw == side
                prob = np.where(agree, p_same, 1.0 - p_same)
                prob = np.where(raw == 0, 0.5, prob)
                c = np.where(unpredicted, 0.0, -2.0 * np.log(prob))
                out[o.name] = (c, np.where(unpredicted, np.nan, raw), np.zeros(n))
                continue
            p = _scored(src, raw)
            m = o.value
            if q == THD.evidence:
                floor = _to_db(max(THD_FLOOR_PERCENT, 2.0 * cm.base.get("thd_floor", 0.0)))
                p, m = np.maximum(p, floor), max(m, floor)
            s = np.sqrt(o.sigma**2 + cm.spread.get(src, 0.0) ** 2 + _allow(src, 0.0, False) ** 2)
            d = m - p
            if q == CLIP_ABOVE_EVIDENCE:
                d = np.maximum(d, 0.0)
            elif q == CLIP_BELOW_EVIDENCE:
                d = np.minimum(d, 0.0)
            c = np.where(unpredicted, 0.0, d**2 / s**2)
            out[o.name] = (c, np.where(unpredicted, np.nan, p), np.broadcast_to(s, (n,)))
        else:
            dc = pred.values.get(q)
            if dc is None:
                continue
            s = np.sqrt(
                o.sigma**2 + cm.spread.get(q, 0.0) ** 2 + _allow("dc", dc, pred.degraded) ** 2
            )
            out[o.name] = ((o.value - dc) ** 2 / s**2, dc, s)
    if supply_obs is not None:
        p = pred.values["supply_current_a"] + supply_other
        s = np.sqrt(
            supply_obs.sigma**2
            + cm.spread.get("supply_current_a", 0.0) ** 2
            + _allow("supply_current_a", p, pred.degraded) ** 2
        )
        out[supply_obs.name] = ((supply_obs.value - p) ** 2 / s**2, p, s)
    return out


def _erf(x: np.ndarray) -> np.ndarray:
    from scipy.special import erf

    return np.asarray(erf(x), dtype=float)


def _natural(name: str, quantity: str, x: float) -> float:
    if quantity in DB_SCORED_EVIDENCE:
        return 10.0 ** (x / 20.0) if math.isfinite(x) else math.nan
    return x


@dataclass
class _Row:
    hyp: Hypothesis
    value: float | None
    overrides: dict[str, float]
    patch: str | None


def _rows_for(
    h: Hypothesis, values: Sequence[float | None], base: Mapping[str, float]
) -> list[_Row]:
    rows = []
    for v in values:
        o, patch = h.overrides(v, base)
        rows.append(_Row(h, v, o, patch))
    return rows


def _evaluate(
    cm: _ChannelModel,
    board: Board,
    rows: Sequence[_Row],
    supply_other: float,
    supply_obs: _Obs | None,
) -> tuple[np.ndarray, dict, Predictions]:
    pred = predict_channel(
        board,
        cm.ch,
        [r.overrides for r in rows],
        [r.patch for r in rows],
        stage_of_patch=[r.hyp.stage for r in rows],
        extra_frequencies_hz=cm.extra_f,
    )
    terms = _terms(cm, pred, supply_other, supply_obs)
    chi2 = np.zeros(len(rows))
    for c, _, _ in terms.values():
        chi2 = chi2 + c
    return chi2, terms, pred


def _grid(h: Hypothesis) -> np.ndarray:
    lo, hi = h.fit  # type: ignore[misc]
    return np.exp(np.linspace(math.log(lo), math.log(hi), GRID_POINTS))


def rank_faults(
    board: Board,
    measurements: Mapping[str, tuple[Any, float | None]],
    *,
    top: int | None = None,
    include_none: bool = True,
    spreads: Mapping[str, Mapping[str, float]] | None = None,
    screen: bool = True,
    screened_out: list[str] | None = None,
) -> list[Candidate]:
    """Single-fault candidates, best first.

    ``measurements`` maps diagnosis keys (:mod:`harness.diagnose.names`) to (value, U) with U
    the expanded uncertainty (k = 2) as the run layer stores it (None: no uncertainty known).
    ``spreads`` caches :func:`tolerance_spread` per channel (computed when missing).
    ``include_none`` keeps the "no fault" hypothesis in the ranking (kind ``"none"``).
    ``screen`` skips the hypotheses of channels that agree with a good board (every own
    measurement and the supply current within :data:`SCREEN_Z` sigma); their names are
    appended to ``screened_out`` when a list is given.
    """
    if screened_out is None:
        screened_out = []
    grouped = _parse(measurements, board)
    if not any(grouped.values()):
        raise AnalysisError(
            "no measurements to diagnose from",
            hint="give at least a gain, THD, threshold or DC test point",
        )
    supply_obs = next((o for o in grouped.get("", []) if o.quantity == "supply_current_a"), None)
    models: dict[str, _ChannelModel] = {}
    for ch in board.channels:
        obs = grouped.get(ch.name, [])
        extra = tuple(
            sorted(
                {
                    float(o.quantity.split("@", 1)[1])
                    for o in obs
                    if o.quantity.startswith("gain_db@")
                }
            )
        )
        sp = (
            dict(spreads[ch.name])
            if spreads and ch.name in spreads
            else tolerance_spread(board, ch, extra)
        )
        base = nominal_params(board, ch)
        floor = measurements.get(f"{ch.name}.{THD_FLOOR_EVIDENCE}")
        if floor is not None and floor[0] is not None:
            base["thd_floor"] = float(floor[0])
        cm = _ChannelModel(ch, obs, sp, {}, extra, base)
        nom = predict_channel(board, ch, [{}], extra_frequencies_hz=extra)
        cm.nominal_gain_db = {
            q: float(v[0]) for q, v in nom.values.items() if q.startswith("gain_db")
        }
        g = next((o for o in obs if o.quantity == "gain_db"), None)
        cm.measured_dead = g is not None and g.value < cm.nominal_gain_db["gain_db"] - DEAD_DB + 6
        models[ch.name] = cm

    # nominal predictions of every channel: the baseline the others are added to
    nominal_supply: dict[str, float] = {}
    nominal_chi2: dict[str, float] = {}
    nominal_terms: dict[str, dict] = {}
    none = Hypothesis(ref="none", kind="none", channel="", stage="")
    for name, cm in models.items():
        row = _rows_for(none, [None], cm.base)
        pred = predict_channel(board, cm.ch, [{}], extra_frequencies_hz=cm.extra_f)
        nominal_supply[name] = float(pred.values["supply_current_a"][0])
        terms = _terms(cm, pred, 0.0, None)
        nominal_terms[name] = {
            k: (float(c[0]), float(p[0]), float(s[0])) for k, (c, p, s) in terms.items()
        }
        nominal_chi2[name] = sum(v[0] for v in nominal_terms[name].values())
        del row
    total_supply = sum(nominal_supply.values())

    scored: list[tuple[float, float, _Row, dict[str, tuple[float, float, float]], bool]] = []

    def collect(
        cm: _ChannelModel, rows: Sequence[_Row], chi2: np.ndarray, terms: dict, pred: Predictions
    ) -> None:
        others = sum(v for k, v in nominal_chi2.items() if k != cm.ch.name)
        for i, r in enumerate(rows):
            t = {k: (float(c[i]), float(p[i]), float(s[i])) for k, (c, p, s) in terms.items()}
            scored.append(
                (float(chi2[i]) + others, r.hyp.penalty(r.value), r, t, bool(pred.degraded[i]))
            )

    # the "no fault" hypothesis, with the supply term of the whole board
    if include_none:
        first = next(iter(models.values()))
        rows = _rows_for(none, [None], first.base)
        other = total_supply - nominal_supply[first.ch.name]
        chi2, terms, pred = _evaluate(first, board, rows, other, supply_obs)
        collect(first, rows, chi2, terms, pred)
        for name in models:  # add the other channels' evidence for display
            if name != first.ch.name:
                scored[-1][3].update(nominal_terms[name])

    # screening: a channel whose own measurements and the supply current agree with a good
    # board cannot hold a fault that explains anything; its hypotheses would all rank below
    # "no fault" (their chi-square cannot fall below the other channels' nominal one)
    supply_ok = True
    if supply_obs is not None:
        s_sup = math.sqrt(
            supply_obs.sigma**2
            + sum(cm.spread.get("supply_current_a", 0.0) ** 2 for cm in models.values())
            + float(_allow("supply_current_a", total_supply, False)) ** 2
        )
        supply_ok = abs(supply_obs.value - total_supply) <= SCREEN_Z * s_sup
    for name, t in nominal_terms.items():
        if (
            screen
            and supply_ok
            and all(math.sqrt(max(c, 0.0)) <= SCREEN_Z for c, _, _ in t.values())
            and len(models) > 1
        ):
            screened_out.append(name)

    fits: list[tuple[float, _ChannelModel, Hypothesis, np.ndarray, np.ndarray, float]] = []
    for name, cm in models.items():
        if name in screened_out:
            continue
        hyps, _skipped = channel_hypotheses(board, cm.ch)
        other = total_supply - nominal_supply[name]
        fixed = [r for h in hyps if h.fit is None for r in _rows_for(h, [None], cm.base)]
        fitted = [h for h in hyps if h.fit is not None]
        grid_rows = [r for h in fitted for r in _rows_for(h, list(_grid(h)), cm.base)]
        rows = fixed + grid_rows
        chi2, terms, pred = _evaluate(cm, board, rows, other, supply_obs)
        collect(
            cm,
            rows[: len(fixed)],
            chi2[: len(fixed)],
            {k: tuple(a[: len(fixed)] for a in v) for k, v in terms.items()},
            pred,
        )
        others = sum(v for k, v in nominal_chi2.items() if k != name)
        for j, h in enumerate(fitted):
            sl = slice(len(fixed) + j * GRID_POINTS, len(fixed) + (j + 1) * GRID_POINTS)
            grid = _grid(h)
            tot = chi2[sl] + np.array([h.penalty(v) for v in grid])
            k = int(np.argmin(tot))
            fits.append((float(tot[k]) + others, cm, h, grid, tot, other))
        # the other channels' nominal evidence, for display
        for s in scored:
            if s[2].hyp.channel == name:
                for oname, t in nominal_terms.items():
                    if oname != name:
                        for kk, vv in t.items():
                            s[3].setdefault(kk, vv)

    fits.sort(key=lambda f: f[0])
    for rank_i, (_, cm, h, grid, tot, other) in enumerate(fits):
        k = int(np.argmin(tot))
        best = float(grid[k])
        if rank_i < REFINE:
            lo = math.log(grid[max(k - 1, 0)])
            hi = math.log(grid[min(k + 1, len(grid) - 1)])

            def objective(
                x: float, _h: Hypothesis = h, _cm: _ChannelModel = cm, _o: float = other
            ) -> float:
                r = _rows_for(_h, [math.exp(x)], _cm.base)
                c, _, _ = _evaluate(_cm, board, r, _o, supply_obs)
                return float(c[0]) + _h.penalty(math.exp(x))

            res = minimize_scalar(
                objective, bounds=(lo, hi), method="bounded", options={"xatol": REFINE_XATOL}
            )
            if float(res.fun) <= float(tot[k]):
                best = math.exp(float(res.x))
        rows = _rows_for(h, [best], cm.base)
        chi2, terms, pred = _evaluate(cm, board, rows, other, supply_obs)
        collect(cm, rows, chi2, terms, pred)
        for oname, t in nominal_terms.items():
            if oname != cm.ch.name:
                for kk, vv in t.items():
                    scored[-1][3].setdefault(kk, vv)

    # evidence and ranking
    quantity_of = {o.name: o.quantity for obs in grouped.values() for o in obs}
    measured_of = {o.name: o.value for obs in grouped.values() for o in obs}
    nominal_z: dict[str, float] = {}
    if include_none:
        for key, (c, _, _) in scored[0][3].items():
            nominal_z[key] = math.sqrt(max(c, 0.0))
    else:
        for t in nominal_terms.values():
            for key, (c, _, _) in t.items():
                nominal_z[key] = math.sqrt(max(c, 0.0))
    best_score = min(c + p for c, p, *_ in scored)
    weights = [math.exp(-(c + p - best_score) / 2.0) for c, p, *_ in scored]
    wsum = sum(weights)
    out: list[Candidate] = []
    for (c2, pen, r, t, degraded), w in zip(scored, weights, strict=True):
        ev: list[Evidence] = []
        explained, contradicts = [], []
        for name, (c, p, sigma) in sorted(t.items()):
            q = quantity_of.get(name, name)
            m = measured_of.get(name)
            if q == CLIP_SIDE.evidence:
                pv = (
                    None
                    if not math.isfinite(p)
                    else ("positive" if p > 0 else "negative" if p < 0 else None)
                )
                ev.append(Evidence(name, m, pv, None))
            else:
                assert m is not None  # every scored term is an observation with a value
                ev.append(
                    Evidence(
                        name,
                        _natural(name, q, float(m)),
                        _natural(name, q, p),
                        _sigma_natural(q, float(m), sigma),
                    )
                )
            z = math.sqrt(max(c, 0.0))
            if z <= 2.0 and nominal_z.get(name, 0.0) > 2.0:
                explained.append(name)
            if z > 3.0:
                contradicts.append(name)
        h = r.hyp
        out.append(
            Candidate(
                ref=h.ref,
                kind=h.kind,
                fitted_value=r.value,
                score=c2 + pen,
                explained=explained,
                evidence=ev,
                detail=h.detail,
                channel=h.channel,
                stage=h.stage,
                chi2=c2,
                penalty=pen,
                probability=w / wsum,
                contradicts=contradicts,
                degraded=degraded,
            )
        )
    out.sort(key=lambda cand: cand.score)
    return out[:top] if top else out


def _sigma_natural(q: str, measured: float, s: float) -> float:
    if q not in DB_SCORED_EVIDENCE:
        return s
    v = 10.0 ** (measured / 20.0)
    return v * (10.0 ** (s / 20.0) - 1.0)
