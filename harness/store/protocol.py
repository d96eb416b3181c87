"""The one interface the rest of stageproof sees of the results store.

SQLite (one file, several station processes) and PostgreSQL (many stations on many hosts)
implement it alike (:class:`harness.store.sql.SQLStore`), so the sequencer and the CLI
never learn which one they talk to.
"""

from __future__ import annotations

from datetime import date, datetime
from types import TracebackType
from typing import Protocol, Self, runtime_checkable

import numpy as np

from harness.store.rows import MeasurementRow, RecordRow, RunHeader, RunRow, SweepPointRow

When = str | date | datetime


@runtime_checkable
class ResultStore(Protocol):
    """Durable record of runs.  Every write method commits before it returns."""

    def recover_aborted(self, *, stale_after_s: float | None = None) -> list[int]:
        """Mark 'aborted' every run left 'running' by a process that is gone; return ids."""
        ...

    def begin_run(self, header: RunHeader) -> int:
        """Record a new run (status 'running', retest number counted); return its id."""
        ...

    def heartbeat(self, run_id: int) -> None:
        """Say the owner is still alive during a long wait with nothing to store."""
        ...

    def add_measurement(self, run_id: int, m: MeasurementRow) -> None: ...

    def add_sweep_point(self, run_id: int, p: SweepPointRow) -> None: ...

    def add_record(
        self,
        run_id: int,
        channel: str,
        label: str,
        sample_rate_hz: float,
        arrays: dict[str, np.ndarray],
        *,
        as_float32: bool = True,
    ) -> int: ...

    def finish_run(
        self, run_id: int, status: str, verdict: str | None, reason: str | None = None
    ) -> None: ...

    def retest_count(self, serial: str, part_number: str) -> int: ...

    def list_runs(
        self,
        serial: str | None = None,
        status: str | None = None,
        verdict: str | None = None,
        since: When | None = None,
        until: When | None = None,
        board: str | None = None,
        limit: int | None = None,
        station: str | None = None,
    ) -> list[RunRow]: ...

    def get_run(self, run_id: int) -> RunRow: ...

    def measurements(self, run_id: int) -> list[MeasurementRow]: ...

    def sweep_points(self, run_id: int) -> list[SweepPointRow]: ...

    def records(self, run_id: int) -> list[RecordRow]: ...

    def close(self) -> None: ...

    def __enter__(self) -> Self: ...

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None: ...
