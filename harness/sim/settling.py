"""The simulated board on its way from one balance to the next.

Why it exists: a real board is not in its periodic steady state the moment the level or the
supply changes: its coupling and bypass capacitors move from the old balance toward the new
one with the circuit's time constants (tens of milliseconds for an input capacitor into its
bias divider, seconds for a large output capacitor into its load).  A record taken too early
shows the bias shift not yet complete and the output's DC level still moving.  Without this
the simulated bench could not tell a harness that waits correctly from one that never waits.

How: each channel's capacitor state s = (v_C(0), v_C(−h)) is tracked with the time it was
known.  Under a constant drive the state tends to the periodic one s*, and the period map's
monodromy matrix M (from the shooting solution, :mod:`harness.sim.physics_circuit`) carries a
deviation forward by whole periods: s(t) − s* ≈ M^n (s(t_ref) − s*), n = ⌊(t − t_ref)·f⌋ (the
linearisation about the new balance, exact in the limit).  When the drive or the supply
changes, the state reached under the old drive is where the new one starts.  A record is
built from two periods solved from the actual (non-periodic) states at its start and end
(:meth:`BoardSim.transient`), interpolated across the record, so the waveform itself — with
its bias shift and clipping — is the circuit's, not a painted-on drift.  Once the deviation
is below :data:`SETTLED_V` the periodic solution is used as it is (no extra cost).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["SETTLED_V", "Drifting", "Tracker"]

#: A capacitor state this close to the periodic one counts as settled (volts).
SETTLED_V = 2e-6
#: A drive held at least this long is solved before the next change (shorter: a ramp step).
MIN_HOLD_S = 0.02


@dataclass
class _Track:
    resp: Any  # the PeriodicResponse of the drive since t_ref; None: changed, not solved yet
    state: np.ndarray  # capacitor state at t_ref
    t_ref: float
    f_hz: float  # drive frequency the state's second half (v_C(−h)) belongs to


class Drifting:
    """A record's worth of a settling channel: the period solved at its start and the one
    solved at its end, interpolated linearly over ``duration_s`` (record time t from 0)."""

    def __init__(self, start: Any, end: Any, duration_s: float) -> None:
        self.start = start
        self.end = end
        self.duration_s = max(float(duration_s), 1e-12)
        self.nodes = start.nodes
        self.frequency_hz = start.frequency_hz

    def evaluate(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        t = np.asarray(t, dtype=float)
        a_in, a_out = self.start.evaluate(t)
        b_in, b_out = self.end.evaluate(t)
        w = np.clip(t / self.duration_s, 0.0, 1.0)
        return a_in + (b_in - a_in) * w, a_out + (b_out - a_out) * w


def propagate(resp: Any, state: np.ndarray, elapsed_s: float) -> np.ndarray:
    """The capacitor state ``elapsed_s`` after ``state`` under ``resp``'s drive."""
    target = resp.state
    mono = resp.monodromy
    if target is None or mono is None or len(state) != len(target):
        return state if target is None else target
    d = state - target
    big = float(np.max(np.abs(d))) if d.size else 0.0
    n = int(max(elapsed_s, 0.0) * resp.frequency_hz)
    if big <= SETTLED_V or n <= 0:
        return target + d if n <= 0 else target
    d_new = np.linalg.matrix_power(mono, n) @ d
    # a stable circuit only shrinks a deviation; anything else is numerical: settled
    if not np.all(np.isfinite(d_new)) or float(np.max(np.abs(d_new))) > 10.0 * big:
        return target
    return target + d_new


class Tracker:
    """Capacitor states of every channel, against a clock (see the module doc)."""

    def __init__(self, sim: Any) -> None:
        self.sim = sim
        self.tracks: list[_Track] | None = None
        self.key: tuple | None = None

    def changed(self, key: tuple, now: float, steady_for: Callable[[tuple], list[Any]]) -> None:
        """The drive or supply is now ``key``: each channel's state is carried to ``now``
        under the drive it had, and waits there for the new drive's solution.  A drive
        never solved (nothing was recorded under it) is solved now with ``steady_for`` if
        it was held longer than :data:`MIN_HOLD_S`; a shorter one (a step of a level ramp)
        leaves the state where it was."""
        if self.tracks is None or key == self.key:
            return
        held = [tr for tr in self.tracks if tr.resp is None and now - tr.t_ref > MIN_HOLD_S]
        if held and self.key is not None:
            solved = steady_for(self.key)
            for tr, r in zip(self.tracks, solved, strict=True):
                if tr.resp is None and now - tr.t_ref > MIN_HOLD_S:
                    self._adopt(tr, r)
        for tr in self.tracks:
            if tr.resp is not None:
                tr.state = propagate(tr.resp, tr.state, now - tr.t_ref)
                tr.t_ref = now
            tr.resp = None
        self.key = key

    @staticmethod
    def _adopt(tr: _Track, r: Any) -> None:
        """Put a pending track under the solved response ``r`` of its drive."""
        tr.resp = r
        if r.frequency_hz != tr.f_hz and len(tr.state) % 2 == 0:
            # a new step h: the voltages one step back are, to first order, today's
            k = len(tr.state) // 2
            tr.state = np.concatenate([tr.state[:k], tr.state[:k]])
        tr.f_hz = r.frequency_hz

    def follow(self, key: tuple, responses: list[Any], now: float, duration_s: float) -> list[Any]:
        """What each channel shows over a record starting at ``now`` and lasting
        ``duration_s``, given the periodic responses of the present drive."""
        if self.tracks is None or len(self.tracks) != len(responses):
            # first sight of the board: it has long sat in this state
            self.tracks = [_Track(r, np.asarray(r.state), now, r.frequency_hz) for r in responses]
            self.key = key
            return responses
        if key != self.key:  # a change no instrument reported: it happened now
            self.changed(key, now, lambda _k: list(responses))
        out = []
        for tr, r in zip(self.tracks, responses, strict=True):
            if tr.resp is None:
                self._adopt(tr, r)
            s0 = propagate(r, tr.state, now - tr.t_ref)
            s1 = propagate(r, tr.state, now + duration_s - tr.t_ref)
            if r.state is None or max(_dev(s0, r.state), _dev(s1, r.state)) <= SETTLED_V:
                out.append(r)
                continue
            a, _ = self.sim.transient(r, s0)
            b, _ = self.sim.transient(r, s1) if _dev(s0, s1) > SETTLED_V else (a, None)
            out.append(Drifting(a, b, duration_s))
        return out


def _dev(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b)))) if len(a) else 0.0
