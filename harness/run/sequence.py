"""The test sequence for one board: supply, DC test points, gain / phase / THD, clipping
threshold, extra frequencies; every measurement decided and stored as soon as it is made.

Only driver calls here, no SCPI text.  Safety lives in :mod:`harness.run.safety` and is
used on every path: the generator output is off before the first step, after the last and
on any exit (exception, Ctrl-C, SIGTERM, a lost instrument); no level above the board's
safe input level is ever commanded; rises ramp; the supply goes off when the quiescent
check fails and at the end.

Steps, in order:

1. before any signal: limits the bench cannot resolve (a THD limit under the scope's
   floor) are stored as ``not resolvable``;
2. supply on with its current limit; the quiescent current against the model's limit (a
   shorted board stops here, supply off, verdict FAIL);
3. DC test points with the DMM through the switch, against the operating-point limits;
4. per group of channels the scope sees at once: a coherent record at the nominal level
   (gain, phase, THD), then the clipping-threshold search started at the model's predicted
   threshold, every channel of the group advancing from the same acquisitions;
5. gain at the board's extra frequencies (information: the model gives no limits there).
"""

from __future__ import annotations

import contextlib
import json
import logging
import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from harness.errors import FixtureFileError, StageproofError
from harness.instruments.drivers import Acquisition
from harness.io.fixture import ChannelConnection, FixtureConfig
from harness.measure import (
    FLOOR_TO_READING_U,
    RecordAnalysis,
    SearchStep,
    clip_threshold,
    measurement_floor,
    next_search_level,
)
from harness.measure.coherent import CoherentPlan
from harness.measure.condition import ChannelCondition, classify_channel
from harness.measure.floor import FLOOR_MARGIN
from harness.model.board import Board
from harness.model.design import MAX_SETTLE_S, check_settle_time
from harness.model.limits import BoardLimits, ChannelLimits, Limit
from harness.model.settling import SETTLE_TAUS
from harness.outcomes import ALWAYS_ACCEPTED, Outcome
from harness.quantities import (
    CLIP_INPUT,
    CLIP_SIDE,
    CONDITION,
    GAIN,
    PHASE,
    SUPPLY_CURRENT,
    THD,
    Quantity,
    dc_point,
    gain_at,
)
from harness.run.bench_ops import (
    RANGE_FILL,
    Detail,
    choose_range,
    limit_get,
    plan_record,
)
from harness.run.decisions import (
    STRICT,
    BenchUncertainty,
    DecisionPolicy,
    amplitude_rel_u,
    decide,
    gain_uncertainty_db,
    thd_uncertainty_percent,
    threshold_uncertainty_db,
)
from harness.run.progress import NullProgress, Progress
from harness.run.roles import InstrumentSet
from harness.run.steps import Order, RunContext, build_context, move_to, perform, power_up, settle
from harness.store import MeasurementRow, ResultStore

__all__ = [
    "ChannelVerdict",
    "ProductionSteps",
    "RunOptions",
    "RunResult",
    "production_order",
    "run_board",
]

log = logging.getLogger("harness.run.sequence")

#: Record length cap: longer records lower the floor but cost acquisition time.
MAX_POINTS = 20000
#: Longest record wanted (acquisition time per step).
MAX_RECORD_S = 0.1
#: Test frequency may differ from the board's by this fraction (coherent sampling).
FREQ_TOLERANCE = 0.01
#: Fewest cycles in a record (sine fit and harmonics stay well conditioned).
MIN_CYCLES = 5
#: Output fill for the clipping search: the digitiser's own nonlinearity (integral
#: nonlinearity makes harmonics that grow with the fraction of full scale used) would
#: otherwise add to or cancel the board's harmonics near the criterion.
SEARCH_FILL = 0.4
#: Phase tolerance of the polarity check: a wrong polarity reads 180 degrees off.
PHASE_TOLERANCE_DEG = 45.0
#: Expanded uncertainty of a phase reading (degrees); small against the tolerance.
PHASE_U_DEG = 1.0
#: Most repeated records when settling is verified instead of waited for.
VERIFY_RECORDS = 8


@dataclass(frozen=True)
class RunOptions:
    """How a run is made.  ``settle_wait_s`` None waits the model's settle time after each
    level change; a number overrides it (stated in the run record).  ``settle="verify"``
    repeats the record after a level change until two agree instead of waiting."""

    operator: str = ""
    station_name: str = ""
    keep_records: bool = False
    policy: DecisionPolicy = STRICT
    bench: BenchUncertainty = field(default_factory=BenchUncertainty)
    settle: Literal["wait", "verify"] = "wait"
    settle_wait_s: float | None = None
    #: a model settle time longer than this is not waited out after every level change:
    #: settling is verified by repeated records instead (stated in the run record)
    max_settle_wait_s: float = 5.0
    max_step_up_db: float = 6.0
    resolution_db: float = 0.1
    max_search_acquisitions: int = 24
    max_rerange: int = 4
    max_points: int = MAX_POINTS
    extra_frequencies: bool = True
    correct_adc_nonlinearity: bool = True
    sleep: Callable[[float], None] = time.sleep


@dataclass
class ChannelVerdict:
    channel: str
    verdict: Literal["PASS", "FAIL"]
    failing: list[str]


@dataclass
class RunResult:
    run_id: int
    serial: str
    status: Literal["complete", "aborted"]
    verdict: Literal["PASS", "FAIL"] | None
    reason: str | None
    retest: int
    measurements: list[MeasurementRow]
    channels: dict[str, ChannelVerdict]
    acquisitions: int
    search_acquisitions: int
    generator_state: str
    settle_note: str
    elapsed_s: float
    instrument_s: float
    waiting_s: float
    #: settling waits asked for, in the board's time (equal to waiting_s with a real sleep)
    settle_waited_s: float = 0.0

    @property
    def overhead_s(self) -> float:
        """Time not spent in instrument calls or settling waits."""
        return max(self.elapsed_s - self.instrument_s - self.waiting_s, 0.0)

    def failing(self) -> list[MeasurementRow]:
        return [m for m in self.measurements if m.decision not in ALWAYS_ACCEPTED]

    def to_dict(self) -> dict[str, Any]:
        return {
            "run_id": self.run_id,
            "serial": self.serial,
            "status": self.status,
            "verdict": self.verdict,
            "reason": self.reason,
            "retest": self.retest,
            "channels": {
                k: {"verdict": v.verdict, "failing": v.failing} for k, v in self.channels.items()
            },
            "acquisitions": self.acquisitions,
            "search_acquisitions": self.search_acquisitions,
            "generator_state": self.generator_state,
            "settle_note": self.settle_note,
            "settle_waited_s": round(self.settle_waited_s, 3),
            "elapsed_s": round(self.elapsed_s, 3),
            "measurements": [
                {
                    "channel": m.channel,
                    "name": m.name,
                    "value": m.value,
                    "unit": m.unit,
                    "low": m.low,
                    "high": m.high,
                    "uncertainty": m.uncertainty,
                    "decision": m.decision,
                    "step": m.step,
                    "detail": json.loads(m.detail_json) if m.detail_json else None,
                    "reason": m.reason,
                }
                for m in self.measurements
            ],
        }


def _why(a: RecordAnalysis) -> str:
    """Why a record gave no reading, as stored beside the null: "over-range: ..." when the
    scope's ADC limits were touched, otherwise the analysis's own reason."""
    if a.over_range:
        return f"over-range: {a.reason}" if a.reason else "over-range"
    return a.reason or "no valid reading in the record"


def _wrap_near(phase_deg: float, expected: float) -> float:
    d = (phase_deg - expected + 180.0) % 360.0 - 180.0
    return expected + d


@dataclass
class _ChannelState:
    conn: ChannelConnection
    limits: ChannelLimits
    points: list[RecordAnalysis] = field(default_factory=list)
    levels_commanded: list[float] = field(default_factory=list)
    done: bool = False
    step: SearchStep | None = None
    nominal: RecordAnalysis | None = None
    condition: ChannelCondition | None = None

    @property
    def failed(self) -> bool:
        """The channel is in a failure mode (dead, oscillating, ...): no clipping search."""
        return self.condition is not None and not self.condition.working


class ProductionSteps:
    """The production sequence's own steps and the state they share over one run (the
    record plan, the settling mode, the search count), composed with the run's context;
    :func:`production_order` puts them in order, :func:`run_board` runs them."""

    def __init__(self, ctx: RunContext, options: RunOptions) -> None:
        self.ctx = ctx
        self.opt = options
        board, limits, fixture = ctx.board, ctx.limits, ctx.fixture
        self.search_acquisitions = 0
        self.supply_settle_s = (
            self.ctx.settle_s
            if options.settle_wait_s is not None
            else max(
                [self.ctx.settle_s]
                + [
                    float(limits.channels[c.board_channel].supply_settle_time_s)
                    for c in fixture.channels
                    if c.board_channel in limits.channels
                ]
            )
        )
        if options.settle_wait_s is None and self.supply_settle_s > MAX_SETTLE_S:
            # a wrong capacitor value must not keep the supply on for days (see bench_ops)
            for c in fixture.channels:
                ch_lim = limits.channels.get(c.board_channel)
                wait = float(ch_lim.supply_settle_time_s) if ch_lim is not None else 0.0
                with contextlib.suppress(AttributeError):
                    check_settle_time(board, board.channel(c.board_channel), wait)
        self.settle_mode: Literal["wait", "verify"] = options.settle
        long_wait = options.settle_wait_s is None and self.ctx.settle_s > options.max_settle_wait_s
        if long_wait:
            self.settle_mode = "verify"
        #: between repeated records: one time constant of the slowest operating-point mode
        self.verify_interval_s = self.ctx.settle_s / SETTLE_TAUS
        if self.settle_mode == "verify":
            self.ctx.settle_note = (
                "settling verified by repeating the record after each level change, "
                f"{self.verify_interval_s:.3g} s apart, until gain and THD agree"
                + (
                    f" (the model's settle time {self.ctx.settle_s:.3g} s is longer than "
                    f"{options.max_settle_wait_s:g} s)"
                    if long_wait
                    else ""
                )
            )
        elif options.settle_wait_s is not None:
            self.ctx.settle_note = (
                f"waited {self.ctx.settle_s:.3g} s after each level change "
                "(operator override of the model's settle time)"
            )
        else:
            self.ctx.settle_note = (
                f"waited the model's settle time {self.ctx.settle_s:.3g} s after each level change"
            )
        if self.supply_settle_s > self.ctx.settle_s and fixture.supply is not None:
            self.ctx.settle_note += (
                f"; {self.supply_settle_s:.3g} s after supply on (the output capacitors "
                "charging into the load move the operating point until then)"
            )
        ac = sorted(
            {
                c.output_scope
                for c in fixture.channels
                if c.board_channel in limits.channels
                and float(limits.channels[c.board_channel].dc_settle_time_s)
                > (0.0 if self.settle_mode == "verify" else self.ctx.settle_s)
            }
        )
        for n in ac:
            self.ctx.scope.coupling[n] = "AC"
        if ac:
            self.ctx.settle_note += (
                "; outputs AC-coupled (scope inputs "
                + ", ".join(str(n) for n in ac)
                + "): their DC level, set by the output capacitor into the load, is still "
                "moving when the wait ends"
            )
        self.plan = self._plan(board.conditions.frequency_hz)
        self.last_acquisition: Acquisition | None = None

    # --- helpers --------------------------------------------------------------------
    @property
    def acquisitions(self) -> int:
        return self.ctx.scope.acquisitions

    def _plan(self, frequency_hz: float) -> CoherentPlan:
        """A coherent record near ``frequency_hz``: the longest record (lowest noise floor)
        that lasts at most MAX_RECORD_S, relaxed step by step if none fits."""
        return plan_record(
            self.ctx.roles.scope,
            frequency_hz,
            max_points=self.opt.max_points,
            max_record_s=(MAX_RECORD_S, 2.5 * MAX_RECORD_S, 10 * MAX_RECORD_S),
            min_cycles=MIN_CYCLES,
            tolerance_rel=FREQ_TOLERANCE,
        )

    def _row(
        self,
        channel: str,
        q: Quantity,
        value: float | None,
        low: float | None,
        high: float | None,
        u: float | None,
        decision: Outcome,
        detail: Detail | None = None,
        reason: str | None = None,
    ) -> MeasurementRow:
        return self.ctx.log.row(
            channel, q, value, low, high, u, decision, self.ctx.step, detail, reason
        )

    def _decide_row(
        self,
        channel: str,
        q: Quantity,
        value: float | None,
        limit: Limit | None,
        u: float,
        detail: Detail | None = None,
        reason: str | None = None,
    ) -> MeasurementRow:
        low, high = limit_get(limit, "low"), limit_get(limit, "high")
        decision: Outcome
        if value is None or not math.isfinite(value):
            decision = "fail" if (low is not None or high is not None) else "info"
            value = None
        else:
            decision = decide(value, low, high, u)
        if self._unresolvable(channel, q):
            decision = "not resolvable"
        return self._row(channel, q, value, low, high, u, decision, detail, reason)

    def _unresolvable(self, channel: str, q: Quantity) -> bool:
        return any(
            r.channel == channel
            and r.name == q.name
            and r.decision == "not resolvable"
            and r.step == "precheck"
            for r in self.ctx.log.rows
        )

    def _wait_settle(self, *, always: bool = False, seconds: float | None = None) -> None:
        """Wait the settle time (or ``seconds``) after a change; in "verify" mode only when
        ``always`` or ``seconds`` is given.  The wait is counted as simulated or real, as
        the sleep given in the options makes it."""
        settle(self.ctx, seconds, wait=always or seconds is not None or self.settle_mode == "wait")

    # --- acquisition ----------------------------------------------------------------
    def _tip_ranges(self, probe: float) -> tuple[float, ...]:
        return self.ctx.scope.tip_ranges(probe)

    def _gains(self, group: list[_ChannelState]) -> list[tuple[ChannelConnection, float]]:
        """Each channel's expected gain: the nominal record's once known, else the model's."""
        out = []
        for st in group:
            if st.nominal is not None and st.nominal.gain is not None:
                gain = abs(st.nominal.gain)
            else:
                gain = (
                    float(st.limits.output_vrms_nominal)
                    / self.ctx.board.conditions.nominal_input_vrms
                )
            out.append((st.conn, gain))
        return out

    def _acquire(
        self, group: list[_ChannelState], plan: CoherentPlan, label: str
    ) -> dict[str, RecordAnalysis | None]:
        """One acquisition of every input of the group (see GroupScope.acquire); the raw
        records stored too with ``keep_records``.  A channel whose record cannot be analysed
        gets None (it is classified at the nominal step, never an abort of the run)."""
        conns = [st.conn for st in group]
        out, acq = self.ctx.scope.acquire(
            conns, plan, correct_adc=self.opt.correct_adc_nonlinearity, tolerant=True
        )
        self.last_acquisition = acq
        if self.opt.keep_records:
            for c in conns:
                self.ctx.store.add_record(
                    self.ctx.run_id,
                    c.board_channel,
                    label,
                    acq.sample_rate_hz,
                    {
                        "input": np.asarray(acq.volts[c.input_scope]),
                        "output": np.asarray(acq.volts[c.output_scope]),
                    },
                )
        return out

    def _measure_at(
        self,
        group: list[_ChannelState],
        level_vrms: float,
        plan: CoherentPlan,
        label: str,
        fill: float = RANGE_FILL,
    ) -> dict[str, RecordAnalysis | None]:
        """Move the generator (ramped), let the board settle, record."""
        changed = move_to(self.ctx, self._gains(group), level_vrms, fill)
        if changed:
            self._wait_settle()
        res = self._acquire(group, plan, label)
        if self.settle_mode == "verify" and changed:
            # records one time constant apart that agree leave less than about 0.6 of the
            # agreement tolerance still to settle (e^-1 / (1 - e^-1)); 8 of them span 8 tau
            for _ in range(VERIFY_RECORDS):
                self._wait_settle(seconds=self.verify_interval_s)
                again = self._acquire(group, plan, label + " (settling check)")
                if all(_agree(res[k], again[k]) for k in res if not _failed(group, k)):
                    res = again
                    break
                res = again
        return res

    # --- steps ----------------------------------------------------------------------
    def validate(self) -> None:
        """Checks of the inputs against the model, before anything is stored or driven."""
        sup = self.ctx.limits.supply_current_a
        high = limit_get(sup, "high")
        if (
            self.ctx.fixture.supply is not None
            and high is not None
            and self.ctx.fixture.supply.current_limit_a < high
        ):
            raise FixtureFileError(
                self.ctx.fixture.path,
                "supply.current_limit_a",
                f"{self.ctx.fixture.supply.current_limit_a:g} A is below the board's highest "
                f"quiescent current {high:.3g} A: a good board would trip the supply",
                hint=f"set current_limit_a to at least {1.5 * high:.2g}",
            )
        missing = [
            c.board_channel
            for c in self.ctx.fixture.channels
            if c.board_channel not in self.ctx.limits.channels
        ]
        if missing:
            raise FixtureFileError(
                self.ctx.fixture.path,
                "channel",
                f"no limits for channel(s) {', '.join(missing)}",
                hint="recompute the limits for this board file",
            )

    def precheck(self) -> None:
        """Before any signal: limits the bench cannot resolve are stored as such."""
        self.ctx.step = "precheck"
        bits = self.ctx.roles.scope.bits
        for c in self.ctx.fixture.channels:
            lim = self.ctx.limits.channels[c.board_channel]
            vout = float(lim.output_vrms_nominal)
            rng = choose_range(2 * math.sqrt(2) * vout, self._tip_ranges(c.output_probe))
            fl = measurement_floor(bits, rng, vout * math.sqrt(2), 0.0, self.plan.n_samples)
            high = limit_get(lim.thd_percent, "high")
            resolvable_at = FLOOR_MARGIN * fl.thd_percent
            if high is not None and high < resolvable_at:
                self._row(
                    c.board_channel,
                    THD,
                    None,
                    None,
                    high,
                    None,
                    "not resolvable",
                    {
                        "floor_percent": fl.thd_percent,
                        "resolvable_from_percent": resolvable_at,
                        "why": "THD limit below the bench's measurement floor",
                    },
                )
            if (
                self.ctx.criterion.kind == "thd"
                and self.ctx.criterion.threshold_percent < resolvable_at
            ):
                self._clip_row(
                    c.board_channel,
                    lim,
                    "not resolvable",
                    {"why": "clip criterion THD below the bench's floor"},
                )
            clim = lim.clip_input_vrms
            low = limit_get(clim, "low")
            if low is not None and low > self.ctx.board.conditions.safe_input_vrms:
                self._row(
                    c.board_channel,
                    CLIP_INPUT,
                    None,
                    low,
                    limit_get(clim, "high"),
                    None,
                    "not resolvable",
                    {"why": "the whole limit lies above the safe input level"},
                )

    def quiescent(self) -> str | None:
        """Supply on and the quiescent current decided; a reason to stop before any signal
        when the board draws grossly the wrong current (the supply is then off)."""
        supply = self.ctx.supply
        if supply is None:
            return None
        self.ctx.progress.step("supply", "supply on, quiescent current")
        # coupling capacitors charge: wait in every mode, until even the output capacitor's
        # charging current no longer moves a stage's operating point (the model's figure)
        reading = power_up(self.ctx, supply, self.supply_settle_s)
        tripped, current = reading.tripped, reading.current_a
        lim = self.ctx.limits.supply_current_a
        u = 2 * (0.005 * abs(current) + 20e-6)  # supply read-back: common practice figure
        self._decide_row(
            "",
            SUPPLY_CURRENT,
            current,
            lim,
            u,
            {"tripped": tripped, "current_limit_a": supply.current_limit_a},
        )
        if tripped or _gross(current, lim, supply.current_limit_a):
            supply.off()
            self.ctx.progress.note(
                "quiescent current grossly out of limits (short or open "
                "supply path): supply off, no signal applied"
            )
            return "quiescent current grossly out of limits: stopped before any signal"
        return None

    def dc_points(self) -> None:
        if not self.ctx.fixture.test_points or self.ctx.roles.dmm is None:
            return
        self.ctx.step = "dc"
        self.ctx.progress.step("dc", f"{len(self.ctx.fixture.test_points)} DC test points")
        b = self.opt.bench
        del b
        for tp in self.ctx.fixture.test_points:
            lim = self.ctx.limits.channels[tp.board_channel].operating_point.get(tp.key)
            if tp.route and self.ctx.roles.switch is not None:
                self.ctx.roles.switch.close(list(tp.route))
            range_v = dmm_range_v(lim)
            try:
                v = float(self.ctx.roles.dmm.dc_volts(range_v))
            finally:
                if tp.route and self.ctx.roles.switch is not None:
                    self.ctx.roles.switch.open(list(tp.route))
            detail: Detail = {"test_point": tp.name, "quantity": tp.key, "range_v": range_v}
            if not math.isfinite(v):
                # SCPI's 9.9E37 (overload): no number to decide, and never an infinite U
                detail["result"] = f"over-range at {tp.name}"
                self.ctx.progress.note(f"DMM over-range at {tp.name} ({tp.key})")
                self._row(
                    tp.board_channel,
                    dc_point(tp.key),
                    None,
                    limit_get(lim, "low"),
                    limit_get(lim, "high"),
                    None,
                    "fail",
                    detail,
                )
                continue
            u = 2 * (0.0005 * abs(v) + 0.5e-3)  # DMM read-back: common practice figure
            self._decide_row(tp.board_channel, dc_point(tp.key), v, lim, u, detail)

    def nominal(self, group: list[_ChannelState]) -> None:
        self.ctx.step = "nominal"
        names = ", ".join(s.conn.board_channel for s in group)
        self.ctx.progress.step(
            "nominal", f"gain, phase, THD at {self.plan.frequency_hz:.6g} Hz ({names})"
        )
        level = self.ctx.board.conditions.nominal_input_vrms
        # the scope's timebase read back and the plan made from it; the generator at the
        # planned (coherent) frequency, output still off, and the frequency it reports used
        self.plan = self.ctx.scope.tune(self.plan, lambda f: self.ctx.safe.configure(f, level))
        res = self._measure_at(group, level, self.plan, "nominal")
        acq = self.last_acquisition
        assert acq is not None  # _measure_at recorded the group
        wide = self._wide_look(group)
        b = self.opt.bench
        for st in group:
            ch = st.conn.board_channel
            a = res[ch]
            lim = st.limits
            cond = self._classify(st, acq, wide)
            if cond.working and a is None:  # the output's sine did not stand out of the noise
                cond = ChannelCondition("dead", "no sine wave above the noise", cond.evidence)
            st.condition = cond
            self._row(
                ch,
                CONDITION,
                None,
                None,
                None,
                None,
                "pass" if cond.working else "fail",
                cond.to_dict(),
            )
            if not cond.working:
                self.ctx.progress.note(f"channel {ch}: {cond.text}")
                self._failed_rows(st, a, level)
                continue
            assert a is not None  # a working channel's record analyses (see above)
            st.nominal = a
            detail = {"record": a.to_dict(), "level_vrms": level}
            if a.gain_db is None:
                for q, limit in ((GAIN, lim.gain_db), (THD, lim.thd_percent)):
                    self._decide_row(ch, q, None, limit, 0.0, detail, _why(a))
                continue
            u_in = amplitude_rel_u(_resid_ratio(a, "in"), a.n_samples)
            u_out = amplitude_rel_u((a.thdn_percent or 0.0) / 100, a.n_samples)
            ug = gain_uncertainty_db(u_in, u_out, b)
            self._decide_row(ch, GAIN, a.gain_db, lim.gain_db, ug, detail)
            expected = float(lim.phase_deg)
            ph = _wrap_near(a.phase_deg, expected)
            self._row(
                ch,
                PHASE,
                ph,
                expected - PHASE_TOLERANCE_DEG,
                expected + PHASE_TOLERANCE_DEG,
                PHASE_U_DEG,
                decide(
                    ph, expected - PHASE_TOLERANCE_DEG, expected + PHASE_TOLERANCE_DEG, PHASE_U_DEG
                ),
                {"expected_deg": expected, "inverting": bool(lim.inverting)},
            )
            uthd = thd_uncertainty_percent(a.thd_percent or 0.0, a.floor.thd_percent, b)
            self._decide_row(
                ch,
                THD,
                a.thd_percent,
                lim.thd_percent,
                uthd,
                {
                    "thd_report": a.thd_report,
                    "floor_percent": a.floor.thd_percent,
                    # what the value is: the record's THD, or with the scope's own
                    # harmonics removed (the raw record's value kept beside it)
                    "scope_harmonics_removed": a.scope_harmonics_removed,
                    "thd_raw_percent": (
                        a.thd_percent if a.thd_raw_percent is None else a.thd_raw_percent
                    ),
                },
            )
            st.points.append(a)
            st.levels_commanded.append(level)
            self._sweep_point(ch, a, level)

    def _wide_look(self, group: list[_ChannelState]) -> dict[str, tuple[np.ndarray, float]]:
        """One short record of the outputs at the scope's highest sample rate, so an
        oscillation far above the test frequency shows at its own frequency (the nominal
        record, sampled for the test signal, would alias it, even onto DC)."""
        rates = sorted(float(r) for r in self.ctx.roles.scope.sample_rates_hz)
        lengths = sorted(int(n) for n in self.ctx.roles.scope.record_lengths)
        fast = rates[-1]
        if fast <= self.plan.sample_rate_hz * (1 + 1e-9):
            return {}
        # about ten test-signal periods, within the scope's lengths (100,000 at most)
        want = min(max(10 * fast / self.plan.frequency_hz, 4096), 100_000)
        n = next((k for k in lengths if k >= want), lengths[-1])
        inputs = sorted({st.conn.output_scope for st in group})
        self.ctx.roles.scope.configure_timebase(fast, n)
        self.ctx.scope.timebase = None  # the next record sets its own again
        acq = self.ctx.roles.scope.acquire(inputs)
        self.ctx.scope.acquisitions += 1
        return {
            st.conn.board_channel: (
                np.asarray(acq.volts[st.conn.output_scope], dtype=float),
                float(acq.sample_rate_hz),
            )
            for st in group
        }

    def _classify(
        self, st: _ChannelState, acq: Acquisition, wide: dict[str, tuple[np.ndarray, float]]
    ) -> ChannelCondition:
        """The channel's mode from the nominal record (and the wide look)."""
        c = st.conn
        lim = st.limits
        expected = float(lim.output_vrms_nominal) / self.ctx.board.conditions.nominal_input_vrms
        # a stuck output shows as a DC level only where nothing blocks DC on its way
        dc_coupled = False
        with contextlib.suppress(AttributeError, KeyError, IndexError):
            dc_coupled = self.ctx.board.channel(c.board_channel).stages[-1].c_out is None
        rails = (self.ctx.board.supply.v_neg, self.ctx.board.supply.v_pos) if dc_coupled else None
        return classify_channel(
            np.asarray(acq.volts[c.input_scope], dtype=float),
            np.asarray(acq.volts[c.output_scope], dtype=float),
            float(acq.sample_rate_hz),
            float(self.plan.frequency_hz),
            expected_gain=expected,
            expected_phase_deg=float(lim.phase_deg),
            rails_v=rails,
            wide=wide.get(c.board_channel),
        )

    def _clip_row(self, ch: str, lim: ChannelLimits, decision: Outcome, detail: Detail) -> None:
        """A clipping-threshold row with no value (not resolvable, or not searched)."""
        clim = lim.clip_input_vrms
        self._row(
            ch,
            CLIP_INPUT,
            None,
            limit_get(clim, "low"),
            limit_get(clim, "high"),
            None,
            decision,
            detail,
        )

    def _failed_rows(self, st: _ChannelState, a: RecordAnalysis | None, level: float) -> None:
        """A channel in a failure mode: its measurements stored as failed, with the mode and
        its evidence; a gain still measurable (reversed polarity, gross gain error, hum) is
        kept as the value, since the diagnosis can use it."""
        ch = st.conn.board_channel
        cond = st.condition
        assert cond is not None
        lim = st.limits
        detail = {"mode": cond.mode, "why": cond.text, "evidence": cond.evidence}
        keep = cond.mode in ("reversed_polarity", "gain_error", "hum") and a is not None
        gain = a.gain_db if keep and a is not None else None
        thd = a.thd_percent if keep and a is not None else None
        for q, limit, value in ((GAIN, lim.gain_db, gain), (THD, lim.thd_percent, thd)):
            self._row(
                ch,
                q,
                value,
                limit_get(limit, "low"),
                limit_get(limit, "high"),
                None,
                "fail",
                detail,
            )
        phase = cond.evidence.get("phase_deg")
        expected = float(lim.phase_deg)
        self._row(
            ch,
            PHASE,
            _wrap_near(phase, expected) if phase is not None else None,
            expected - PHASE_TOLERANCE_DEG,
            expected + PHASE_TOLERANCE_DEG,
            None,
            "fail",
            detail,
        )
        self._clip_row(
            ch, lim, "fail", {**detail, "result": f"clipping search skipped: channel {cond.mode}"}
        )
        if a is not None:
            self._sweep_point(ch, a, level)

    def _sweep_point(
        self, ch: str, a: RecordAnalysis, commanded: float, sweep: str = "clip"
    ) -> None:
        extra = {
            "commanded_vrms": commanded,
            "frequency_hz": a.frequency_hz,
            "over_range": a.over_range,
            "asymmetry": float(a.clip.asymmetry),
        }
        self.ctx.log.sweep_point(ch, sweep, a, extra)

    def clip_search(self, group: list[_ChannelState]) -> None:
        self.ctx.step = "clip"
        safe = self.ctx.board.conditions.safe_input_vrms
        self.ctx.progress.step(
            "clip",
            f"clipping threshold ({self.ctx.criterion.label}), "
            f"{self.opt.resolution_db:g} dB resolution",
        )
        active = [
            s
            for s in group
            if not s.failed
            and s.nominal is not None
            and s.nominal.gain_db is not None
            and not self._unresolvable(s.conn.board_channel, CLIP_INPUT)
        ]
        for s in group:
            if s not in active:
                s.done = True
        # Measured level per commanded level (source divider, probe): the search works on
        # the measured input level; the generator is commanded in its own terms.
        ratio = {}
        for s in active:
            a = s.nominal
            assert a is not None  # active channels have a nominal record (see above)
            ratio[s.conn.board_channel] = (
                a.input_vrms / self.ctx.board.conditions.nominal_input_vrms
            )
        n = 0
        while any(not s.done for s in active) and n < self.opt.max_search_acquisitions:
            proposals: list[tuple[float, _ChannelState]] = []
            for s in active:
                if s.done:
                    continue
                k = ratio[s.conn.board_channel]
                step = self._next(s, k * safe)
                s.step = step
                if step.done:
                    s.done = True
                    continue
                assert step.level_vrms is not None  # a step that is not done has a level
                proposals.append((min(step.level_vrms / k, safe), s))
            if not proposals:
                break
            level, steering = min(proposals, key=lambda p: p[0])
            if any(abs(level - c) < 1e-9 * level for c in steering.levels_commanded):
                # the level was already measured (e.g. capped at the safe level): stop
                steering.done = True
                continue
            res = self._measure_at(group, level, self.plan, f"clip {n}", SEARCH_FILL)
            n += 1
            self.search_acquisitions += 1
            for s in group:
                a = res[s.conn.board_channel]
                if a is None or s.failed:
                    continue
                self._sweep_point(s.conn.board_channel, a, level)
                if a.gain_db is not None and a.thd_percent is not None:
                    s.points.append(a)
                    s.levels_commanded.append(level)
        for s in active:
            self._threshold_row(s)

    def _next(self, s: _ChannelState, max_measured: float) -> SearchStep:
        lim = s.limits.clip_input_vrms
        assert s.nominal is not None  # only channels with a nominal record are searched
        start = float(lim.nominal) * (
            s.nominal.input_vrms / self.ctx.board.conditions.nominal_input_vrms
        )
        # The model's limits bracket a good board: expand by about half their span.
        lo, hi = limit_get(lim, "low"), limit_get(lim, "high")
        expand = 3.0
        if lo and hi and lo > 0:
            expand = min(max(10 * math.log10(hi / lo), 0.5), 3.0)
        # The nominal record is far below the threshold: as a bracket end it would slow
        # false position (THD there is at the floor), so the search uses its own points and
        # starts at the model's prediction, expanding by about half the limits' span.
        pts = list(s.points[1:])
        if (
            not pts
            and s.points
            and self.ctx.criterion.kind == "thd"
            and (s.points[0].thd_percent or 0) >= self.ctx.criterion.threshold_percent
        ):
            pts = list(s.points)  # clipping already at the nominal level
        if not pts:
            return SearchStep(min(start, max_measured), False, False, "model's prediction")
        step = next_search_level(
            pts,
            self.ctx.criterion,
            start_vrms=min(start, max_measured),
            max_vrms=max_measured,
            resolution_db=self.opt.resolution_db,
            expand_db=expand,
            small_signal_gain_db=s.nominal.gain_db if s.nominal else None,
        )
        if not step.done and not step.bracketed and len(pts) >= 2 and step.level_vrms:
            step = self._extrapolate(step, pts, s, expand, max_measured)
        th = step.threshold
        if (
            not step.done
            and step.bracketed
            and th is not None
            and th.below_vrms
            and th.above_vrms
            and len(pts) >= 3
        ):
            # Safeguard: false position that lands twice on the same side of the crossing
            # creeps; bisect (in dB) instead.
            sides = [self._meets(p, s) for p in pts[-2:]]
            if sides[0] == sides[1]:
                mid = math.sqrt(th.below_vrms * th.above_vrms)
                step = SearchStep(min(mid, max_measured), False, True, "bisecting", th)
        return step

    def _score(self, p: RecordAnalysis, s: _ChannelState) -> float:
        """Signed distance to the criterion (>= 0: met): log10 THD ratio, or dB."""
        if self.ctx.criterion.kind == "thd":
            return math.log10(
                max(p.thd_percent or 0.0, 1e-9) / self.ctx.criterion.threshold_percent
            )
        g0 = s.nominal.gain_db if s.nominal and s.nominal.gain_db is not None else 0.0
        return (g0 - (p.gain_db if p.gain_db is not None else g0)) - self.ctx.criterion.db

    def _extrapolate(
        self,
        step: SearchStep,
        pts: list[RecordAnalysis],
        s: _ChannelState,
        expand_db: float,
        max_measured: float,
    ) -> SearchStep:
        """While no bracket exists, aim past the crossing the two nearest points predict
        (secant on score vs level in dB, overshooting by half the expansion step), instead
        of creeping in fixed steps; the move stays between 0.5x and 4x the expansion."""
        assert step.level_vrms is not None  # a step that is not done has a level
        up = step.level_vrms > max(p.input_vrms for p in pts)
        ordered = sorted(pts, key=lambda p: p.input_vrms)
        a, b = (ordered[-2], ordered[-1]) if up else (ordered[1], ordered[0])
        xa, xb = 20 * math.log10(a.input_vrms), 20 * math.log10(b.input_vrms)
        fa, fb = self._score(a, s), self._score(b, s)
        # Without a usable secant, grow the expansion geometrically (1, 2, 4... steps).
        m = len(pts)
        grown = min(expand_db * 2 ** max(m - 1, 0), 6.0)
        plain = min(10 ** ((xb + (grown if up else -grown)) / 20), max_measured)
        plain_step = SearchStep(plain, False, False, "expanding", step.threshold)
        if xa == xb or fa == fb:
            return plain_step
        x_cross = xb + (0.0 - fb) * (xb - xa) / (fb - fa)
        move = x_cross - xb
        if (move > 0) != up:
            return plain_step  # the curve bends the wrong way
        move = (abs(move) + 0.5 * expand_db) * (1 if up else -1)
        lim = max(4 * expand_db, grown)
        move = max(min(move, lim), -lim)
        if abs(move) < 0.5 * expand_db:
            move = 0.5 * expand_db * (1 if up else -1)
        level = min(10 ** ((xb + move) / 20), max_measured)
        return SearchStep(level, False, False, "extrapolating", step.threshold)

    def _meets(self, p: RecordAnalysis, s: _ChannelState) -> bool:
        """The record meets the clipping criterion."""
        if self.ctx.criterion.kind == "thd":
            return (p.thd_percent or 0.0) >= self.ctx.criterion.threshold_percent
        g0 = s.nominal.gain_db if s.nominal and s.nominal.gain_db is not None else 0.0
        return (g0 - (p.gain_db or g0)) >= self.ctx.criterion.db

    def _threshold_row(self, s: _ChannelState) -> None:
        ch = s.conn.board_channel
        lim = s.limits.clip_input_vrms
        safe = self.ctx.board.conditions.safe_input_vrms
        step = s.step
        th = step.threshold if step is not None else None
        if (th is None or not th.bracketed) and s.points:
            th = clip_threshold(
                [p.input_vrms for p in s.points],
                [p.thd_percent for p in s.points],
                [p.gain_db for p in s.points],
                self.ctx.criterion,
                s.nominal.gain_db if s.nominal else None,
                [FLOOR_TO_READING_U * p.floor.thd_percent for p in s.points],
            )
        detail: Detail = {
            "criterion": self.ctx.criterion.label,
            "points": len(s.points),
            "expected_side": s.limits.clip_side,
            "expected_stage": s.limits.clip_stage,
            "reason": step.reason if step is not None else None,
        }
        if th is not None and th.bracketed and th.level_vrms is not None:
            side, asym = _clip_side(s.points, th.level_vrms)
            detail.update(
                {
                    "below_vrms": th.below_vrms,
                    "above_vrms": th.above_vrms,
                    "interp_u_db": th.uncertainty_db,
                    "side": side,
                    "asymmetry": asym,
                }
            )
            assert s.nominal is not None  # as in _next
            u_rel = amplitude_rel_u(_resid_ratio(s.nominal, "in"), s.nominal.n_samples)
            u_db = threshold_uncertainty_db(
                0.0, u_rel, self.opt.bench, settled=True, fit_u_db=th.uncertainty_db or 0.0
            )
            u_v = th.level_vrms * (10 ** (u_db / 20) - 1)
            detail["u_db"] = u_db
            self._decide_row(ch, CLIP_INPUT, th.level_vrms, lim, u_v, detail)
            self._row(
                ch,
                CLIP_SIDE,
                asym,
                None,
                None,
                None,
                _side_decision(side, s.limits),
                {
                    "side": side,
                    "expected": detail["expected_side"],
                    "stage": detail["expected_stage"],
                    "expected_fraction": _side_fraction(s.limits, side),
                },
            )
            return
        low, high = limit_get(lim, "low"), limit_get(lim, "high")
        if (
            th is not None
            and th.below_vrms is not None
            and not th.bracketed
            and th.above_vrms is None
        ):
            # Criterion not met up to the safe level: a result, not an excess.
            top = th.below_vrms
            detail.update(
                {
                    "result": "threshold above safe level",
                    "safe_input_vrms": safe,
                    "highest_measured_vrms": top,
                }
            )
            decision: Outcome
            if high is not None and high <= top:
                decision = "fail"
            elif high is not None:
                decision = "not resolvable"
            else:
                decision = decide(top, low, None, 0.0)
            self._row(ch, CLIP_INPUT, None, low, high, None, decision, detail, detail["result"])
            self.ctx.progress.note(f"channel {ch}: threshold above safe level {safe:g} V rms")
            return
        if th is not None and th.above_vrms is not None and not th.bracketed:
            detail.update(
                {
                    "result": "criterion met at the lowest level measured",
                    "lowest_measured_vrms": th.above_vrms,
                }
            )
            self._row(
                ch,
                CLIP_INPUT,
                None,
                low,
                high,
                None,
                "fail" if low is not None and th.above_vrms < low else "not resolvable",
                detail,
                detail["result"],
            )
            return
        detail["result"] = "search did not converge"
        self._row(ch, CLIP_INPUT, None, low, high, None, "fail", detail, detail["result"])

    def frequencies(self, group: list[_ChannelState]) -> None:
        extra = self.ctx.board.conditions.extra_frequencies_hz
        if not extra or not self.opt.extra_frequencies:
            return
        self.ctx.step = "frequency"
        self.ctx.progress.step("frequency", "gain at " + ", ".join(f"{f:g}" for f in extra) + " Hz")
        level = self.ctx.board.conditions.nominal_input_vrms
        self.ctx.safe.set_level(level)
        for f in extra:
            plan = self.ctx.scope.tune(self._plan(f), self.ctx.safe.set_frequency)
            self._wait_settle()
            res = self._measure_at(group, level, plan, f"{f:g} Hz")
            for s in group:
                ch = s.conn.board_channel
                a = res[ch]
                if a is None or s.failed:
                    continue
                self._sweep_point(ch, a, level, sweep="frequency")
                rel = None
                if a.gain_db is not None and s.nominal is not None and s.nominal.gain_db:
                    rel = a.gain_db - s.nominal.gain_db
                self._row(
                    ch,
                    gain_at(f),
                    a.gain_db,
                    None,
                    None,
                    None,
                    "info",
                    {
                        "frequency_hz": plan.frequency_hz,
                        "relative_db": rel,
                        "phase_deg": a.phase_deg,
                    },
                    None if a.gain_db is not None else _why(a),
                )
        self.plan = self.ctx.scope.tune(self.plan, self.ctx.safe.set_frequency)

    # --- the whole run --------------------------------------------------------------
    def verdicts(self) -> dict[str, ChannelVerdict]:
        out: dict[str, ChannelVerdict] = {}
        board_rows = [r for r in self.ctx.log.rows if r.channel == ""]
        for c in self.ctx.fixture.channels:
            ch = c.board_channel
            rows = [r for r in self.ctx.log.rows if r.channel == ch] + board_rows
            failing = [
                f"{r.name} ({r.decision})" for r in rows if not self.opt.policy.accepts(r.decision)
            ]
            ok = bool(rows) and not failing
            out[ch] = ChannelVerdict(ch, "PASS" if ok else "FAIL", failing)
        return out

    def open_group(self, group: tuple[ChannelConnection, ...]) -> list[_ChannelState]:
        """A group's channels, each with its limits and its measurements to come."""
        return [_ChannelState(c, self.ctx.limits.channels[c.board_channel]) for c in group]

    def run(self) -> RunResult:
        t0 = time.perf_counter()
        ctx = self.ctx
        self.validate()
        verdicts: dict[str, ChannelVerdict] = {}

        def verdict(
            status: Literal["complete", "aborted"], reason: str | None
        ) -> tuple[Literal["PASS", "FAIL"] | None, str | None]:
            verdicts.update(self.verdicts())
            if status != "complete":
                return None, reason
            ok = all(v.verdict == "PASS" for v in verdicts.values())
            return ("PASS" if ok else "FAIL"), reason

        outcome = perform(ctx, production_order(self), verdict)
        retest = 0
        with contextlib.suppress(StageproofError):  # the store could not say
            retest = int(ctx.store.get_run(ctx.run_id).retest)
        result = RunResult(
            run_id=ctx.run_id,
            serial=ctx.serial,
            status=outcome.status,
            verdict=outcome.verdict,
            reason=outcome.reason,
            retest=retest,
            measurements=list(ctx.log.rows),
            channels=verdicts,
            acquisitions=ctx.scope.acquisitions,
            search_acquisitions=self.search_acquisitions,
            generator_state=ctx.safe.output_state,
            settle_note=ctx.settle_note,
            elapsed_s=time.perf_counter() - t0,
            instrument_s=ctx.clock.instrument_s,
            waiting_s=ctx.clock.waiting_s,
            settle_waited_s=ctx.clock.settle_s,
        )
        outcome.reraise(ctx.step)
        return result


def production_order(p: ProductionSteps) -> Order[list[_ChannelState]]:
    """The production sequence: the unresolvable limits before anything is driven, the
    supply and the DC test points, then per group nominal, clipping search, frequencies."""
    return Order(
        name="production",
        unpowered=(p.precheck,),
        board=(p.quiescent, p.dc_points),
        group=p.open_group,
        routed=(p.nominal, p.clip_search, p.frequencies),
        release_step="shutdown",
    )


#: Margin between a test point's highest expected voltage and the DMM range asked for, so
#: a board at the edge of its limits still reads on range (common practice).
DMM_RANGE_MARGIN = 1.25


def dmm_range_v(limit: Limit | None) -> float | None:
    """The DMM range that fits a test point's expected voltage from the model (its largest
    magnitude, nominal or limit, with margin); None (the meter's own choice) when the model
    gives no figure."""
    values = [limit_get(limit, k) for k in ("nominal", "low", "high")]
    known = [abs(v) for v in values if v is not None and math.isfinite(v)]
    if not known or max(known) <= 0:
        return None
    return DMM_RANGE_MARGIN * max(known)


def _gross(current: float, limit: Limit, current_limit_a: float) -> bool:
    """A board that must not see a signal: the supply is limiting (within 10 % of its
    current limit) or the current is off by more than a factor of two (a short, a missing
    part).  A smaller excess is a fail but the test goes on, for the repair diagnosis."""
    if current >= 0.9 * current_limit_a:
        return True
    low, high = limit_get(limit, "low"), limit_get(limit, "high")
    return (high is not None and current > 2 * high) or (low is not None and current < low / 2)


def _failed(group: list[_ChannelState], channel: str) -> bool:
    return any(s.failed for s in group if s.conn.board_channel == channel)


def _agree(a: RecordAnalysis | None, b: RecordAnalysis | None) -> bool:
    """Two records after a level change agree: settled."""
    if a is None or b is None or a.gain_db is None or b.gain_db is None:
        return False
    if abs(a.gain_db - b.gain_db) > 0.02:
        return False
    ta, tb = a.thd_percent or 0.0, b.thd_percent or 0.0
    return abs(ta - tb) <= 0.05 * max(ta, tb) + a.floor.thd_percent


def _resid_ratio(a: RecordAnalysis | None, which: str) -> float:
    """Residual-to-fundamental ratio of the input record; the quantisation part of the
    floor stands in (the input is a clean generator sine)."""
    if a is None:
        return 0.0
    return float(a.floor.thdn_ratio) if which == "in" else float((a.thdn_percent or 0) / 100)


def _clip_side(points: list[RecordAnalysis], threshold_vrms: float) -> tuple[str | None, float]:
    """Which half-cycle of the output limits first: from the lowest record at or above the
    threshold (crest deficit asymmetry: > 0 means the negative half-cycle falls short)."""
    above = sorted(
        (p for p in points if p.input_vrms >= threshold_vrms * 0.999), key=lambda p: p.input_vrms
    )
    if not above:
        above = sorted(points, key=lambda p: p.input_vrms)[-1:]
    if not above:
        return None, 0.0
    p = above[0]
    asym = float(p.clip.asymmetry)
    if p.clip_side:
        return p.clip_side, asym
    return ("negative" if asym > 0 else "positive"), asym


#: A measured clipping side that the model gives to fewer boards than this is a fault clue
#: strong enough to fail on (for example a drifted bias resistor moving the clipping from one
#: half-cycle to the other); where the model itself is split, the side is recorded only.
SIDE_DECISIVE_FRACTION = 0.99


def _side_fraction(limits: ChannelLimits, side: str | None) -> float | None:
    if side is None:
        return None
    value = limits.clip_side_fraction.get(side)
    return None if value is None else float(value)


def _side_decision(side: str | None, limits: ChannelLimits) -> Outcome:
    """Decide the clipping side against the model: pass when it is the side the model
    expects; fail when the model gives the other side to at least 99 % of good boards."""
    expected = limits.clip_side or None
    if side is None or expected is None:
        return "info"
    if side == expected:
        return "pass"
    fraction = _side_fraction(limits, expected)
    if fraction is not None and fraction >= SIDE_DECISIVE_FRACTION:
        return "fail"
    return "info"


def run_board(
    instruments: InstrumentSet,
    board: Board,
    limits: BoardLimits,
    fixture: FixtureConfig,
    serial: str,
    store: ResultStore,
    *,
    options: RunOptions | None = None,
    progress: Progress | None = None,
    board_file: str = "",
    station_file: str = "",
) -> RunResult:
    """Test one board; returns the result (status complete) or raises RunAborted /
    KeyboardInterrupt after marking the run aborted.  The store must be open and
    ``recover_aborted()`` already called."""
    opts = options or RunOptions()
    prog = progress or NullProgress()
    ctx = build_context(
        instruments,
        board=board,
        limits=limits,
        fixture=fixture,
        serial=serial,
        board_file=board_file or board.source,
        station=opts.station_name or station_file,
        store=store,
        options=opts,
        progress=prog,
        note=prog.note,
    )
    return ProductionSteps(ctx, opts).run()
