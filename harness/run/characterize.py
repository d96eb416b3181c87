"""Characterisation of a prototype: fine level sweep, frequency sweep, model comparison.

Where the production sequence measures just enough to decide, characterisation draws the
curves an engineer compares with the design:

* level sweep at the board's test frequency, in ``level_step_db`` steps from
  ``level_below_db`` under the nominal input level up to the level where the board's
  clipping criterion is met or the safe input level, whichever comes first (never above it;
  rises ramp through :class:`~harness.run.safety.SafeGenerator`);
* frequency sweep at the nominal level, log-spaced (``points_per_decade``) from
  ``f_start_hz`` (extended down to well below the model's low-corner band, so the −3 dB point
  is bracketed) to ``f_stop_hz`` (or what the scope's sample rates allow), then a few
  bisection steps (in log f) around the −3 dB crossing;
* the measured low corner (−3 dB against the mid-band gain, interpolated in log f) against
  the model's ``ChannelLimits.low_corner_hz``; gain, THD and clipping threshold against
  their limits too.  Decisions here are simple acceptance against the model's band (ILAC
  G8:09/2019 §4.2.1, w = 0): characterisation asks whether the prototype behaves like the
  model, not whether it may ship.

Every point goes to the store as a sweep point (sweeps ``"level"`` and ``"frequency"``, the
frequency and phase in ``extra_json``); comparisons as measurements.  A complete run's
verdict is PASS when every compared quantity lies in the model's band.

Acquisition (plan a coherent record, range the scope, acquire, analyse), the run header
and the row writing are the production sequence's own, from :mod:`harness.run.bench_ops`;
only the policy differs: longer records are allowed, a sweep frequency may sit
``FREQ_TOLERANCE`` off its target, and the digitiser-harmonic correction is applied only
where input and output fill their ranges within ``FILL_MATCH`` of each other.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from harness.errors import AnalysisError, RunAborted, SafetyError
from harness.io.fixture import ChannelConnection, FixtureConfig
from harness.measure import RecordAnalysis, clip_threshold
from harness.measure.floor import FLOOR_MARGIN
from harness.model.board import Board
from harness.run.bench_ops import (
    BoardRun,
    plan_record,
    raise_aborted,
    routed,
    run_guarded,
)
from harness.run.progress import NullProgress, Progress
from harness.store import MeasurementRow

log = logging.getLogger("harness.run.characterize")

#: The -3 dB point is bracketed from points this far (factor) below the model's lowest corner.
CORNER_MARGIN = 0.4
#: Mid-band reference: gains between this multiple of the model's corner and the test
#: frequency (a single-pole high-pass is within 0.01 dB of mid-band at 20x its corner).
MIDBAND_FACTOR = 20.0
#: A frequency-sweep point may sit this fraction off its log-spaced target (coherence).
FREQ_TOLERANCE = 0.05


@dataclass(frozen=True)
class CharacterizeOptions:
    """How the sweeps are made.  ``settle_wait_s`` None waits the model's settle time after
    every level or frequency change (a simulated bench is settled at once: pass 0)."""

    operator: str = ""
    station_name: str = ""
    level_step_db: float = 1.0
    level_below_db: float = 20.0
    f_start_hz: float = 10.0
    f_stop_hz: float = 20000.0
    points_per_decade: int = 6
    refine_steps: int = 3
    settle_wait_s: float | None = None
    max_points: int = 8192
    max_record_s: float = 2.5
    min_cycles: int = 3
    max_rerange: int = 4
    max_step_up_db: float = 6.0
    sleep: Callable[[float], None] = time.sleep

    def __post_init__(self) -> None:
        checks = {
            "level_step_db": self.level_step_db > 0,
            "level_below_db": self.level_below_db >= 0,
            "f_start_hz": self.f_start_hz > 0,
            "f_stop_hz": self.f_stop_hz > self.f_start_hz,
            "points_per_decade": self.points_per_decade >= 1,
            "refine_steps": self.refine_steps >= 0,
            "max_points": self.max_points >= 16,
        }
        for name, ok in checks.items():
            if not ok:
                raise SafetyError(f"characterisation option {name} is out of range")


@dataclass(frozen=True)
class CharPoint:
    """One measured point of a sweep."""

    channel: str
    sweep: Literal["level", "frequency"]
    frequency_hz: float
    commanded_vrms: float
    input_vrms: float
    gain_db: float | None
    phase_deg: float | None
    thd_percent: float | None
    clipped: bool


@dataclass
class ChannelCharacterization:
    """Measured curves of one channel and their comparison with the model."""

    channel: str
    level_points: list[CharPoint] = field(default_factory=list)
    frequency_points: list[CharPoint] = field(default_factory=list)
    reference_gain_db: float | None = None
    measured_corner_hz: float | None = None
    corner_bracket_hz: tuple[float, float] | None = None
    threshold: Any = None
    stopped_because: str = ""
    model: dict[str, Any] = field(default_factory=dict)

    def relative_db(self) -> list[tuple[float, float]]:
        """(frequency, gain − mid-band gain) of the frequency sweep, sorted."""
        if self.reference_gain_db is None:
            return []
        return sorted(
            (p.frequency_hz, p.gain_db - self.reference_gain_db)
            for p in self.frequency_points
            if p.gain_db is not None
        )


@dataclass
class CharacterizationResult:
    run_id: int
    serial: str
    board_name: str
    part_number: str
    status: Literal["complete", "aborted"]
    verdict: Literal["PASS", "FAIL"] | None
    reason: str | None
    channels: dict[str, ChannelCharacterization]
    measurements: list[MeasurementRow]
    safe_input_vrms: float
    nominal_input_vrms: float
    frequency_hz: float
    criterion: str
    criterion_thd_percent: float | None
    max_commanded_vrms: float
    generator_state: str
    settle_note: str
    limits_digest: str
    acquisitions: int
    elapsed_s: float


def log_frequencies(
    f_lo: float, f_hi: float, per_decade: int, include: Sequence[float] = ()
) -> list[float]:
    """Log-spaced frequencies from ``f_lo`` to ``f_hi`` (both ends), plus ``include``."""
    n = max(math.ceil(per_decade * math.log10(f_hi / f_lo)), 1)
    fs = {float(f_lo * (f_hi / f_lo) ** (k / n)) for k in range(n + 1)}
    fs.update(float(f) for f in include if f_lo <= f <= f_hi)
    return sorted(fs)


def corner_from_sweep(points: Sequence[tuple[float, float]]) -> tuple[float, int] | None:
    """The low −3 dB point of a relative response ``[(f, dB)...]``: the highest-frequency
    crossing of −3 dB below which the response stays under it; linear interpolation of dB
    against log f between the bracketing points.  Returns (f, index of the upper point)."""
    pts = sorted(points)
    for i in range(len(pts) - 1, 0, -1):
        (f0, g0), (f1, g1) = pts[i - 1], pts[i]
        if g0 < -3.0 <= g1:
            x0, x1 = math.log10(f0), math.log10(f1)
            x = x0 + (-3.0 - g0) * (x1 - x0) / (g1 - g0)
            return 10**x, i
    return None


class Characterizer(BoardRun):
    """One characterisation run; use :func:`characterize`."""

    fixture_note = "; characterisation"

    def __init__(
        self,
        instruments: Any,
        board: Board,
        limits: Any,
        fixture: FixtureConfig,
        serial: str,
        store: Any,
        options: CharacterizeOptions,
        progress: Progress,
        *,
        board_file: str,
    ) -> None:
        super().__init__(
            instruments,
            board,
            limits,
            fixture,
            serial,
            store,
            options,
            progress,
            board_file=board_file,
            generator=instruments.generator,
            scope=instruments.scope,
            supply=getattr(instruments, "supply", None),
        )
        self.settle_note = f"waited {self.settle_s:.3g} s after each level or frequency change" + (
            " (operator override)"
            if options.settle_wait_s is not None
            else " (the model's settle time)"
        )
        self.channels = {
            c.board_channel: ChannelCharacterization(c.board_channel) for c in fixture.channels
        }
        self.step = "setup"

    # --- store ----------------------------------------------------------------------
    def _row(
        self,
        ch: str,
        name: str,
        value: float | None,
        unit: str,
        limit: Any,
        detail: dict | None = None,
    ) -> MeasurementRow:
        low = None if limit is None or limit.low is None else float(limit.low)
        high = None if limit is None or limit.high is None else float(limit.high)
        if limit is None or (low is None and high is None):
            decision = "info"
        elif value is None or not math.isfinite(value):
            decision = "fail"
        else:
            decision = "pass" if limit.contains(value) else "fail"
        return self.run_log.row(ch, name, value, unit, low, high, None, decision, self.step, detail)

    def _point(
        self,
        ch: str,
        sweep: Literal["level", "frequency"],
        a: RecordAnalysis,
        commanded: float,
        extra: dict | None = None,
    ) -> CharPoint:
        p = CharPoint(
            ch,
            sweep,
            float(a.frequency_hz),
            commanded,
            float(a.input_vrms),
            a.gain_db,
            a.phase_deg,
            a.thd_percent,
            bool(a.clipped),
        )
        data = {
            "frequency_hz": p.frequency_hz,
            "commanded_vrms": commanded,
            "phase_deg": a.phase_deg,
            "over_range": a.over_range,
            **(extra or {}),
        }
        self.run_log.sweep_point(ch, sweep, a, data)
        return p

    # --- measuring ------------------------------------------------------------------
    def _gains(self, group: Sequence[ChannelConnection]) -> dict[str, float]:
        nom = self.board.conditions.nominal_input_vrms
        return {
            c.board_channel: float(self.limits.channels[c.board_channel].output_vrms_nominal) / nom
            for c in group
        }

    def _plan(self, frequency_hz: float, *, tolerance_rel: float = 0.01) -> Any:
        """A coherent record near ``frequency_hz`` lasting at most max_record_s: the longest
        record up to ``max_points``, else the shortest longer one that fits (low
        frequencies need long records); else the shortest-lasting plan there is."""
        return plan_record(
            self.inst.scope,
            frequency_hz,
            max_points=self.opt.max_points,
            max_record_s=(self.opt.max_record_s,),
            min_cycles=self.opt.min_cycles,
            tolerance_rel=tolerance_rel,
            longer_records=True,
            fallback="shortest",
        )

    def _measure(self, group, level: float, plan: Any, gains: dict) -> dict[str, RecordAnalysis]:
        changed = abs(level - self.safe.level_vrms) > 1e-12 or self.safe.output_state != "on"
        self.scope_ops.preset([(c, gains[c.board_channel]) for c in group], level)
        self.safe.set_level(level)
        if self.safe.output_state != "on":
            self.safe.on()
        if changed:
            self._settle()
        out, _ = self.scope_ops.acquire(group, plan)
        lost = sorted(k for k, v in out.items() if v is None)
        if lost:
            raise AnalysisError(
                f"characterisation at {level:g} V rms: no analysable record on {', '.join(lost)}",
                hint="run `stageproof run` first: it names a dead, stuck or oscillating channel",
            )
        return {k: v for k, v in out.items() if v is not None}

    def _settle(self) -> None:
        if self.settle_s > 0:
            self.opt.sleep(self.settle_s)
        self.run_log.heartbeat()

    def _met(self, a: RecordAnalysis, small_gain: float | None) -> bool:
        """The record meets the clipping criterion.  THD counts only clear of the bench's
        floor (a small level on an 8-bit scope reads high THD from quantisation alone)."""
        if self.criterion.kind == "thd":
            thd = a.thd_percent or 0.0
            floor = FLOOR_MARGIN * float(a.floor.thd_percent)
            return thd >= self.criterion.threshold_percent and thd >= floor
        if a.gain_db is None or small_gain is None:
            return False
        return small_gain - a.gain_db >= self.criterion.db

    def level_sweep(self, group: Sequence[ChannelConnection]) -> None:
        self.step = "level"
        cond = self.board.conditions
        nom, safe = cond.nominal_input_vrms, cond.safe_input_vrms
        plan = self._plan(cond.frequency_hz)
        self.progress.step(
            "level",
            f"level sweep at {plan.frequency_hz:.6g} Hz, "
            f"{self.opt.level_step_db:g} dB steps, up to {safe:g} V rms at most",
        )
        plan = self.scope_ops.tune(plan, lambda f: self.safe.configure(f, min(nom, safe)))
        gains = self._gains(group)
        small: dict[str, float | None] = {}
        pending = {c.board_channel for c in group}
        k = -math.floor(self.opt.level_below_db / self.opt.level_step_db)
        why = ""
        while True:
            level = nom * 10 ** (k * self.opt.level_step_db / 20)
            at_cap = False
            if level >= safe * (1 - 1e-9):
                level, at_cap = safe, True
            res = self._measure(group, level, plan, gains)
            for c in group:
                ch = c.board_channel
                a = res[ch]
                self.channels[ch].level_points.append(self._point(ch, "level", a, level))
                if small.get(ch) is None and a.gain_db is not None:
                    small[ch] = a.gain_db
                if ch in pending and self._met(a, small.get(ch)):
                    pending.discard(ch)
                    self.channels[
                        ch
                    ].stopped_because = (
                        f"criterion ({self.criterion.label}) met at {a.input_vrms:.4g} V rms"
                    )
                if a.gain_db is not None and a.gain_db > -20:
                    gains[ch] = 10 ** (a.gain_db / 20)
            if not pending:
                why = "criterion met on every channel"
                break
            if at_cap:
                why = f"safe input level {safe:g} V rms reached"
                for ch in pending:
                    self.channels[ch].stopped_because = why
                break
            k += 1
        self.progress.note(f"level sweep stopped: {why}")
        # back to the nominal level before anything else (decreases are immediate)
        self.safe.set_level(min(nom, safe))

    def frequency_sweep(self, group: Sequence[ChannelConnection]) -> None:
        self.step = "frequency"
        cond = self.board.conditions
        level = min(cond.nominal_input_vrms, cond.safe_input_vrms)
        corners = [self.limits.channels[c.board_channel].low_corner_hz for c in group]
        lowest = min((float(c.low) if c.low is not None else float(c.nominal)) for c in corners)
        f_lo = (
            min(self.opt.f_start_hz, CORNER_MARGIN * lowest) if lowest > 0 else self.opt.f_start_hz
        )
        f_hi = self.opt.f_stop_hz
        freqs = log_frequencies(f_lo, f_hi, self.opt.points_per_decade, [cond.frequency_hz])
        self.progress.step(
            "frequency",
            f"frequency sweep {f_lo:.3g} Hz to {f_hi:.3g} Hz at "
            f"{level:g} V rms, {len(freqs)} points",
        )
        gains = self._gains(group)
        for f in freqs:
            self._freq_point(group, f, level, gains)
        for c in group:
            self._reference(c.board_channel)
        for _ in range(self.opt.refine_steps):
            targets = []
            for c in group:
                ch = self.channels[c.board_channel]
                found = corner_from_sweep(ch.relative_db())
                if found is None:
                    continue
                rel = ch.relative_db()
                i = found[1]
                targets.append(math.sqrt(rel[i - 1][0] * rel[i][0]))
            if not targets:
                break
            for f in sorted(set(targets)):
                self._freq_point(group, f, level, gains)
        for c in group:
            ch = self.channels[c.board_channel]
            found = corner_from_sweep(ch.relative_db())
            if found is not None:
                rel = ch.relative_db()
                ch.measured_corner_hz = found[0]
                ch.corner_bracket_hz = (rel[found[1] - 1][0], rel[found[1]][0])
        self.scope_ops.tune(self._plan(cond.frequency_hz), self.safe.set_frequency)

    def _freq_point(self, group, f: float, level: float, gains: dict) -> None:
        try:
            # the sweep's frequencies need not be exact: the planned one is recorded
            plan = self._plan(f, tolerance_rel=FREQ_TOLERANCE)
        except AnalysisError as exc:
            self.progress.note(f"{f:.4g} Hz skipped: {exc}")
            return
        plan = self.scope_ops.tune(plan, self.safe.set_frequency)
        self._settle()
        res = self._measure(group, level, plan, gains)
        for c in group:
            ch = c.board_channel
            self.channels[ch].frequency_points.append(self._point(ch, "frequency", res[ch], level))

    def _reference(self, ch_name: str) -> None:
        ch = self.channels[ch_name]
        f_test = self.board.conditions.frequency_hz
        corner = float(self.limits.channels[ch_name].low_corner_hz.nominal)
        lo = MIDBAND_FACTOR * corner
        g = [
            p.gain_db
            for p in ch.frequency_points
            if p.gain_db is not None and lo <= p.frequency_hz <= f_test * 1.02
        ]
        if not g:  # no point in the window: the one nearest the test frequency
            pts = [p for p in ch.frequency_points if p.gain_db is not None]
            if not pts:
                return
            nearest = min(pts, key=lambda p: abs(math.log(p.frequency_hz / f_test))).gain_db
            assert nearest is not None  # pts hold only points with a gain
            g = [nearest]
        ch.reference_gain_db = float(np.mean(g))

    # --- comparison rows -------------------------------------------------------------
    def compare(self, group: Sequence[ChannelConnection]) -> None:
        self.step = "compare"
        nom = self.board.conditions.nominal_input_vrms
        for c in group:
            name = c.board_channel
            ch = self.channels[name]
            lim = self.limits.channels[name]
            ch.model = {
                "gain_db": lim.gain_db,
                "thd_percent": lim.thd_percent,
                "clip_input_vrms": lim.clip_input_vrms,
                "low_corner_hz": lim.low_corner_hz,
            }
            at_nom = [p for p in ch.level_points if abs(p.commanded_vrms - nom) <= 1e-9 * nom]
            if at_nom:
                p = at_nom[0]
                self._row(
                    name,
                    "gain",
                    p.gain_db,
                    "dB",
                    lim.gain_db,
                    {"level_vrms": p.commanded_vrms, "frequency_hz": p.frequency_hz},
                )
                self._row(
                    name,
                    "thd",
                    p.thd_percent,
                    "%",
                    lim.thd_percent,
                    {"level_vrms": p.commanded_vrms},
                )
            pts = [
                p for p in ch.level_points if p.gain_db is not None and p.thd_percent is not None
            ]
            if pts:
                th = clip_threshold(
                    [p.input_vrms for p in pts],
                    [p.thd_percent for p in pts],
                    [p.gain_db for p in pts],
                    self.criterion,
                    pts[0].gain_db,
                )
                ch.threshold = th
                detail = {
                    "criterion": self.criterion.label,
                    "bracketed": th.bracketed,
                    "below_vrms": th.below_vrms,
                    "above_vrms": th.above_vrms,
                    "interp_u_db": th.uncertainty_db,
                    "stopped": ch.stopped_because,
                }
                if th.bracketed and th.level_vrms is not None:
                    self._row(
                        name, "clip_input", th.level_vrms, "V rms", lim.clip_input_vrms, detail
                    )
                else:
                    self._row(name, "clip_input", None, "V rms", None, detail)
            detail = {
                "model_nominal_hz": float(lim.low_corner_hz.nominal),
                "bracket_hz": ch.corner_bracket_hz,
                "reference_gain_db": ch.reference_gain_db,
                "method": "-3 dB against the mid-band gain, dB interpolated linearly in "
                "log f between the bracketing points after bisection",
            }
            self._row(name, "low_corner", ch.measured_corner_hz, "Hz", lim.low_corner_hz, detail)
            self._row(
                name,
                "midband_gain",
                ch.reference_gain_db,
                "dB",
                None,
                {
                    "window_hz": [
                        MIDBAND_FACTOR * float(lim.low_corner_hz.nominal),
                        self.board.conditions.frequency_hz,
                    ]
                },
            )

    # --- the whole run ---------------------------------------------------------------
    def _steps(self) -> None:
        with self.safe:  # output off before the first step and on every exit
            if self.supply is not None:
                self.step = "supply"
                self.supply.on()
                self._settle()
                cur = self.supply.current_a()
                self._row(
                    "",
                    "supply_current",
                    cur,
                    "A",
                    self.limits.supply_current_a,
                    {"tripped": self.supply.tripped()},
                )
                if self.supply.tripped():
                    raise RunAborted("supply tripped: no signal applied", step="supply")
            switch = getattr(self.inst, "switch", None)
            for grp in self.fixture.groups():
                with routed(switch, grp, self.safe):
                    self.level_sweep(grp)
                    self.frequency_sweep(grp)
                self.compare(grp)

    def _shutdown(self) -> None:
        self.safe.safe_off()
        if self.supply is not None:
            self.supply.safe_off()

    def run(self) -> CharacterizationResult:
        t0 = time.perf_counter()
        self.run_id = self.run_log.begin(self.header())
        status, reason, error = run_guarded(
            self._steps, self._shutdown, lambda: self.step, self.safe, self.supply
        )
        verdict: Literal["PASS", "FAIL"] | None = None
        if status == "complete":
            decided = [r for r in self.rows if r.decision != "info"]
            verdict = "PASS" if decided and all(r.decision == "pass" for r in decided) else "FAIL"
            reason = reason or (
                "characterisation: PASS means every compared quantity lies in the model's band"
            )
        self.store.finish_run(self.run_id, status, verdict, reason)
        result = CharacterizationResult(
            run_id=self.run_id,
            serial=self.serial,
            board_name=self.board.name,
            part_number=self.board.part_number,
            status=status,
            verdict=verdict,
            reason=reason,
            channels=self.channels,
            measurements=list(self.rows),
            safe_input_vrms=self.board.conditions.safe_input_vrms,
            nominal_input_vrms=self.board.conditions.nominal_input_vrms,
            frequency_hz=self.board.conditions.frequency_hz,
            criterion=self.criterion.label,
            criterion_thd_percent=self.criterion.threshold_percent
            if self.criterion.kind == "thd"
            else None,
            max_commanded_vrms=self.safe.max_commanded_vrms,
            generator_state=self.safe.output_state,
            settle_note=self.settle_note,
            limits_digest=str(self.limits.digest),
            acquisitions=self.scope_ops.acquisitions,
            elapsed_s=time.perf_counter() - t0,
        )
        if error is not None:
            raise_aborted(error, self.step)
        return result


def characterize(
    instruments: Any,
    board: Board,
    limits: Any,
    fixture: FixtureConfig,
    serial: str,
    store: Any,
    *,
    options: CharacterizeOptions | None = None,
    progress: Progress | None = None,
    board_file: str = "",
) -> CharacterizationResult:
    """Characterise one board (see the module doc).  The store must be open; the run is
    stored as a run of its own (fixture text ends in "characterisation")."""
    return Characterizer(
        instruments,
        board,
        limits,
        fixture,
        serial,
        store,
        options or CharacterizeOptions(),
        progress or NullProgress(),
        board_file=board_file or board.source,
    ).run()
