"""SPICE netlist of a board channel for the ngspice cross-checks of the simulated board.

Written straight from the Board dataclasses, not from harness.sim's netlist builder, so a
wiring mistake in the simulator cannot be copied into its reference.  The Ebers-Moll model
maps to ngspice's Gummel-Poon BJT with IS, BF, BR and everything else at its default
(VAF = IKF = ∞, no resistances or capacitances; ngspice manual, BJT model parameters,
from memory).  TNOM = TEMP = 27 °C, as the simulator assumes.
"""

from __future__ import annotations

from harness.model.board import Board, CommonEmitter, EmitterFollower


def _n(name: str) -> str:
    return name.replace(".", "_")


def channel_netlist(
    board: Board,
    channel: str,
    *,
    amplitude_vpk: float,
    frequency_hz: float,
    source_ohm: float,
    beta_r: float,
    offset_v: float = 0.0,
    control: str,
    supply_v: float | None = None,
) -> str:
    """Netlist of one BJT channel (common-emitter / follower stages) with a sine source
    ``VG`` (also AC 1) behind ``RS`` into node ``in``; ``control`` is the .control body."""
    ch = board.channel(channel)
    vcc = board.supply.v_pos if supply_v is None else supply_v
    lines = [
        f"* {board.name} channel {channel}",
        f"VCC vpos 0 {vcc}",
        f"VG src 0 SIN({offset_v} {amplitude_vpk} {frequency_hz}) AC 1",
        f"RS src in {max(source_ohm, 1e-3)}",
    ]
    models: dict[str, str] = {}
    sig = "in"
    for j, st in enumerate(ch.stages):
        s = _n(st.name)
        last = j == len(ch.stages) - 1
        if not isinstance(st, CommonEmitter | EmitterFollower):
            raise NotImplementedError("op-amp stages are checked against formulas instead")
        tr = st.transistor
        models[tr.name] = f".model Q_{tr.name} NPN(IS={tr.is_a.typ} BF={tr.beta.typ} BR={beta_r})"
        if isinstance(st, CommonEmitter):
            b = f"{s}_b" if st.c_in is not None else sig
            if st.c_in is not None:
                lines.append(f"C_{s}_in {sig} {b} {st.c_in.nominal}")
            lines += [
                f"R_{s}_1 vpos {b} {st.r1.nominal}",
                f"R_{s}_2 {b} 0 {st.r2.nominal}",
                f"R_{s}_c vpos {s}_c {st.rc.nominal}",
            ]
            if st.re_bypassed is not None:
                lines += [
                    f"R_{s}_e {s}_e {s}_e2 {st.re.nominal}",
                    f"R_{s}_eb {s}_e2 0 {st.re_bypassed.nominal}",
                ]
                if st.c_e is not None:
                    lines.append(f"C_{s}_e {s}_e2 0 {st.c_e.nominal}")
            else:
                lines.append(f"R_{s}_e {s}_e 0 {st.re.nominal}")
            lines.append(f"Q_{s} {s}_c {b} {s}_e Q_{tr.name}")
            out = f"{s}_c"
        else:
            b = sig
            if not st.dc_coupled:
                b = f"{s}_b"
                lines.append(f"C_{s}_in {sig} {b} {st.c_in.nominal}")  # type: ignore[union-attr]
                lines += [
                    f"R_{s}_1 vpos {b} {st.r1.nominal}",  # type: ignore[union-attr]
                    f"R_{s}_2 {b} 0 {st.r2.nominal}",
                ]  # type: ignore[union-attr]
            lines += [f"R_{s}_e {s}_e 0 {st.re.nominal}", f"Q_{s} vpos {b} {s}_e Q_{tr.name}"]
            out = f"{s}_e"
        if st.c_out is not None:
            nxt = "out" if last else f"{s}_o"
            lines.append(f"C_{s}_out {out} {nxt} {st.c_out.nominal}")
            out = nxt
        sig = out
    if sig != "out":
        lines.append(f"R_tie {sig} out 1e-6")
    lines.append(f"RL out 0 {ch.load_ohm.nominal}")
    lines += list(models.values())
    # "quit 0": ngspice -b exits 1 when a .control block runs no netlist analysis
    lines += [
        ".options reltol=1e-6 vntol=1e-9 abstol=1e-14",
        ".control",
        control,
        "quit 0",
        ".endc",
        ".end",
    ]
    return "\n".join(lines) + "\n"


def parse_prints(stdout: str) -> dict[str, float]:
    """``name = value`` lines printed by ngspice's ``print`` for single-point vectors."""
    out: dict[str, float] = {}
    for line in stdout.splitlines():
        if " = " in line:
            key, _, val = line.partition(" = ")
            try:
                out[key.strip()] = float(val.split()[0])
            except (ValueError, IndexError):
                continue
    return out


def parse_thd(stdout: str) -> list[float]:
    """THD (%) of every ``fourier`` block, in order."""
    vals = []
    for line in stdout.splitlines():
        if "THD:" in line:
            vals.append(float(line.split("THD:")[1].split("%")[0]))
    return vals
