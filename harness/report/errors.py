"""The report layer's error, kept importable here; it lives with the others in harness.errors."""

from __future__ import annotations

from harness.errors import ReportError

__all__ = ["ReportError"]
