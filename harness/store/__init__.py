"""Results store: every run, measurement and sweep point, durable as soon as measured.

``open_store(path_or_url)`` returns a :class:`ResultStore`: SQLite for a file path or
``sqlite:///relative.db`` / ``sqlite:////absolute.db`` (the default, nothing to install),
PostgreSQL for a ``postgresql://`` (or ``postgres://``) URL, for lines where several
stations on several hosts share one database server.  Both hold the same versioned schema
(:mod:`harness.store.schema`).
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
from harness.store.schema import MIGRATIONS, SCHEMA_VERSION
from harness.store.sql import RunFilter, SQLStore
from harness.store.sqlite import BUSY_TIMEOUT_S, SQLiteStore

#: Database used when no --db is given: in the current folder.
DEFAULT_DB = "stageproof-results.db"
_PG_SCHEMES = ("postgresql", "postgres")


def is_server_url(path_or_url: str | Path) -> bool:
    """True for a database-server URL (PostgreSQL), False for an SQLite file."""
    text = str(path_or_url)
    return "://" in text and text.partition("://")[0].lower() in _PG_SCHEMES


def redact(path_or_url: str | Path) -> str:
    """The database as shown on screen: a server URL without its password."""
    if is_server_url(path_or_url):
        from harness.store.postgres import redact as without_password

        return without_password(str(path_or_url))
    return str(path_or_url)


def sqlite_path(path_or_url: str | Path) -> Path:
    """The file an SQLite path or ``sqlite://`` URL names (checked, one-line errors)."""
    if isinstance(path_or_url, Path):
        return path_or_url
    text = str(path_or_url)
    if "://" in text:
        scheme, _, rest = text.partition("://")
        if scheme.lower() != "sqlite":
            raise StoreError(
                f"unknown results store URL scheme {scheme.lower()!r} in {text!r}",
                hint="give a file path, sqlite:///file.db or postgresql://user@host/dbname",
            )
        if not rest.startswith("/") or rest == "/":
            raise StoreError(
                f"SQLite URL {text!r} names no file",
                hint="write sqlite:///relative.db or sqlite:////absolute/path.db",
            )
        text = rest[1:]
    if not text:
        raise StoreError("results database path is empty", hint=f"e.g. {DEFAULT_DB}")
    return Path(text)


def open_store(
    path_or_url: str | Path,
    *,
    readonly: bool = False,
    busy_timeout_s: float = BUSY_TIMEOUT_S,
) -> SQLStore:
    """Open (creating if needed) a results store and prove it writable.

    An unwritable path, an unreachable server or refused credentials raise
    :class:`~harness.errors.StoreError` naming the database and the fix, here, before any
    run starts.  ``readonly`` needs an existing database and never writes.
    """
    if is_server_url(path_or_url):
        from harness.store.postgres import PostgresStore

        return PostgresStore(str(path_or_url), readonly=readonly, busy_timeout_s=busy_timeout_s)
    return SQLiteStore(sqlite_path(path_or_url), readonly=readonly, busy_timeout_s=busy_timeout_s)


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
    "RunFilter",
    "RunHeader",
    "RunRow",
    "SQLStore",
    "SQLiteStore",
    "SweepPointRow",
    "is_server_url",
    "load_frame",
    "open_store",
    "parse_when",
    "redact",
    "sqlite_path",
    "utc_now",
]
