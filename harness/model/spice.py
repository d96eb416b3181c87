"""SPICE netlists written from a board file, and readers for ngspice's batch output.

Pure text in, text out: the tests run the netlist through ngspice (Debian package) as an
outside reference for the model.  BJTs are Gummel-Poon ``.model NPN`` cards with the board's
I_S (IS), beta (BF), reverse beta (BR) and Early voltage (VAF, absent = infinite); op-amps are
a voltage-controlled source with the board's open-loop gain (no rails: compare op-amp stages
below clipping only).
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

from harness.model.board import (
    Board,
    Channel,
    CommonEmitter,
    EmitterFollower,
    OpAmpInverting,
    OpAmpNonInverting,
    Stage,
)
from harness.model.params import TEMPERATURE_K, channel_parameters, nominal_arrays


def _v(x: float) -> str:
    return f"{x:.9g}"


def _channel_body(
    board: Board, ch: Channel, p: Mapping[str, float], amplitude_vpk: float, f: float
) -> tuple[list[str], list[str]]:
    """Element lines (supply, generator, stages, load) and the probed DC nodes of a channel."""
    lines = [f"VCC vcc 0 DC {_v(p['supply.positive_v'])}"]
    if "supply.negative_v" in p:
        lines.append(f"VEE vee 0 DC {_v(p['supply.negative_v'])}")
    lines.append(f"VSIG src 0 DC 0 AC 1 SIN(0 {_v(amplitude_vpk)} {_v(f)})")
    lines.append(f"RSRC src in {_v(max(p['source_ohm'], 1e-3))}")
    models: list[str] = []
    prev = "in"
    dc_nodes: list[str] = []
    for j, st in enumerate(ch.stages):
        nm = st.name

        def g(key: str, _nm: str = nm) -> float:
            return p[f"{_nm}.{key}"]

        def cin(
            node: str, _st: Stage = st, _j: int = j, _prev: str = prev, _lines: list[str] = lines
        ) -> str:
            if _st.c_in is not None:
                _lines.append(f"CIN{_j} {_prev} {node} {_v(g('c_in'))}")
                return node
            return _prev

        if isinstance(st, CommonEmitter | EmitterFollower):
            vaf = f" VAF={_v(g('vaf_v'))}" if f"{nm}.vaf_v" in p else ""
            models.append(
                f".model Q{j}MOD NPN(IS={_v(g('is_a'))} BF={_v(g('beta'))} "
                f"BR={_v(g('beta_r'))}{vaf})"
            )
        if isinstance(st, CommonEmitter):
            b = cin(f"b{j}")
            if b != f"b{j}":
                lines.append(f"RLINK{j} {b} b{j} 1e-3")
            lines += [
                f"R1_{j} vcc b{j} {_v(g('r1'))}",
                f"R2_{j} b{j} 0 {_v(g('r2'))}",
                f"RC{j} vcc c{j} {_v(g('rc'))}",
                f"Q{j} c{j} b{j} e{j} Q{j}MOD",
            ]
            byp = f"{nm}.re_bypassed" in p
            low = f"x{j}" if byp else "0"
            lines.append(f"RE{j} e{j} {low} {_v(max(g('re'), 1e-6))}")
            if byp:
                lines.append(f"REB{j} x{j} 0 {_v(g('re_bypassed'))}")
                if f"{nm}.c_e" in p:
                    lines.append(f"CE{j} x{j} 0 {_v(g('c_e'))}")
            out = f"c{j}"
            dc_nodes += [f"b{j}", f"e{j}", f"c{j}"]
        elif isinstance(st, EmitterFollower):
            if st.dc_coupled:
                lines.append(f"RLINK{j} {prev} b{j} 1e-3")
            else:
                b = cin(f"b{j}")
                if b != f"b{j}":
                    lines.append(f"RLINK{j} {b} b{j} 1e-3")
                lines += [f"R1_{j} vcc b{j} {_v(g('r1'))}", f"R2_{j} b{j} 0 {_v(g('r2'))}"]
            lines += [f"Q{j} vcc b{j} e{j} Q{j}MOD", f"RE{j} e{j} 0 {_v(g('re'))}"]
            out = f"e{j}"
            dc_nodes += [f"b{j}", f"e{j}"]
        elif isinstance(st, OpAmpInverting):
            x = cin(f"x{j}")
            lines += [
                f"RIN{j} {x} n{j} {_v(g('r_in'))}",
                f"RF{j} n{j} c{j} {_v(g('r_f'))}",
                f"EOP{j} c{j} 0 0 n{j} {_v(g('open_loop_gain'))}",
            ]
            out = f"c{j}"
            dc_nodes.append(f"c{j}")
        elif isinstance(st, OpAmpNonInverting):
            x = cin(f"p{j}")
            if x != f"p{j}":
                lines.append(f"RLINK{j} {x} p{j} 1e-3")
            if f"{nm}.r_bias" in p:
                lines.append(f"RB{j} p{j} 0 {_v(g('r_bias'))}")
            if f"{nm}.c_g" in p:
                lines += [f"RG{j} n{j} m{j} {_v(g('r_g'))}", f"CG{j} m{j} 0 {_v(g('c_g'))}"]
            else:
                lines.append(f"RG{j} n{j} 0 {_v(g('r_g'))}")
            lines += [
                f"RF{j} c{j} n{j} {_v(g('r_f'))}",
                f"EOP{j} c{j} 0 p{j} n{j} {_v(g('open_loop_gain'))}",
            ]
            out = f"c{j}"
            dc_nodes.append(f"c{j}")
        else:  # pragma: no cover - board.py knows only these kinds
            raise ValueError(st.kind)
        if st.c_out is not None:
            lines.append(f"COUT{j} {out} o{j} {_v(g('c_out'))}")
            out = f"o{j}"
        prev = out
    lines.append(f"RLOAD {prev} out 1e-3")
    lines.append(f"RL out 0 {_v(p['load_ohm'])}")
    return lines + models, dc_nodes


def _nominal(board: Board, ch: Channel, params: Mapping[str, float] | None) -> dict[str, float]:
    return {
        k: float(v[0]) for k, v in nominal_arrays(channel_parameters(board, ch), params).items()
    }


def channel_netlist(
    board: Board,
    channel_name: str,
    *,
    amplitude_vpk: float = 0.0,
    frequency_hz: float | None = None,
    params: Mapping[str, float] | None = None,
    probes: bool = True,
    transient_periods: int = 20,
    points_per_period: int = 400,
) -> str:
    """A netlist of one channel with its supply, generator (``source_ohm``) and load.

    Nodes: ``in`` (board input connector), ``out`` (channel output), ``b<j>``, ``e<j>``,
    ``c<j>`` (stage j's base, emitter, collector) and ``o<j>`` (stage j's output).  The
    ``.control`` block prints the operating point, the small-signal gain v(out)/v(in) at the
    test frequency, and a transient with ``fourier`` of v(out) when ``amplitude_vpk`` > 0.
    """
    ch = board.channel(channel_name)
    p = _nominal(board, ch, params)
    f = frequency_hz or board.conditions.frequency_hz
    body, dc_nodes = _channel_body(board, ch, p, amplitude_vpk, f)
    lines = [
        f"* stageproof: {board.name}, channel {ch.name} (from {board.source})",
        f".options temp={TEMPERATURE_K - 273.15:.2f} tnom={TEMPERATURE_K - 273.15:.2f}",
        *body,
    ]
    period = 1.0 / f
    ctl = [".control", "op"]
    if probes:
        ctl.append("print " + " ".join(f"v({n})" for n in dc_nodes))
    ctl += [
        f"ac lin 1 {_v(f)} {_v(f)}",
        "let gr = real(v(out)/v(in))",
        "let gi = imag(v(out)/v(in))",
        "print gr gi",
    ]
    if amplitude_vpk > 0:
        step = period / points_per_period
        ctl += [
            f"tran {_v(step)} {_v(transient_periods * period)} 0 {_v(step)}",
            f"fourier {_v(f)} v(out)",
        ]
    ctl += ["quit", ".endc", ".end"]
    return "\n".join(lines + ctl) + "\n"


@dataclass(frozen=True)
class SpiceCopy:
    """One copy of a channel in a batch netlist: its label, drive and parameter overrides."""

    label: str
    board: Board
    channel: str
    amplitude_vpk: float
    params: Mapping[str, float] | None = None


def batch_netlist(
    copies: Sequence[SpiceCopy],
    frequency_hz: float,
    *,
    transient_periods: int = 60,
    points_per_period: int = 400,
) -> str:
    """Several channel copies, each a subcircuit ``x<label>`` of its own, in one netlist: one
    ``op``, one ``ac`` (gains ``g<label>r``/``g<label>i`` of v(out)/v(in)), one transient
    long enough for the coupling capacitors to settle, and ``fourier`` (11 frequencies:
    DC and harmonics 1-10) of every copy's output, its input node (the drive the model is
    given) and its stages' DC nodes, so the bias under drive is read from the DC terms."""
    lines = [
        "* stageproof: batch of channel copies",
        f".options temp={TEMPERATURE_K - 273.15:.2f} tnom={TEMPERATURE_K - 273.15:.2f}",
    ]
    probes: list[str] = []
    waves: list[str] = []
    gains: list[str] = []
    for c in copies:
        ch = c.board.channel(c.channel)
        body, dc_nodes = _channel_body(
            c.board, ch, _nominal(c.board, ch, c.params), c.amplitude_vpk, frequency_hz
        )
        x = f"x{c.label}"
        lines += [f".subckt s{c.label}", *body, ".ends", f"{x} s{c.label}"]
        probes += [f"v({x}.{n})" for n in dc_nodes]
        if c.amplitude_vpk > 0:
            waves += [f"v({x}.out)", f"v({x}.in)"] + [f"v({x}.{n})" for n in dc_nodes]
        gains += [
            f"let g{c.label}r = real(v({x}.out)/v({x}.in))",
            f"let g{c.label}i = imag(v({x}.out)/v({x}.in))",
            f"print g{c.label}r g{c.label}i",
        ]
    step = 1.0 / (frequency_hz * points_per_period)
    ctl = [".control", "set nfreqs=11", "op"]
    ctl += [f"print {' '.join(probes[i : i + 8])}" for i in range(0, len(probes), 8)]
    ctl += [f"ac lin 1 {_v(frequency_hz)} {_v(frequency_hz)}", *gains]
    if waves:
        ctl.append(f"tran {_v(step)} {_v(transient_periods / frequency_hz)} 0 {_v(step)}")
        ctl += [f"fourier {_v(frequency_hz)} {w}" for w in waves]
    ctl += ["quit", ".endc", ".end"]
    return "\n".join(lines + ctl) + "\n"


_PRINT = re.compile(r"^\s*([\w().\[\]]+)\s*=\s*([-+0-9.eE]+)", re.MULTILINE)
_THD = re.compile(r"THD:\s*([-+0-9.eE]+)\s*%")
_HARM = re.compile(
    r"^\s*(\d+)\s+([-+0-9.eE]+)\s+([-+0-9.eE]+)\s+([-+0-9.eE]+)\s+([-+0-9.eE]+)"
    r"\s+([-+0-9.eE]+)\s*$",
    re.MULTILINE,
)


def parse_values(stdout: str) -> dict[str, float]:
    """``name = value`` lines of ngspice ``print`` (operating point, scalars)."""
    return {m.group(1).lower(): float(m.group(2)) for m in _PRINT.finditer(stdout)}


def parse_fourier(stdout: str) -> tuple[float, list[tuple[int, float, float]]]:
    """THD (percent) and the harmonic table (number, frequency, magnitude) of ``fourier``."""
    m = _THD.search(stdout)
    if m is None:
        raise ValueError("no fourier analysis in the ngspice output")
    rows = [
        (int(r.group(1)), float(r.group(2)), float(r.group(3)))
        for r in _HARM.finditer(stdout[m.end() :])
    ]
    return float(m.group(1)), rows


_FOURIER_HEAD = re.compile(r"Fourier analysis for (\S+?):")


def parse_fourier_all(stdout: str) -> dict[str, tuple[float, list[tuple[int, float, float]]]]:
    """Every ``fourier`` table in the output: node (as printed, lower case) -> THD and rows."""
    heads = list(_FOURIER_HEAD.finditer(stdout))
    out = {}
    for k, m in enumerate(heads):
        end = heads[k + 1].start() if k + 1 < len(heads) else len(stdout)
        out[m.group(1).lower()] = parse_fourier(stdout[m.start() : end])
    return out
