"""What stands behind the simulated instruments: the board, its supply and the wiring.

One :class:`World` per bench holds the board physics (``physics.BoardSim``), the wiring
of the fixture the bench writes (generator output 1 drives every channel input in
parallel; scope input 1 probes the common input, inputs 2.. the channel outputs in board
order; switch relay ``<c><nn>`` connects the DMM to test point ``nn`` of channel ``c``)
and the bench-wide lock every instrument works under.  The instruments ask it for the
signals at their inputs; they never talk to each other directly.

The channels share one input node.  Each channel's response is first computed alone
behind the 50 Ω source; if their input voltages differ (a faulty channel loads the node
differently) the node is re-solved with every other channel's input impedance as a
Thevenin load on the source, so the common-input probe and each output stay consistent.

Signal faults (``A.buffer:oscillate=400000,0.2``, ``A:hum=50``) are added to the channel
outputs while the board is powered: an oscillation at a stage's output reaches the channel
output through the later stages' gain, hum coupled into the channel input through the whole
channel's (each gain the physics' own small-signal response at the board's test frequency,
an approximation stated here: a real channel's gain differs a little at 50 Hz or 400 kHz).
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from harness.model.board import Board, CommonEmitter, EmitterFollower
from harness.sim.settling import Drifting, Tracker

__all__ = ["Drive", "SignalSet", "TestPoint", "World", "test_points"]


class ResponseLike(Protocol):
    def evaluate(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]: ...


@dataclass(frozen=True)
class TestPoint:
    """A DC test point reachable through switch relay ``relay``."""

    relay: int
    channel: str
    stage: str
    quantity: str  # collector_v, emitter_v, base_v

    @property
    def key(self) -> str:
        return f"{self.stage}.{self.quantity}"


def test_points(board: Board) -> tuple[TestPoint, ...]:
    """Relays ``<c><nn>``: channel c (1-based, board order), nn counting collector,
    emitter, base of each BJT stage in order (A.gain: 101-103, A.buffer: 104-106)."""
    points = []
    for c, channel in enumerate(board.channels, start=1):
        n = 0
        for stage in channel.stages:
            if not isinstance(stage, CommonEmitter | EmitterFollower):
                continue
            for quantity in ("collector_v", "emitter_v", "base_v"):
                n += 1
                points.append(TestPoint(c * 100 + n, channel.name, stage.name, quantity))
    return tuple(points)


@dataclass(frozen=True)
class Drive:
    """What the generator puts out: EMF peak volts behind ``source_ohm``."""

    emf_vpk: float
    frequency_hz: float
    offset_v: float
    source_ohm: float
    on: bool


@dataclass(frozen=True)
class SignalSet:
    """A snapshot of every scope-visible signal: call ``signal(k, t)`` for input k."""

    frequency_hz: float
    inputs: Sequence[Callable[[np.ndarray], np.ndarray]]

    def signal(self, scope_input: int, t: np.ndarray) -> np.ndarray:
        if 1 <= scope_input <= len(self.inputs):
            return self.inputs[scope_input - 1](t)
        return np.zeros_like(t)  # nothing wired to this input


def _fundamental(resp: ResponseLike, frequency_hz: float) -> float:
    """Peak of the fundamental of v_in over one period (input-node loading estimate)."""
    n = 256
    t = np.arange(n) / (n * frequency_hz)
    v_in, _ = resp.evaluate(t)
    return float(2.0 * abs(np.fft.rfft(np.asarray(v_in, dtype=float))[1]) / n)


class World:
    """Board + supply + generator state behind the instruments (thread-safe via ``lock``).

    ``sim`` is a ``physics.BoardSim``.  ``drive``, ``rails`` and ``closed_relays`` are
    callables the bench points at its instruments, so the world always reads their
    present state.  The board sees the supply it is given: ``rails()`` returns the
    positive output volts and the negative output's magnitude; the physics takes one
    positive rail with the negative one tracking it, so a split board runs on the weaker
    of the two (relative to nominal); an output switched off is 0 V, a dead board.
    """

    def __init__(
        self,
        board: Board,
        sim: Any,
        *,
        rng_seed: int = 20240601,
        settling: bool = False,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.board = board
        self.sim = sim
        #: with ``settling`` the board moves from balance to balance in the time that
        #: passes (:mod:`harness.sim.settling`); without, it is always settled
        self.settling = settling
        self._clock = clock
        self._skipped_s = 0.0
        self._tracker = Tracker(sim)
        self.lock = threading.RLock()
        self.rng = np.random.default_rng(rng_seed)
        self.points = test_points(board)
        self._by_relay = {p.relay: p for p in self.points}
        self._cache: dict[tuple, list[ResponseLike]] = {}
        self.drive: Callable[[], Drive] = lambda: Drive(0.0, 1000.0, 0.0, 50.0, False)
        self.rails: Callable[[], tuple[float, float]] = lambda: (
            board.supply.v_pos,
            abs(board.supply.v_neg),
        )
        self.closed_relays: Callable[[], Sequence[int]] = lambda: ()
        self._extra: dict[float, dict[str, list[tuple[float, float]]]] = {}

    # -- board state ----------------------------------------------------------------------------

    def board_supply_v(self) -> float:
        """The positive rail the physics runs on (0 = off), capped at twice nominal."""
        v_pos, v_neg = self.rails()
        nominal = self.board.supply
        ratio = max(v_pos, 0.0) / nominal.v_pos
        if nominal.negative is not None:
            ratio = min(ratio, max(v_neg, 0.0) / abs(nominal.v_neg))
        return round(min(ratio, 2.0) * nominal.v_pos, 4)

    def supply_current_a(self, supply_v: float) -> float:
        return float(self.sim.supply_current_a(supply_v))

    def operating_point(self) -> dict[str, dict[str, float]]:
        """Operating point per channel at the present supply."""
        v = self.board_supply_v()
        return {
            ch.name: dict(self.sim.operating_point(ch.name, supply_v=v))
            for ch in self.board.channels
        }

    def test_point_v(self, relay: int) -> float:
        point = self._by_relay.get(relay)
        if point is None:
            return 0.0
        v = self.board_supply_v()
        if self.settling:
            k = [ch.name for ch in self.board.channels].index(point.channel)
            resp = self._followed(0.0)[k]
            if isinstance(resp, Drifting):  # still settling: the period's mean
                node = self.sim.test_point_nodes(point.channel, v)[point.key]
                return float(np.mean(resp.start.nodes[node]))
        return float(self.sim.operating_point(point.channel, supply_v=v).get(point.key, 0.0))

    # -- time -------------------------------------------------------------------------------------

    def now(self) -> float:
        """The bench's clock: the wall clock plus any time :meth:`advance` skipped."""
        return self._clock() + self._skipped_s

    def advance(self, seconds: float) -> None:
        """Let ``seconds`` pass for the board at once (a simulated wait: tests and scripts
        pass this as the harness's sleep)."""
        with self.lock:
            self._skipped_s += max(float(seconds), 0.0)

    def changed(self) -> None:
        """The generator or the supply changed: the board starts moving toward the new
        balance now (instruments call this on every change they make)."""
        if self.settling:
            with self.lock:
                self._tracker.changed(self._key(), self.now(), self._steady_for)

    def follow_now(self) -> None:
        """Start following the board from its present state, taken as long settled."""
        self._followed(0.0)

    def _key(self) -> tuple:
        d = self.drive()
        emf = d.emf_vpk if d.on else 0.0
        offset = d.offset_v if d.on else 0.0
        return (emf, d.frequency_hz, offset, d.source_ohm, self.board_supply_v())

    def is_test_point(self, relay: int) -> bool:
        return relay in self._by_relay

    # -- signals --------------------------------------------------------------------------------

    def signals(self, duration_s: float = 0.0) -> SignalSet:
        """Every scope-visible signal for the present drive and supply, over a record
        starting now and lasting ``duration_s`` (what a settling board shows in it)."""
        d = self.drive()
        v = self.board_supply_v()
        responses = self._followed(duration_s)
        inputs: list[Callable[[np.ndarray], np.ndarray]] = [_pick(responses[0], 0)]
        extra = self.signal_faults(v)
        inputs += [
            _pick(r, 1, extra.get(ch.name, ()))
            for r, ch in zip(responses, self.board.channels, strict=True)
        ]
        return SignalSet(d.frequency_hz, inputs)

    def _steady(self) -> tuple[tuple, list[ResponseLike]]:
        """The periodic responses of every channel for the present drive (cached)."""
        key = self._key()
        return key, self._steady_for(key)

    def _steady_for(self, key: tuple) -> list[ResponseLike]:
        hit = self._cache.get(key)
        if hit is None:
            if len(self._cache) > 64:
                self._cache.clear()
            emf, f, offset, rs, v = key
            hit = self._respond(v, emf, f, offset, rs)
            self._cache[key] = hit
        return hit

    def _followed(self, duration_s: float) -> list[ResponseLike]:
        key, steady = self._steady()
        if not self.settling:
            return steady
        with self.lock:
            return self._tracker.follow(key, list(steady), self.now(), duration_s)

    def signal_faults(self, supply_v: float) -> dict[str, list[tuple[float, float]]]:
        """Tones the signal faults add to each channel output at this supply (none unpowered):
        (frequency Hz, peak V at the output connector)."""
        faults = [f for f in getattr(self.sim, "faults", ()) if f.kind in ("oscillate", "hum")]
        if not faults or supply_v <= 0.0:
            return {}
        hit = self._extra.get(supply_v)
        if hit is not None:
            return hit
        out: dict[str, list[tuple[float, float]]] = {}
        f0 = self.board.conditions.frequency_hz
        rs = self.board.conditions.source_ohm
        for fault in faults:
            channel, _, stage = fault.ref.partition(".")
            # the physics' own small-signal response: 1 mV peak at the test frequency
            resp = self.sim.respond(channel, 1e-3, f0, 0.0, rs, supply_v=supply_v)
            out_pk = abs(resp.harmonics("out", 1)[1])
            if fault.kind == "hum":
                gain = out_pk / max(abs(resp.harmonics("in", 1)[1]), 1e-30)
                base = float(fault.value)
                tones = [
                    (k * base, float(gain * fault.signal_vpk * w))
                    for k, w in ((1, 1.0), (2, 0.5), (3, 0.25))
                ]
            else:
                node = self.sim.stage_output_node(channel, stage)
                y = np.asarray(resp.nodes[node], dtype=float)
                node_pk = 2.0 * abs(np.fft.rfft(y)[1]) / len(y)
                gain = out_pk / max(node_pk, 1e-30)
                tones = [(float(fault.value), float(gain * fault.signal_vpk))]
            out.setdefault(channel, []).extend(tones)
        self._extra[supply_v] = out
        return out

    def _respond(
        self, v: float, emf: float, f: float, offset: float, rs: float
    ) -> list[ResponseLike]:
        sim = self.sim
        names = [ch.name for ch in self.board.channels]
        first = [sim.respond(n, emf, f, offset, rs, supply_v=v) for n in names]
        if len(names) == 1 or emf == 0.0:
            return first
        vin = [_fundamental(r, f) for r in first]
        if max(vin) <= 0 or (max(vin) - min(vin)) / max(vin) < 1e-4:
            return first
        # each channel's input impedance magnitude from the divider it forms with rs
        z = [rs * x / (emf - x) if emf - x > 1e-12 * emf else math.inf for x in vin]
        out = []
        for k, name in enumerate(names):
            g_others = sum(1.0 / zj for j, zj in enumerate(z) if j != k and zj > 0)
            if g_others <= 0:
                out.append(first[k])
                continue
            z_o = 1.0 / g_others
            e_th = emf * z_o / (rs + z_o)
            r_th = rs * z_o / (rs + z_o)
            out.append(sim.respond(name, e_th, f, offset, r_th, supply_v=v))
        return out


def _pick(
    resp: ResponseLike, which: int, tones: Sequence[tuple[float, float]] = ()
) -> Callable[[np.ndarray], np.ndarray]:
    """One waveform of a response, with added tones (frequency Hz, peak V) if any."""

    def sig(t: np.ndarray) -> np.ndarray:
        v = np.asarray(resp.evaluate(t)[which], dtype=float)
        for f, a in tones:
            v = v + a * np.sin(2 * np.pi * f * np.asarray(t, dtype=float))
        return v

    return sig
