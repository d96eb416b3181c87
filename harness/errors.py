"""One root error for everything a user can cause or a bench can throw.

Every error the project raises derives from :class:`StageproofError` and also from
the builtin that fits it (``ValueError`` for bad input, ``OSError`` for I/O), so
callers may catch either.  The CLI turns any ``StageproofError`` into one clear
line on stderr and exit status 2; nothing else should reach the user as a
traceback.  Each subclass carries the fields that locate the problem, and
``hint`` says how to fix it.
"""

from __future__ import annotations


class StageproofError(Exception):
    """Root of all stageproof errors."""

    exit_status = 2

    def __init__(self, message: str, *, hint: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint

    def __str__(self) -> str:
        if self.hint:
            return f"{self.message} (fix: {self.hint})"
        return self.message


# --- bad input files --------------------------------------------------------------------------


class InputFileError(StageproofError, ValueError):
    """A file written by a user (board, fixture, station, profile, capture) is wrong.

    ``location`` is a dotted path to the offending field, e.g.
    ``channel.left.stage[1].r_e`` or ``line 12`` for line-oriented files.
    """

    kind = "input file"

    def __init__(
        self,
        path: str | None,
        location: str | None,
        reason: str,
        *,
        hint: str | None = None,
    ) -> None:
        self.path = path
        self.location = location
        self.reason = reason
        where = path or "<input>"
        if location:
            where = f"{where}: {location}"
        super().__init__(f"{self.kind} {where}: {reason}", hint=hint)


class BoardFileError(InputFileError):
    """A board description in limits/ is wrong or describes an unworkable circuit."""

    kind = "board file"


class FixtureFileError(InputFileError):
    kind = "fixture file"


class StationFileError(InputFileError):
    kind = "station file"


class ProfileError(InputFileError):
    """An instrument profile is malformed (unknown operation, missing placeholder...)."""

    kind = "instrument profile"


class CaptureFileError(InputFileError):
    kind = "capture file"


class ValueParseError(StageproofError, ValueError):
    """A component value or quantity could not be parsed (``4k7``, ``10n``, ``-3``)."""

    def __init__(self, text: str, reason: str, *, hint: str | None = None) -> None:
        self.text = text
        self.reason = reason
        super().__init__(f"cannot read value {text!r}: {reason}", hint=hint)


class MemoryBudgetError(StageproofError, MemoryError):
    """A request would need more memory than the machine can give (Monte Carlo boards,
    a capture that claims gigabytes): refused before anything is allocated.

    ``field`` names the option or input at fault (``--samples``, ``limits.samples``, a file).
    """

    def __init__(
        self, field: str, reason: str, *, needed: int, available: int, hint: str | None = None
    ) -> None:
        self.field = field
        self.needed = needed
        self.available = available
        super().__init__(f"{field}: {reason}", hint=hint)


# --- signal analysis ------------------------------------------------------------------------


class AnalysisError(StageproofError, ValueError):
    """A record cannot be analysed honestly (NaN samples, too few cycles, silent...)."""


class OverRangeError(AnalysisError):
    """The record touches the ADC limits: distortion figures would be false."""


# --- instruments ----------------------------------------------------------------------------


class InstrumentError(StageproofError, OSError):
    """Anything that goes wrong talking to an instrument.

    Carries the VISA ``resource`` and the ``command`` in flight, and the station
    ``role`` (generator, scope, ...) where known.
    """

    def __init__(
        self,
        message: str,
        *,
        resource: str | None = None,
        command: str | None = None,
        role: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.resource = resource
        self.command = command
        self.role = role
        parts = [message]
        if role:
            parts.append(f"role={role}")
        if resource:
            parts.append(f"resource={resource}")
        if command:
            parts.append(f"command={command!r}")
        StageproofError.__init__(self, "; ".join(parts), hint=hint)


class InstrumentTimeout(InstrumentError):
    """No (complete) reply within the timeout."""


class ConnectionLost(InstrumentError):
    """The connection was refused, reset or closed."""


class MalformedReply(InstrumentError):
    """A reply that does not parse: bad block header, short block, non-numeric text."""


class ScpiError(InstrumentError):
    """The instrument reported an error in its queue (``SYSTem:ERRor?``)."""

    def __init__(
        self,
        code: int,
        text: str,
        *,
        resource: str | None = None,
        command: str | None = None,
        role: str | None = None,
    ) -> None:
        self.code = code
        self.text = text
        super().__init__(
            f'instrument error {code},"{text}"', resource=resource, command=command, role=role
        )


class IdentityMismatch(InstrumentError):
    """``*IDN?`` does not match what the station file expects at that resource."""


class ReadbackMismatch(InstrumentError):
    """An instrument reports a setting other than the one it was sent (beyond its resolution).

    Carries the ``setting`` name, the ``requested`` and the ``read_back`` values, so the
    operator sees which instrument ignored or rounded what.
    """

    def __init__(
        self,
        setting: str,
        requested: float | str,
        read_back: float | str,
        *,
        resource: str | None = None,
        command: str | None = None,
        role: str | None = None,
        hint: str | None = None,
    ) -> None:
        self.setting = setting
        self.requested = requested
        self.read_back = read_back
        super().__init__(
            f"{setting}: sent {requested!r}, instrument reports {read_back!r}",
            resource=resource,
            command=command,
            role=role,
            hint=hint,
        )


# --- run ------------------------------------------------------------------------------------


class SafetyError(StageproofError, RuntimeError):
    """A step would break a safety rule (level above the safe input, supply fault)."""


class StationBusy(StageproofError, RuntimeError):
    """Another process holds the station's instruments (its lock names who)."""


class RunAborted(StageproofError, RuntimeError):
    """The sequence stopped before a verdict (operator interrupt, lost instrument)."""

    def __init__(self, reason: str, *, step: str | None = None) -> None:
        self.reason = reason
        self.step = step
        msg = f"run aborted at step {step}: {reason}" if step else f"run aborted: {reason}"
        super().__init__(msg)


class StoreError(StageproofError, OSError):
    """The results store cannot be opened or written."""


class FaultSpecError(StageproofError, ValueError):
    """A component fault or a setting for the simulated board is wrong (``R104:drift=1.3``)."""

    def __init__(self, spec: str, reason: str, *, hint: str | None = None) -> None:
        self.spec = spec
        self.reason = reason
        super().__init__(f"fault {spec!r}: {reason}", hint=hint)


# --- reports -------------------------------------------------------------------------------


class ReportError(StageproofError, ValueError):
    """A report cannot be made from what was asked: unknown serial or run, an empty date
    range, an output path that cannot be written, a missing optional library.

    ``field`` names the option or input at fault (``--serial``, ``--since``, ``-o``...).
    """

    def __init__(self, field: str, reason: str, *, hint: str | None = None) -> None:
        self.field = field
        self.reason = reason
        super().__init__(f"{field}: {reason}", hint=hint)
