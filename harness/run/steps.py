"""The run of one board by composition: one context, shared steps, two orders of them.

:func:`build_context` makes, once per run, the :class:`RunContext` that every step takes:
the station's roles (each call timed), the board, its limits and fixture, the store, the
options, the progress callbacks and the clock, with the safe generator, the supply guard,
the scope as a group of channels and the run's log built on them.  The steps written once
here serve both runs: :func:`settle`, :func:`move_to` (range, move the generator with its
ramp, output on), :func:`power_up`, :func:`shutdown`, and :func:`perform`, the frame that
begins the run in the store, runs an :class:`Order` with the generator off before the
first step and on every exit, and finishes the run.  The production sequence
(:mod:`harness.run.sequence`) and the characterisation (:mod:`harness.run.characterize`)
are two orders of these steps plus their own.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Generic, Literal, Protocol, TypeVar, cast

from harness.instruments.scpi import Identity
from harness.io.fixture import ChannelConnection, FixtureConfig
from harness.measure import ClipCriterion
from harness.model.board import Board
from harness.model.limits import BoardLimits
from harness.outcomes import Verdict as VerdictWord
from harness.run.bench_ops import (
    RANGE_FILL,
    GroupScope,
    RunLog,
    clip_criterion,
    raise_aborted,
    routed,
    run_guarded,
    run_header,
    safe_generator,
    settle_time_s,
    station_disturbances,
    supply_guard,
)
from harness.run.progress import Progress
from harness.run.roles import (
    DmmRole,
    GeneratorRole,
    InstrumentSet,
    ScopeRole,
    SupplyRole,
    SwitchRole,
)
from harness.run.safety import SafeGenerator, SupplyGuard
from harness.store import ResultStore, RunHeader

__all__ = [
    "Clock",
    "Order",
    "Roles",
    "RunContext",
    "RunEnd",
    "RunSettings",
    "build_context",
    "move_to",
    "perform",
    "power_up",
    "settle",
    "shutdown",
]

log = logging.getLogger("harness.run")

R = TypeVar("R")
G = TypeVar("G")


class Clock:
    """Time spent inside instrument calls and in settling waits, for the overhead figure."""

    def __init__(self) -> None:
        self.instrument_s = 0.0
        self.waiting_s = 0.0
        self.settle_s = 0.0  # settling waits asked for (what the board saw pass)


class _Timed:
    """Proxy of a driver that adds the time of every method call to a clock."""

    def __init__(self, target: object, clock: Clock) -> None:
        self._target = target
        self._clock = clock

    def __getattr__(self, name: str) -> object:
        value = getattr(self._target, name)
        if not callable(value):
            return value
        clock = self._clock
        method = value

        def call(*args: object, **kwargs: object) -> object:
            t0 = time.perf_counter()
            try:
                return method(*args, **kwargs)
            finally:
                clock.instrument_s += time.perf_counter() - t0

        return call


def timed(target: R, clock: Clock) -> R:
    """``target`` with every method call's time added to ``clock`` (same interface)."""
    return cast(R, _Timed(target, clock))


@dataclass(frozen=True)
class Roles:
    """The instruments one run drives, each in its role (absent optional roles: None)."""

    generator: GeneratorRole
    scope: ScopeRole
    switch: SwitchRole | None = None
    dmm: DmmRole | None = None
    supply: SupplyRole | None = None

    @classmethod
    def timed(cls, instruments: InstrumentSet, clock: Clock) -> Roles:
        """The station's roles with every instrument call timed on ``clock``."""
        sw, dmm, sup = instruments.switch, instruments.dmm, instruments.supply
        return cls(
            generator=timed(instruments.generator, clock),
            scope=timed(instruments.scope, clock),
            switch=timed(sw, clock) if sw is not None else None,
            dmm=timed(dmm, clock) if dmm is not None else None,
            supply=timed(sup, clock) if sup is not None else None,
        )


class RunSettings(Protocol):
    """What every run's options hold (RunOptions, CharacterizeOptions)."""

    @property
    def operator(self) -> str: ...

    @property
    def station_name(self) -> str: ...

    @property
    def settle_wait_s(self) -> float | None: ...

    @property
    def max_rerange(self) -> int: ...

    @property
    def max_step_up_db(self) -> float: ...

    @property
    def sleep(self) -> Callable[[float], None]: ...


@dataclass
class RunContext:
    """Everything one run of one board works with; built once by :func:`build_context`
    and handed to every step.  ``step`` is the step in progress (the stored rows and an
    abort name it)."""

    roles: Roles
    board: Board
    limits: BoardLimits
    fixture: FixtureConfig
    serial: str
    board_file: str
    station: str
    identities: Mapping[str, Identity | str]
    store: ResultStore
    options: RunSettings
    progress: Progress
    clock: Clock
    criterion: ClipCriterion
    safe: SafeGenerator
    supply: SupplyGuard | None
    scope: GroupScope
    log: RunLog
    settle_s: float
    #: appended to the fixture text of the run header
    fixture_note: str = ""
    settle_note: str = ""
    step: str = "setup"

    @property
    def run_id(self) -> int:
        return self.log.run_id

    def header(self) -> RunHeader:
        return run_header(
            serial=self.serial,
            board=self.board,
            board_file=self.board_file,
            limits=self.limits,
            fixture=self.fixture,
            station=self.station,
            operator=self.options.operator,
            identities=self.identities,
            settle_note=self.settle_note,
            fixture_note=self.fixture_note,
        )


def build_context(
    instruments: InstrumentSet,
    *,
    board: Board,
    limits: BoardLimits,
    fixture: FixtureConfig,
    serial: str,
    board_file: str,
    station: str,
    store: ResultStore,
    options: RunSettings,
    progress: Progress,
    note: Callable[[str], None] | None = None,
    fixture_note: str = "",
) -> RunContext:
    """The run's context: roles timed, the generator behind the board's safe level (ramps,
    read-backs, the station's recoveries watched), the supply guard, the scope, the settle
    time (a model wait over the bound refused here, before anything waits) and the log.
    ``note`` hears safety alarms and re-ranges."""
    clock = Clock()
    roles = Roles.timed(instruments, clock)
    safe = safe_generator(
        roles.generator,
        board,
        fixture,
        options.max_step_up_db,
        on_alarm=note,
        disturbances=station_disturbances(instruments),
    )
    settle_s = settle_time_s(limits, fixture, options.settle_wait_s, board)

    def restore() -> bool:
        """After an instrument recovery: the generator back on (ramped) and settled; True
        when the last record was taken without the signal."""
        if not safe.resync():
            return False
        if settle_s > 0:
            options.sleep(settle_s)
        return True

    scope = GroupScope(
        roles.scope, board, max_rerange=options.max_rerange, note=note, safe=safe, restore=restore
    )
    supply = supply_guard(fixture, roles.supply)
    return RunContext(
        roles=roles,
        board=board,
        limits=limits,
        fixture=fixture,
        serial=serial,
        board_file=board_file,
        station=station,
        identities=instruments.identities,
        store=store,
        options=options,
        progress=progress,
        clock=clock,
        criterion=clip_criterion(board),
        safe=safe,
        supply=supply,
        scope=scope,
        log=RunLog(store, progress),
        settle_s=settle_s,
        fixture_note=fixture_note,
    )


# --- shared steps ----------------------------------------------------------------------------
def settle(ctx: RunContext, seconds: float | None = None, *, wait: bool = True) -> None:
    """Wait the settle time (or ``seconds``) when ``wait``, counted on the clock as the
    sleep in the options makes it (simulated or real); the store hears the run is alive."""
    s = ctx.settle_s if seconds is None else seconds
    if wait and s > 0:
        t0 = time.perf_counter()
        ctx.options.sleep(s)
        ctx.clock.waiting_s += time.perf_counter() - t0
        ctx.clock.settle_s += s
    ctx.log.heartbeat()


def move_to(
    ctx: RunContext,
    gains: Sequence[tuple[ChannelConnection, float]],
    level_vrms: float,
    fill: float = RANGE_FILL,
) -> bool:
    """Range the scope for ``level_vrms`` (each channel at its expected linear gain), move
    the generator there (ramped, never above the safe level) and switch it on.  True when
    the level or the output changed, so the board must settle before a record."""
    safe = ctx.safe
    changed = abs(level_vrms - safe.level_vrms) > 1e-12 or safe.output_state != "on"
    ctx.scope.preset(gains, level_vrms, fill)
    safe.set_level(level_vrms)
    if safe.output_state != "on":
        safe.on()
    return changed


@dataclass(frozen=True)
class SupplyReading:
    current_a: float
    tripped: bool


def power_up(ctx: RunContext, supply: SupplyGuard, wait_s: float) -> SupplyReading:
    """Supply on with its current limit, wait ``wait_s`` (coupling capacitors charge),
    then read whether it trips and the current it delivers."""
    ctx.step = "supply"
    supply.on()
    settle(ctx, wait_s)
    tripped = supply.tripped()
    return SupplyReading(supply.current_a(), tripped)


def shutdown(ctx: RunContext) -> None:
    """Every exit path: generator off (read back), supply off, the fixture's routes open."""
    ctx.safe.safe_off()
    if ctx.supply is not None:
        ctx.supply.safe_off()
    switch = ctx.roles.switch
    if switch is not None and ctx.fixture.needs_switch:
        try:
            switch.open_all()
        except BaseException as exc:
            log.warning("switch open_all failed: %s", exc)


# --- orders and their frame ----------------------------------------------------------------------
#: A step over the whole board (bound to its run's context); a text stops the run early,
#: with that reason.
BoardStep = Callable[[], str | None]
#: A step over one group of channels the scope sees at once (G: the group's own state).
GroupStep = Callable[[G], None]


@dataclass(frozen=True)
class Order(Generic[G]):
    """What a run does, in order: ``unpowered`` steps (no instrument touched), then with
    the generator off first and on every exit the ``board`` steps, then per group of
    channels (``group`` makes its state) the ``routed`` steps with the group's switch route
    closed and the ``after`` steps with it open again.  ``release_step`` names the step in
    progress while a route is released (None: the last step keeps its name)."""

    name: str
    unpowered: tuple[BoardStep, ...]
    board: tuple[BoardStep, ...]
    group: Callable[[tuple[ChannelConnection, ...]], G]
    routed: tuple[GroupStep[G], ...]
    after: tuple[GroupStep[G], ...] = ()
    release_step: str | None = None
    shutdown: Callable[[RunContext], None] = shutdown

    def steps(self) -> tuple[object, ...]:
        """Every step of the order, in order (shutdown last)."""
        return (*self.unpowered, *self.board, *self.routed, *self.after, self.shutdown)


def _run_order(ctx: RunContext, order: Order[G]) -> str | None:
    for step in order.unpowered:
        reason = step()
        if reason:
            return reason
    with ctx.safe:  # generator off before the first step
        for step in order.board:
            reason = step()
            if reason:
                return reason
        for grp in ctx.fixture.groups():
            state = order.group(tuple(grp))

            def release() -> None:
                if order.release_step is not None:
                    ctx.step = order.release_step

            with routed(ctx.roles.switch, grp, ctx.safe, release):
                for gstep in order.routed:
                    gstep(state)
            for gstep in order.after:
                gstep(state)
    return None


@dataclass
class RunEnd:
    """How a run ended: stored with ``finish_run`` already."""

    status: Literal["complete", "aborted"]
    verdict: VerdictWord | None
    reason: str | None
    error: BaseException | None
    elapsed_s: float

    def reraise(self, step: str) -> None:
        """Raise what stopped an aborted run (see raise_aborted); nothing when complete."""
        if self.error is not None:
            raise_aborted(self.error, step)


Verdict = Callable[
    [Literal["complete", "aborted"], str | None],
    tuple[VerdictWord | None, str | None],
]


def perform(ctx: RunContext, order: Order[G], verdict: Verdict) -> RunEnd:
    """Begin the run in the store, run ``order`` with SIGTERM raising and
    ``order.shutdown`` on every exit, decide the verdict from (status, reason) and finish
    the run in the store.  Never raises for what stopped the run: see RunEnd.reraise."""
    t0 = time.perf_counter()
    ctx.log.begin(ctx.header())
    status, reason, error = run_guarded(
        lambda: _run_order(ctx, order),
        lambda: order.shutdown(ctx),
        lambda: ctx.step,
        ctx.safe,
        ctx.supply,
    )
    decided, reason = verdict(status, reason)
    ctx.store.finish_run(ctx.run_id, status, decided, reason)
    return RunEnd(status, decided, reason, error, time.perf_counter() - t0)
