"""The simulated board under test: each channel solved as a large-signal circuit.

Why it exists: the simulated bench must answer like a real board, including where the limit
model is only approximate (clipping, bias shift under large drive, faults), and it must be
*independent* of the limit model's formulas, so that comparing the two tests both.  Nothing
here imports harness.model's design code; only the Board description is shared.

Physics (details and sources in :mod:`harness.sim.physics_circuit`):

* Each channel is a netlist of the parts fitted (:mod:`harness.sim.physics_netlist`): the
  generator's EMF behind its source resistance, coupling and bypass capacitors, bias
  resistors, transistors, op-amps and the load across the output connector.
* BJTs are full Ebers-Moll transport models with both junctions (Ebers & Moll, Proc. IRE
  1954), I_S and β_F from the board (typ by default), β_R = 3 (our choice, common practice
  1-10), optional Early voltage.  A saturated collector therefore follows the emitter up as
  the drive grows: the clipped half-cycle bends back instead of sitting flat.
* Op-amps are a macro-model: single pole from GBW and A0, output clamped smoothly to the rails
  less the headroom, output current limited.
* The periodic steady state is found by shooting on the capacitor voltages (Newton with the
  exact monodromy matrix of the BDF2 map), so the bias shift that the rectified base current
  causes on C_in under large drive is part of the answer, exactly as after a long wait on a
  real bench.  Why shooting: the coupling time constants are 10-1000 signal periods; a
  transient would have to run that long, shooting converges in 2-5 periods.

Supply: ``supply_v`` is the positive rail; on a split-supply board the negative rail tracks it
(V− = V−,nominal · supply_v / V+,nominal), as a tracking bench supply does.  0 V is "off":
every node then sits at 0 V and the outputs are ~0.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from harness.errors import FaultSpecError, StageproofError
from harness.model.board import Board
from harness.sim.physics_circuit import (
    Circuit,
    ConvergenceError,
    OpAmpModel,
    periodic_steady_state,
    thermal_voltage,
    transient_period,
)
from harness.sim.physics_faults import (
    FAULT_KINDS,
    Fault,
    check_fault,
    component_refs,
    parse_fault,
    stage_refs,
)
from harness.sim.physics_netlist import BETA_R_DEFAULT, SimParams, StageNodes, build_channel

__all__ = [
    "BETA_R_DEFAULT",
    "FAULT_KINDS",
    "BoardSim",
    "Fault",
    "PeriodicResponse",
    "SimParams",
    "SimulationError",
    "component_refs",
    "parse_fault",
    "stage_refs",
    "thermal_voltage",
]

_TABLE_POINTS = 1 << 15  # band-limited upsampling table for evaluate()
_CACHE_SIZE = 16  # each response holds a 2^15-point table (~0.5 MB): keep few


class SimulationError(StageproofError, ArithmeticError):
    """The simulated board's circuit could not be solved (reported, never a traceback)."""


@dataclass(frozen=True, eq=False)
class PeriodicResponse:
    """One period of the channel's periodic steady state.

    ``t_s`` are the sample times 0, T/N, …; ``v_in`` is the voltage at the board's input
    connector (after the generator's source resistance), ``v_out`` at the channel output
    connector (across the load), ``nodes`` every node's waveform (``"<stage>.c"`` etc.).
    """

    channel: str
    amplitude_vpk: float
    frequency_hz: float
    offset_v: float
    source_ohm: float
    supply_v: float
    t_s: np.ndarray
    v_in: np.ndarray
    v_out: np.ndarray
    nodes: Mapping[str, np.ndarray] = field(default_factory=dict)
    shooting_iterations: int = 0
    periodicity_error_v: float = 0.0
    #: capacitor state (v_C(0), v_C(−h)) of this period's start, the period map's
    #: monodromy matrix about it and the unknowns over the period (steps, n): what
    #: :meth:`BoardSim.transient` needs to follow the board from another state
    state: np.ndarray | None = field(default=None, repr=False)
    monodromy: np.ndarray | None = field(default=None, repr=False)
    x_unknown: np.ndarray | None = field(default=None, repr=False)

    @property
    def period_s(self) -> float:
        return 1.0 / self.frequency_hz

    @cached_property
    def _tables(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        grid = np.arange(_TABLE_POINTS) / _TABLE_POINTS
        return grid, _upsample(self.v_in, _TABLE_POINTS), _upsample(self.v_out, _TABLE_POINTS)

    def evaluate(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(v_in, v_out) at arbitrary times ``t`` (s; t = 0 is the start of this period and the
        waveform repeats).  Band-limited: the period's FFT is zero-padded to 32768 points per
        period once, then read with linear interpolation (relative error < 1e-8 at the
        tenth harmonic), so a 1e6-sample record costs a few tens of ms."""
        t = np.asarray(t, dtype=float)
        phase = np.mod(t * self.frequency_hz, 1.0)
        grid, tin, tout = self._tables
        return (np.interp(phase, grid, tin, period=1.0), np.interp(phase, grid, tout, period=1.0))

    def harmonics(self, which: str = "out", k_max: int = 10) -> np.ndarray:
        """Complex amplitudes (peak) of harmonics 0..k_max of v_in or v_out."""
        y = self.v_out if which == "out" else self.v_in
        spec = np.fft.rfft(y) / len(y)
        spec[1:] *= 2.0
        return spec[: k_max + 1]


def _upsample(y: np.ndarray, points: int) -> np.ndarray:
    n = len(y)
    spec = np.fft.rfft(y)
    if n % 2 == 0:
        spec[-1] *= 0.5  # split the Nyquist bin between ±f_N
    big = np.zeros(points // 2 + 1, dtype=complex)
    big[: len(spec)] = spec
    return np.fft.irfft(big, points) * (points / n)


def _key(*values: Any) -> tuple:
    return tuple(float(f"{v:.12g}") if isinstance(v, float) else v for v in values)


class _ChannelSolver:
    """One channel at one supply voltage and source resistance: compiled circuit, DC point,
    and the last converged shooting states for warm starts."""

    def __init__(self, circuit: Circuit, stage_nodes: list[StageNodes]) -> None:
        self.circuit = circuit
        self.stage_nodes = stage_nodes
        self.dc_cache: dict[tuple, np.ndarray] = {}
        self.warm: dict[tuple, list[tuple[float, np.ndarray, np.ndarray]]] = {}


class BoardSim:
    """The simulated board: ``respond`` gives the periodic steady state of a channel driven by
    a sine, ``operating_point`` the DC bias, ``supply_current_a`` the quiescent current.

    ``faults``: Fault objects or their text (``"R104:drift=1.3"``); ``supply_v``: positive rail
    (None = board nominal); ``params``: ``"typ"``/``"min"``/``"max"`` or a dict of
    :class:`SimParams` overrides (e.g. ``{"beta_r": 5, "steps_per_period": 1024}``).
    """

    def __init__(
        self,
        board: Board,
        faults: Iterable[Fault | str] = (),
        supply_v: float | None = None,
        params: str | Mapping[str, Any] | SimParams = "typ",
    ) -> None:
        self.board = board
        parsed = []
        for f in faults:
            fault = parse_fault(f) if isinstance(f, str) else f
            if not isinstance(fault, Fault):
                raise FaultSpecError(repr(f), "not a fault", hint="pass Fault(...) or text")
            check_fault(board, fault)
            parsed.append(fault)
        self.faults: tuple[Fault, ...] = tuple(parsed)
        self.params = SimParams.from_spec(params)
        self._supply_v: float | None = None
        self.supply_v = supply_v  # validates
        self._solvers: dict[tuple, _ChannelSolver] = {}
        self._cache: OrderedDict[tuple, PeriodicResponse] = OrderedDict()
        self.stats = {"solved": 0, "cached": 0}

    # --- supply ------------------------------------------------------------------------------

    @property
    def supply_v(self) -> float:
        """The positive rail now applied (V)."""
        return self.board.supply.v_pos if self._supply_v is None else self._supply_v

    @supply_v.setter
    def supply_v(self, value: float | None) -> None:
        if value is not None:
            v = float(value)
            if not math.isfinite(v) or v < 0:
                raise FaultSpecError(f"supply_v={value!r}", "supply must be 0 V (off) or more")
            if v > 2.0 * self.board.supply.v_pos:
                raise FaultSpecError(
                    f"supply_v={value!r}",
                    "more than twice the nominal supply",
                    hint="the simulated board would be destroyed; lower it",
                )
            value = v
        self._supply_v = value

    def _rails(self, supply_v: float | None) -> tuple[float, float]:
        vp = self.supply_v if supply_v is None else float(supply_v)
        nominal = self.board.supply.v_pos
        vn = self.board.supply.v_neg * (vp / nominal) if nominal else 0.0
        return vp, vn

    # --- plumbing ----------------------------------------------------------------------------

    def _channel(self, name: str):
        try:
            return self.board.channel(name)
        except KeyError:
            names = ", ".join(ch.name for ch in self.board.channels)
            raise FaultSpecError(
                f"channel={name}", f"no channel {name!r} on this board", hint=f"use one of: {names}"
            ) from None

    def _solver(self, channel: str, v_pos: float, v_neg: float) -> _ChannelSolver:
        key = _key(channel, v_pos, v_neg)
        sol = self._solvers.get(key)
        if sol is None:
            ch = self._channel(channel)
            net, stage_nodes = build_channel(self.board, ch, self.faults, self.params, v_pos, v_neg)
            sol = _ChannelSolver(Circuit(net, self.params.temperature_k), stage_nodes)
            self._solvers[key] = sol
        return sol

    def _dc(self, sol: _ChannelSolver, offset_v: float, source_ohm: float) -> np.ndarray:
        key = _key(offset_v, source_ohm)
        x = sol.dc_cache.get(key)
        if x is None:
            try:
                x = sol.circuit.dc(offset_v, 1.0 / max(source_ohm, 1e-3))
            except (ConvergenceError, np.linalg.LinAlgError) as exc:
                raise SimulationError(f"DC operating point not found: {exc}") from None
            sol.dc_cache[key] = x
        return x

    # --- public API --------------------------------------------------------------------------

    def respond(
        self,
        channel: str,
        amplitude_vpk: float,
        frequency_hz: float,
        offset_v: float = 0.0,
        source_ohm: float = 50.0,
        *,
        supply_v: float | None = None,
    ) -> PeriodicResponse:
        """Periodic steady state of ``channel`` driven by a generator of EMF
        ``offset_v + amplitude_vpk·sin(2πft)`` behind ``source_ohm``.  Cached."""
        amplitude_vpk, frequency_hz = float(amplitude_vpk), float(frequency_hz)
        offset_v, source_ohm = float(offset_v), float(source_ohm)
        if not (math.isfinite(amplitude_vpk) and amplitude_vpk >= 0):
            raise FaultSpecError(f"amplitude={amplitude_vpk}", "amplitude must be >= 0 V")
        if not (math.isfinite(frequency_hz) and frequency_hz > 0):
            raise FaultSpecError(f"frequency={frequency_hz}", "frequency must be > 0 Hz")
        if not (math.isfinite(source_ohm) and source_ohm >= 0):
            raise FaultSpecError(f"source_ohm={source_ohm}", "source resistance must be >= 0")
        if not math.isfinite(offset_v):
            raise FaultSpecError(f"offset_v={offset_v}", "offset must be finite")
        v_pos, v_neg = self._rails(supply_v)
        key = _key(channel, amplitude_vpk, frequency_hz, offset_v, source_ohm, v_pos)
        hit = self._cache.get(key)
        if hit is not None:
            self._cache.move_to_end(key)
            self.stats["cached"] += 1
            return hit
        sol = self._solver(channel, v_pos, v_neg)
        circ = sol.circuit
        x_dc = self._dc(sol, offset_v, source_ohm)
        steps = self.params.steps_per_period
        wkey = _key(frequency_hz, offset_v, source_ohm)
        init_state = x_guess = None
        near = sol.warm.get(wkey)
        if near:
            amp, state, xg = min(near, key=lambda w: abs(w[0] - amplitude_vpk))
            # only a very close neighbour beats the coarse pre-pass (measured)
            if abs(amp - amplitude_vpk) <= 0.02 * max(amplitude_vpk, amp):
                init_state = state
                x_guess = xg.copy()
        omega = 2.0 * math.pi * frequency_hz

        def emf(t: np.ndarray) -> np.ndarray:
            return offset_v + amplitude_vpk * np.sin(omega * t)

        g_src = 1.0 / max(source_ohm, 1e-3)
        try:
            try:
                per, state = periodic_steady_state(
                    circ, emf, g_src, 1.0 / frequency_hz, steps, x_dc, init_state, x_guess
                )
            except ConvergenceError:
                if init_state is None:
                    raise
                per, state = periodic_steady_state(
                    circ, emf, g_src, 1.0 / frequency_hz, steps, x_dc
                )
        except (ConvergenceError, np.linalg.LinAlgError) as exc:
            raise SimulationError(
                f"channel {channel}: no periodic solution at {amplitude_vpk:g} Vpk, "
                f"{frequency_hz:g} Hz: {exc}"
            ) from None
        # warm start store, shifted so that the stored guess is "the previous period"
        lst = sol.warm.setdefault(wkey, [])
        lst.append((amplitude_vpk, state, np.vstack([per.x[1:], per.x[:1]])))
        del lst[:-8]
        resp = _response(
            circ,
            per.x,
            channel=channel,
            amplitude_vpk=amplitude_vpk,
            frequency_hz=frequency_hz,
            offset_v=offset_v,
            source_ohm=source_ohm,
            supply_v=v_pos,
            shooting_iterations=per.iterations,
            periodicity_error_v=per.residual_v,
            state=_ro(state.copy()),
            monodromy=None if per.monodromy is None else _ro(per.monodromy),
            x_unknown=_ro(per.x.copy()),
        )
        self._cache[key] = resp
        if len(self._cache) > _CACHE_SIZE:
            self._cache.popitem(last=False)
        self.stats["solved"] += 1
        return resp

    def node_voltages(
        self, channel: str, *, supply_v: float | None = None, source_ohm: float | None = None
    ) -> dict[str, float]:
        """DC voltage of every node of ``channel`` (generator connected, EMF 0 V)."""
        v_pos, v_neg = self._rails(supply_v)
        sol = self._solver(channel, v_pos, v_neg)
        rs = self.board.conditions.source_ohm if source_ohm is None else source_ohm
        x = sol.circuit.full(self._dc(sol, 0.0, rs))
        return {
            name: float(x[i]) for name, i in sol.circuit.index.items() if not name.endswith("#p")
        }

    def operating_point(self, channel: str, *, supply_v: float | None = None) -> dict[str, float]:
        """DC bias keyed ``"<stage>.<quantity>"``: collector_v, emitter_v, base_v for BJT
        stages, output_v for op-amp stages (volts to ground)."""
        v = self.node_voltages(channel, supply_v=supply_v)
        return {key: v[node] for key, node in self.test_point_nodes(channel, supply_v).items()}

    def test_point_nodes(self, channel: str, supply_v: float | None = None) -> dict[str, str]:
        """``"<stage>.<quantity>"`` -> the netlist node it is read at."""
        v_pos, v_neg = self._rails(supply_v)
        out: dict[str, str] = {}
        for sn in self._solver(channel, v_pos, v_neg).stage_nodes:
            if sn.output is not None:
                out[f"{sn.name}.output_v"] = sn.output
            else:
                out[f"{sn.name}.collector_v"] = sn.collector  # type: ignore[assignment]
                out[f"{sn.name}.emitter_v"] = sn.emitter  # type: ignore[assignment]
                out[f"{sn.name}.base_v"] = sn.base  # type: ignore[assignment]
        return out

    def supply_current_a(self, v_supply: float | None = None) -> float:
        """Quiescent current drawn from the positive rail by the whole board (all channels),
        from the KCL residual at the rail node of each channel's DC solution, plus op-amp
        quiescent currents (scaled down smoothly when the supply is below a few volts)."""
        v_pos, v_neg = self._rails(v_supply)
        total = 0.0
        rs = self.board.conditions.source_ohm
        for ch in self.board.channels:
            sol = self._solver(ch.name, v_pos, v_neg)
            circ = sol.circuit
            xf = circ.full(self._dc(sol, 0.0, rs))
            total += _rail_current(circ, xf, "vpos")
            for el, i_out in zip(circ.opamps, circ.opamp_output_current(xf), strict=True):
                m = el.model
                assert isinstance(m, OpAmpModel)
                # the output sources current from V+ (sinks it into V−)
                total += m.quiescent_a * math.tanh(max(v_pos - v_neg, 0.0) / 3.0)
                total += max(i_out, 0.0)
        return total

    def transient(
        self, resp: PeriodicResponse, state: np.ndarray
    ) -> tuple[PeriodicResponse, np.ndarray]:
        """One period of ``resp``'s channel under ``resp``'s drive, started from capacitor
        state ``state`` instead of the periodic one: the board still settling after a level
        change or supply on.  Returns that period (``evaluate`` reads it as if it repeated)
        and the state it ends in."""
        if resp.x_unknown is None:
            raise SimulationError("the response carries no period solution to start from")
        v_neg = self._rails(resp.supply_v)[1]
        circ = self._solver(resp.channel, resp.supply_v, v_neg).circuit
        omega = 2.0 * math.pi * resp.frequency_hz

        def emf(t: np.ndarray) -> np.ndarray:
            return resp.offset_v + resp.amplitude_vpk * np.sin(omega * t)

        steps = len(resp.x_unknown)
        try:
            xs, end = transient_period(
                circ,
                emf,
                1.0 / max(resp.source_ohm, 1e-3),
                1.0 / resp.frequency_hz,
                steps,
                np.asarray(state, dtype=float),
                resp.x_unknown,
            )
        except (ConvergenceError, np.linalg.LinAlgError) as exc:
            raise SimulationError(f"channel {resp.channel}: transient not solved: {exc}") from None
        # samples at h … T; the table wants 0 … T−h: the end of the period stands for its start
        x_period = np.vstack([xs[-1:], xs[:-1]])
        out = _response(
            circ,
            x_period,
            channel=resp.channel,
            amplitude_vpk=resp.amplitude_vpk,
            frequency_hz=resp.frequency_hz,
            offset_v=resp.offset_v,
            source_ohm=resp.source_ohm,
            supply_v=resp.supply_v,
        )
        return out, end

    def stage_output_node(self, channel: str, stage: str) -> str:
        """The netlist node a stage drives (collector, follower emitter, op-amp output)."""
        v_pos, v_neg = self._rails(None)
        for sn in self._solver(channel, v_pos, v_neg).stage_nodes:
            if sn.name == stage:
                node = sn.output or (sn.emitter if sn.kind == "emitter_follower" else sn.collector)
                assert node is not None
                return node
        raise FaultSpecError(f"{channel}.{stage}", f"no stage {stage!r} on channel {channel}")

    def clear_cache(self) -> None:
        self._cache.clear()


def _response(circ: Circuit, x_period: np.ndarray, **fields: Any) -> PeriodicResponse:
    """A PeriodicResponse from the unknowns over one period (steps, n), t = 0 … T−h."""
    steps = len(x_period)
    full = np.empty((steps, circ.nf))
    full[:, : circ.n] = x_period
    full[:, circ.n :] = circ.known_values
    nodes = {
        name: _ro(full[:, circ.index[name]].copy())
        for name in circ.index
        if not name.endswith("#p")
    }
    return PeriodicResponse(
        t_s=_ro(np.arange(steps) / (steps * fields["frequency_hz"])),
        v_in=nodes[circ.netlist.input_node],
        v_out=nodes[circ.netlist.output_node],
        nodes=nodes,
        **fields,
    )


def _rail_current(circ: Circuit, xf: np.ndarray, rail: str) -> float:
    """Current flowing out of the rail into the circuit through resistors and BJT collectors
    (the rail's KCL residual with the sign turned round).  Op-amp outputs are handled by the
    caller, because the macro-model takes its output current from the node, not a rail."""
    if rail not in circ.index:
        return 0.0
    idx = circ.index[rail]
    current = 0.0
    for el in circ.resistors:
        a, b = circ.index[el.nodes[0]], circ.index[el.nodes[1]]
        if a == idx:
            current += (xf[a] - xf[b]) / el.value
        elif b == idx:
            current += (xf[b] - xf[a]) / el.value
    for k, (ic, ib) in enumerate(circ.bjt_currents(xf)):
        c, b, e = circ._bjt_idx[k]
        if c == idx:
            current += ic
        if b == idx:
            current += ib
        if e == idx:
            current -= ic + ib
    return current


def _ro(a: np.ndarray) -> np.ndarray:
    a.setflags(write=False)
    return a
