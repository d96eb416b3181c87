"""Safety as code: the generator can never over-drive the board, and is off on every exit.

:class:`SafeGenerator` wraps the generator driver.  It refuses (``SafetyError``, nothing
sent) any level above the board's safe input level; switches the output on at no more than
the board's nominal level; while the output is on, ramps every rise in steps of at most
``max_step_up_db`` from the present level (decreases are applied at once); reads the
amplitude back after every level change where the profile can, and stops on a level the
instrument does not confirm; and as a context manager switches the output off before the
first step and after the last, on every exit path: normal end, exception, Ctrl-C and
SIGTERM (see :func:`sigterm_raises`).  Every switch-off is read back: an output that still
reads on, or cannot be read, is ``"unknown"`` — never ``"off"`` — so the run record and the
screen say so.

Levels are rms volts at the board input, commanded as the generator's open-circuit level
(``load_ohm = inf``): any real load only lowers the voltage at the input, so the limit holds
whatever the board's input impedance, even on a faulty board.

:class:`SupplyGuard` does the same for the bench supply: configured with its current limit,
switched off (and read back) at the end and when the quiescent check fails.

:func:`connect_safe` and :func:`safe_station` make "connect" mean "connect and put every
source in its safe state first", for every command that connects.
"""

from __future__ import annotations

import logging
import math
import signal
import threading
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from types import FrameType
from typing import TYPE_CHECKING, Literal

from harness.errors import ReadbackMismatch, RunAborted, SafetyError, StageproofError
from harness.run.roles import GeneratorRole, Routes, Source, SupplyRole

if TYPE_CHECKING:
    import pyvisa

    from harness.instruments.bench import Instruments
    from harness.instruments.config import StationConfig

log = logging.getLogger("harness.run.safety")

#: Roles whose instruments drive the board (harness.instruments.bench.SOURCE_ROLES).
_SOURCES = ("generator", "supply", "switch")

OutputState = Literal["off", "on", "unknown"]
#: Relative slack on the safe-level comparison, for rounding in unit conversions only.
_SLACK = 1e-9
#: A read-back amplitude may differ from the command by this much (relative) ...
READBACK_REL = 0.02
#: ... or this much (V rms): instruments round a setting to their resolution, about 1 mVpp.
READBACK_ABS_VRMS = 0.5e-3


class SafeGenerator:
    """A generator driver that cannot command more than ``safe_input_vrms``.

    ``direct_vrms`` is the highest level the output may switch on at (default: the safe
    level; the run passes the board's nominal input level).  While the output is on, every
    rise goes in steps of at most ``max_step_up_db`` from the present level; ``on_step`` is
    called after every level actually commanded, ``on_alarm`` with every safety message the
    operator must see.  ``disturbances`` counts the station's recoveries (a lost instrument
    switches the generator off first): when it moves, the output is brought back, ramped;
    without it, no recovery is watched.
    """

    def __init__(
        self,
        generator: GeneratorRole,
        safe_input_vrms: float,
        *,
        direct_vrms: float | None = None,
        max_step_up_db: float = 6.0,
        on_step: Callable[[float], None] | None = None,
        on_alarm: Callable[[str], None] | None = None,
        disturbances: Callable[[], int] | None = None,
        output: int = 1,
    ) -> None:
        if not (math.isfinite(safe_input_vrms) and safe_input_vrms > 0):
            raise SafetyError(f"safe input level must be > 0 (got {safe_input_vrms!r})")
        if not 0 < max_step_up_db <= 6.0:
            raise SafetyError(f"ramp step must be > 0 and <= 6 dB (got {max_step_up_db!r})")
        self._gen = generator
        self.output = int(output)
        self.safe_input_vrms = float(safe_input_vrms)
        self.direct_vrms = min(
            direct_vrms if direct_vrms is not None else safe_input_vrms, safe_input_vrms
        )
        self.max_step_up_db = float(max_step_up_db)
        self._on_step = on_step
        self._on_alarm = on_alarm
        self._disturbances = disturbances or _no_recoveries
        self.level_vrms = 0.0  # last level commanded (0 before the first)
        self.max_commanded_vrms = 0.0
        self.output_state: OutputState = "unknown"
        self.steps = 0
        self._seen = self._disturbances()

    # --- checks -----------------------------------------------------------------------
    def check(self, vrms: float) -> float:
        """Validate a level; raises SafetyError for anything not finite, negative or above
        the safe level.  Returns it as float."""
        v = float(vrms)
        if not math.isfinite(v) or v < 0:
            raise SafetyError(f"generator level {vrms!r} V rms is not a valid level")
        if v > self.safe_input_vrms * (1 + _SLACK):
            raise SafetyError(
                f"generator level {v:.6g} V rms is above the board's safe input level "
                f"{self.safe_input_vrms:.6g} V rms; refused",
                hint="the board file's conditions.safe_input_vrms bounds every step",
            )
        return v

    def alarm(self, text: str) -> None:
        """A safety message for the operator (log and screen)."""
        log.error("%s", text)
        if self._on_alarm is not None:
            try:
                self._on_alarm(text)
            except Exception as exc:  # the screen must not stop a switch-off
                log.error("safety message not shown: %s", exc)

    def stop(self, text: str, hint: str | None = None) -> SafetyError:
        """Switch off now, tell the operator, and return the SafetyError to raise."""
        state = self.safe_off()
        self.alarm(f"{text}; generator switched off (read back: {state})")
        return SafetyError(text, hint=hint)

    def _verify_level(self, v: float) -> None:
        """Read the amplitude back where the profile can: a level the generator does not
        confirm (a profile whose command does more than it says) stops the run."""
        got = self._gen.level_readback_vrms(output=self.output)
        if got is None:
            return
        if got > self.safe_input_vrms * (1 + READBACK_REL) or abs(got - v) > max(
            READBACK_REL * v, READBACK_ABS_VRMS
        ):
            raise self.stop(
                f"the generator reports {got:.6g} V rms after {v:.6g} V rms was commanded "
                f"(safe input level {self.safe_input_vrms:.6g} V rms)",
                hint="check the generator profile's set_amplitude, query_amplitude, "
                "amplitude_unit and calibrated_load",
            )

    # --- commands ---------------------------------------------------------------------
    def _command(self, v: float) -> None:
        self.check(v)  # belt and braces: no path reaches the driver unchecked
        try:
            self._gen.set_level(v, load_ohm=math.inf, output=self.output)
        except ReadbackMismatch as exc:
            # the driver's read-back: the generator does not report what it was sent
            got = self._gen.level_readback_vrms(output=self.output)
            said = f"{got:.6g} V rms" if got is not None else repr(exc.read_back)
            raise self.stop(
                f"the generator reports {said} after {v:.6g} V rms was commanded "
                f"(safe input level {self.safe_input_vrms:.6g} V rms; {exc.message})",
                exc.hint,
            ) from exc
        self.level_vrms = v
        self.max_commanded_vrms = max(self.max_commanded_vrms, v)
        self.steps += 1
        self._verify_level(v)
        if self._on_step is not None:
            self._on_step(v)

    def ramp_plan(self, target_vrms: float) -> list[float]:
        """The levels a move to ``target_vrms`` will command, in order: one step when the
        output is off or when falling; otherwise steps of at most ``max_step_up_db`` from
        the present level (from no level at all, the first step is at most ``direct_vrms``,
        as when the output switches on)."""
        target = self.check(target_vrms)
        current = self.level_vrms
        if self.output_state == "off" or target <= current:
            return [target]
        ratio = 10 ** (self.max_step_up_db / 20.0)
        plan: list[float] = []
        level = current
        if level <= 0:
            level = min(target, self.direct_vrms)
            plan.append(level)
        while target > level * ratio * (1 + 1e-12):
            level *= ratio
            plan.append(level)
        if not plan or plan[-1] != target:
            plan.append(target)
        return plan

    def resync(self) -> bool:
        """After a recovery on the station the generator's output is off (a lost instrument
        switches it off first; a generator's own reconnect never switches it back on):
        bring the output back on through the ramp.  True when it did (whatever was
        recorded meanwhile was recorded without a signal)."""
        count = self._disturbances()
        if count == self._seen:
            return False
        self._seen = count
        if self.output_state != "on":
            return False
        log.warning("the station recovered an instrument; generator on again, ramped")
        self.output_state = "off"
        self.on()
        return True

    def set_level(self, vrms: float) -> None:
        """Move to ``vrms`` (ramping up while the output is on)."""
        for v in self.ramp_plan(vrms):
            self._command(v)
        self.resync()

    def configure(self, frequency_hz: float, level_vrms: float) -> float | None:
        """Set a sine at ``frequency_hz`` with the output off, then the level.  Returns the
        frequency the generator reports (None from a driver that cannot say)."""
        self.off()
        got = self._gen.configure_sine(frequency_hz, output=self.output)
        self._command(min(self.check(level_vrms), self.direct_vrms))
        if level_vrms > self.direct_vrms:
            self.set_level(level_vrms)
        return got

    def set_frequency(self, frequency_hz: float) -> float | None:
        """Change the frequency; the level stays (the driver's configure keeps it).
        Returns the frequency the generator reports."""
        level = self.level_vrms
        got = self._gen.configure_sine(frequency_hz, output=self.output)
        if level > 0:
            self._command(level)
        self.resync()
        return got

    def on(self) -> None:
        """Switch the output on at the present level, at most ``direct_vrms``: a higher
        level is first lowered, then ramped back up."""
        target = self.level_vrms
        if target > self.direct_vrms:
            self._command(self.direct_vrms)
        self._gen.output(True, output=self.output)
        self.output_state = "on"
        self._seen = self._disturbances()
        if target > self.level_vrms:
            self.set_level(target)

    def _reads_off(self) -> bool | None:
        """The output's state read back: True off, False on, None unreadable."""
        try:
            return not bool(self._gen.is_on(output=self.output))
        except Exception as exc:
            log.warning("generator output state cannot be read: %s", exc)
            return None

    def off(self) -> None:
        """Switch the output off and read it back.  Raises on an instrument error, and
        SafetyError when it does not read back off (the state is then "unknown")."""
        self.output_state = "unknown"
        self._gen.output(False, output=self.output)
        reads = self._reads_off()
        if reads is not True:
            self.alarm(
                f"generator output {self.output} "
                + ("still reads ON" if reads is False else "cannot be read back")
                + " after it was switched off: state unknown, switch it off by hand"
            )
            raise SafetyError(
                f"generator output {self.output} not confirmed off after output_off (read back)",
                hint="switch it off by hand and check the profile's output_off and query_output",
            )
        self.output_state = "off"

    def safe_off(self) -> OutputState:
        """Best effort off on an exit path, read back; never raises.  Returns the state:
        "off" only when the output reads back off."""
        reads: bool | None = None
        try:
            self._gen.output(False, output=self.output)
            reads = self._reads_off()
        except BaseException as exc:
            log.warning("generator output off failed: %s", exc)
        if reads is not True:
            try:
                self._gen.safe_off()
            except BaseException as exc2:
                log.warning("generator safe_off failed: %s", exc2)
            reads = self._reads_off()
        if reads is True:
            self.output_state = "off"
        else:
            if self.output_state != "unknown":
                self.alarm(
                    f"generator output {self.output} not confirmed off (read back): state "
                    "unknown, switch it off by hand"
                )
            self.output_state = "unknown"
        return self.output_state

    def __enter__(self) -> SafeGenerator:
        self.off()  # off before the first step; an unreachable generator stops here
        return self

    def __exit__(self, *exc: object) -> None:
        self.safe_off()


class SupplyGuard:
    """The bench supply: configured with its current limit, off on every exit path, every
    switch-off read back ("unknown" when an output does not read off)."""

    def __init__(
        self,
        supply: SupplyRole,
        voltage_v: float,
        current_limit_a: float,
        output: int = 1,
        negative: tuple[int, float] | None = None,
    ) -> None:
        self._supply = supply
        self.voltage_v = voltage_v
        self.current_limit_a = current_limit_a
        self.output = output
        self.negative = negative
        self.output_state: OutputState = "unknown"

    def _outputs(self) -> list[int]:
        outs = [self.output]
        if self.negative is not None:
            outs.append(self.negative[0])
        return outs

    def on(self) -> None:
        self._supply.configure(self.voltage_v, self.current_limit_a, output=self.output)
        if self.negative is not None:
            out, volts = self.negative
            # Supplies set magnitudes; the fixture wires the output's + to ground.
            self._supply.configure(abs(volts), self.current_limit_a, output=out)
        for out in self._outputs():
            self._supply.output(True, output=out)
        self.output_state = "on"

    def current_a(self) -> float:
        return float(self._supply.current_a(output=self.output))

    def tripped(self) -> bool:
        return any(bool(self._supply.tripped(output=o)) for o in self._outputs())

    def _still_on(self) -> list[int]:
        """Outputs that do not read back off (unreadable ones included)."""
        bad = []
        for out in self._outputs():
            try:
                if self._supply.is_on(output=out):
                    bad.append(out)
            except Exception as exc:
                log.warning("supply output %s state cannot be read: %s", out, exc)
                bad.append(out)
        return bad

    def off(self) -> None:
        """Every output off and read back; SafetyError when one does not read off."""
        self.output_state = "unknown"
        for out in self._outputs():
            self._supply.output(False, output=out)
        bad = self._still_on()
        if bad:
            raise SafetyError(
                f"supply output(s) {bad} not confirmed off after output_off (read back)",
                hint="switch the supply off by hand and check its profile's output_off",
            )
        self.output_state = "off"

    def safe_off(self) -> OutputState:
        """Best effort off on an exit path, read back; never raises."""
        ok = True
        for out in self._outputs():
            try:
                self._supply.output(False, output=out)
            except BaseException as exc:
                log.warning("supply output %s off failed: %s", out, exc)
                ok = False
        if ok:
            ok = not self._still_on()
        if not ok:
            try:
                ok = bool(self._supply.safe_off())  # every output, each read back
            except BaseException as exc:
                log.warning("supply safe_off failed: %s", exc)
        if not ok:
            log.error("supply output not confirmed off (read back): state unknown")
        self.output_state = "off" if ok else "unknown"
        return self.output_state

    def __enter__(self) -> SupplyGuard:
        return self

    def __exit__(self, *exc: object) -> None:
        self.safe_off()


def _no_recoveries() -> int:
    return 0


class Terminated(RunAborted):
    """SIGTERM arrived during a run."""

    def __init__(self) -> None:
        super().__init__("terminated by SIGTERM")


@contextmanager
def sigterm_raises() -> Iterator[None]:
    """Make SIGTERM raise :class:`Terminated` inside the run so every ``finally`` (generator
    off, supply off, run marked aborted) executes.  Only the main thread can install signal
    handlers; elsewhere this does nothing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def _handler(signum: int, frame: FrameType | None) -> None:
        raise Terminated()

    previous = signal.signal(signal.SIGTERM, _handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def is_abort(exc: BaseException) -> bool:
    """Exceptions that abort a run rather than fail a board."""
    return isinstance(exc, KeyboardInterrupt | RunAborted) or (
        isinstance(exc, StageproofError) and not isinstance(exc, SafetyError)
    )


# --- the station's safe state ---------------------------------------------------------------


def make_safe(role: str, driver: object) -> OutputState:
    """Put one instrument in its safe state and say what it is now.

    Generator and supply: every output off, each read back ("off" only when every output
    reads off, else "unknown").  Switch: every route open, each relay it watches read back
    open ("off" only then).  Measuring instruments drive nothing: "off".  Never raises.
    """
    if role in ("generator", "supply"):
        if not isinstance(driver, Source):
            log.error("%s driver has no safe_off: state unknown", role)
            return "unknown"
        try:
            return "off" if driver.safe_off() else "unknown"
        except Exception as exc:  # safe_off never raises; a stranger driver might
            log.error("%s safe state failed: %s", role, exc)
            return "unknown"
    if role == "switch":
        if not isinstance(driver, Routes):
            log.error("switch driver has no open_all: routes may still be closed")
            return "unknown"
        try:
            driver.open_all()
            return "off"
        except Exception as exc:
            log.error("switch routes may still be closed: %s", exc)
            return "unknown"
    return "off"


def all_safe(instruments: Instruments) -> dict[str, OutputState]:
    """Every source of an open station in its safe state: role -> state."""
    return {
        role: make_safe(role, drv)
        for role, drv in instruments.drivers().items()
        if role in _SOURCES
    }


def unsafe_text(states: dict[str, OutputState]) -> str:
    """The sources whose safe state could not be confirmed, in words ("" when none)."""
    words = {"generator": "generator output", "supply": "supply output", "switch": "switch route"}
    bad = [words.get(r, r) for r, v in states.items() if v != "off"]
    return ", ".join(bad)


def connect_safe(
    station: StationConfig,
    *,
    rm: pyvisa.ResourceManager | None = None,
    relays: Iterable[int] = (),
) -> Instruments:
    """Connect ``station`` and put every source in its safe state before anything else.

    The sources (generator, supply, switch) are opened first and each is made safe as soon
    as it answers — before the scope or DMM is even opened — so a station left driving a
    board by a crashed process is switched off at once.  A connect that fails part-way
    still makes safe every source it reached.  On the open station, every other
    instrument's recovery (a timeout, a reconnect) first switches the generator off, and
    closing it makes every source safe again.  A source that cannot be confirmed safe
    stops here with a SafetyError: nothing is driven through a station in an unknown state.
    ``relays`` are the fixture's switch routes: each is read back open, at connect and at
    every later safe state, even one this process never closed (a crashed one did).
    """
    from harness.instruments.bench import connect

    states: dict[str, OutputState] = {}
    watched = tuple(relays)

    def on_open(role: str, driver: object) -> None:
        if role == "switch" and watched and isinstance(driver, Routes):
            driver.watch(watched)
        if role in _SOURCES:
            states[role] = make_safe(role, driver)

    inst = connect(station, rm=rm, on_open=on_open)
    inst.on_close = all_safe
    gen = inst.generator
    for role, session in inst.sessions.items():
        if role != "generator":  # the generator's own reconnect replays its output off
            session.add_recovery_hook(gen.safe_off)
    bad = unsafe_text(states)
    if bad:
        inst.close()
        raise SafetyError(
            f"{bad} not confirmed off after connecting (read back); nothing was started",
            hint="switch it off by hand, then check the profile's output_off / open_all "
            "and query_output operations",
        )
    return inst


@contextmanager
def safe_station(
    station: StationConfig,
    *,
    rm: pyvisa.ResourceManager | None = None,
    relays: Iterable[int] = (),
) -> Iterator[Instruments]:
    """The whole session on one station: its lock taken first (a second process gets
    StationBusy naming the holder), then :func:`connect_safe`; on every exit the sources
    are made safe, the sessions closed and the lock released."""
    from harness.run.station_lock import station_lock

    with station_lock(station):
        inst = connect_safe(station, rm=rm, relays=relays)
        try:
            yield inst
        finally:
            inst.close()
