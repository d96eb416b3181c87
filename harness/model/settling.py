"""Which of a channel's time constants the test must wait for after a level change.

Why it exists: waiting five times the *largest* coupling time constant after every level
change makes a board with ordinary audio capacitors (100 µF out into 100 kΩ: tau ≈ 10 s)
take minutes per channel, yet that capacitor does not shape the waveform the harness
measures.  Circuit theory (common practice):

* a capacitor whose charge sets a stage's operating point — the input or inter-stage
  coupling capacitor into a bias network, an emitter bypass, an op-amp's C_G — changes the
  waveform while it recharges (the bias shift under large drive, clipping on one side):
  ``kind = "operating_point"``; the wait after a level change follows these;
* the last stage's output coupling capacitor into the load only moves the DC level at the
  output connector, tau = C_out (R_out + R_L): an AC-coupled scope input or the offset term
  of the sine fit (IEEE Std 1057 / IEEE Std 1241 four-parameter fit) removes it, provided the
  scope range leaves room for the DC still moving: ``kind = "dc_level"``.  Not quite
  nothing, though: while it charges, its current flows through the stage's output
  resistance, so the stage's own DC (a collector) sits R_out/(R_out + R_L) of the output's DC
  step away from its rest point.  After a level change that step is tiny (the rectified
  drive moves the output's mean by millivolts); after supply on it is the whole output DC
  level, so the wait after supply on lasts until that shift is below
  :data:`SUPPLY_SHIFT_FRACTION` of the supply span.

Pure: parameter arrays in, arrays out, like :mod:`harness.model.core`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

from harness.model.board import Channel, CommonEmitter, EmitterFollower, OpAmpNonInverting

__all__ = [
    "SETTLE_TAUS",
    "SUPPLY_SHIFT_FRACTION",
    "TimeConstant",
    "settle_times",
    "supply_settle_time",
    "time_constants",
]

#: Time constants waited after a change: 5 tau leaves e^-5 = 0.7 % of the step (common
#: practice for "settled").
SETTLE_TAUS = 5.0
#: After supply on, a DC-level capacitor still charging may shift a stage's operating point
#: by at most this fraction of the supply span (0.5 %: 60 mV on 12 V; our choice).  Measured
#: on the invented audio demo board on the simulated bench: the shift left after the wait
#: (about 27 mV for a nominal board, the wait being the worst Monte Carlo board's) moved the
#: clipping threshold by 0.05 dB, 7 mV by 0.004 dB: inside the search's 0.1 dB resolution.
SUPPLY_SHIFT_FRACTION = 5e-3

Kind = Literal["operating_point", "dc_level"]


@dataclass(frozen=True)
class TimeConstant:
    """One capacitor's recharge time constant (seconds, per sample) and what it moves."""

    name: str  # "<stage>.<part>" (c_in, c_in.bias, c_e, c_g, c_out)
    kind: Kind
    tau_s: np.ndarray
    #: dc_level only: the stage's operating-point shift right after supply on (V)
    supply_shift_v: np.ndarray | None = None


def _b(x: object, n: int) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    return a if a.shape == (n,) else np.broadcast_to(a, (n,)).copy()


def _par(*rs: np.ndarray) -> np.ndarray:
    """Resistances in parallel; a zero one (an ideal voltage source) shorts the rest."""
    with np.errstate(divide="ignore"):
        g = sum(1.0 / np.asarray(r, dtype=float) for r in rs)
        return np.asarray(1.0 / g, dtype=float)


def time_constants(
    channel: Channel, p: Mapping[str, np.ndarray], stages: Sequence[object], n: int
) -> list[TimeConstant]:
    """Every coupling and bypass time constant of ``channel``, classified.

    ``stages`` are the core's StageArrays (input_ohm, output_ohm, r_next, beta, ic_a) in
    stage order; ``p`` the parameter arrays.  Each coupling capacitor sees the source side's
    resistance plus the impedance it drives; a coupling capacitor into a BJT bias network
    also recharges through the divider (R1 ∥ R2) when the base current is rectified near
    clipping; an emitter bypass sees R_E,bypassed ∥ what looks into the emitter.
    """
    out: list[TimeConstant] = []
    r_src = _b(p["source_ohm"], n)
    v_t = _b(p["v_t"], n)
    last = len(channel.stages) - 1
    for j, (st, s) in enumerate(zip(channel.stages, stages, strict=True)):
        nm = st.name
        if st.c_in is not None:
            c = _b(p[f"{nm}.c_in"], n)
            out.append(TimeConstant(f"{nm}.c_in", "operating_point", c * (r_src + s.input_ohm)))  # type: ignore[attr-defined]
            if isinstance(st, CommonEmitter) or (
                isinstance(st, EmitterFollower) and not st.dc_coupled
            ):
                r_th = _par(_b(p[f"{nm}.r1"], n), _b(p[f"{nm}.r2"], n))
                out.append(TimeConstant(f"{nm}.c_in.bias", "operating_point", c * (r_src + r_th)))
            elif isinstance(st, OpAmpNonInverting) and st.r_bias is not None:
                r_b = _b(p[f"{nm}.r_bias"], n)
                out.append(TimeConstant(f"{nm}.c_in.bias", "operating_point", c * (r_src + r_b)))
        if isinstance(st, CommonEmitter) and st.c_e is not None and st.re_bypassed is not None:
            c = _b(p[f"{nm}.c_e"], n)
            beta, ic = s.beta, s.ic_a  # type: ignore[attr-defined]
            r_b = _par(r_src, _b(p[f"{nm}.r1"], n), _b(p[f"{nm}.r2"], n))
            r_look = _b(p[f"{nm}.re"], n) + (beta * v_t / ic + r_b) / (beta + 1.0)
            r_seen = _par(_b(p[f"{nm}.re_bypassed"], n), r_look)
            out.append(TimeConstant(f"{nm}.c_e", "operating_point", c * r_seen))
        if isinstance(st, OpAmpNonInverting) and st.c_g is not None:
            c = _b(p[f"{nm}.c_g"], n)
            out.append(TimeConstant(f"{nm}.c_g", "operating_point", c * _b(p[f"{nm}.r_g"], n)))
        if st.c_out is not None:
            c = _b(p[f"{nm}.c_out"], n)
            r = s.output_ohm + s.r_next  # type: ignore[attr-defined]
            # the last stage's output capacitor drives only the load: a DC level at the
            # output connector; an inter-stage one feeds the next stage's bias network
            if j == last:
                share = s.output_ohm / r  # type: ignore[attr-defined]
                shift = np.abs(s.vout_dc_v) * share  # type: ignore[attr-defined]
                out.append(TimeConstant(f"{nm}.c_out", "dc_level", c * r, shift))
            else:
                out.append(TimeConstant(f"{nm}.c_out", "operating_point", c * r))
        r_src = s.output_ohm  # type: ignore[attr-defined]
    return out


def settle_times(taus: Sequence[TimeConstant], n: int) -> tuple[np.ndarray, np.ndarray]:
    """(wait after a level change, time for the output DC level to settle), each
    SETTLE_TAUS times the longest time constant of its kind (0 where there is none)."""

    def longest(kind: str) -> np.ndarray:
        arrs = [t.tau_s for t in taus if t.kind == kind]
        return np.max(np.stack(arrs), axis=0) if arrs else np.zeros(n)

    return SETTLE_TAUS * longest("operating_point"), SETTLE_TAUS * longest("dc_level")


def supply_settle_time(
    taus: Sequence[TimeConstant], settle_s: np.ndarray, supply_span_v: np.ndarray
) -> np.ndarray:
    """The wait after supply on: the level-change wait, or longer where a DC-level capacitor
    still charging keeps a stage's operating point more than SUPPLY_SHIFT_FRACTION of the
    supply span away (shift(t) = shift(0)·e^(−t/tau), so t = tau·ln(shift(0)/tolerance))."""
    wait = np.asarray(settle_s, dtype=float).copy()
    tol = SUPPLY_SHIFT_FRACTION * np.abs(np.asarray(supply_span_v, dtype=float))
    for t in taus:
        if t.supply_shift_v is None:
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            need = t.tau_s * np.log(np.maximum(t.supply_shift_v / tol, 1.0))
        wait = np.maximum(wait, np.nan_to_num(need))
    return wait
