"""Single-fault hypotheses for a board, each as overrides of the stage model's parameters.

Why overrides: the stage model (:mod:`harness.model.core`) is vectorised over parameter
sets, so every hypothesis of a channel, and every trial value of every fitted drift, is one
row of one model evaluation.  The fault vocabulary is the simulated bench's
(:mod:`harness.sim.physics_faults`): drift, open, short, open_bypass, low_beta,
shorted_junction (be / ce), so a candidate can be replayed there as ``Candidate.spec``.

Prior (our own assumption from repair-bench practice, not from a reliability handbook): the
relative weights in :data:`PRIOR_WEIGHT`, against 1 for "no fault".  Open resistors and dried
or cracked capacitors are the common failures; a resistor short is rare (it is usually a
solder bridge); overstressed junctions are common on discrete stages.  A drift is flat in
log-factor apart from a mild ``|ln f|`` cost, so a burnt resistor at ×5 stays plausible; its
fitted parameter costs 2 more (Akaike's penalty for one fitted parameter).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

from harness.model.board import (
    Board,
    Channel,
    CommonEmitter,
    EmitterFollower,
    OpAmpInverting,
    OpAmpNonInverting,
    stage_parts,
)

FaultKind = Literal["none", "drift", "open", "short", "open_bypass", "low_beta", "shorted_junction"]

#: Resistance of an open resistor and of a short, as the simulated bench uses them.
OPEN_OHM = 1e12
SHORT_OHM = 1e-3
#: An open coupling capacitor (F): its corner lands far above any test frequency.
OPEN_FARAD = 1e-15
#: What is left of a bypassed emitter resistance once it is moved into ``re`` (ohm).
MOVED_OHM = 1e-6
#: I_S of a transistor that conducts no more (a shorted junction takes its current away).
DEAD_IS_A = 1e-60

#: Drift search span (factor), and the low-beta span starts here.
DRIFT_BOUNDS = (1.0 / 30.0, 30.0)
BETA_FLOOR = 2.0

#: Prior weights relative to "no fault" (see module docstring).
PRIOR_WEIGHT: dict[tuple[str, str], float] = {
    ("resistor", "open"): 0.10,
    ("resistor", "short"): 0.01,
    ("resistor", "drift"): 0.05,
    ("capacitor", "open"): 0.10,
    ("capacitor", "short"): 0.03,
    ("capacitor", "drift"): 0.05,
    ("capacitor", "open_bypass"): 0.10,
    ("transistor", "low_beta"): 0.03,
    ("transistor", "shorted_junction"): 0.05,
}
#: Cost per e-fold of a fitted drift (in score units, i.e. -2 ln prior density).
DRIFT_COST_PER_EFOLD = 1.0
#: Score cost of one fitted parameter (Akaike).
FIT_COST = 2.0


@dataclass(frozen=True)
class Hypothesis:
    """One single fault.  ``fit`` holds the bounds of a fitted value (drift factor or beta),
    None when the fault has no free value."""

    ref: str
    kind: FaultKind
    channel: str
    stage: str
    field: str | None = None
    detail: str | None = None
    part_kind: str = "other"
    nominal: float = math.nan
    tol_low: float = math.nan
    tol_high: float = math.nan
    fit: tuple[float, float] | None = None

    @property
    def label(self) -> str:
        tail = f"={self.detail}" if self.detail else ""
        return f"{self.ref}:{self.kind}{tail}"

    def penalty(self, value: float | None) -> float:
        """-2 ln(prior) of this hypothesis with fitted ``value`` (0 for no fault)."""
        if self.kind == "none":
            return 0.0
        w = PRIOR_WEIGHT.get((self.part_kind, self.kind), 0.03)
        p = -2.0 * math.log(w)
        if self.fit is not None:
            p += FIT_COST
            if self.kind == "drift" and value is not None and value > 0:
                p += DRIFT_COST_PER_EFOLD * abs(math.log(value))
        return p

    def overrides(
        self, value: float | None, nominal: Mapping[str, float]
    ) -> tuple[dict[str, float], str | None]:
        """Model parameter overrides, and the name of the adapter's patch (or None)."""
        s = self.stage
        k = f"{s}.{self.field}" if self.field else ""
        if self.kind == "none":
            return {}, None
        if self.kind == "drift":
            return {k: nominal[k] * float(value)}, None  # type: ignore[arg-type]
        if self.kind == "low_beta":
            return {f"{s}.beta": float(value)}, None  # type: ignore[arg-type]
        if self.kind == "shorted_junction":
            return {f"{s}.is_a": DEAD_IS_A}, f"shorted_{self.detail}"
        if self.kind == "open_bypass":
            re_key, byp_key = f"{s}.re", f"{s}.re_bypassed"
            return {re_key: nominal[re_key] + nominal[byp_key], byp_key: MOVED_OHM}, None
        if self.part_kind == "resistor":
            return {k: OPEN_OHM if self.kind == "open" else SHORT_OHM}, None
        # capacitor open / short
        if self.kind == "open":
            return {k: OPEN_FARAD}, None
        if self.field == "c_e":
            return {f"{s}.re_bypassed": SHORT_OHM}, None
        if self.field == "c_in":  # the generator (EMF 0 V DC) now loads the base
            src = nominal["source_ohm"]
            r2 = nominal[f"{s}.r2"]
            return {f"{s}.r2": r2 * src / (r2 + src) if src > 0 else SHORT_OHM}, None
        if self.field == "c_out":  # the load now carries the follower's DC
            re, load = nominal[f"{s}.re"], nominal["load_ohm"]
            return {f"{s}.re": re * load / (re + load)}, None
        raise ValueError(f"no model for {self.label}")  # pragma: no cover - filtered out


def _cap_short_modelled(ch: Channel, j: int, field: str) -> bool:
    """Capacitor shorts the stage model can express (others are left out, and said so)."""
    st = ch.stages[j]
    if field == "c_e":
        return True
    if field == "c_in":
        return j == 0 and isinstance(st, CommonEmitter)
    if field == "c_out":
        return j == len(ch.stages) - 1 and isinstance(st, EmitterFollower)
    return False


def channel_hypotheses(board: Board, ch: Channel) -> tuple[list[Hypothesis], list[str]]:
    """Every single fault of one channel the model can express, and the ones it cannot."""
    out: list[Hypothesis] = []
    skipped: list[str] = []
    for j, st in enumerate(ch.stages):
        for field, part in stage_parts(st):
            common = dict(
                ref=part.ref,
                channel=ch.name,
                stage=st.name,
                field=field,
                part_kind=part.kind,
                nominal=part.nominal,
                tol_low=part.low / part.nominal,
                tol_high=part.high / part.nominal,
            )
            out.append(Hypothesis(kind="drift", fit=DRIFT_BOUNDS, **common))  # type: ignore[arg-type]
            if field == "c_e":
                out.append(Hypothesis(kind="open_bypass", **common))  # type: ignore[arg-type]
            else:
                out.append(Hypothesis(kind="open", **common))  # type: ignore[arg-type]
            if part.kind == "resistor" or _cap_short_modelled(ch, j, field):
                out.append(Hypothesis(kind="short", **common))  # type: ignore[arg-type]
            else:
                skipped.append(f"{part.ref}:short")
        if isinstance(st, CommonEmitter | EmitterFollower):
            ref = f"{ch.name}.{st.name}"
            beta_min = st.transistor.beta.min
            out.append(
                Hypothesis(
                    ref=ref,
                    kind="low_beta",
                    channel=ch.name,
                    stage=st.name,
                    part_kind="transistor",
                    nominal=st.transistor.beta.typ,
                    fit=(BETA_FLOOR, beta_min),
                )
            )
            for junction in ("be", "ce"):
                out.append(
                    Hypothesis(
                        ref=ref,
                        kind="shorted_junction",
                        channel=ch.name,
                        stage=st.name,
                        detail=junction,
                        part_kind="transistor",
                    )
                )
        elif isinstance(st, OpAmpInverting | OpAmpNonInverting):
            skipped.append(f"{ch.name}.{st.name}: op-amp faults (not in the fault vocabulary)")
    return out, skipped
