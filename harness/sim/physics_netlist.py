"""Board → circuit netlist of one channel, with faults and device parameters applied.

Why a netlist and not stage formulas: each channel becomes the resistors, capacitors,
transistors and op-amps actually fitted, wired node to node, so interactions the limit model
simplifies away (the follower loading the collector, the generator's 50 Ω with C_in, the
load on the output, rectified base current charging C_in) are present by construction.

Node names: ``in`` (input connector), ``out`` (output connector, across the load),
``vpos``/``vneg`` (rails), ``0`` (ground) and ``<stage>.b|c|e|e2|o|n|p|g|x`` inside stages.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

from harness.errors import FaultSpecError
from harness.model.board import (
    Board,
    Channel,
    CommonEmitter,
    EmitterFollower,
    OpAmpInverting,
    OpAmpNonInverting,
    Part,
    Spread,
)
from harness.sim.physics_circuit import T_DEFAULT_K, BjtModel, Netlist, OpAmpModel
from harness.sim.physics_faults import OPEN_OHM, SHORT_OHM, Fault

#: Reverse β of the Ebers-Moll model.  Small-signal NPN parts have β_R of about 1-10
#: (common practice); 3 is our choice.  It sets how hard a saturated collector is pulled
#: down: the ngspice checks map it to the Gummel-Poon BR.
BETA_R_DEFAULT = 3.0


@dataclass(frozen=True)
class SimParams:
    """Device parameters of the simulated board.  ``corner`` picks min/typ/max of every data-sheet
    spread; the other fields, when given, override it for all devices."""

    corner: Literal["min", "typ", "max"] = "typ"
    beta_f: float | None = None
    beta_r: float = BETA_R_DEFAULT
    is_a: float | None = None
    vaf_v: float | None = None  # None: the board's value, else infinite
    headroom_v: float | None = None
    opamp_r_out_ohm: float = 20.0  # open-loop output resistance of the macro-model
    temperature_k: float = T_DEFAULT_K
    steps_per_period: int = 512

    @classmethod
    def from_spec(cls, spec: str | Mapping[str, Any] | SimParams) -> SimParams:
        """``"typ"``/``"min"``/``"max"`` or a dict of field overrides."""
        if isinstance(spec, SimParams):
            return spec
        if isinstance(spec, str):
            if spec not in {"min", "typ", "max"}:
                raise FaultSpecError(
                    f"params={spec}",
                    "unknown parameter corner",
                    hint='use "typ", "min", "max" or a dict of overrides',
                )
            return cls(corner=spec)  # type: ignore[arg-type]
        if not isinstance(spec, Mapping):
            raise FaultSpecError(f"params={spec!r}", "params must be a corner name or a dict")
        fields = set(cls.__dataclass_fields__)
        unknown = sorted(set(spec) - fields)
        if unknown:
            raise FaultSpecError(
                f"params.{unknown[0]}",
                "unknown simulation parameter",
                hint=f"allowed: {', '.join(sorted(fields))}",
            )
        p = cls(**dict(spec))
        if p.corner not in {"min", "typ", "max"}:
            raise FaultSpecError(
                f"params.corner={p.corner}", "unknown corner", hint="use typ, min or max"
            )
        for name in ("beta_f", "is_a", "vaf_v", "headroom_v"):
            v = getattr(p, name)
            if v is not None and not (isinstance(v, int | float) and v > 0):
                raise FaultSpecError(f"params.{name}={v!r}", "must be a positive number")
        if not p.beta_r > 0 or not p.opamp_r_out_ohm > 0 or not p.temperature_k > 0:
            raise FaultSpecError("params", "beta_r, opamp_r_out_ohm and temperature_k must be > 0")
        if not isinstance(p.steps_per_period, int) or not 64 <= p.steps_per_period <= 8192:
            raise FaultSpecError(
                f"params.steps_per_period={p.steps_per_period!r}",
                "must be a whole number from 64 to 8192",
            )
        return p

    def pick(self, s: Spread) -> float:
        return {"min": s.min, "typ": s.typ, "max": s.max}[self.corner]


@dataclass(frozen=True)
class StageNodes:
    """Where a stage's quantities live in the netlist (for the operating point)."""

    name: str
    kind: str
    base: str | None = None
    collector: str | None = None
    emitter: str | None = None
    output: str | None = None  # op-amp output pin


def build_channel(
    board: Board,
    channel: Channel,
    faults: Iterable[Fault],
    params: SimParams,
    v_pos: float,
    v_neg: float,
    load_ohm: float | None = None,
) -> tuple[Netlist, list[StageNodes]]:
    """The channel's netlist with ``faults`` applied; rails at ``v_pos``/``v_neg``."""
    faults = list(faults)
    by_ref: dict[str, list[Fault]] = {}
    for f in faults:
        by_ref.setdefault(f.ref, []).append(f)
    net = Netlist()
    net.known["vpos"] = v_pos
    if board.supply.negative is not None:
        net.known["vneg"] = v_neg

    def res(role: str, a: str, b: str, part: Part) -> None:
        r = part.nominal
        for f in by_ref.get(part.ref, ()):
            if f.kind == "drift":
                r *= float(f.value)  # type: ignore[arg-type]
            elif f.kind == "open":
                r = OPEN_OHM
            elif f.kind == "short":
                r = SHORT_OHM
        net.add("R", role, (a, b), r, ref=part.ref)

    def cap(role: str, a: str, b: str, part: Part, *, bypass_open: bool = False) -> None:
        c = part.nominal
        for f in by_ref.get(part.ref, ()):
            if f.kind == "drift":
                c *= float(f.value)  # type: ignore[arg-type]
            elif f.kind in {"open", "open_bypass"}:
                return
            elif f.kind == "short":
                net.add("R", role, (a, b), SHORT_OHM, ref=part.ref)
                return
        if bypass_open:
            return
        net.add("C", role, (a, b), c, ref=part.ref)

    def bjt_model(stage_ref: str, tr: Any) -> BjtModel:
        beta = params.beta_f if params.beta_f is not None else params.pick(tr.beta)
        for f in by_ref.get(stage_ref, ()):
            if f.kind == "low_beta":
                beta = float(f.value)  # type: ignore[arg-type]
        is_a = params.is_a if params.is_a is not None else params.pick(tr.is_a)
        vaf = params.vaf_v if params.vaf_v is not None else (tr.vaf_v or math.inf)
        # the transistor data's reverse beta (board field beta_r) unless overridden here
        beta_r = params.beta_r
        if tr.beta_r is not None and params.beta_r == BETA_R_DEFAULT:
            beta_r = params.pick(tr.beta_r)
        return BjtModel(is_a=is_a, beta_f=beta, beta_r=beta_r, vaf_v=vaf)

    def junction_faults(stage_ref: str, name: str, b: str, c: str, e: str) -> None:
        for f in by_ref.get(stage_ref, ()):
            if f.kind == "shorted_junction":
                a = b if f.value == "be" else c
                net.add("R", f"{name}.short_{f.value}", (a, e), SHORT_OHM, ref=stage_ref)

    nodes: list[StageNodes] = []
    sig = "in"
    n_stages = len(channel.stages)
    for j, st in enumerate(channel.stages):
        name = st.name
        sref = f"{channel.name}.{name}"
        last = j == n_stages - 1
        if isinstance(st, CommonEmitter):
            b = f"{name}.b"
            if st.c_in is not None:
                cap(f"{name}.c_in", sig, b, st.c_in)
            else:
                b = sig
            c, e = f"{name}.c", f"{name}.e"
            res(f"{name}.r1", "vpos", b, st.r1)
            res(f"{name}.r2", b, "0", st.r2)
            res(f"{name}.rc", "vpos", c, st.rc)
            if st.re_bypassed is not None:
                e2 = f"{name}.e2"
                res(f"{name}.re", e, e2, st.re)
                res(f"{name}.re_bypassed", e2, "0", st.re_bypassed)
                if st.c_e is not None:
                    stage_bypass_open = any(f.kind == "open_bypass" for f in by_ref.get(sref, ()))
                    cap(f"{name}.c_e", e2, "0", st.c_e, bypass_open=stage_bypass_open)
            else:
                res(f"{name}.re", e, "0", st.re)
            net.add("Q", f"{name}.q", (c, b, e), model=bjt_model(sref, st.transistor), ref=sref)
            junction_faults(sref, name, b, c, e)
            nodes.append(StageNodes(name, st.kind, base=b, collector=c, emitter=e))
            out = c
        elif isinstance(st, EmitterFollower):
            b = f"{name}.b"
            if st.dc_coupled:
                b = sig
            else:
                if st.c_in is not None:
                    cap(f"{name}.c_in", sig, b, st.c_in)
                else:
                    b = sig
                if st.r1 is not None:
                    res(f"{name}.r1", "vpos", b, st.r1)
                if st.r2 is not None:
                    res(f"{name}.r2", b, "0", st.r2)
            e = f"{name}.e"
            res(f"{name}.re", e, "0", st.re)
            net.add(
                "Q", f"{name}.q", ("vpos", b, e), model=bjt_model(sref, st.transistor), ref=sref
            )
            junction_faults(sref, name, b, "vpos", e)
            nodes.append(StageNodes(name, st.kind, base=b, collector="vpos", emitter=e))
            out = e
        elif isinstance(st, OpAmpInverting | OpAmpNonInverting):
            om = st.opamp
            headroom = (
                params.headroom_v if params.headroom_v is not None else params.pick(om.headroom_v)
            )
            model = OpAmpModel(
                open_loop_gain=om.open_loop_gain,
                gbw_hz=om.gbw_hz,
                headroom_v=headroom,
                i_limit_a=om.output_current_a,
                r_out_ohm=params.opamp_r_out_ohm,
                quiescent_a=params.pick(om.quiescent_a),
            )
            o, n_, p_ = f"{name}.x", f"{name}.n", f"{name}.p"
            if isinstance(st, OpAmpInverting):
                a_in = f"{name}.a"
                if st.c_in is not None:
                    cap(f"{name}.c_in", sig, a_in, st.c_in)
                else:
                    a_in = sig
                res(f"{name}.r_in", a_in, n_, st.r_in)
                res(f"{name}.r_f", n_, o, st.r_f)
                p_ = "0"
            else:
                if st.c_in is not None:
                    cap(f"{name}.c_in", sig, p_, st.c_in)
                else:
                    p_ = sig
                if st.r_bias is not None:
                    res(f"{name}.r_bias", p_, "0", st.r_bias)
                res(f"{name}.r_f", o, n_, st.r_f)
                if st.c_g is not None:
                    g_ = f"{name}.g"
                    res(f"{name}.r_g", n_, g_, st.r_g)
                    cap(f"{name}.c_g", g_, "0", st.c_g)
                else:
                    res(f"{name}.r_g", n_, "0", st.r_g)
            net.add("A", f"{name}.u", (p_, n_, o), model=model, ref=sref)
            nodes.append(StageNodes(name, st.kind, output=o))
            out = o
        else:  # pragma: no cover - the board loader admits only the kinds above
            raise TypeError(f"unknown stage {st!r}")
        if st.c_out is not None:
            nxt = "out" if last else f"{name}.o"
            cap(f"{name}.c_out", out, nxt, st.c_out)
            out = nxt
        sig = out
    net.output_node = sig
    rl = channel.load_ohm.nominal if load_ohm is None else load_ohm
    if math.isfinite(rl):
        net.add("R", "load", (sig, "0"), rl, ref="load")
    return net, nodes
