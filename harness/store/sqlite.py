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

Every value, serial numbers included, is bound as an SQL parameter; SQL text is built only
from fixed fragments.  The schema version lives in ``PRAGMA user_version``; ``MIGRATIONS``
maps each version to the step that brings the previous one up to it.
"""

from __future__ import annotations

import json
import logging
import sqlite3
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager, suppress
from datetime import UTC, datetime, timedelta
from pathlib import Path
from types import TracebackType
from typing import Any, Self
from urllib.parse import quote

import numpy as np

from harness.errors import StoreError
from harness.store.owner import Owner, owner_alive, this_owner
from harness.store.protocol import When
from harness.store.rows import (
    STATUSES,
    VERDICTS,
    MeasurementRow,
    RecordRow,
    RunHeader,
    RunRow,
    SweepPointRow,
    format_time,
    parse_when,
    utc_now,
)

log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())

#: Schema version written to ``PRAGMA user_version``.
SCHEMA_VERSION = 1
#: Default wait for another process's transaction before giving up.
BUSY_TIMEOUT_S = 30.0

_SCHEMA_V1 = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE runs (
    run_id INTEGER PRIMARY KEY AUTOINCREMENT,
    serial TEXT NOT NULL,
    part_number TEXT NOT NULL,
    board_name TEXT NOT NULL,
    board_file TEXT NOT NULL,
    board_digest TEXT NOT NULL,
    limits_json TEXT NOT NULL,
    limits_digest TEXT NOT NULL,
    limits_provenance TEXT,
    station TEXT NOT NULL,
    fixture TEXT NOT NULL,
    operator TEXT NOT NULL,
    instruments_json TEXT NOT NULL,
    software_version TEXT NOT NULL,
    settle_note TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('running', 'complete', 'aborted')),
    verdict TEXT CHECK (verdict IN ('PASS', 'FAIL')),
    reason TEXT,
    retest INTEGER NOT NULL CHECK (retest >= 0),
    started_at TEXT NOT NULL,
    ended_at TEXT,
    heartbeat_at TEXT NOT NULL,
    host TEXT NOT NULL,
    pid INTEGER NOT NULL,
    start_token TEXT
);
CREATE INDEX runs_serial ON runs (serial, part_number);
CREATE INDEX runs_status ON runs (status);
CREATE INDEX runs_started ON runs (started_at);
CREATE TABLE measurements (
    id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs (run_id),
    channel TEXT NOT NULL,
    name TEXT NOT NULL,
    value REAL,
    unit TEXT NOT NULL,
    low REAL,
    high REAL,
    uncertainty REAL,
    decision TEXT NOT NULL,
    step TEXT NOT NULL,
    measured_at TEXT NOT NULL,
    detail_json TEXT
);
CREATE INDEX measurements_run ON measurements (run_id);
CREATE TABLE sweep_points (
    id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs (run_id),
    channel TEXT NOT NULL,
    sweep TEXT NOT NULL,
    level_vrms REAL NOT NULL,
    gain_db REAL,
    thd_percent REAL,
    thdn_percent REAL,
    clipped INTEGER NOT NULL CHECK (clipped IN (0, 1)),
    clip_side TEXT,
    extra_json TEXT,
    measured_at TEXT NOT NULL
);
CREATE INDEX sweep_points_run ON sweep_points (run_id);
CREATE TABLE records (
    record_id INTEGER PRIMARY KEY,
    run_id INTEGER NOT NULL REFERENCES runs (run_id),
    channel TEXT NOT NULL,
    label TEXT NOT NULL,
    sample_rate_hz REAL NOT NULL,
    captured_at TEXT NOT NULL
);
CREATE INDEX records_run ON records (run_id);
CREATE TABLE record_arrays (
    record_id INTEGER NOT NULL REFERENCES records (record_id),
    name TEXT NOT NULL,
    dtype TEXT NOT NULL,
    shape TEXT NOT NULL,
    data BLOB NOT NULL,
    PRIMARY KEY (record_id, name)
);
"""


def _run_ddl(conn: sqlite3.Connection, script: str) -> None:
    """Run DDL statement by statement: ``executescript`` would COMMIT the open transaction."""
    for statement in script.split(";"):
        if statement.strip():
            conn.execute(statement)


#: version -> step that upgrades the schema from version-1 to version (inside one
#: transaction).  A later schema adds ``MIGRATIONS[2] = ...`` and bumps SCHEMA_VERSION.
MIGRATIONS: dict[int, Callable[[sqlite3.Connection], None]] = {
    1: lambda conn: _run_ddl(conn, _SCHEMA_V1),
}

_RUN_COLUMNS = (
    "run_id, serial, part_number, status, verdict, started_at, ended_at, retest, reason, "
    "operator, station, fixture, board_name, board_file, board_digest, limits_json, "
    "limits_digest, limits_provenance, instruments_json, software_version, settle_note, "
    "host, pid, heartbeat_at"
)
_MEAS_COLUMNS = (
    "channel, name, value, unit, low, high, uncertainty, decision, step, measured_at, detail_json"
)
_SWEEP_COLUMNS = (
    "channel, sweep, level_vrms, gain_db, thd_percent, thdn_percent, clipped, clip_side, "
    "extra_json, measured_at"
)


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


class SQLiteStore:
    """The SQLite implementation of :class:`~harness.store.protocol.ResultStore`.

    Opening checks write access by actually committing a transaction, so an unwritable
    path fails here, before any run starts.  ``readonly=True`` (for listing) requires an
    existing database and never writes.  One connection per store; a lock makes it safe
    to share between the sequencer's threads.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        readonly: bool = False,
        busy_timeout_s: float = BUSY_TIMEOUT_S,
    ) -> None:
        self.path = Path(path)
        self.readonly = readonly
        self.busy_timeout_s = float(busy_timeout_s)
        self._lock = threading.RLock()
        self._owner: Owner = this_owner()
        self._check_path()
        self._conn: sqlite3.Connection | None = None
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

    def _connect(self) -> sqlite3.Connection:
        timeout_ms = int(self.busy_timeout_s * 1000)
        if self.readonly:
            uri = f"file:{quote(str(self.path.resolve()))}?mode=ro"
            conn = sqlite3.connect(
                uri,
                uri=True,
                timeout=self.busy_timeout_s,
                isolation_level=None,
                check_same_thread=False,
            )
        else:
            conn = sqlite3.connect(
                str(self.path),
                timeout=self.busy_timeout_s,
                isolation_level=None,
                check_same_thread=False,
            )
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

    def _init_schema(self) -> None:
        """Create or migrate the schema and prove the file is writable, in one commit."""
        assert self._conn is not None
        conn = self._conn
        conn.execute("BEGIN IMMEDIATE")
        try:
            version = conn.execute("PRAGMA user_version").fetchone()[0]
            if version > SCHEMA_VERSION:
                raise StoreError(
                    f"results database {self.path} has schema version {version}; this "
                    f"stageproof knows up to {SCHEMA_VERSION}",
                    hint="upgrade stageproof on this station",
                )
            if version == 0:
                tables = conn.execute(
                    "SELECT count(*) FROM sqlite_master WHERE type = 'table'"
                ).fetchone()[0]
                if tables:
                    raise StoreError(
                        f"{self.path} is an SQLite file but not an stageproof results database",
                        hint="choose another --db",
                    )
            for step in range(version + 1, SCHEMA_VERSION + 1):
                log.info("results database %s: migrating schema to version %d", self.path, step)
                MIGRATIONS[step](conn)
            if version != SCHEMA_VERSION:
                conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION:d}")
            conn.execute(
                "INSERT OR REPLACE INTO meta (key, value) VALUES ('last_opened_at', ?)",
                (utc_now(),),
            )
            conn.execute("COMMIT")
        except BaseException:
            self._rollback()
            raise

    def _check_schema_readonly(self) -> None:
        assert self._conn is not None
        version = self._conn.execute("PRAGMA user_version").fetchone()[0]
        if version != SCHEMA_VERSION:
            if version == 0:
                raise StoreError(
                    f"{self.path} is not an stageproof results database",
                    hint="pass --db PATH of a results database",
                )
            raise StoreError(
                f"results database {self.path} has schema version {version}, this stageproof "
                f"reads version {SCHEMA_VERSION}",
                hint="open it once for writing (any run) to migrate, or upgrade stageproof",
            )

    # --- plumbing -------------------------------------------------------------------------

    def _rollback(self) -> None:
        if self._conn is not None and self._conn.in_transaction:
            # a failed ROLLBACK means the connection is already broken: nothing to undo
            with suppress(sqlite3.Error):
                self._conn.execute("ROLLBACK")

    def _live(self) -> sqlite3.Connection:
        if self._conn is None:
            raise StoreError(f"results database {self.path} is closed")
        return self._conn

    @contextmanager
    def _write(self, doing: str) -> Iterator[sqlite3.Connection]:
        """One short IMMEDIATE transaction, committed (fsynced) before the caller returns."""
        if self.readonly:
            raise StoreError(f"results database {self.path} was opened read-only ({doing})")
        with self._lock:
            conn = self._live()
            try:
                conn.execute("BEGIN IMMEDIATE")
                yield conn
                conn.execute("COMMIT")
            except sqlite3.Error as exc:
                self._rollback()
                raise store_error(exc, self.path, doing, self.busy_timeout_s) from None
            except BaseException:
                self._rollback()
                raise

    @contextmanager
    def _read(self, doing: str) -> Iterator[sqlite3.Connection]:
        with self._lock:
            conn = self._live()
            try:
                yield conn
            except sqlite3.Error as exc:
                raise store_error(exc, self.path, doing, self.busy_timeout_s) from None

    def _touch(self, conn: sqlite3.Connection, run_id: int, doing: str) -> str:
        """Refresh the run's heartbeat; refuse if the run is not running (or missing)."""
        now = utc_now()
        cur = conn.execute(
            "UPDATE runs SET heartbeat_at = ? WHERE run_id = ? AND status = 'running'",
            (now, int(run_id)),
        )
        if cur.rowcount != 1:
            row = conn.execute("SELECT status FROM runs WHERE run_id = ?", (int(run_id),))
            found = row.fetchone()
            if found is None:
                raise StoreError(f"no run {run_id} in {self.path} ({doing})")
            raise StoreError(
                f"run {run_id} is {found[0]}, not running: {doing} not stored",
                hint="begin a new run",
            )
        return now

    # --- runs -----------------------------------------------------------------------------

    def begin_run(self, header: RunHeader) -> int:
        if not isinstance(header, RunHeader):
            raise StoreError(f"begin_run needs a RunHeader, got {type(header).__name__}")
        now = utc_now()
        with self._write("beginning a run") as conn:
            retest = conn.execute(
                "SELECT count(*) FROM runs WHERE serial = ? AND part_number = ?",
                (header.serial, header.part_number),
            ).fetchone()[0]
            cur = conn.execute(
                "INSERT INTO runs (serial, part_number, board_name, board_file, board_digest, "
                "limits_json, limits_digest, limits_provenance, station, fixture, operator, "
                "instruments_json, software_version, settle_note, status, verdict, reason, "
                "retest, started_at, ended_at, heartbeat_at, host, pid, start_token) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'running', NULL, NULL, "
                "?, ?, NULL, ?, ?, ?, ?)",
                (
                    header.serial,
                    header.part_number,
                    header.board_name,
                    header.board_file,
                    header.board_digest,
                    header.limits_json,
                    header.limits_digest,
                    header.provenance_json(),
                    header.station,
                    header.fixture,
                    header.operator,
                    json.dumps(header.instruments, sort_keys=True),
                    header.software_version,
                    header.settle_note,
                    retest,
                    now,
                    now,
                    self._owner.host,
                    self._owner.pid,
                    self._owner.start_token,
                ),
            )
            run_id = int(cur.lastrowid or 0)
        log.info(
            "results database %s: run %d begun (serial %s, retest %d)",
            self.path,
            run_id,
            header.serial,
            retest,
        )
        return run_id

    def heartbeat(self, run_id: int) -> None:
        with self._write("heartbeat") as conn:
            self._touch(conn, run_id, "heartbeat")

    def finish_run(
        self, run_id: int, status: str, verdict: str | None, reason: str | None = None
    ) -> None:
        if status not in ("complete", "aborted"):
            raise StoreError(f"finish_run status {status!r} must be 'complete' or 'aborted'")
        if verdict is not None and verdict not in VERDICTS:
            raise StoreError(f"verdict {verdict!r} must be one of {', '.join(VERDICTS)} or None")
        if status == "complete" and verdict is None:
            raise StoreError(
                "a complete run needs a verdict (PASS or FAIL)",
                hint="finish with status 'aborted' when there is no verdict",
            )
        if reason is not None and not isinstance(reason, str):
            raise StoreError("reason must be text")
        with self._write("finishing a run") as conn:
            now = self._touch(conn, run_id, "finishing the run")
            conn.execute(
                "UPDATE runs SET status = ?, verdict = ?, reason = ?, ended_at = ? "
                "WHERE run_id = ?",
                (status, verdict, reason, now, int(run_id)),
            )

    def recover_aborted(self, *, stale_after_s: float | None = None) -> list[int]:
        """Mark 'aborted' the runs whose owner process is gone; return their ids.

        A run on this host is aborted when its pid is not alive or now belongs to another
        process (start token differs).  A live owner's run is never touched.  Runs owned
        elsewhere (or where liveness cannot be told) are aborted only when
        ``stale_after_s`` is given and their heartbeat is older than that.  ``ended_at``
        is set to the last heartbeat, the last moment the owner was known to be working.
        """
        with self._read("looking for abandoned runs") as conn:
            rows = conn.execute(
                "SELECT run_id, host, pid, start_token, heartbeat_at FROM runs "
                "WHERE status = 'running'"
            ).fetchall()
        if not rows:
            return []
        cutoff = None
        if stale_after_s is not None:
            cutoff = format_time(datetime.now(UTC) - timedelta(seconds=float(stale_after_s)))
        dead: list[tuple[int, Owner, str, str]] = []
        for run_id, host, pid, token, heartbeat_at in rows:
            if isinstance(pid, bool) or not isinstance(pid, int):
                raise self._damaged(run_id, "pid", f"{pid!r} is not a process id")
            owner = Owner(host, pid, token)
            alive = owner_alive(owner)
            if alive is False:
                why = (
                    f"owner process {pid} on {host} ended without finishing the run "
                    "(crash, kill or power cut)"
                )
            elif alive is None and cutoff is not None and heartbeat_at < cutoff:
                why = (
                    f"owner process {pid} on {host} silent since {heartbeat_at} "
                    f"(over {stale_after_s:g} s)"
                )
            else:
                continue
            dead.append((int(run_id), owner, heartbeat_at, why))
        marked: list[int] = []
        found_at = utc_now()
        for run_id, owner, heartbeat_at, why in dead:
            with self._write("marking an abandoned run aborted") as conn:
                cur = conn.execute(
                    "UPDATE runs SET status = 'aborted', ended_at = ?, reason = ? "
                    "WHERE run_id = ? AND status = 'running' AND host = ? AND pid = ? "
                    "AND heartbeat_at = ?",
                    (
                        heartbeat_at,
                        f"{why}; found at {found_at}",
                        run_id,
                        owner.host,
                        owner.pid,
                        heartbeat_at,
                    ),
                )
                if cur.rowcount == 1:
                    marked.append(run_id)
        if marked:
            log.warning("results database %s: marked abandoned runs aborted: %s", self.path, marked)
        return marked

    def retest_count(self, serial: str, part_number: str) -> int:
        """Runs already recorded for this serial + part number (any status): the retest
        number the next run of that board gets."""
        with self._read("counting retests") as conn:
            return int(
                conn.execute(
                    "SELECT count(*) FROM runs WHERE serial = ? AND part_number = ?",
                    (str(serial), str(part_number)),
                ).fetchone()[0]
            )

    # --- rows -----------------------------------------------------------------------------

    def _add_row(
        self,
        run_id: int,
        doing: str,
        what: str,
        table: str,
        columns: str,
        values: tuple[Any, ...],
    ) -> None:
        """Insert one row of a running run's child table, refreshing its heartbeat."""
        marks = ", ".join("?" * (len(values) + 1))
        with self._write(doing) as conn:
            self._touch(conn, run_id, what)
            conn.execute(
                f"INSERT INTO {table} (run_id, {columns}) VALUES ({marks})",
                (int(run_id), *values),
            )

    def add_measurement(self, run_id: int, m: MeasurementRow) -> None:
        if not isinstance(m, MeasurementRow):
            raise StoreError(f"add_measurement needs a MeasurementRow, got {type(m).__name__}")
        self._add_row(
            run_id,
            "storing a measurement",
            f"measurement {m.name!r}",
            "measurements",
            _MEAS_COLUMNS,
            (
                m.channel,
                m.name,
                m.value,
                m.unit,
                m.low,
                m.high,
                m.uncertainty,
                m.decision,
                m.step,
                m.measured_at,
                m.detail_json,
            ),
        )

    def add_sweep_point(self, run_id: int, p: SweepPointRow) -> None:
        if not isinstance(p, SweepPointRow):
            raise StoreError(f"add_sweep_point needs a SweepPointRow, got {type(p).__name__}")
        self._add_row(
            run_id,
            "storing a sweep point",
            "sweep point",
            "sweep_points",
            _SWEEP_COLUMNS,
            (
                p.channel,
                p.sweep,
                p.level_vrms,
                p.gain_db,
                p.thd_percent,
                p.thdn_percent,
                int(p.clipped),
                p.clip_side,
                p.extra_json,
                p.measured_at,
            ),
        )

    def add_record(
        self,
        run_id: int,
        channel: str,
        label: str,
        sample_rate_hz: float,
        arrays: dict[str, np.ndarray],
        *,
        as_float32: bool = True,
    ) -> int:
        """Keep a raw record: each array as little-endian bytes with its dtype and shape.

        With ``as_float32`` (default) float64 samples are stored as float32: a 24-bit
        mantissa keeps a relative error under 6e-8, far below one step of a scope ADC
        (8-16 bits), and halves the size.  Returns the record id.
        """
        if not arrays:
            raise StoreError("add_record needs at least one array")
        rate = float(sample_rate_hz)
        if not rate > 0:
            raise StoreError(f"sample_rate_hz must be positive, got {sample_rate_hz!r}")
        packed: list[tuple[str, str, str, bytes]] = []
        for name, value in arrays.items():
            if not isinstance(name, str) or not name:
                raise StoreError("record array names must be non-empty text")
            a = np.asarray(value)
            if a.dtype.kind not in "fiub":
                raise StoreError(f"record array {name!r} has dtype {a.dtype}; numbers only")
            if as_float32 and a.dtype.kind == "f" and a.dtype.itemsize > 4:
                a = a.astype(np.float32)
            a = np.ascontiguousarray(a, dtype=a.dtype.newbyteorder("<"))
            packed.append((name, a.dtype.str, json.dumps(list(a.shape)), a.tobytes()))
        with self._write("storing a raw record") as conn:
            now = self._touch(conn, run_id, f"record {label!r}")
            cur = conn.execute(
                "INSERT INTO records (run_id, channel, label, sample_rate_hz, captured_at) "
                "VALUES (?, ?, ?, ?, ?)",
                (int(run_id), str(channel), str(label), rate, now),
            )
            record_id = int(cur.lastrowid or 0)
            conn.executemany(
                "INSERT INTO record_arrays (record_id, name, dtype, shape, data) "
                "VALUES (?, ?, ?, ?, ?)",
                [(record_id, n, d, s, sqlite3.Binary(b)) for n, d, s, b in packed],
            )
        return record_id

    # --- reading --------------------------------------------------------------------------

    def _damaged(self, run_id: Any, column: str, why: str) -> StoreError:
        """A row changed outside stageproof (hand edit, another tool, a bad restore): named
        so it can be found, never read as if it were right."""
        return StoreError(
            f"results database {self.path}: run {run_id} has a damaged {column} ({why})",
            hint="the row was changed outside stageproof: restore the database from a "
            "backup, or delete that run",
        )

    def _json_column(self, run_id: Any, column: str, text: Any, *, empty: bool = False) -> Any:
        if text is None and empty:
            return None
        try:
            return json.loads(text)
        except (TypeError, ValueError) as exc:
            raise self._damaged(run_id, column, f"not JSON: {exc}") from None

    def _run_row(self, row: tuple[Any, ...], *, full: bool = False) -> RunRow:
        """A run row, its owner and JSON columns checked (``full``: the limits too)."""
        values = list(row)
        run_id = values[0]
        instruments = self._json_column(run_id, "instruments_json", values[18])
        if not isinstance(instruments, dict):
            raise self._damaged(run_id, "instruments_json", "not a table of roles")
        values[18] = instruments
        for i, column in ((7, "retest"), (22, "pid")):
            if isinstance(values[i], bool) or not isinstance(values[i], int):
                raise self._damaged(run_id, column, f"{values[i]!r} is not a whole number")
        if full:
            self._json_column(run_id, "limits_json", values[15])
            self._json_column(run_id, "limits_provenance", values[17], empty=True)
        return RunRow(*values)

    def get_run(self, run_id: int) -> RunRow:
        with self._read("reading a run") as conn:
            row = conn.execute(
                f"SELECT {_RUN_COLUMNS} FROM runs WHERE run_id = ?", (int(run_id),)
            ).fetchone()
        if row is None:
            raise StoreError(
                f"no run {run_id} in {self.path}",
                hint="list runs with `stageproof results` to find its id",
            )
        return self._run_row(row, full=True)

    def list_runs(
        self,
        serial: str | None = None,
        status: str | None = None,
        verdict: str | None = None,
        since: When | None = None,
        until: When | None = None,
        board: str | None = None,
        limit: int | None = None,
    ) -> list[RunRow]:
        """Runs matching every filter given, newest first.

        ``board`` matches the part number or the board name; ``since`` / ``until`` are
        inclusive (a bare date covers that whole local day).
        """
        where: list[str] = []
        params: list[Any] = []
        if serial is not None:
            where.append("serial = ?")
            params.append(str(serial))
        if status is not None:
            if status not in STATUSES:
                raise StoreError(f"status {status!r} must be one of {', '.join(STATUSES)}")
            where.append("status = ?")
            params.append(status)
        if verdict is not None:
            if verdict not in VERDICTS:
                raise StoreError(f"verdict {verdict!r} must be one of {', '.join(VERDICTS)}")
            where.append("verdict = ?")
            params.append(verdict)
        if since is not None:
            where.append("started_at >= ?")
            params.append(parse_when(since))
        if until is not None:
            where.append("started_at < ?" if _is_bare_date(until) else "started_at <= ?")
            params.append(parse_when(until, end_of_day=True))
        if board is not None:
            where.append("(part_number = ? OR board_name = ?)")
            params.extend([str(board), str(board)])
        sql = f"SELECT {_RUN_COLUMNS} FROM runs"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY started_at DESC, run_id DESC"
        if limit is not None:
            if isinstance(limit, bool) or not isinstance(limit, int) or limit < 1:
                raise StoreError(f"limit must be a positive whole number, got {limit!r}")
            sql += " LIMIT ?"
            params.append(limit)
        with self._read("listing runs") as conn:
            rows = conn.execute(sql, params).fetchall()
        return [self._run_row(r) for r in rows]

    def _child_rows(
        self, run_id: int, doing: str, table: str, columns: str
    ) -> list[tuple[Any, ...]]:
        """A run's rows of a child table, in the order they were stored."""
        with self._read(doing) as conn:
            return conn.execute(
                f"SELECT {columns} FROM {table} WHERE run_id = ? ORDER BY id", (int(run_id),)
            ).fetchall()

    def measurements(self, run_id: int) -> list[MeasurementRow]:
        rows = self._child_rows(run_id, "reading measurements", "measurements", _MEAS_COLUMNS)
        for r in rows:
            self._json_column(run_id, f"measurement {r[1]!r} detail_json", r[-1], empty=True)
        return [MeasurementRow(*r) for r in rows]

    def sweep_points(self, run_id: int) -> list[SweepPointRow]:
        rows = self._child_rows(run_id, "reading sweep points", "sweep_points", _SWEEP_COLUMNS)
        for r in rows:
            self._json_column(run_id, "sweep point extra_json", r[8], empty=True)
        return [SweepPointRow(*r) for r in rows]

    def records(self, run_id: int) -> list[RecordRow]:
        with self._read("reading raw records") as conn:
            heads = conn.execute(
                "SELECT record_id, run_id, channel, label, sample_rate_hz, captured_at "
                "FROM records WHERE run_id = ? ORDER BY record_id",
                (int(run_id),),
            ).fetchall()
            out: list[RecordRow] = []
            for head in heads:
                arrays: dict[str, np.ndarray] = {}
                for name, dtype, shape, data in conn.execute(
                    "SELECT name, dtype, shape, data FROM record_arrays WHERE record_id = ? "
                    "ORDER BY rowid",
                    (head[0],),
                ):
                    flat = np.frombuffer(data, dtype=np.dtype(dtype))
                    arrays[name] = flat.reshape(json.loads(shape)).copy()
                out.append(RecordRow(*head, arrays=arrays))
        return out

    # --- lifetime -------------------------------------------------------------------------

    def close(self) -> None:
        with self._lock:
            if self._conn is not None:
                self._rollback()
                self._conn.close()
                self._conn = None

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.readonly else "read-write"
        return f"SQLiteStore({str(self.path)!r}, {mode})"


def _is_bare_date(value: When) -> bool:
    if isinstance(value, datetime):
        return False
    if hasattr(value, "year"):
        return True
    return len(str(value).strip()) == 10
