"""Safety as code: the generator can never over-drive the board, and is off on every exit.

:class:`SafeGenerator` wraps the generator driver.  It refuses (``SafetyError``, nothing
sent) any level above the board's safe input level, ramps level increases in steps of at
most ``max_step_up_db`` while the output is on (decreases are applied at once), and as a
context manager switches the output off before the first step and after the last, on every
exit path: normal end, exception, Ctrl-C and SIGTERM (see :func:`sigterm_raises`).  When the
generator cannot be reached at the end, :attr:`SafeGenerator.output_state` is ``"unknown"``
so the run record can say so.

Levels are rms volts at the board input, commanded as the generator's open-circuit level
(``load_ohm = inf``): any real load only lowers the voltage at the input, so the limit holds
whatever the board's input impedance, even on a faulty board.

:class:`SupplyGuard` does the same for the bench supply: configured with its current limit,
switched off at the end and when the quiescent check fails.
"""

from __future__ import annotations

import logging
import math
import signal
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from types import FrameType
from typing import Any, Literal

from harness.errors import RunAborted, SafetyError, StageproofError

log = logging.getLogger("harness.run.safety")

OutputState = Literal["off", "on", "unknown"]
#: Relative slack on the safe-level comparison, for rounding in unit conversions only.
_SLACK = 1e-9


class SafeGenerator:
    """A generator driver that cannot command more than ``safe_input_vrms``.

    ``direct_vrms`` is the highest level that may be applied without a ramp when the output
    switches on or the level rises (default: the board's nominal input level).  Above it,
    rises go in steps of at most ``max_step_up_db``; ``on_step`` is called after every level
    actually commanded (the sequencer uses it to log the ramp).
    """

    def __init__(
        self,
        generator: Any,
        safe_input_vrms: float,
        *,
        direct_vrms: float | None = None,
        max_step_up_db: float = 6.0,
        on_step: Callable[[float], None] | None = None,
        output: int = 1,
    ) -> None:
        if not (math.isfinite(safe_input_vrms) and safe_input_vrms > 0):
            raise SafetyError(f"safe input level must be > 0 (got {safe_input_vrms!r})")
        if not max_step_up_db > 0:
            raise SafetyError(f"ramp step must be > 0 dB (got {max_step_up_db!r})")
        self._gen = generator
        self.output = int(output)
        self.safe_input_vrms = float(safe_input_vrms)
        self.direct_vrms = min(
            direct_vrms if direct_vrms is not None else safe_input_vrms, safe_input_vrms
        )
        self.max_step_up_db = float(max_step_up_db)
        self._on_step = on_step
        self.level_vrms = 0.0  # last level commanded (0 before the first)
        self.max_commanded_vrms = 0.0
        self.output_state: OutputState = "unknown"
        self.steps = 0
        self._seen_reconnects = self._reconnects()

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

    # --- commands ---------------------------------------------------------------------
    def _command(self, v: float) -> None:
        self.check(v)  # belt and braces: no path reaches the driver unchecked
        self._gen.set_level(v, load_ohm=math.inf, output=self.output)
        self.level_vrms = v
        self.max_commanded_vrms = max(self.max_commanded_vrms, v)
        self.steps += 1
        if self._on_step is not None:
            self._on_step(v)

    def ramp_plan(self, target_vrms: float) -> list[float]:
        """The levels a move to ``target_vrms`` will command, in order: one step when the
        output is off, when falling, or when staying at or under ``direct_vrms``; otherwise
        steps of at most ``max_step_up_db`` from the higher of the present level and
        ``direct_vrms``."""
        target = self.check(target_vrms)
        current = self.level_vrms
        if self.output_state != "on" or target <= max(current, self.direct_vrms):
            return [target]
        ratio = 10 ** (self.max_step_up_db / 20.0)
        level = max(current, self.direct_vrms)
        plan: list[float] = [level] if level > current else []
        while target > level * ratio * (1 + 1e-12):
            level *= ratio
            plan.append(level)
        plan.append(target)
        return plan

    def _reconnects(self) -> int:
        session = getattr(self._gen, "session", None)
        count = getattr(session, "reconnects", 0)
        return count if isinstance(count, int) else 0

    def _resync(self) -> None:
        """After a reconnect the generator's output is off (a replay never switches it on):
        bring the output back on through the ramp, so the record after it is not silence."""
        count = self._reconnects()
        if count == self._seen_reconnects:
            return
        self._seen_reconnects = count
        if self.output_state == "on":
            log.warning("generator reconnected with its output off; switching on again, ramped")
            self.output_state = "off"
            self.on()

    def set_level(self, vrms: float) -> None:
        """Move to ``vrms`` (ramping up while the output is on)."""
        for v in self.ramp_plan(vrms):
            self._command(v)
        self._resync()

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
        self._resync()
        return got

    def on(self) -> None:
        """Switch the output on at the present level; a level above ``direct_vrms`` is
        first lowered, then ramped back up."""
        target = self.level_vrms
        if target > self.direct_vrms:
            self._command(self.direct_vrms)
        self._gen.output(True, output=self.output)
        self.output_state = "on"
        self._seen_reconnects = self._reconnects()
        if target > self.level_vrms:
            self.set_level(target)

    def off(self) -> None:
        """Switch the output off (raises on an instrument error)."""
        self._gen.output(False, output=self.output)
        self.output_state = "off"

    def safe_off(self) -> OutputState:
        """Best effort off on an exit path; never raises.  Returns the known state."""
        try:
            self._gen.output(False, output=self.output)
            self.output_state = "off"
        except BaseException as exc:
            log.warning("generator output off failed: %s", exc)
            try:
                self._gen.safe_off()
            except BaseException as exc2:
                log.warning("generator safe_off failed: %s", exc2)
            try:
                self.output_state = "on" if self._gen.is_on(output=self.output) else "off"
            except BaseException as exc3:
                log.warning("generator output state cannot be read: %s", exc3)
                self.output_state = "unknown"
        return self.output_state

    def __enter__(self) -> SafeGenerator:
        self.off()  # off before the first step; an unreachable generator stops here
        return self

    def __exit__(self, *exc: object) -> None:
        self.safe_off()


class SupplyGuard:
    """The bench supply: configured with its current limit, off on every exit path."""

    def __init__(
        self,
        supply: Any,
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

    def off(self) -> None:
        for out in self._outputs():
            self._supply.output(False, output=out)
        self.output_state = "off"

    def safe_off(self) -> OutputState:
        ok = True
        for out in self._outputs():
            try:
                self._supply.output(False, output=out)
            except BaseException as exc:
                log.warning("supply output %s off failed: %s", out, exc)
                ok = False
        if not ok:
            try:
                self._supply.safe_off()
                ok = True
            except BaseException as exc:
                log.warning("supply safe_off failed: %s", exc)
        self.output_state = "off" if ok else "unknown"
        return self.output_state

    def __enter__(self) -> SupplyGuard:
        return self

    def __exit__(self, *exc: object) -> None:
        self.safe_off()


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
