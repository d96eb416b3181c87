"""The report layer's one error class (a candidate to move into harness/errors.py)."""

from __future__ import annotations

from harness.errors import AmpbenchError


class ReportError(AmpbenchError, ValueError):
    """A report cannot be made from what was asked: unknown serial or run, an empty date
    range, an output path that cannot be written, a missing optional library.

    ``field`` names the option or input at fault (``--serial``, ``--since``, ``-o``...).
    """

    def __init__(self, field: str, reason: str, *, hint: str | None = None) -> None:
        self.field = field
        self.reason = reason
        super().__init__(f"{field}: {reason}", hint=hint)
