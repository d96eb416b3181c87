"""Results store: every run, measurement and sweep point, durable as soon as measured.

``open_store(path_or_url)`` returns a :class:`ResultStore`.  Today that is SQLite (a file
path or ``sqlite:///relative.db`` / ``sqlite:////absolute.db``); a server database for
lines with several stations will come behind the same Protocol.
"""

from __future__ import annotations

from pathlib import Path

from harness.errors import StoreError
from harness.store.frame import FRAMES, load_frame
from harness.store.protocol import ResultStore
from harness.store.rows import (
    STATUSES,
    VERDICTS,
    MeasurementRow,
    RecordRow,
    RunHeader,
    RunRow,
    SweepPointRow,
    parse_when,
    utc_now,
)
from harness.store.sqlite import BUSY_TIMEOUT_S, MIGRATIONS, SCHEMA_VERSION, SQLiteStore

#: Database used when no --db is given: in the current folder.
DEFAULT_DB = "stageproof-results.db"


def open_store(
    path_or_url: str | Path,
    *,
    readonly: bool = False,
    busy_timeout_s: float = BUSY_TIMEOUT_S,
) -> ResultStore:
    """Open (creating if needed) a results store and prove it writable.

    An unwritable path raises :class:`~harness.errors.StoreError` naming the path and the
    fix, here, before any run starts.  ``readonly`` needs an existing database.
    """
    if isinstance(path_or_url, Path):
        return SQLiteStore(path_or_url, readonly=readonly, busy_timeout_s=busy_timeout_s)
    text = str(path_or_url)
    if "://" in text:
        scheme, _, rest = text.partition("://")
        scheme = scheme.lower()
        if scheme.startswith(("postgresql", "postgres")):
            raise StoreError(
                "a PostgreSQL results store is not available yet",
                hint="use an SQLite file path (e.g. --db stageproof-results.db) for now",
            )
        if scheme != "sqlite":
            raise StoreError(
                f"unknown results store URL scheme {scheme!r} in {text!r}",
                hint="give a file path or sqlite:///file.db",
            )
        if not rest.startswith("/") or rest == "/":
            raise StoreError(
                f"SQLite URL {text!r} names no file",
                hint="write sqlite:///relative.db or sqlite:////absolute/path.db",
            )
        text = rest[1:]
    if not text:
        raise StoreError("results database path is empty", hint=f"e.g. {DEFAULT_DB}")
    return SQLiteStore(text, readonly=readonly, busy_timeout_s=busy_timeout_s)


__all__ = [
    "BUSY_TIMEOUT_S",
    "DEFAULT_DB",
    "FRAMES",
    "MIGRATIONS",
    "SCHEMA_VERSION",
    "STATUSES",
    "VERDICTS",
    "MeasurementRow",
    "RecordRow",
    "ResultStore",
    "RunHeader",
    "RunRow",
    "SQLiteStore",
    "SweepPointRow",
    "load_frame",
    "open_store",
    "parse_when",
    "utc_now",
]
