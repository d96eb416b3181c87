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
from typing import Literal

import numpy as np

from harness.errors import AnalysisError, RunAborted, SafetyError
from harness.io.fixture import ChannelConnection, FixtureConfig
from harness.measure import RecordAnalysis, clip_threshold
from harness.measure.bracket import Threshold
from harness.measure.coherent import CoherentPlan
from harness.measure.floor import FLOOR_MARGIN
from harness.model.board import Board
from harness.model.limits import BoardLimits, Limit
from harness.outcomes import Outcome
from harness.quantities import (
    CLIP_INPUT,
    GAIN,
    LOW_CORNER,
    MIDBAND_GAIN,
    SUPPLY_CURRENT,
    THD,
    Quantity,
)
from harness.run.bench_ops import Detail, plan_record
from harness.run.progress import NullProgress, Progress
from harness.run.roles import InstrumentSet
from harness.run.steps import Order, RunContext, build_context, move_to, perform, power_up, settle
from harness.store import MeasurementRow, ResultStore

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
    threshold: Threshold | None = None
    stopped_because: str = ""
    model: dict[str, Limit] = field(default_factory=dict)

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


class CharacterisationSteps:
    """The characterisation's own steps and what they gather (the curves per channel),
    composed with the run's context; :func:`characterisation_order` puts them in order,
    :func:`characterize` runs them."""

    def __init__(self, ctx: RunContext, options: CharacterizeOptions) -> None:
        self.ctx = ctx
        self.opt = options
        ctx.settle_note = f"waited {ctx.settle_s:.3g} s after each level or frequency change" + (
            " (operator override)"
            if options.settle_wait_s is not None
            else " (the model's settle time)"
        )
        self.channels = {
            c.board_channel: ChannelCharacterization(c.board_channel) for c in ctx.fixture.channels
        }

    # --- store ----------------------------------------------------------------------
    def _row(
        self,
        ch: str,
        q: Quantity,
        value: float | None,
        limit: Limit | None,
        detail: Detail | None = None,
    ) -> MeasurementRow:
        low = None if limit is None or limit.low is None else float(limit.low)
        high = None if limit is None or limit.high is None else float(limit.high)
        decision: Outcome
        if limit is None or (low is None and high is None):
            decision = "info"
        elif value is None or not math.isfinite(value):
            decision = "fail"
        else:
            decision = "pass" if limit.contains(value) else "fail"
        return self.ctx.log.row(ch, q, value, low, high, None, decision, self.ctx.step, detail)

    def _point(
        self,
        ch: str,
        sweep: Literal["level", "frequency"],
        a: RecordAnalysis,
        commanded: float,
        extra: Detail | None = None,
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
        self.ctx.log.sweep_point(ch, sweep, a, data)
        return p

    # --- measuring ------------------------------------------------------------------
    def _gains(self, group: Sequence[ChannelConnection]) -> dict[str, float]:
        nom = self.ctx.board.conditions.nominal_input_vrms
        channels = self.ctx.limits.channels
        return {
            c.board_channel: float(channels[c.board_channel].output_vrms_nominal) / nom
            for c in group
        }

    def _plan(self, frequency_hz: float, *, tolerance_rel: float = 0.01) -> CoherentPlan:
        """A coherent record near ``frequency_hz`` lasting at most max_record_s: the longest
        record up to ``max_points``, else the shortest longer one that fits (low
        frequencies need long records); else the shortest-lasting plan there is."""
        return plan_record(
            self.ctx.roles.scope,
            frequency_hz,
            max_points=self.opt.max_points,
            max_record_s=(self.opt.max_record_s,),
            min_cycles=self.opt.min_cycles,
            tolerance_rel=tolerance_rel,
            longer_records=True,
            fallback="shortest",
        )

    def _measure(
        self,
        group: Sequence[ChannelConnection],
        level: float,
        plan: CoherentPlan,
        gains: dict[str, float],
    ) -> dict[str, RecordAnalysis]:
        if move_to(self.ctx, [(c, gains[c.board_channel]) for c in group], level):
            settle(self.ctx)
        out, _ = self.ctx.scope.acquire(group, plan)
        lost = sorted(k for k, v in out.items() if v is None)
        if lost:
            raise AnalysisError(
                f"characterisation at {level:g} V rms: no analysable record on {', '.join(lost)}",
                hint="run `stageproof run` first: it names a dead, stuck or oscillating channel",
            )
        return {k: v for k, v in out.items() if v is not None}

    def _met(self, a: RecordAnalysis, small_gain: float | None) -> bool:
        """The record meets the clipping criterion.  THD counts only clear of the bench's
        floor (a small level on an 8-bit scope reads high THD from quantisation alone)."""
        if self.ctx.criterion.kind == "thd":
            thd = a.thd_percent or 0.0
            floor = FLOOR_MARGIN * float(a.floor.thd_percent)
            return thd >= self.ctx.criterion.threshold_percent and thd >= floor
        if a.gain_db is None or small_gain is None:
            return False
        return small_gain - a.gain_db >= self.ctx.criterion.db

    def level_sweep(self, group: Sequence[ChannelConnection]) -> None:
        self.ctx.step = "level"
        cond = self.ctx.board.conditions
        nom, safe = cond.nominal_input_vrms, cond.safe_input_vrms
        plan = self._plan(cond.frequency_hz)
        self.ctx.progress.step(
            "level",
            f"level sweep at {plan.frequency_hz:.6g} Hz, "
            f"{self.opt.level_step_db:g} dB steps, up to {safe:g} V rms at most",
        )
        plan = self.ctx.scope.tune(plan, lambda f: self.ctx.safe.configure(f, min(nom, safe)))
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
                        f"criterion ({self.ctx.criterion.label}) met at {a.input_vrms:.4g} V rms"
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
        self.ctx.progress.note(f"level sweep stopped: {why}")
        # back to the nominal level before anything else (decreases are immediate)
        self.ctx.safe.set_level(min(nom, safe))

    def frequency_sweep(self, group: Sequence[ChannelConnection]) -> None:
        self.ctx.step = "frequency"
        cond = self.ctx.board.conditions
        level = min(cond.nominal_input_vrms, cond.safe_input_vrms)
        corners = [self.ctx.limits.channels[c.board_channel].low_corner_hz for c in group]
        lowest = min((float(c.low) if c.low is not None else float(c.nominal)) for c in corners)
        f_lo = (
            min(self.opt.f_start_hz, CORNER_MARGIN * lowest) if lowest > 0 else self.opt.f_start_hz
        )
        f_hi = self.opt.f_stop_hz
        freqs = log_frequencies(f_lo, f_hi, self.opt.points_per_decade, [cond.frequency_hz])
        self.ctx.progress.step(
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
        self.ctx.scope.tune(self._plan(cond.frequency_hz), self.ctx.safe.set_frequency)

    def _freq_point(
        self, group: Sequence[ChannelConnection], f: float, level: float, gains: dict[str, float]
    ) -> None:
        try:
            # the sweep's frequencies need not be exact: the planned one is recorded
            plan = self._plan(f, tolerance_rel=FREQ_TOLERANCE)
        except AnalysisError as exc:
            self.ctx.progress.note(f"{f:.4g} Hz skipped: {exc}")
            return
        plan = self.ctx.scope.tune(plan, self.ctx.safe.set_frequency)
        settle(self.ctx)
        res = self._measure(group, level, plan, gains)
        for c in group:
            ch = c.board_channel
            self.channels[ch].frequency_points.append(self._point(ch, "frequency", res[ch], level))

    def _reference(self, ch_name: str) -> None:
        ch = self.channels[ch_name]
        f_test = self.ctx.board.conditions.frequency_hz
        corner = float(self.ctx.limits.channels[ch_name].low_corner_hz.nominal)
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
        self.ctx.step = "compare"
        nom = self.ctx.board.conditions.nominal_input_vrms
        for c in group:
            name = c.board_channel
            ch = self.channels[name]
            lim = self.ctx.limits.channels[name]
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
                    GAIN,
                    p.gain_db,
                    lim.gain_db,
                    {"level_vrms": p.commanded_vrms, "frequency_hz": p.frequency_hz},
                )
                self._row(
                    name,
                    THD,
                    p.thd_percent,
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
                    self.ctx.criterion,
                    pts[0].gain_db,
                )
                ch.threshold = th
                detail = {
                    "criterion": self.ctx.criterion.label,
                    "bracketed": th.bracketed,
                    "below_vrms": th.below_vrms,
                    "above_vrms": th.above_vrms,
                    "interp_u_db": th.uncertainty_db,
                    "stopped": ch.stopped_because,
                }
                if th.bracketed and th.level_vrms is not None:
                    self._row(name, CLIP_INPUT, th.level_vrms, lim.clip_input_vrms, detail)
                else:
                    self._row(name, CLIP_INPUT, None, None, detail)
            detail = {
                "model_nominal_hz": float(lim.low_corner_hz.nominal),
                "bracket_hz": ch.corner_bracket_hz,
                "reference_gain_db": ch.reference_gain_db,
                "method": "-3 dB against the mid-band gain, dB interpolated linearly in "
                "log f between the bracketing points after bisection",
            }
            self._row(name, LOW_CORNER, ch.measured_corner_hz, lim.low_corner_hz, detail)
            self._row(
                name,
                MIDBAND_GAIN,
                ch.reference_gain_db,
                None,
                {
                    "window_hz": [
                        MIDBAND_FACTOR * float(lim.low_corner_hz.nominal),
                        self.ctx.board.conditions.frequency_hz,
                    ]
                },
            )

    # --- the whole run ---------------------------------------------------------------
    def supply_on(self) -> None:
        """Supply on and its current compared; a tripped supply stops before any signal."""
        supply = self.ctx.supply
        if supply is None:
            return
        reading = power_up(self.ctx, supply, self.ctx.settle_s)
        self._row(
            "",
            SUPPLY_CURRENT,
            reading.current_a,
            self.ctx.limits.supply_current_a,
            {"tripped": reading.tripped},
        )
        if reading.tripped:
            raise RunAborted("supply tripped: no signal applied", step="supply")

    def open_group(self, group: tuple[ChannelConnection, ...]) -> tuple[ChannelConnection, ...]:
        return group

    def run(self) -> CharacterizationResult:
        ctx = self.ctx

        def verdict(
            status: Literal["complete", "aborted"], reason: str | None
        ) -> tuple[Literal["PASS", "FAIL"] | None, str | None]:
            if status != "complete":
                return None, reason
            decided = [r for r in ctx.log.rows if r.decision != "info"]
            ok = bool(decided) and all(r.decision == "pass" for r in decided)
            return ("PASS" if ok else "FAIL"), reason or (
                "characterisation: PASS means every compared quantity lies in the model's band"
            )

        outcome = perform(ctx, characterisation_order(self), verdict)
        board, crit = ctx.board, ctx.criterion
        result = CharacterizationResult(
            run_id=ctx.run_id,
            serial=ctx.serial,
            board_name=board.name,
            part_number=board.part_number,
            status=outcome.status,
            verdict=outcome.verdict,
            reason=outcome.reason,
            channels=self.channels,
            measurements=list(ctx.log.rows),
            safe_input_vrms=board.conditions.safe_input_vrms,
            nominal_input_vrms=board.conditions.nominal_input_vrms,
            frequency_hz=board.conditions.frequency_hz,
            criterion=crit.label,
            criterion_thd_percent=crit.threshold_percent if crit.kind == "thd" else None,
            max_commanded_vrms=ctx.safe.max_commanded_vrms,
            generator_state=ctx.safe.output_state,
            settle_note=ctx.settle_note,
            limits_digest=str(ctx.limits.digest),
            acquisitions=ctx.scope.acquisitions,
            elapsed_s=outcome.elapsed_s,
        )
        outcome.reraise(ctx.step)
        return result


def characterisation_order(
    c: CharacterisationSteps,
) -> Order[tuple[ChannelConnection, ...]]:
    """The characterisation: the supply, then per group the level and frequency sweeps
    with the route closed and the comparison with the model once it is open again."""
    return Order(
        name="characterisation",
        unpowered=(),
        board=(c.supply_on,),
        group=c.open_group,
        routed=(c.level_sweep, c.frequency_sweep),
        after=(c.compare,),
    )


def characterize(
    instruments: InstrumentSet,
    board: Board,
    limits: BoardLimits,
    fixture: FixtureConfig,
    serial: str,
    store: ResultStore,
    *,
    options: CharacterizeOptions | None = None,
    progress: Progress | None = None,
    board_file: str = "",
) -> CharacterizationResult:
    """Characterise one board (see the module doc).  The store must be open; the run is
    stored as a run of its own (fixture text ends in "characterisation")."""
    opts = options or CharacterizeOptions()
    ctx = build_context(
        instruments,
        board=board,
        limits=limits,
        fixture=fixture,
        serial=serial,
        board_file=board_file or board.source,
        station=opts.station_name,
        store=store,
        options=opts,
        progress=progress or NullProgress(),
        fixture_note="; characterisation",
    )
    return CharacterisationSteps(ctx, opts).run()
