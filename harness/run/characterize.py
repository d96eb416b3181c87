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

Acquisition here is this module's own small loop over the driver calls (plan a coherent
record, range the scope, acquire, analyse) rather than the sequencer's private helpers,
which may change; it uses only public functions of the run layer (SafeGenerator,
SupplyGuard, sigterm_raises, choose_range, added_thd_percent).
"""

from __future__ import annotations

import json
import logging
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from harness import __version__
from harness.errors import AnalysisError, InstrumentError, RunAborted, SafetyError
from harness.measure import (
    ClipCriterion,
    RecordAnalysis,
    analyze_uniform,
    clip_threshold,
    plan_coherent,
)
from harness.measure.floor import FLOOR_MARGIN
from harness.model.board import Board
from harness.run.fixture import ChannelConnection, FixtureConfig
from harness.run.progress import NullProgress, Progress
from harness.run.safety import SafeGenerator, SupplyGuard, sigterm_raises
from harness.run.sequence import added_thd_percent, choose_range
from harness.store import MeasurementRow, RunHeader, SweepPointRow

log = logging.getLogger("harness.run.characterize")

#: A record fills at most this fraction of the scope range; under this share of it, re-range.
RANGE_FILL = 0.8
RANGE_UNDERUSE = 0.35
#: The -3 dB point is bracketed from points this far (factor) below the model's lowest corner.
CORNER_MARGIN = 0.4
#: Mid-band reference: gains between this multiple of the model's corner and the test
#: frequency (a single-pole high-pass is within 0.01 dB of mid-band at 20x its corner).
MIDBAND_FACTOR = 20.0
#: A frequency-sweep point may sit this fraction off its log-spaced target (coherence).
FREQ_TOLERANCE = 0.05
#: Input and output records within this fill ratio get the digitiser-harmonic correction.
FILL_MATCH = 1.25


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


class _Bench:
    """Adapter: the few acquisition steps characterisation needs, on public driver calls."""

    def __init__(self, instruments: Any, board: Board, fixture: FixtureConfig, opt) -> None:
        self.inst = instruments
        self.scope = instruments.scope
        self.board = board
        self.fixture = fixture
        self.opt = opt
        self.ranges: dict[int, float] = {}
        self.scope_ranges = tuple(float(r) for r in self.scope.ranges_vpp)
        self.timebase: tuple[float, int] | None = None
        self.trigger: int | None = None
        self.acquisitions = 0

    def plan(self, frequency_hz: float, *, tolerance_rel: float = 0.01) -> Any:
        """A coherent record near ``frequency_hz`` lasting at most max_record_s: the longest
        record up to ``max_points``, else the shortest longer one that fits (low
        frequencies need long records); else the shortest-lasting plan there is."""
        all_lengths = sorted(int(n) for n in self.scope.record_lengths)
        short = [n for n in all_lengths if n <= self.opt.max_points][::-1]
        longer = [n for n in all_lengths if n > self.opt.max_points]
        rates = list(self.scope.sample_rates_hz)
        best = None
        for n in short + longer:
            try:
                p = plan_coherent(
                    frequency_hz,
                    rates,
                    [n],
                    min_cycles=self.opt.min_cycles,
                    tolerance_rel=tolerance_rel,
                )
            except AnalysisError:
                continue
            dur = p.n_samples / p.sample_rate_hz
            if dur <= self.opt.max_record_s:
                return p
            if best is None or dur < best[0]:
                best = (dur, p)
        if best is None:
            raise AnalysisError(
                f"the scope cannot record {frequency_hz:.4g} Hz coherently within "
                f"{100 * tolerance_rel:g} % (sample rates {rates}, record lengths "
                f"{all_lengths})"
            )
        return best[1]

    def _tips(self, probe: float) -> tuple[float, ...]:
        return tuple(r * probe for r in self.scope_ranges)

    def _set_range(self, n: int, rng: float, probe: float) -> None:
        if self.ranges.get(n) == rng:
            return
        setup = self.scope.configure_input(n, range_vpp=rng, probe=probe)
        self.ranges[n] = float(getattr(setup, "range_vpp", rng))

    def preset(self, group: Sequence[ChannelConnection], level_vrms: float, gains: dict) -> None:
        span = self.board.supply.v_pos - self.board.supply.v_neg
        for c in group:
            vin = 2 * math.sqrt(2) * level_vrms
            self._set_range(
                c.input_scope, choose_range(vin, self._tips(c.input_probe)), c.input_probe
            )
            vout = min(vin * gains[c.board_channel], 1.1 * span)
            self._set_range(
                c.output_scope, choose_range(vout, self._tips(c.output_probe)), c.output_probe
            )

    def acquire(self, group: Sequence[ChannelConnection], plan: Any) -> dict[str, RecordAnalysis]:
        inputs: list[int] = []
        for c in group:
            for n in (c.input_scope, c.output_scope):
                if n not in inputs:
                    inputs.append(n)
        probes = {c.input_scope: c.input_probe for c in group}
        probes.update({c.output_scope: c.output_probe for c in group})
        tb = (float(plan.sample_rate_hz), int(plan.n_samples))
        if self.timebase != tb:
            self.scope.configure_timebase(*tb)
            self.timebase = tb
        if self.trigger != inputs[0]:
            self.scope.configure_trigger(inputs[0], 0.0)
            self.trigger = inputs[0]
        for attempt in range(self.opt.max_rerange + 1):
            acq = self.scope.acquire(inputs)
            self.acquisitions += 1
            changed = False
            for n in inputs:
                v = np.asarray(acq.volts[n], dtype=float)
                lo, hi = acq.adc_limits[n]
                lsb = (hi - lo) / 2 ** int(acq.bits)
                over = bool(np.any(v >= hi - 0.5 * lsb) or np.any(v <= lo + 0.5 * lsb))
                rng = self.ranges.get(n, hi - lo)
                tips = self._tips(probes[n])
                new = rng
                if over:
                    bigger = [r for r in tips if r > rng * (1 + 1e-9)]
                    new = bigger[0] if bigger else rng
                elif float(np.ptp(v)) < RANGE_UNDERUSE * RANGE_FILL * rng:
                    new = min(choose_range(float(np.ptp(v)), tips), rng)
                if new != rng and attempt < self.opt.max_rerange:
                    self.ranges.pop(n, None)
                    self._set_range(n, new, probes[n])
                    changed = True
            if not changed:
                break
        out: dict[str, RecordAnalysis] = {}
        for c in group:
            x = np.asarray(acq.volts[c.input_scope], dtype=float)
            y = np.asarray(acq.volts[c.output_scope], dtype=float)
            a = analyze_uniform(
                x,
                y,
                acq.sample_rate_hz,
                in_adc=tuple(acq.adc_limits[c.input_scope]),
                out_adc=tuple(acq.adc_limits[c.output_scope]),
                adc_bits=int(acq.bits),
                frequency_hz=plan.frequency_hz,
            )
            in_lo, in_hi = acq.adc_limits[c.input_scope]
            out_lo, out_hi = acq.adc_limits[c.output_scope]
            fill_ratio = (float(np.ptp(y)) / (out_hi - out_lo)) / max(
                float(np.ptp(x)) / (in_hi - in_lo), 1e-12
            )
            # The digitiser-harmonic correction scales the input's harmonics by
            # fill_ratio^(k-1): with unequal fills it would amplify the input's
            # quantisation error into false harmonics, so it is used only near equal fill.
            if a.thd_percent is not None and 1 / FILL_MATCH <= fill_ratio <= FILL_MATCH:
                corr = added_thd_percent(
                    x, y, plan, acq.adc_limits[c.input_scope], acq.adc_limits[c.output_scope]
                )
                if corr is not None:
                    from dataclasses import replace

                    a = replace(a, thd_percent=corr)
            out[c.board_channel] = a
        return out


class Characterizer:
    """One characterisation run; use :func:`characterize`."""

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
        self.inst = instruments
        self.board = board
        self.limits = limits
        self.fixture = fixture
        self.serial = serial
        self.store = store
        self.opt = options
        self.progress = progress
        self.board_file = board_file
        cond = board.conditions
        self.criterion = ClipCriterion(
            kind=cond.clip_criterion,
            threshold_percent=cond.clip_thd_percent,
            db=cond.clip_compression_db,
        )
        self.bench = _Bench(instruments, board, fixture, options)
        self.safe = SafeGenerator(
            instruments.generator,
            cond.safe_input_vrms,
            direct_vrms=cond.nominal_input_vrms,
            max_step_up_db=options.max_step_up_db,
            output=fixture.generator_output,
        )
        self.supply: SupplyGuard | None = None
        if fixture.supply is not None and getattr(instruments, "supply", None) is not None:
            s = fixture.supply
            neg = (
                (s.negative_output, float(s.negative_voltage_v))
                if s.negative_output is not None and s.negative_voltage_v is not None
                else None
            )
            self.supply = SupplyGuard(
                instruments.supply, s.voltage_v, s.current_limit_a, s.output, negative=neg
            )
        self.settle_s = (
            options.settle_wait_s
            if options.settle_wait_s is not None
            else max(
                float(limits.channels[c.board_channel].settle_time_s) for c in fixture.channels
            )
        )
        self.settle_note = f"waited {self.settle_s:.3g} s after each level or frequency change" + (
            " (operator override)"
            if options.settle_wait_s is not None
            else " (the model's settle time)"
        )
        self.rows: list[MeasurementRow] = []
        self.channels = {
            c.board_channel: ChannelCharacterization(c.board_channel) for c in fixture.channels
        }
        self.run_id = -1
        self.step = "setup"

    # --- store ----------------------------------------------------------------------
    def header(self) -> RunHeader:
        ids = getattr(self.inst, "identities", {}) or {}
        doc = self.limits.to_dict()
        return RunHeader(
            serial=self.serial,
            part_number=self.board.part_number,
            board_name=self.board.name,
            board_file=self.board_file,
            board_digest=self.board.digest,
            limits_json=json.dumps(doc, sort_keys=True, default=str),
            limits_digest=str(self.limits.digest),
            station=self.opt.station_name,
            fixture=f"{self.fixture.name} ({self.fixture.path}, sha256 {self.fixture.digest}); "
            "characterisation",
            operator=self.opt.operator,
            instruments={
                r: ",".join(
                    str(getattr(i, k, "")) for k in ("maker", "model", "serial", "firmware")
                )
                for r, i in ids.items()
            },
            software_version=__version__,
            settle_note=self.settle_note,
        )

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
        row = MeasurementRow(
            channel=ch,
            name=name,
            value=value,
            unit=unit,
            low=low,
            high=high,
            uncertainty=None,
            decision=decision,
            step=self.step,
            detail_json=json.dumps(detail, default=_json_default) if detail else None,
        )
        self.store.add_measurement(self.run_id, row)
        self.rows.append(row)
        self.progress.measurement(row)
        return row

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
        self.store.add_sweep_point(
            self.run_id,
            SweepPointRow(
                channel=ch,
                sweep=sweep,
                level_vrms=a.input_vrms,
                gain_db=a.gain_db,
                thd_percent=a.thd_percent,
                thdn_percent=a.thdn_percent,
                clipped=a.clipped,
                clip_side=a.clip_side,
                extra_json=json.dumps(data, default=_json_default),
            ),
        )
        return p

    # --- measuring ------------------------------------------------------------------
    def _gains(self, group: Sequence[ChannelConnection]) -> dict[str, float]:
        nom = self.board.conditions.nominal_input_vrms
        return {
            c.board_channel: float(self.limits.channels[c.board_channel].output_vrms_nominal) / nom
            for c in group
        }

    def _measure(self, group, level: float, plan: Any, gains: dict) -> dict[str, RecordAnalysis]:
        changed = abs(level - self.safe.level_vrms) > 1e-12 or self.safe.output_state != "on"
        self.bench.preset(group, level, gains)
        self.safe.set_level(level)
        if self.safe.output_state != "on":
            self.safe.on()
        if changed:
            self._settle()
        return self.bench.acquire(group, plan)

    def _settle(self) -> None:
        if self.settle_s > 0:
            self.opt.sleep(self.settle_s)
        hb = getattr(self.store, "heartbeat", None)
        if hb is not None:
            hb(self.run_id)

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
        plan = self.bench.plan(cond.frequency_hz)
        self.progress.step(
            "level",
            f"level sweep at {plan.frequency_hz:.6g} Hz, "
            f"{self.opt.level_step_db:g} dB steps, up to {safe:g} V rms at most",
        )
        self.safe.configure(plan.frequency_hz, min(nom, safe))
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
        self.safe.set_frequency(self.bench.plan(cond.frequency_hz).frequency_hz)

    def _freq_point(self, group, f: float, level: float, gains: dict) -> None:
        try:
            # the sweep's frequencies need not be exact: the planned one is recorded
            plan = self.bench.plan(f, tolerance_rel=FREQ_TOLERANCE)
        except AnalysisError as exc:
            self.progress.note(f"{f:.4g} Hz skipped: {exc}")
            return
        self.safe.set_frequency(plan.frequency_hz)
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
            g = [min(pts, key=lambda p: abs(math.log(p.frequency_hz / f_test))).gain_db]
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
    def run(self) -> CharacterizationResult:
        t0 = time.perf_counter()
        self.run_id = self.store.begin_run(self.header())
        status: Literal["complete", "aborted"] = "complete"
        reason: str | None = None
        error: BaseException | None = None
        try:
            with sigterm_raises():
                try:
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
                        for grp in self.fixture.groups():
                            route = sorted({r for c in grp for r in c.route})
                            switch = getattr(self.inst, "switch", None)
                            if route and switch is not None:
                                switch.close(route)
                            try:
                                self.level_sweep(grp)
                                self.frequency_sweep(grp)
                            finally:
                                self.safe.off()
                                if route and switch is not None:
                                    switch.open(route)
                            self.compare(grp)
                finally:
                    self.safe.safe_off()
                    if self.supply is not None:
                        self.supply.safe_off()
        except BaseException as exc:
            status, error = "aborted", exc
            if isinstance(exc, KeyboardInterrupt):
                reason = f"interrupted by the operator (Ctrl-C) at step {self.step}"
            else:
                reason = f"{type(exc).__name__} at step {self.step}: {exc}"
        if self.safe.output_state == "unknown":
            reason = (reason + "; " if reason else "") + "generator output state unknown"
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
            acquisitions=self.bench.acquisitions,
            elapsed_s=time.perf_counter() - t0,
        )
        if error is not None:
            if isinstance(error, KeyboardInterrupt | RunAborted):
                raise error
            if isinstance(error, InstrumentError | AnalysisError):
                raise RunAborted(str(error), step=self.step) from error
            raise error
        return result


def _json_default(o: Any) -> Any:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, tuple):
        return list(o)
    return str(o)


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
