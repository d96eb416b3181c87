"""SQLite results store: one file that several station processes write at once.

Durability choices, for "nothing already measured is lost" on a crash or power cut:

* ``journal_mode=WAL``: readers never block the writer, and a crash mid-write leaves the
  last committed state intact (the WAL is replayed or ignored on the next open).
* ``synchronous=FULL``: in WAL mode every commit fsyncs the WAL before it returns.  With
  NORMAL the database stays consistent but the last commits before a power cut can be
  rolled back (they are only synced at checkpoint), which would lose measurements the
  sequencer already believed stored.  About 3 ms per commit on these machines.
* One short ``BEGIN IMMEDIATE`` transaction per row, committed before ``add_*`` returns.
  IMMEDIATE takes the write lock up front, so the busy timeout applies (a deferred
  transaction that upgrades from read to write can fail at once with SQLITE_BUSY in WAL).
* ``busy_timeout``: a writer waits for another station's short transaction instead of
  failing.

Owner liveness: the process that begins a run holds an exclusive ``flock`` (flock(2)) on
``<database>.runlocks/<run token>.lock`` for the run's lifetime; the kernel releases it
when the process ends however it ends.  A run is dead only when that lock can be taken.
Unlike a pid, this holds across PID namespaces (a station in a container) and after pid
reuse.  Runs written by schema version 1 have no lock file and keep the pid + start-token
check of :mod:`harness.store.owner`.

The schema version lives in ``PRAGMA user_version``; an older database is copied beside
itself (``<database>.schema-vN.bak``) and then migrated in one transaction.
"""

from __future__ import annotations

import logging
import os
import sqlite3
import uuid
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from pathlib import Path
from typing import Any
from urllib.parse import quote

from harness.errors import StoreError
from harness.store.owner import Owner, owner_alive
from harness.store.rows import utc_now
from harness.store.schema import (
    SCHEMA_VERSION,
    SQLITE,
    migration_statements,
    newer_schema_hint,
)
from harness.store.sql import SQLStore

try:  # POSIX; elsewhere liveness falls back to the pid check
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())

#: Default wait for another process's transaction before giving up.
BUSY_TIMEOUT_S = 30.0


def store_error(exc: sqlite3.Error, path: Path, doing: str, timeout_s: float) -> StoreError:
    """Turn SQLite's terse message into one that names the file and the fix."""
    text = str(exc)
    low = text.lower()
    if "readonly" in low or "read-only" in low:
        return StoreError(
            f"results database {path} is read-only ({doing}: {text})",
            hint="make the file and its folder writable by this user, or choose another --db",
        )
    if "unable to open" in low:
        return StoreError(
            f"cannot open results database {path} ({doing}: {text})",
            hint="check that the folder exists and is writable, or choose another --db",
        )
    if "locked" in low or "busy" in low:
        return StoreError(
            f"results database {path} stayed locked for {timeout_s:g} s ({doing})",
            hint="another process holds a long transaction; retry, or look for a hung stageproof",
        )
    if "not a database" in low or "malformed" in low:
        return StoreError(
            f"{path} is not a readable SQLite results database ({text})",
            hint="choose another --db; keep the damaged file for inspection",
        )
    if "disk" in low or "full" in low:
        return StoreError(
            f"cannot write results database {path}: {text}",
            hint="free disk space or move the database to a healthy disk",
        )
    return StoreError(f"results database {path}: {doing}: {text}")


def _take_lock(path: Path, *, create: bool) -> int | None:
    """An fd holding an exclusive flock on ``path``; None when another process holds it."""
    assert fcntl is not None
    flags = os.O_RDWR | (os.O_CREAT if create else 0)
    fd = os.open(path, flags, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        return None
    except BaseException:
        os.close(fd)
        raise
    return fd


def _drop_lock(path: Path, fd: int) -> None:
    """Remove the lock file while still holding it, then let the lock go."""
    with suppress(OSError):
        path.unlink()
    os.close(fd)


class SQLiteStore(SQLStore):
    """The SQLite implementation of :class:`~harness.store.protocol.ResultStore`.

    Opening checks write access by actually committing a transaction, so an unwritable
    path fails here, before any run starts.  ``readonly=True`` (for listing) requires an
    existing database and never writes, also on a read-only file or folder.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        readonly: bool = False,
        busy_timeout_s: float = BUSY_TIMEOUT_S,
    ) -> None:
        self._init_common()
        self.path = Path(path)
        self.location = str(self.path)
        self.readonly = readonly
        self.busy_timeout_s = float(busy_timeout_s)
        self.lock_dir = self.path.with_name(self.path.name + ".runlocks")
        self._claims: dict[str, int] = {}  # run token -> fd holding its lock
        self._tokens: dict[int, str] = {}  # run id -> token, for runs this store began
        self._version = SCHEMA_VERSION
        self._check_path()
        try:
            self._conn = self._connect()
            if readonly:
                self._check_schema_readonly()
            else:
                self._init_schema()
        except sqlite3.Error as exc:
            self.close()
            raise store_error(exc, self.path, "opening", self.busy_timeout_s) from None
        except BaseException:
            self.close()
            raise

    # --- opening ---------------------------------------------------------------------------

    def _check_path(self) -> None:
        p = self.path
        if p.is_dir():
            raise StoreError(
                f"results database path {p} is a folder",
                hint=f"give a file path, e.g. {p / 'stageproof-results.db'}",
            )
        if self.readonly:
            if not p.exists():
                raise StoreError(
                    f"no results database at {p}",
                    hint="run a test first, or pass --db PATH of an existing database "
                    "(stageproof demo writes stageproof-demo.db: --db stageproof-demo.db)",
                )
            return
        parent = p.parent if str(p.parent) else Path(".")
        if not parent.is_dir():
            raise StoreError(
                f"cannot create results database {p}: folder {parent} does not exist",
                hint=f"create it (mkdir -p {parent}) or choose another --db",
            )

    def _open(self, target: str, *, uri: bool) -> sqlite3.Connection:
        return sqlite3.connect(
            target,
            uri=uri,
            timeout=self.busy_timeout_s,
            isolation_level=None,
            check_same_thread=False,
        )

    def _connect(self) -> sqlite3.Connection:
        timeout_ms = int(self.busy_timeout_s * 1000)
        if self.readonly:
            base = f"file:{quote(str(self.path.resolve()))}?mode=ro"
            conn = self._open(base, uri=True)
            try:
                conn.execute("PRAGMA user_version").fetchone()
            except sqlite3.OperationalError:
                # A WAL database on a read-only file or folder: the reader cannot create
                # the shared-memory index.  Read it as immutable (sqlite.org/uri.html):
                # nothing can be writing a file that nobody may write.
                conn.close()
                conn = self._open(base + "&immutable=1", uri=True)
        else:
            conn = self._open(str(self.path), uri=False)
        try:
            conn.execute(f"PRAGMA busy_timeout = {timeout_ms:d}")
            if not self.readonly:
                mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    raise StoreError(
                        f"results database {self.path}: the file system refused WAL journal "
                        f"mode (got {mode!r})",
                        hint="keep the database on a local disk, not a network share",
                    )
                conn.execute("PRAGMA synchronous = FULL")
            conn.execute("PRAGMA foreign_keys = ON")
        except BaseException:
            conn.close()
            raise
        return conn

    def _newer(self, version: int) -> StoreError:
        return StoreError(
            f"results database {self.path} was made by a newer version of stageproof "
            f"(schema {version}; this one knows up to {SCHEMA_VERSION})",
            hint=newer_schema_hint(),
        )

    def _backup(self, version: int) -> None:
        """Copy the database beside itself before a migration (sqlite3 backup API)."""
        target = self.path.with_name(f"{self.path.name}.schema-v{version}.bak")
        if target.exists():
            return
        dest = sqlite3.connect(target)
        try:
            self._live().backup(dest)
        finally:
            dest.close()
        log.warning("results database %s: backed up to %s before migrating", self.path, target)

    def _init_schema(self) -> None:
        """Create or migrate the schema and prove the file is writable, in one commit."""
        conn = self._live()
        version = conn.execute("PRAGMA user_version").fetchone()[0]
        if version > SCHEMA_VERSION:
            raise self._newer(version)
        if 0 < version < SCHEMA_VERSION:
            self._backup(version)
        conn.execute("BEGIN IMMEDIATE")
        try:
            version = conn.execute("PRAGMA user_version").fetchone()[0]  # another may have won
            if version > SCHEMA_VERSION:
                raise self._newer(version)
            if version == 0:
                tables = conn.execute(
                    "SELECT count(*) FROM sqlite_master WHERE type = 'table'"
                ).fetchone()[0]
                if tables:
                    raise StoreError(
                        f"{self.path} is an SQLite file but not a stageproof results database",
                        hint="choose another --db",
                    )
            for step in range(version + 1, SCHEMA_VERSION + 1):
                log.info("results database %s: migrating schema to version %d", self.path, step)
                for statement in migration_statements(step, SQLITE):
                    conn.execute(statement)
            if version != SCHEMA_VERSION:
                conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION:d}")
            conn.execute(
                "INSERT OR IGNORE INTO meta (key, value) VALUES ('database_id', ?)",
                (uuid.uuid4().hex,),
            )
            conn.execute(
                "INSERT OR REPLACE INTO meta (key, value) VALUES ('last_opened_at', ?)",
                (utc_now(),),
            )
            conn.execute("COMMIT")
        except BaseException:
            self._rollback()
            raise
        if fcntl is not None:
            try:
                self.lock_dir.mkdir(exist_ok=True)
            except OSError as exc:
                raise StoreError(
                    f"cannot create the run-lock folder {self.lock_dir}: {exc.strerror or exc}",
                    hint="make the database's folder writable by this user",
                ) from None

    def _check_schema_readonly(self) -> None:
        version = self._live().execute("PRAGMA user_version").fetchone()[0]
        if version == 0:
            raise StoreError(
                f"{self.path} is not a stageproof results database",
                hint="pass --db PATH of a results database",
            )
        if version > SCHEMA_VERSION:
            raise self._newer(version)
        self._version = int(version)  # an older schema is read as it is, with defaults

    # --- what SQLStore needs --------------------------------------------------------------

    def _rollback(self) -> None:
        if self._conn is not None and self._conn.in_transaction:
            # a failed ROLLBACK means the connection is already broken: nothing to undo
            with suppress(sqlite3.Error):
                self._conn.execute("ROLLBACK")

    @contextmanager
    def _transaction(self, conn: Any) -> Iterator[None]:
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            self._rollback()
            raise
        conn.execute("COMMIT")

    def _error(self, exc: Exception, doing: str) -> StoreError:
        return store_error(exc, self.path, doing, self.busy_timeout_s)  # type: ignore[arg-type]

    def _driver_errors(self) -> tuple[type[Exception], ...]:
        return (sqlite3.Error,)

    def _unique_violation(self, exc: Exception) -> bool:
        return isinstance(exc, sqlite3.IntegrityError) and "runs.retest" in str(exc)

    def _lock_path(self, token: str) -> Path:
        return self.lock_dir / f"{token}.lock"

    def _prepare_claim(self, token: str) -> None:
        if fcntl is None:
            return
        try:
            fd = _take_lock(self._lock_path(token), create=True)
        except OSError as exc:
            raise StoreError(
                f"cannot create a run lock in {self.lock_dir}: {exc.strerror or exc}",
                hint="make the database's folder writable by this user",
            ) from None
        if fd is None:  # a fresh random name cannot be held by anyone
            raise StoreError(f"run lock {self._lock_path(token)} is held by another process")
        self._claims[token] = fd

    def _claim_run(self, conn: Any, run_id: int, token: str) -> None:
        self._tokens[run_id] = token

    def _abandon_claim(self, token: str) -> None:
        fd = self._claims.pop(token, None)
        if fd is not None:
            _drop_lock(self._lock_path(token), fd)
        for run_id in [r for r, t in self._tokens.items() if t == token]:
            del self._tokens[run_id]

    def _release_run(self, run_id: int) -> None:
        token = self._tokens.pop(run_id, None)
        if token is not None:
            self._abandon_claim(token)

    def _owner_gone(self, run_id: int, token: str, owner: Owner) -> tuple[bool | None, Any]:
        if fcntl is None or not token or token.startswith("v1:"):
            alive = owner_alive(owner)  # written by schema 1: no lock file to ask
            return (None if alive is None else not alive), None
        if self._tokens.get(run_id) == token:
            return False, None
        path = self._lock_path(token)
        try:
            fd = _take_lock(path, create=True)
        except OSError:
            return None, None  # cannot ask the lock: leave it to the stale-heartbeat rule
        if fd is None:
            return False, None
        return True, (path, fd)

    def _let_go(self, held: Any) -> None:
        if held is not None:
            _drop_lock(*held)

    def _close_connection(self) -> None:
        for token in list(self._claims):
            self._abandon_claim(token)
        self._rollback()
        self._conn.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.readonly else "read-write"
        return f"SQLiteStore({str(self.path)!r}, {mode})"
