"""Bench operations shared by the production sequence and characterisation.

Both drive the same instruments the same way: plan a coherent record, range the scope from
the expected levels, acquire a group of channels at once (re-ranging on over-range or
under-use), analyse each channel and take the digitiser's own harmonics out of the THD;
both write the same run header, measurement rows and sweep points.  What differs between
them is policy (how long a record may be, how far a sweep frequency may move, when the
ADC-nonlinearity correction is trusted), so it is passed in, never copied.

Only driver calls here, no SCPI text.
"""

from __future__ import annotations

import contextlib
import logging
import math
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import asdict, is_dataclass, replace
from typing import Any, Literal, NoReturn, Protocol

import numpy as np

from harness import __version__, jsontext
from harness.errors import AnalysisError, InstrumentError, RunAborted
from harness.instruments.drivers import Acquisition
from harness.instruments.scpi import Identity
from harness.io.board import read_board_text
from harness.io.fixture import ChannelConnection, FixtureConfig
from harness.measure import ClipCriterion, RecordAnalysis, analyze_uniform, plan_coherent
from harness.measure.coherent import CoherentPlan, plan_coherent_within
from harness.model.board import Board
from harness.model.design import check_settle_time
from harness.model.limits import BoardLimits, Limit
from harness.outcomes import Outcome
from harness.quantities import Quantity
from harness.run.progress import Progress
from harness.run.roles import GeneratorRole, InstrumentSet, ScopeRole, SupplyRole, SwitchRole
from harness.run.roles import recoveries as station_recoveries
from harness.run.safety import SafeGenerator, SupplyGuard, sigterm_raises
from harness.store import MeasurementRow, ResultStore, RunHeader, SweepPointRow

#: A measurement's or sweep point's detail: free-form JSON (numbers, texts, lists, dicts).
Detail = dict[str, Any]

#: A record fills at most this fraction of the scope range (headroom for tolerances).
RANGE_FILL = 0.8
#: A record using less than this fraction of its target fill is re-ranged down.
RANGE_UNDERUSE = 0.35
#: The input probe may read this much above the safe level before the run stops: the
#: margin for the scope's gain accuracy (about 2-3 % for an 8-bit scope, common practice).
MEASURED_SAFE_MARGIN = 0.05
#: Acquisitions in a row that may be spoilt by an instrument recovering before giving up.
MAX_RESTORES = 3

log = logging.getLogger("harness.run")


# --- small conversions -------------------------------------------------------------------
def json_default(o: object) -> object:
    """JSON for the numpy scalars, arrays and result objects that end up in detail texts."""
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if hasattr(o, "to_dict"):
        return o.to_dict()
    if is_dataclass(o) and not isinstance(o, type):
        return asdict(o)
    return str(o)


def identity_text(identity: Identity | str) -> str:
    """One instrument's identity as stored in the run header (maker,model,serial,firmware)."""
    if isinstance(identity, str):
        return identity
    fields = [identity.maker, identity.model, identity.serial, identity.firmware]
    if any(fields):
        return ",".join(str(f) for f in fields)
    return str(identity)


def limit_get(limit: Limit | None, attr: Literal["nominal", "low", "high"]) -> float | None:
    """A limit's bound as a float, None where the limit (or the bound) is absent."""
    if limit is None:
        return None
    v = limit.low if attr == "low" else limit.high if attr == "high" else limit.nominal
    return None if v is None else float(v)


def choose_range(vpp: float, ranges: Iterable[float], fill: float = RANGE_FILL) -> float:
    """Smallest scope range holding ``vpp`` within ``fill`` of full scale (else the largest)."""
    rs = sorted(float(r) for r in ranges)
    for r in rs:
        if vpp <= fill * r:
            return r
    return rs[-1]


#: Input and output records within this fill ratio get the digitiser-harmonic correction.
#: Harmonic k of the input's record is scaled by (r_out / r_in)^(k-1) to stand for the
#: digitiser's share of the output's; with fills far apart that factor multiplies the
#: input's noise and quantisation error (e.g. 2^9 at k = 10 for a 2:1 ratio) into a false THD.
FILL_MATCH = 1.25


class CoherentRecord(Protocol):
    """What the digitiser-harmonic correction needs of a record's plan (a CoherentPlan)."""

    @property
    def cycles(self) -> int: ...

    @property
    def n_samples(self) -> int: ...


def added_thd_percent(
    x: np.ndarray,
    y: np.ndarray,
    plan: CoherentRecord,
    in_adc: tuple[float, float],
    out_adc: tuple[float, float],
    k_max: int = 10,
) -> float | None:
    """THD the board adds, with the digitiser's own harmonics removed (percent).

    A static ADC nonlinearity (integral nonlinearity: a polynomial in the code) puts the
    same relative harmonics, at the same phase relative to the fundamental, on any sine
    recorded at the same fraction r of full scale; harmonic k of a polynomial's leading term
    grows as r^(k-1).  The input probe sees the generator's clean sine: its phase-normalised
    complex harmonics, scaled from its own fraction of full scale to the output's, estimate
    the digitiser's share of the output's harmonics, which is subtracted as complex
    amplitudes.  Needs a coherent record (harmonic k exactly in FFT bin k·J); returns None
    otherwise.  What remains is the distortion added between the two probes: the
    generator's own distortion, already present at the input, is not charged to the board.
    """
    n = len(y)
    j = int(plan.cycles)
    if len(x) != n or n != int(plan.n_samples) or j < 1:
        return None
    kk = [k for k in range(2, k_max + 1) if k * j < n // 2]
    if not kk:
        return None
    fx, fy = np.fft.rfft(x - np.mean(x)), np.fft.rfft(y - np.mean(y))

    def rel(f: np.ndarray, adc: tuple[float, float]) -> tuple[np.ndarray, float]:
        h1 = f[j]
        phi = float(np.angle(h1))
        r = 2 * abs(h1) / n / ((adc[1] - adc[0]) / 2)  # fraction of full scale
        return np.array([f[k * j] / abs(h1) * np.exp(-1j * k * phi) for k in kk]), r

    rx, r_in = rel(fx, in_adc)
    ry, r_out = rel(fy, out_adc)
    if not (r_in > 0 and r_out > 0):
        return None
    scale = np.array([(r_out / r_in) ** (k - 1) for k in kk])
    added = ry - rx * scale
    return float(100 * np.sqrt(np.sum(np.abs(added) ** 2)))


# --- run set-up ---------------------------------------------------------------------------
def clip_criterion(board: Board) -> ClipCriterion:
    """The board's clipping criterion from its test conditions."""
    cond = board.conditions
    return ClipCriterion(
        kind=cond.clip_criterion,
        threshold_percent=cond.clip_thd_percent,
        db=cond.clip_compression_db,
    )


def settle_time_s(
    limits: BoardLimits,
    fixture: FixtureConfig,
    override_s: float | None,
    board: Board | None = None,
) -> float:
    """The operator's settle time, else the longest the model gives a tested channel; a
    model wait over MAX_SETTLE_S (a capacitor's value or unit wrong) is refused with a
    BoardFileError naming the channel when ``board`` is given, before anything waits."""
    if override_s is not None:
        return override_s
    waits = {
        c.board_channel: float(limits.channels[c.board_channel].settle_time_s)
        for c in fixture.channels
    }
    if board is not None:
        for name, wait in waits.items():
            check_settle_time(board, board.channel(name), wait)
    return max(waits.values())


def safe_generator(
    generator: GeneratorRole,
    board: Board,
    fixture: FixtureConfig,
    max_step_up_db: float,
    *,
    on_alarm: Callable[[str], None] | None = None,
    disturbances: Callable[[], int] | None = None,
) -> SafeGenerator:
    """The generator behind the board's safe input level: it switches on at no more than
    the nominal level and every rise while on ramps."""
    cond = board.conditions
    return SafeGenerator(
        generator,
        cond.safe_input_vrms,
        direct_vrms=cond.nominal_input_vrms,
        max_step_up_db=max_step_up_db,
        on_alarm=on_alarm,
        disturbances=disturbances,
        output=fixture.generator_output,
    )


def station_disturbances(instruments: InstrumentSet) -> Callable[[], int] | None:
    """A counter of every recovery on the station's sessions (None without sessions)."""
    if not instruments.sessions:
        return None
    return lambda: station_recoveries(instruments)


def supply_guard(fixture: FixtureConfig, supply: SupplyRole | None) -> SupplyGuard | None:
    """The fixture's supply settings on the station's supply; None without either."""
    if fixture.supply is None or supply is None:
        return None
    s = fixture.supply
    neg = (
        (s.negative_output, float(s.negative_voltage_v))
        if s.negative_output is not None and s.negative_voltage_v is not None
        else None
    )
    return SupplyGuard(supply, s.voltage_v, s.current_limit_a, s.output, negative=neg)


def run_header(
    *,
    serial: str,
    board: Board,
    board_file: str,
    limits: BoardLimits,
    fixture: FixtureConfig,
    station: str,
    operator: str,
    identities: Mapping[str, Identity | str],
    settle_note: str,
    fixture_note: str = "",
) -> RunHeader:
    """What the store keeps about a run before its first measurement: the board, the frozen
    limits with their provenance, the fixture (``fixture_note`` appended), the instruments."""
    limits_dict = limits.to_dict()
    prov = limits_dict.get("provenance") if isinstance(limits_dict, dict) else None
    return RunHeader(
        serial=serial,
        part_number=board.part_number,
        board_name=board.name,
        board_file=board_file,
        board_digest=board.digest,
        limits_json=jsontext.dumps(limits_dict, sort_keys=True, default=json_default),
        limits_digest=str(limits.digest),
        station=station,
        fixture=f"{fixture.name} ({fixture.path}, sha256 {fixture.digest}){fixture_note}",
        operator=operator,
        instruments={role: identity_text(i) for role, i in identities.items()},
        software_version=__version__,
        settle_note=settle_note,
        limits_provenance=jsontext.dumps(prov, sort_keys=True, default=json_default)
        if prov is not None
        else None,
        board_text=read_board_text(board_file, board.digest),
    )


# --- rows ---------------------------------------------------------------------------------
class RunLog:
    """Where a run's results go: every decided measurement is stored at once (a crash loses
    nothing decided), kept for the verdict and shown; sweep points are stored."""

    def __init__(self, store: ResultStore, progress: Progress) -> None:
        self.store = store
        self.progress = progress
        self.run_id = -1
        self.rows: list[MeasurementRow] = []

    def begin(self, header: RunHeader) -> int:
        self.run_id = self.store.begin_run(header)
        return self.run_id

    def row(
        self,
        channel: str,
        q: Quantity,
        value: float | None,
        low: float | None,
        high: float | None,
        uncertainty: float | None,
        decision: Outcome,
        step: str,
        detail: Detail | None = None,
        reason: str | None = None,
    ) -> MeasurementRow:
        """Store, keep and show one decided measurement.  A value that could not be measured
        (None or not finite) is stored as null with no uncertainty and always with a reason
        in its detail (``reason``, the detail's own, or "not measured"), never silently."""
        if value is not None and not math.isfinite(value):
            reason = reason or f"reading not finite ({value})"
            value = None
        if value is None:
            uncertainty = None
            detail = dict(detail or {})
            detail["reason"] = reason or detail.get("reason") or "not measured"
        elif reason:
            detail = {**(detail or {}), "reason": reason}
        row = MeasurementRow(
            channel=channel,
            name=q.name,
            value=value,
            unit=q.unit,
            low=low,
            high=high,
            uncertainty=uncertainty,
            decision=decision,
            step=step,
            detail_json=jsontext.dumps(detail, default=json_default) if detail else None,
        )
        self.store.add_measurement(self.run_id, row)
        self.rows.append(row)
        self.progress.measurement(row)
        return row

    def sweep_point(self, channel: str, sweep: str, a: RecordAnalysis, extra: Detail) -> None:
        """One analysed record as a sweep point; ``extra`` goes to ``extra_json`` as given."""
        self.store.add_sweep_point(
            self.run_id,
            SweepPointRow(
                channel=channel,
                sweep=sweep,
                level_vrms=a.input_vrms,
                gain_db=a.gain_db,
                thd_percent=a.thd_percent,
                thdn_percent=a.thdn_percent,
                clipped=a.clipped,
                clip_side=a.clip_side,
                extra_json=jsontext.dumps(extra, default=json_default),
            ),
        )

    def heartbeat(self) -> None:
        """Tell the store the run is alive (during long waits with nothing to store)."""
        self.store.heartbeat(self.run_id)


# --- the run's frame ------------------------------------------------------------------------
@contextlib.contextmanager
def routed(
    switch: SwitchRole | None,
    channels: Iterable[ChannelConnection],
    safe: SafeGenerator,
    on_release: Callable[[], None] | None = None,
) -> Iterator[None]:
    """The group's switch route closed for the block; on every exit the generator output
    goes off first, then the route opens (no signal on a contact that moves).

    On a normal exit ``on_release`` runs first (the sequencer names the step "shutdown", so
    a failure to switch off is reported as such); when the block raised, the output is
    switched off without raising, so the error that stopped the block is the one reported.
    """
    route = sorted({r for c in channels for r in c.route})
    if route and switch is not None:
        switch.close(route)
    try:
        yield
    except BaseException:
        safe.safe_off()
        if route and switch is not None:
            try:
                switch.open(route)
            except BaseException as exc:  # the first error is the one to report
                log.warning("switch route %s did not open: %s", route, exc)
        raise
    if on_release is not None:
        on_release()
    safe.off()
    if route and switch is not None:
        switch.open(route)


def abort_reason(exc: BaseException, step: str) -> str:
    """The stored reason of an aborted run."""
    if isinstance(exc, KeyboardInterrupt):
        return f"interrupted by the operator (Ctrl-C) at step {step}"
    if isinstance(exc, RunAborted):
        return exc.reason if exc.step else f"{exc.reason} at step {step}"
    return f"{type(exc).__name__} at step {step}: {exc}"


def run_guarded(
    steps: Callable[[], str | None],
    shutdown: Callable[[], None],
    step: Callable[[], str],
    safe: SafeGenerator,
    supply: SupplyGuard | None = None,
) -> tuple[Literal["complete", "aborted"], str | None, BaseException | None]:
    """Run ``steps`` (which may return a reason for stopping early) with SIGTERM raising and
    ``shutdown`` on every exit; any exception, Ctrl-C included, makes the run aborted with
    its reason at the current ``step()``.  Returns (status, reason, exception or None); an
    unknown generator or supply state (not read back off) is added to the reason."""
    status: Literal["complete", "aborted"] = "complete"
    reason: str | None = None
    error: BaseException | None = None
    try:
        with sigterm_raises():
            try:
                reason = steps()
            finally:
                shutdown()
    except BaseException as exc:
        status, error = "aborted", exc
        reason = abort_reason(exc, step())
    if safe.output_state == "unknown":
        reason = (reason + "; " if reason else "") + "generator output state unknown"
    if supply is not None and supply.output_state == "unknown":
        reason = (reason + "; " if reason else "") + "supply output state unknown"
    return status, reason, error


def raise_aborted(error: BaseException, step: str) -> NoReturn:
    """Re-raise what stopped a run once it is stored as aborted: Ctrl-C and RunAborted as
    they are, instrument and analysis errors as RunAborted naming the step."""
    if isinstance(error, KeyboardInterrupt | RunAborted):
        raise error
    if isinstance(error, InstrumentError | AnalysisError):
        raise RunAborted(f"{error}", step=step) from error
    raise error


# --- planning -------------------------------------------------------------------------------
def plan_record(
    scope: ScopeRole,
    frequency_hz: float,
    *,
    max_points: int,
    max_record_s: Sequence[float],
    min_cycles: int,
    tolerance_rel: float,
    longer_records: bool = False,
    fallback: Literal["any", "shortest"] = "any",
) -> CoherentPlan:
    """A coherent record near ``frequency_hz``: the longest record up to ``max_points``
    (lowest noise floor) lasting at most ``max_record_s[0]``, relaxed to each next duration
    in turn if none fits.  ``longer_records`` also tries lengths above ``max_points``,
    shortest first (low frequencies need long records).  When nothing fits: ``"any"``
    leaves the choice to :func:`plan_coherent` over the allowed lengths; ``"shortest"``
    takes the shortest-lasting plan, or raises AnalysisError naming the scope's limits."""
    all_lengths = sorted(int(n) for n in scope.record_lengths)
    lengths = [n for n in all_lengths if n <= max_points][::-1]
    if longer_records:
        lengths += [n for n in all_lengths if n > max_points]
    elif not lengths:
        lengths = all_lengths[:1]
    rates = list(scope.sample_rates_hz)
    plans: dict[
        int, CoherentPlan | None
    ] = {}  # length -> plan, None where the length has no coherent plan
    for max_s in max_record_s:
        for n in lengths:
            if n not in plans:
                try:
                    plans[n] = plan_coherent(
                        frequency_hz, rates, [n], min_cycles=min_cycles, tolerance_rel=tolerance_rel
                    )
                except AnalysisError:
                    plans[n] = None
            p = plans[n]
            if p is not None and p.n_samples / p.sample_rate_hz <= max_s:
                return p
    found = [p for p in plans.values() if p is not None]
    if fallback == "shortest":
        if not found:
            raise AnalysisError(
                f"the scope cannot record {frequency_hz:.4g} Hz coherently within "
                f"{100 * tolerance_rel:g} % (sample rates {rates}, record lengths "
                f"{all_lengths})"
            )
        return min(found, key=lambda p: p.n_samples / p.sample_rate_hz)
    if len(found) < len(plans):
        return plan_coherent(frequency_hz, rates, lengths, min_cycles=min_cycles)
    return plan_coherent(frequency_hz, rates, lengths)


# --- ranging and acquisition ------------------------------------------------------------------
def scope_inputs(channels: Iterable[ChannelConnection]) -> list[int]:
    """The scope inputs a group uses, in order, each once."""
    used: list[int] = []
    for c in channels:
        for n in (c.input_scope, c.output_scope):
            if n not in used:
                used.append(n)
    return used


class GroupScope:
    """The scope as both runs use it: ranges, timebase and trigger set only on change, a
    group of channels acquired at once and analysed.  ``note`` hears every re-range.

    With ``safe`` every acquisition checks the level the input probes measure against the
    board's safe input level (a wrong profile or probe factor makes the real level differ
    from the commanded one): above it, the generator is switched off and the run stops
    with a SafetyError.  ``restore()`` is asked after every acquisition whether the
    station had to recover an instrument meanwhile (the generator was then switched off
    and is brought back): the record is then taken again."""

    def __init__(
        self,
        scope: ScopeRole,
        board: Board,
        *,
        max_rerange: int,
        note: Callable[[str], None] | None = None,
        safe: SafeGenerator | None = None,
        restore: Callable[[], bool] | None = None,
    ) -> None:
        self.scope = scope
        self.safe = safe
        self.restore = restore
        self.span_v = board.supply.v_pos - board.supply.v_neg
        self.max_rerange = max_rerange
        self.note = note
        self.ranges: dict[int, float] = {}
        self.fill: dict[int, float] = {}
        self.scope_ranges = tuple(float(r) for r in scope.ranges_vpp)
        #: inputs to AC-couple (an output whose DC level is still moving after the wait)
        self.coupling: dict[int, str] = {}
        #: the timebase in force: (requested rate, points), (read-back rate, points)
        self.timebase: tuple[tuple[float, int], tuple[float, int]] | None = None
        self.trigger: int | None = None
        self.acquisitions = 0

    # --- timing: read back, never assume -------------------------------------------------
    def _fits(self, plan: CoherentPlan) -> bool:
        """The timebase in force records ``plan``: same rate, at least its samples."""
        if self.timebase is None:
            return False
        rate, points = self.timebase[1]
        return math.isclose(rate, float(plan.sample_rate_hz), rel_tol=1e-9) and points >= int(
            plan.n_samples
        )

    def realise(self, plan: CoherentPlan, *, tolerance_rel: float = 0.01) -> CoherentPlan:
        """Set the scope's timebase for ``plan`` and return the plan the scope can record.

        The scope reports the sample rate and record length it chose; where they differ
        from the plan (a scope set by time per division picks its own), the coherent plan
        is made again from what it reported: J cycles in the first N' <= N samples at the
        reported rate, near the plan's frequency.
        """
        want = (float(plan.sample_rate_hz), int(plan.n_samples))
        if self.timebase is not None and self.timebase[0] == want:
            rate, points = self.timebase[1]
        else:
            got = self.scope.configure_timebase(*want)
            rate, points = (float(got.sample_rate_hz), int(got.points)) if got is not None else want
            self.timebase = (want, (rate, points))
        if self._fits(plan):
            return plan
        new = plan_coherent_within(
            float(plan.frequency_hz),
            rate,
            points,
            tolerance_rel=tolerance_rel,
            min_cycles=min(int(plan.cycles), 3),
        )
        if self.note is not None:
            self.note(
                f"scope chose {rate:g} S/s x {points} points for {want[0]:g} x {want[1]}: "
                f"record {new.n_samples} points at {new.frequency_hz:.6g} Hz"
            )
        return new

    def tune(
        self, plan: CoherentPlan, set_frequency: Callable[[float], float | None]
    ) -> CoherentPlan:
        """Realise ``plan`` on the scope, set the generator from it and return the plan with
        the frequency the generator reports (the analysis uses that one)."""
        plan = self.realise(plan)
        got = set_frequency(float(plan.frequency_hz))
        if got is not None and float(got) != float(plan.frequency_hz):
            plan = replace(plan, frequency_hz=float(got))
        return plan

    def tip_ranges(self, probe: float) -> tuple[float, ...]:
        """The scope's ranges in probe-tip volts."""
        return tuple(r * probe for r in self.scope_ranges)

    def set_range(self, scope_input: int, range_vpp: float, probe: float) -> None:
        """Configure an input for a full-scale range in probe-tip volts (only on change)."""
        if self.ranges.get(scope_input) == range_vpp:
            return
        cpl = self.coupling.get(scope_input)
        if cpl is None:
            setup = self.scope.configure_input(scope_input, range_vpp=range_vpp, probe=probe)
        else:
            setup = self.scope.configure_input(
                scope_input, range_vpp=range_vpp, probe=probe, coupling=cpl
            )
        self.ranges[scope_input] = float(setup.range_vpp)

    def preset(
        self,
        channels: Iterable[tuple[ChannelConnection, float]],
        level_vrms: float,
        fill: float = RANGE_FILL,
    ) -> None:
        """Ranges from the expected levels: each input from the level, each output from the
        level times the channel's expected gain (pairs of connection and linear gain)."""
        for c, gain in channels:
            # The input probe at the same fill as the output: its record then carries the
            # digitiser's own harmonics at the same fraction of full scale (added_thd_percent).
            vin = 2 * math.sqrt(2) * level_vrms
            self.set_range(
                c.input_scope,
                choose_range(vin, self.tip_ranges(c.input_probe), fill),
                c.input_probe,
            )
            self.fill[c.input_scope] = fill
            # Past clipping the output stops growing: never range above the supply span.
            out_vpp = min(vin * gain, 1.1 * self.span_v)
            self.set_range(
                c.output_scope,
                choose_range(out_vpp, self.tip_ranges(c.output_probe), fill),
                c.output_probe,
            )
            self.fill[c.output_scope] = fill

    def acquire(
        self,
        channels: Sequence[ChannelConnection],
        plan: CoherentPlan,
        *,
        correct_adc: bool = True,
        fill_match: float | None = FILL_MATCH,
        tolerant: bool = False,
    ) -> tuple[dict[str, RecordAnalysis | None], Acquisition]:
        """One acquisition of every input of the group (re-ranged and repeated when a record
        is over-range or uses too little of its range, at most ``max_rerange`` times), each
        channel analysed.  With ``correct_adc`` the THD is the board's added THD; with
        ``fill_match`` only where input and output fill their ranges within that factor of
        each other.  With ``tolerant`` a channel whose record cannot be analysed (a dead
        output holds no sine) gets None instead of stopping the group; the caller classifies
        it from the raw record.  Returns the analyses by channel and the last acquisition."""
        inputs = scope_inputs(channels)
        probes: dict[int, float] = {}
        for c in channels:
            probes.setdefault(c.input_scope, c.input_probe)
            probes.setdefault(c.output_scope, c.output_probe)
        if not self._fits(plan) and self.realise(plan) is not plan:
            raise AnalysisError(
                f"the scope cannot record the planned {plan.n_samples} points at "
                f"{plan.sample_rate_hz:g} S/s as it is set",
                hint="tune the plan (GroupScope.tune) before acquiring",
            )
        whole = self.timebase is None or self.timebase[1][1] == int(plan.n_samples)
        if self.trigger != inputs[0]:
            self.scope.configure_trigger(inputs[0], 0.0)
            self.trigger = inputs[0]
        for attempt in range(self.max_rerange + 1):
            acq = self._acquire_sound(
                inputs,
                [c.input_scope for c in channels],
                None if whole else int(plan.n_samples),
            )
            changed = False
            for n in inputs:
                v = np.asarray(acq.volts[n], dtype=float)
                lo, hi = acq.adc_limits[n]
                lsb = (hi - lo) / 2 ** int(acq.bits)
                over = bool(np.any(v >= hi - 0.5 * lsb) or np.any(v <= lo + 0.5 * lsb))
                rng = self.ranges.get(n, hi - lo)
                pkpk = float(np.max(v) - np.min(v))
                tips = self.tip_ranges(probes[n])
                fill = self.fill.get(n, RANGE_FILL)
                new = rng
                if over:
                    bigger = [r for r in tips if r > rng * (1 + 1e-9)]
                    new = bigger[0] if bigger else rng
                elif pkpk < RANGE_UNDERUSE * fill * rng:
                    new = min(choose_range(pkpk, tips, fill), rng)
                if new != rng and attempt < self.max_rerange:
                    if self.note is not None:
                        self.note(
                            f"scope input {n}: range {rng:g} -> {new:g} Vpp "
                            f"({'over-range' if over else 'under-used'})"
                        )
                    self.ranges.pop(n, None)
                    self.set_range(n, new, probes[n])
                    changed = True
            if not changed:
                break
        out: dict[str, RecordAnalysis | None] = {}
        for c in channels:
            x = np.asarray(acq.volts[c.input_scope], dtype=float)
            y = np.asarray(acq.volts[c.output_scope], dtype=float)
            in_lo, in_hi = acq.adc_limits[c.input_scope]
            out_lo, out_hi = acq.adc_limits[c.output_scope]
            in_adc, out_adc = (float(in_lo), float(in_hi)), (float(out_lo), float(out_hi))
            try:
                a = analyze_uniform(
                    x,
                    y,
                    acq.sample_rate_hz,
                    in_adc=in_adc,
                    out_adc=out_adc,
                    adc_bits=int(acq.bits),
                    frequency_hz=plan.frequency_hz,
                )
            except AnalysisError:
                if not tolerant:
                    raise
                out[c.board_channel] = None
                continue
            if (
                a.thd_percent is not None
                and correct_adc
                and _fills_match(x, y, in_adc, out_adc, fill_match)
            ):
                corr = added_thd_percent(
                    x, y, plan, acq.adc_limits[c.input_scope], acq.adc_limits[c.output_scope]
                )
                if corr is not None:
                    a = replace(
                        a,
                        thd_percent=corr,
                        thd_db=float(20 * np.log10(corr / 100)) if corr > 0 else None,
                        thd_raw_percent=a.thd_percent,
                        scope_harmonics_removed=True,
                    )
            out[c.board_channel] = a
        return out, acq

    def _acquire_sound(
        self, inputs: list[int], input_probes: list[int], points: int | None = None
    ) -> Acquisition:
        """One acquisition (the first ``points`` samples of the record, None: all) taken with
        the generator as the run set it, its input levels checked against the safe level."""
        for _ in range(MAX_RESTORES):
            acq = (
                self.scope.acquire(inputs)
                if points is None
                else self.scope.acquire(inputs, points=points)
            )
            self.acquisitions += 1
            if self.restore is None or not self.restore():
                break
        else:
            raise RunAborted(
                f"instruments recovered during {MAX_RESTORES} acquisitions in a row: "
                "no record was taken with the signal on"
            )
        if self.safe is not None:
            limit = self.safe.safe_input_vrms
            for n in dict.fromkeys(input_probes):
                v = np.asarray(acq.volts[n], dtype=float)
                vrms = float(np.std(v))
                if vrms > limit * (1 + MEASURED_SAFE_MARGIN):
                    raise self.safe.stop(
                        f"the input probe (scope input {n}) measures {vrms:.4g} V rms, above "
                        f"the board's safe input level {limit:.4g} V rms (commanded "
                        f"{self.safe.level_vrms:.4g} V rms)",
                        hint="check the generator profile's amplitude_unit and "
                        "calibrated_load and the fixture's input_probe factor",
                    )
        return acq


def _fills_match(
    x: np.ndarray,
    y: np.ndarray,
    in_adc: tuple[float, ...],
    out_adc: tuple[float, ...],
    fill_match: float | None,
) -> bool:
    """Input and output fill their ranges within ``fill_match`` of each other (None: no
    condition).  The digitiser-harmonic correction scales the input's harmonics by the
    fill ratio^(k-1): with unequal fills it would amplify the input's quantisation error
    into false harmonics."""
    if fill_match is None:
        return True
    fill_ratio = (float(np.ptp(y)) / (out_adc[1] - out_adc[0])) / max(
        float(np.ptp(x)) / (in_adc[1] - in_adc[0]), 1e-12
    )
    return 1 / fill_match <= fill_ratio <= fill_match
