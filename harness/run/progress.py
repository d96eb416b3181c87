"""What the sequence tells its caller while it runs (the CLI draws it; tests record it)."""

from __future__ import annotations

from typing import Protocol

from harness.store import MeasurementRow


class Progress(Protocol):
    """Callbacks of a running sequence; all optional to act on, none may raise."""

    def step(self, name: str, text: str) -> None:
        """A step starts (``supply``, ``dc``, ``nominal``, ``clip``, ``frequency``...)."""

    def measurement(self, row: MeasurementRow) -> None:
        """A measurement row was decided and stored."""

    def note(self, text: str) -> None:
        """Something the operator should see (re-range, ramp, settling)."""


class NullProgress:
    """Says nothing."""

    def step(self, name: str, text: str) -> None:
        pass

    def measurement(self, row: MeasurementRow) -> None:
        pass

    def note(self, text: str) -> None:
        pass


class RecordingProgress(NullProgress):
    """Keeps every callback, for tests and the JSON output."""

    def __init__(self) -> None:
        self.events: list[tuple[str, tuple[str, str] | MeasurementRow | str]] = []

    def step(self, name: str, text: str) -> None:
        self.events.append(("step", (name, text)))

    def measurement(self, row: MeasurementRow) -> None:
        self.events.append(("measurement", row))

    def note(self, text: str) -> None:
        self.events.append(("note", text))
