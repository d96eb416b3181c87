"""Adapter: the stage model evaluated with faults, including stages the model calls unworkable.

Why an adapter: :func:`harness.model.design.design_channel` refuses a circuit whose transistor
is saturated or cut off at rest (BoardFileError), which is right for a board
file but is exactly what a repair bench sees.  Here the vectorised core
(:func:`harness.model.core.evaluate_channel`) is run on rows of parameter overrides, its
problems are read per row, and such rows get a *degraded* prediction:

* the channel gain is "dead" (scored against the dead-channel floor, see
  :mod:`harness.diagnose.rank`), THD, threshold and clip side are not predicted;
* a common-emitter stage saturated at rest gets its DC node voltages from the saturated
  transistor (V_CE = V_CE(sat), V_BE from the junction at the resulting current), and a
  DC-coupled follower after it is re-biased from that collector;
* shorted junctions (which the model cannot express) are patched from the resistive network
  that remains: base-emitter short -> base = emitter on the divider; collector-emitter short
  -> collector = emitter on R_C / R_E; a follower's base-emitter short makes the previous
  collector drive the load directly (alive, lower gain); a follower's collector-emitter short
  pins its emitter to the rail.

Degraded rows are flagged, so the scoring can widen its model allowance for them.
Nothing here reads files or prints.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import ParamSpec, TypeVar

import numpy as np

from harness.model.board import Board, Channel, CommonEmitter, EmitterFollower
from harness.model.core import ChannelArrays, evaluate_channel, parallel, solve_junction
from harness.model.params import channel_parameters, nominal_arrays

_P = ParamSpec("_P")
_R = TypeVar("_R")


def _quiet_fp(func: Callable[_P, _R]) -> Callable[_P, _R]:
    """Run ``func`` with NumPy floating-point warnings off: faulted rows overflow on purpose."""

    @functools.wraps(func)
    def run(*args: _P.args, **kwargs: _P.kwargs) -> _R:
        with np.errstate(all="ignore"):
            return func(*args, **kwargs)

    return run


#: Points per period / criterion iterations of the large-signal solution (the Monte Carlo's).
POINTS = 64
ITERATIONS = 10


@dataclass
class Predictions:
    """Predicted quantities of one channel for a batch of rows (diagnosis quantity names
    without the channel prefix; ``clip_side`` +1 positive, -1 negative, 0 unknown)."""

    values: dict[str, np.ndarray]
    dead: np.ndarray
    degraded: np.ndarray
    side_margin_db: np.ndarray

    def row(self, i: int) -> dict[str, float]:
        return {k: float(v[i]) for k, v in self.values.items()}


def nominal_params(board: Board, ch: Channel) -> dict[str, float]:
    return {k: float(v[0]) for k, v in nominal_arrays(channel_parameters(board, ch)).items()}


def batch_params(
    board: Board, ch: Channel, rows: Sequence[Mapping[str, float]]
) -> dict[str, np.ndarray]:
    """Parameter arrays of shape (len(rows),): nominal values with each row's overrides."""
    base = nominal_params(board, ch)
    n = len(rows)
    p = {k: np.full(n, v) for k, v in base.items()}
    for i, r in enumerate(rows):
        for k, v in r.items():
            if k not in p:
                raise KeyError(f"unknown model parameter {k!r}")
            p[k][i] = v
    return p


def _stage_problem_masks(ch: Channel, res: ChannelArrays) -> list[np.ndarray]:
    """Per stage: rows where that transistor is cut off or saturated at rest."""
    masks = [np.zeros(res.n, dtype=bool) for _ in ch.stages]
    for prob in res.problems:
        if "cut off" not in prob.reason and "saturated" not in prob.reason:
            continue
        for j, st in enumerate(ch.stages):
            if f"stage[{j}]({st.name})" in prob.location:
                masks[j] |= np.asarray(prob.mask, dtype=bool)
    return masks


def _side_limits(ch: Channel, res: ChannelArrays) -> tuple[np.ndarray, np.ndarray]:
    """Input peak at which the positive / negative OUTPUT half-cycle first limits."""
    n = res.n
    pos, neg = np.full(n, np.inf), np.full(n, np.inf)
    cum = np.ones(n)
    stages = res.stages
    for j, s in enumerate(stages):
        cum = cum * s.gain
        after = sum(x.inverting for x in stages[j + 1 :]) % 2 == 1
        with np.errstate(divide="ignore", invalid="ignore"):
            up = s.swing_pos_v / np.abs(cum)
            dn = s.swing_neg_v / np.abs(cum)
        if after:
            up, dn = dn, up
        pos, neg = np.minimum(pos, up), np.minimum(neg, dn)
    return pos, neg


class _Patch:
    """Row-wise DC patches on one channel's arrays (see the module docstring)."""

    def __init__(
        self,
        board: Board,
        ch: Channel,
        p: Mapping[str, np.ndarray],
        res: ChannelArrays,
        values: dict[str, np.ndarray],
    ) -> None:
        self.ch, self.p, self.res, self.v = ch, p, res, values
        self.vcc = p["supply.positive_v"]
        self.v_t = p["v_t"]
        self.supply = [np.array(s.supply_a, dtype=float, copy=True) for s in res.stages]

    def g(self, stage: str, key: str, i: int, default: float | None = None) -> float:
        k = f"{stage}.{key}"
        if k in self.p:
            return float(self.p[k][i])
        if default is None:
            raise KeyError(k)
        return default

    def set(
        self,
        stage: str,
        i: int,
        *,
        vb: float | None = None,
        ve: float | None = None,
        vc: float | None = None,
    ) -> None:
        for q, x in (("base_v", vb), ("emitter_v", ve), ("collector_v", vc)):
            if x is not None:
                self.v[f"{stage}.{q}"][i] = x

    def _follower_from(self, j: int, i: int, v_src: float, r_src: float) -> float:
        """Re-bias a DC-coupled follower (stage j) from a source; returns its base voltage."""
        st = self.ch.stages[j]
        nm = st.name
        beta, i_s = self.g(nm, "beta", i), self.g(nm, "is_a", i)
        re = self.g(nm, "re", i)
        k = r_src / beta + re * (beta + 1.0) / beta
        vbe = float(
            solve_junction(
                np.array([v_src]), np.array([k]), np.array([i_s]), np.array([self.v_t[i]])
            )[0]
        )
        ic = i_s * math.expm1(vbe / float(self.v_t[i]))
        ie = ic * (beta + 1.0) / beta
        ve = ie * re
        vb = ve + vbe
        self.set(nm, i, vb=vb, ve=ve, vc=float(self.vcc[i]))
        self.supply[j][i] = ic
        return vb

    def _next_follower(self, j: int) -> int | None:
        nxt = j + 1
        if nxt < len(self.ch.stages):
            st = self.ch.stages[nxt]
            if isinstance(st, EmitterFollower) and st.dc_coupled:
                return nxt
        return None

    def saturated_ce(self, j: int, i: int) -> None:
        """Common-emitter stage j saturated at rest: solve the three nodes with V_CE(sat)."""
        nm = self.ch.stages[j].name
        vcc, v_t = float(self.vcc[i]), float(self.v_t[i])
        r1, r2, rc = self.g(nm, "r1", i), self.g(nm, "r2", i), self.g(nm, "rc", i)
        re_dc = self.g(nm, "re", i) + self.g(nm, "re_bypassed", i, 0.0)
        i_s, vsat = self.g(nm, "is_a", i), self.g(nm, "vce_sat_v", i)
        v_th, r_th = vcc * r2 / (r1 + r2), r1 * r2 / (r1 + r2)
        vbe = 0.65
        ve = 0.0
        for _ in range(4):  # V_BE from the junction at the emitter current found
            num = (v_th - vbe) / r_th + (vcc - vsat) / rc
            ve = max(re_dc * num / (1.0 + re_dc / r_th + re_dc / rc), 0.0)
            ib = max((v_th - ve - vbe) / r_th, 1e-15)
            vbe = v_t * math.log1p(ib * 10.0 / i_s)  # forced beta ~10 in saturation
        vc = ve + vsat
        vb = ve + vbe
        self.set(nm, i, vb=vb, ve=ve, vc=vc)
        self.supply[j][i] = (vcc - vb) / r1 + (vcc - vc) / rc
        nxt = self._next_follower(j)
        if nxt is not None:
            self._follower_from(nxt, i, vc, 1e-3)  # the saturated collector is stiff

    def shorted(self, j: int, i: int, junction: str) -> bool:
        """A shorted junction on stage j; returns True when the channel stays alive."""
        st = self.ch.stages[j]
        nm = st.name
        vcc = float(self.vcc[i])
        if isinstance(st, CommonEmitter):
            r1, r2, rc = self.g(nm, "r1", i), self.g(nm, "r2", i), self.g(nm, "rc", i)
            re_dc = self.g(nm, "re", i) + self.g(nm, "re_bypassed", i, 0.0)
            if junction == "be":
                rp = parallel(r2, re_dc)
                vb = float(vcc * rp / (r1 + rp))
                self.set(nm, i, vb=vb, ve=vb)
                vc = float(self.v[f"{nm}.collector_v"][i])
                self.supply[j][i] = (vcc - vb) / r1 + (vcc - vc) / rc
            else:
                v_tc, r_tc = vcc * re_dc / (rc + re_dc), float(parallel(rc, re_dc))
                nxt = self._next_follower(j)
                vc = self._follower_from(nxt, i, v_tc, r_tc) if nxt is not None else v_tc
                self.set(nm, i, vb=vcc * r2 / (r1 + r2), ve=vc, vc=vc)
                self.supply[j][i] = vcc / (r1 + r2) + (vcc - vc) / rc
            return False
        if isinstance(st, EmitterFollower):
            if junction == "ce":
                self.set(nm, i, ve=vcc, vc=vcc)
                self.supply[j][i] = vcc / self.g(nm, "re", i)
                return False
            if st.dc_coupled and j > 0:  # the previous collector now sits on R_E
                prev = self.ch.stages[j - 1]
                ps = self.res.stages[j - 1]
                rc, re = self.g(prev.name, "rc", i), self.g(nm, "re", i)
                ic = float(ps.ic_a[i])
                vc = (vcc * re / (rc + re)) - ic * float(parallel(rc, re))
                ve_prev = float(ps.ve_v[i])
                if vc - ve_prev <= self.g(prev.name, "vce_sat_v", i):
                    return False
                self.set(prev.name, i, vc=vc)
                self.set(nm, i, vb=vc, ve=vc, vc=vcc)
                self.supply[j - 1][i] = (vcc - float(ps.vb_v[i])) / self.g(prev.name, "r1", i) + (
                    vcc - vc
                ) / rc
                self.supply[j][i] = 0.0
                return True
            rp = parallel(self.g(nm, "r2", i), self.g(nm, "re", i))
            vb = float(vcc * rp / (self.g(nm, "r1", i) + rp))
            self.set(nm, i, vb=vb, ve=vb)
            return False
        return False

    def follower_be_gain(self, j: int, i: int) -> float:
        """Channel gain (linear) with follower j's base-emitter shorted: the stage before
        drives R_E and the load directly."""
        prev = self.ch.stages[j - 1]
        ps = self.res.stages[j - 1]
        nm = self.ch.stages[j].name
        beta, ic = float(ps.beta[i]), float(ps.ic_a[i])
        r_pi = beta * float(self.v_t[i]) / ic
        r_next = float(self.res.stages[j].r_next[i])
        r_ac = float(parallel(self.g(prev.name, "rc", i), self.g(nm, "re", i), r_next))
        a = -beta * r_ac / (r_pi + (beta + 1.0) * self.g(prev.name, "re", i))
        before = 1.0
        for s in self.res.stages[: j - 1]:
            before *= float(s.gain[i])
        return before * a


@_quiet_fp
def predict_channel(
    board: Board,
    ch: Channel,
    rows: Sequence[Mapping[str, float]],
    patches: Sequence[str | None] | None = None,
    *,
    stage_of_patch: Sequence[str | None] | None = None,
    extra_frequencies_hz: Sequence[float] = (),
    full: bool = True,
) -> Predictions:
    """Predictions of one channel for each row of overrides.

    ``patches[i]`` names a shorted-junction patch (``"shorted_be"``/``"shorted_ce"``) on stage
    ``stage_of_patch[i]``; ``full`` False skips THD and the threshold search (DC and gain
    only, about ten times cheaper).  Faulted rows overflow on purpose (dead stages), so
    floating-point warnings are silenced here and dead rows are flagged instead.
    """
    n = len(rows)
    patches = list(patches) if patches is not None else [None] * n
    where = list(stage_of_patch) if stage_of_patch is not None else [None] * n
    p = batch_params(board, ch, rows)
    res = evaluate_channel(
        board,
        ch,
        p,
        thd_points=POINTS if full else None,
        search_points=POINTS if full else None,
        search_iterations=ITERATIONS,
    )
    values: dict[str, np.ndarray] = {}
    values["gain_db"] = 20.0 * np.log10(np.abs(res.gain))
    values["thd_percent"] = (
        np.array(res.thd_percent, dtype=float)
        if res.thd_percent is not None
        else np.full(n, np.nan)
    )
    values["clip_input_vrms"] = (
        np.asarray(res.thd_clip_input_vpk, dtype=float) / math.sqrt(2.0)
        if res.thd_clip_input_vpk is not None
        else np.full(n, np.nan)
    )
    pos, neg = _side_limits(ch, res)
    margin = np.abs(20.0 * np.log10(pos / neg))
    values["clip_side"] = np.where(pos < neg, 1.0, np.where(neg < pos, -1.0, 0.0))
    for st, s in zip(ch.stages, res.stages, strict=True):
        if isinstance(st, CommonEmitter | EmitterFollower):
            values[f"{st.name}.collector_v"] = np.array(s.vc_v, dtype=float, copy=True)
            values[f"{st.name}.emitter_v"] = np.array(s.ve_v, dtype=float, copy=True)
            values[f"{st.name}.base_v"] = np.array(s.vb_v, dtype=float, copy=True)
        else:
            values[f"{st.name}.output_v"] = np.array(s.vout_dc_v, dtype=float, copy=True)

    dead = np.zeros(n, dtype=bool)
    degraded = np.zeros(n, dtype=bool)
    masks = _stage_problem_masks(ch, res)
    fix = _Patch(board, ch, p, res, values)
    index = {st.name: j for j, st in enumerate(ch.stages)}
    for i in range(n):
        if patches[i]:
            j = index[where[i]]  # type: ignore[index]
            alive = fix.shorted(j, i, patches[i].removeprefix("shorted_"))  # type: ignore[union-attr]
            degraded[i] = True
            if alive:
                values["gain_db"][i] = 20.0 * math.log10(abs(fix.follower_be_gain(j, i)))
                for q in ("thd_percent", "clip_input_vrms", "clip_side"):
                    values[q][i] = math.nan if q != "clip_side" else 0.0
            else:
                dead[i] = True
            continue
        for j, st in enumerate(ch.stages):
            if not masks[j][i]:
                continue
            dead[i] = degraded[i] = True
            s = res.stages[j]
            if isinstance(st, CommonEmitter) and float(s.ic_a[i]) >= 1e-6:
                fix.saturated_ce(j, i)
    values["supply_current_a"] = np.sum(np.stack(fix.supply), axis=0)
    for f in extra_frequencies_hz:
        alt = dataclasses.replace(
            board, conditions=dataclasses.replace(board.conditions, frequency_hz=float(f))
        )
        r2 = evaluate_channel(alt, ch, p, thd_points=None, search_points=None)
        with np.errstate(divide="ignore", invalid="ignore"):
            values[f"gain_db@{f:g}"] = np.where(
                np.isfinite(values["gain_db"]),
                20.0 * np.log10(np.abs(r2.gain))
                - 20.0 * np.log10(np.abs(res.gain))
                + values["gain_db"],
                values["gain_db"],
            )
    return Predictions(values, dead, degraded, margin)
