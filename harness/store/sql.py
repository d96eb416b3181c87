"""What the SQLite and PostgreSQL stores share: every query, written once.

A backend supplies the connection, its transactions, its error wording and its rule for
"is the owner of this running run still alive" (an OS file lock on SQLite, an advisory lock
held by the station's connection on PostgreSQL).  Everything else — the rows, retest
numbering, filters, copying — is here, so both keep the same semantics.

Every value, serial numbers included, is bound as a parameter; SQL text is built only from
fixed fragments.  Queries are written with ``?`` marks; the PostgreSQL backend turns them
into its own.  Each write is one short transaction, committed before the method returns.
"""

from __future__ import annotations

import json
import logging
import threading
import uuid
from collections.abc import Callable, Iterator, Sequence
from contextlib import AbstractContextManager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from types import TracebackType
from typing import Any, Self, TypeVar

import numpy as np

from harness.errors import StoreError
from harness.store.owner import Owner, this_owner
from harness.store.protocol import When
from harness.store.rows import (
    MEASUREMENT_FIELDS,
    STATUSES,
    SWEEP_FIELDS,
    VERDICTS,
    MeasurementRow,
    RecordRow,
    RunHeader,
    RunRow,
    SweepPointRow,
    check_measurement,
    format_time,
    parse_when,
    utc_now,
)

_T = TypeVar("_T")
log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())

#: Tries of begin_run when another station took the same retest number first.
RETEST_TRIES = 50

RUN_COLUMNS = (
    "run_id, serial, part_number, status, verdict, started_at, ended_at, retest, reason, "
    "operator, station, fixture, board_name, board_file, board_digest, limits_json, "
    "limits_digest, limits_provenance, instruments_json, software_version, settle_note, "
    "host, pid, heartbeat_at, board_text, run_token"
)
MEAS_COLUMNS = ", ".join(MEASUREMENT_FIELDS)
SWEEP_COLUMNS = ", ".join(SWEEP_FIELDS)
_INSERT_RUN = (
    "INSERT INTO runs (serial, part_number, board_name, board_file, board_digest, "
    "limits_json, limits_digest, limits_provenance, station, fixture, operator, "
    "instruments_json, software_version, settle_note, status, verdict, reason, "
    "retest, started_at, ended_at, heartbeat_at, host, pid, start_token, board_text, "
    "run_token) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, "
    "(SELECT coalesce(max(retest) + 1, 0) FROM runs WHERE serial = ? AND part_number = ?), "
    "?, ?, ?, ?, ?, ?, ?, ?) RETURNING run_id, retest"
)


@dataclass(frozen=True)
class RunFilter:
    """The filters ``list_runs``, ``load_frame`` and the summary push into SQL."""

    serial: str | None = None
    status: str | None = None
    verdict: str | None = None
    since: When | None = None
    until: When | None = None
    board: str | None = None
    station: str | None = None

    def where(self, prefix: str = "") -> tuple[list[str], list[Any]]:
        """SQL conditions (on columns of ``runs``, named with ``prefix``) and their values."""
        p = prefix
        where: list[str] = []
        params: list[Any] = []
        if self.serial is not None:
            where.append(f"{p}serial = ?")
            params.append(str(self.serial))
        if self.status is not None:
            if self.status not in STATUSES:
                raise StoreError(f"status {self.status!r} must be one of {', '.join(STATUSES)}")
            where.append(f"{p}status = ?")
            params.append(self.status)
        if self.verdict is not None:
            if self.verdict not in VERDICTS:
                raise StoreError(f"verdict {self.verdict!r} must be one of {', '.join(VERDICTS)}")
            where.append(f"{p}verdict = ?")
            params.append(self.verdict)
        if self.since is not None:
            where.append(f"{p}started_at >= ?")
            params.append(parse_when(self.since))
        if self.until is not None:
            op = "<" if is_bare_date(self.until) else "<="
            where.append(f"{p}started_at {op} ?")
            params.append(parse_when(self.until, end_of_day=True))
        if self.board is not None:
            where.append(f"({p}part_number = ? OR {p}board_name = ?)")
            params.extend([str(self.board), str(self.board)])
        if self.station is not None:
            where.append(f"{p}station = ?")
            params.append(str(self.station))
        return where, params


def is_bare_date(value: When) -> bool:
    if isinstance(value, datetime):
        return False
    if hasattr(value, "year"):
        return True
    return len(str(value).strip()) == 10


@dataclass(frozen=True)
class FullRun:
    """One finished run with everything stored about it: what ``store copy`` moves."""

    row: tuple[Any, ...]  # RUN_COLUMNS without run_id, plus start_token
    measurements: list[tuple[Any, ...]]
    sweeps: list[tuple[Any, ...]]
    records: list[tuple[tuple[Any, ...], list[tuple[Any, ...]]]]


_COPY_RUN_COLUMNS = RUN_COLUMNS.replace("run_id, ", "") + ", start_token"


class SQLStore:
    """A :class:`~harness.store.protocol.ResultStore` over a DB-API connection.

    Subclasses set ``location`` (shown in messages), ``readonly`` and ``_conn``, and supply
    ``_transaction``, ``_error``, ``_q`` (placeholder style) and the owner-liveness hooks.
    One connection per store; a lock makes it safe to share between threads.
    """

    location: str
    readonly: bool
    _conn: Any
    #: The schema version of the database as opened (older ones are read with defaults).
    _version: int

    def _init_common(self) -> None:
        self._lock = threading.RLock()
        self._owner: Owner = this_owner()
        self._conn = None

    # --- what a backend supplies ----------------------------------------------------------

    def _q(self, sql: str) -> str:
        return sql

    def _transaction(self, conn: Any) -> AbstractContextManager[Any]:
        raise NotImplementedError

    def _error(self, exc: Exception, doing: str) -> StoreError:
        raise NotImplementedError

    def _driver_errors(self) -> tuple[type[Exception], ...]:
        raise NotImplementedError

    def _unique_violation(self, exc: Exception) -> bool:
        raise NotImplementedError

    def _claim_run(self, conn: Any, run_id: int, token: str) -> None:
        """Inside begin_run's transaction: start holding the run's liveness lock."""

    def _release_run(self, run_id: int) -> None:
        """After the run ended: let its liveness lock go."""

    def _prepare_claim(self, token: str) -> None:
        """Before begin_run's transaction (SQLite takes its file lock here)."""

    def _abandon_claim(self, token: str) -> None:
        """begin_run failed: undo ``_prepare_claim``."""

    def _owner_gone(self, run_id: int, token: str, owner: Owner) -> tuple[bool | None, Any]:
        """Is the owner of this running run gone?  (True, held) when its lock could be
        taken: ``held`` is released by ``_let_go`` after the run is marked."""
        raise NotImplementedError

    def _let_go(self, held: Any) -> None:
        """Release what ``_owner_gone`` took."""

    def _reopen(self, exc: StoreError) -> bool:
        """After a failed write: was the connection lost, and is a new one now open and
        holding this station's run locks again?  (A database file is never lost: no.)"""
        return False

    # --- plumbing -------------------------------------------------------------------------

    def _live(self) -> Any:
        if self._conn is None:
            raise StoreError(f"results database {self.location} is closed")
        return self._conn

    def _exec(self, conn: Any, sql: str, params: Sequence[Any] = ()) -> Any:
        return conn.execute(self._q(sql), tuple(params))

    def _write(self, doing: str) -> AbstractContextManager[Any]:
        if self.readonly:
            raise StoreError(f"results database {self.location} was opened read-only ({doing})")
        return _Guard(self, doing, write=True)

    def _read(self, doing: str) -> AbstractContextManager[Any]:
        return _Guard(self, doing, write=False)

    def _written(self, doing: str, body: Callable[[Any, bool], _T]) -> _T:
        """``body(conn, again)`` in one write transaction.  When the connection was lost
        and the backend opened a new one, the body runs once more with ``again`` true: the
        lost transaction may have committed before the loss, so it first looks whether its
        row is there, and a row is never stored twice nor lost."""
        try:
            with self._write(doing) as conn:
                return body(conn, False)
        except StoreError as exc:
            if not self._reopen(exc):
                raise
        with self._write(doing) as conn:
            return body(conn, True)

    def _touch(self, conn: Any, run_id: int, doing: str) -> str:
        """Refresh the run's heartbeat; refuse if the run is not running (or missing)."""
        now = utc_now()
        cur = self._exec(
            conn,
            "UPDATE runs SET heartbeat_at = ? WHERE run_id = ? AND status = 'running'",
            (now, int(run_id)),
        )
        if cur.rowcount != 1:
            found = self._exec(
                conn, "SELECT status FROM runs WHERE run_id = ?", (int(run_id),)
            ).fetchone()
            if found is None:
                raise StoreError(f"no run {run_id} in {self.location} ({doing})")
            raise StoreError(
                f"run {run_id} is {found[0]}, not running: {doing} not stored",
                hint="begin a new run",
            )
        return now

    def _run_select(self) -> str:
        """The run columns as this database holds them (an older schema read with defaults)."""
        if self._version >= 2:
            return RUN_COLUMNS
        from harness.store.schema import LEGACY_TOKEN_SQL

        return RUN_COLUMNS.replace(
            "board_text, run_token", f"NULL AS board_text, {LEGACY_TOKEN_SQL} AS run_token"
        )

    # --- runs -----------------------------------------------------------------------------

    def begin_run(self, header: RunHeader) -> int:
        """Insert the run with the next retest number of its serial and part number.

        The number is computed inside the INSERT and guarded by the unique (serial,
        part_number, retest): when another station took it first, the insert fails and is
        tried again with the next one, so numbers stay 0..n-1 with no read-then-write race.
        """
        if not isinstance(header, RunHeader):
            raise StoreError(f"begin_run needs a RunHeader, got {type(header).__name__}")
        token = uuid.uuid4().hex
        self._prepare_claim(token)
        try:
            for attempt in range(RETEST_TRIES):
                now = utc_now()
                try:
                    with self._write("beginning a run") as conn:
                        run_id, retest = self._exec(
                            conn, _INSERT_RUN, self._run_values(header, now, token)
                        ).fetchall()[0]
                        self._claim_run(conn, int(run_id), token)
                    break
                except StoreError as exc:
                    if not isinstance(exc.__cause__, Exception) or not self._unique_violation(
                        exc.__cause__
                    ):
                        raise
                    log.info("retest number taken by another station; try %d", attempt + 2)
            else:
                raise StoreError(
                    f"results database {self.location}: could not number a retest of "
                    f"{header.serial!r} after {RETEST_TRIES} tries",
                    hint="many stations are testing this serial at once; retry",
                )
        except BaseException:
            self._abandon_claim(token)
            raise
        log.info(
            "results database %s: run %d begun (serial %s, retest %d)",
            self.location,
            run_id,
            header.serial,
            retest,
        )
        return int(run_id)

    def _run_values(self, header: RunHeader, now: str, token: str) -> tuple[Any, ...]:
        return (
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
            "running",
            None,
            None,
            header.serial,
            header.part_number,
            now,
            None,
            now,
            self._owner.host,
            self._owner.pid,
            self._owner.start_token,
            header.board_text,
            token,
        )

    def heartbeat(self, run_id: int) -> None:
        self._written("heartbeat", lambda conn, _again: self._touch(conn, run_id, "heartbeat"))

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

        def finish(conn: Any, again: bool) -> None:
            if again:
                row = self._exec(
                    conn, "SELECT status, verdict, reason FROM runs WHERE run_id = ?", (run_id,)
                ).fetchone()
                if row is not None and tuple(row) == (status, verdict, reason):
                    return  # the lost transaction had committed
            now = self._touch(conn, run_id, "finishing the run")
            self._exec(
                conn,
                "UPDATE runs SET status = ?, verdict = ?, reason = ?, ended_at = ? "
                "WHERE run_id = ?",
                (status, verdict, reason, now, int(run_id)),
            )

        self._written("finishing a run", finish)
        self._release_run(int(run_id))

    def recover_aborted(self, *, stale_after_s: float | None = None) -> list[int]:
        """Mark 'aborted' the runs whose owner is gone; return their ids.

        The rule: a run is dead only when its liveness lock is free (the backend's
        ``_owner_gone``).  A live owner's run is never touched, however old its heartbeat.
        Runs whose liveness cannot be told (written by an older version elsewhere) are
        aborted only when ``stale_after_s`` is given and their heartbeat is older than that.
        ``ended_at`` is set to the last heartbeat, the last moment the owner was known to work.
        """
        with self._read("looking for abandoned runs") as conn:
            rows = self._exec(
                conn,
                f"SELECT run_id, host, pid, start_token, heartbeat_at, "
                f"{'run_token' if self._version >= 2 else 'NULL'} FROM runs "
                "WHERE status = 'running'",
            ).fetchall()
        cutoff = None
        if stale_after_s is not None:
            cutoff = format_time(datetime.now(UTC) - timedelta(seconds=float(stale_after_s)))
        marked: list[int] = []
        found_at = utc_now()
        for run_id, host, pid, start, heartbeat_at, token in rows:
            if isinstance(pid, bool) or not isinstance(pid, int):
                raise self._damaged(run_id, "pid", f"{pid!r} is not a process id")
            owner = Owner(host, pid, start)
            gone, held = self._owner_gone(int(run_id), token or "", owner)
            try:
                if gone is True:
                    why = (
                        f"owner process {pid} on {host} ended without finishing the run "
                        "(crash, kill or power cut)"
                    )
                elif gone is None and cutoff is not None and heartbeat_at < cutoff:
                    why = (
                        f"owner process {pid} on {host} silent since {heartbeat_at} "
                        f"(over {stale_after_s:g} s)"
                    )
                else:
                    continue
                with self._write("marking an abandoned run aborted") as conn:
                    cur = self._exec(
                        conn,
                        "UPDATE runs SET status = 'aborted', ended_at = ?, reason = ? "
                        "WHERE run_id = ? AND status = 'running' AND heartbeat_at = ?",
                        (heartbeat_at, f"{why}; found at {found_at}", int(run_id), heartbeat_at),
                    )
                    if cur.rowcount == 1:
                        marked.append(int(run_id))
            finally:
                self._let_go(held)
        if marked:
            log.warning(
                "results database %s: marked abandoned runs aborted: %s", self.location, marked
            )
        return marked

    def retest_count(self, serial: str, part_number: str) -> int:
        """Runs already recorded for this serial + part number (any status): the retest
        number the next run of that board gets."""
        with self._read("counting retests") as conn:
            return int(
                self._exec(
                    conn,
                    "SELECT count(*) FROM runs WHERE serial = ? AND part_number = ?",
                    (str(serial), str(part_number)),
                ).fetchone()[0]
            )

    # --- rows -----------------------------------------------------------------------------

    def _add_row(
        self, run_id: int, doing: str, what: str, table: str, columns: str, values: tuple
    ) -> None:
        """Insert one row of a running run's child table, refreshing its heartbeat."""
        marks = ", ".join("?" * (len(values) + 1))
        same = " AND ".join(f"{c.strip()} IS NOT DISTINCT FROM ?" for c in columns.split(","))
        row = (int(run_id), *values)

        def insert(conn: Any, again: bool) -> None:
            self._touch(conn, run_id, what)
            if again:
                sql = f"SELECT 1 FROM {table} WHERE run_id = ? AND {same}"
                if self._exec(conn, sql, row).fetchone() is not None:
                    return  # the lost transaction had committed
            self._exec(conn, f"INSERT INTO {table} (run_id, {columns}) VALUES ({marks})", row)

        self._written(doing, insert)

    def add_measurement(self, run_id: int, m: MeasurementRow) -> None:
        if not isinstance(m, MeasurementRow):
            raise StoreError(f"add_measurement needs a MeasurementRow, got {type(m).__name__}")
        check_measurement(m)
        self._add_row(
            run_id,
            "storing a measurement",
            f"measurement {m.name!r}",
            "measurements",
            MEAS_COLUMNS,
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
            SWEEP_COLUMNS,
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
        head = (int(run_id), str(channel), str(label), rate, utc_now())

        def insert(conn: Any, again: bool) -> int:
            self._touch(conn, run_id, f"record {label!r}")
            if again:
                found = self._exec(
                    conn,
                    "SELECT record_id FROM records WHERE run_id = ? AND channel = ? "
                    "AND label = ? AND sample_rate_hz = ? AND captured_at = ?",
                    head,
                ).fetchone()
                if found is not None:
                    return int(found[0])  # the lost transaction had committed
            return self._insert_record(conn, head, packed)

        return self._written("storing a raw record", insert)

    def _insert_record(
        self, conn: Any, head: tuple[Any, ...], arrays: Sequence[tuple[Any, ...]]
    ) -> int:
        (record_id,) = self._exec(
            conn,
            "INSERT INTO records (run_id, channel, label, sample_rate_hz, captured_at) "
            "VALUES (?, ?, ?, ?, ?) RETURNING record_id",
            head,
        ).fetchall()[0]
        for name, dtype, shape, data in arrays:
            self._exec(
                conn,
                "INSERT INTO record_arrays (record_id, name, dtype, shape, data) "
                "VALUES (?, ?, ?, ?, ?)",
                (int(record_id), name, dtype, shape, bytes(data)),
            )
        return int(record_id)

    # --- reading --------------------------------------------------------------------------

    def _damaged(self, run_id: Any, column: str, why: str) -> StoreError:
        """A row changed outside stageproof (hand edit, another tool, a bad restore): named
        so it can be found, never read as if it were right."""
        return StoreError(
            f"results database {self.location}: run {run_id} has a damaged {column} ({why})",
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

    def _run_row(self, row: Sequence[Any], *, full: bool = False) -> RunRow:
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
            row = self._exec(
                conn, f"SELECT {self._run_select()} FROM runs WHERE run_id = ?", (int(run_id),)
            ).fetchone()
        if row is None:
            raise StoreError(
                f"no run {run_id} in {self.location}",
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
        station: str | None = None,
    ) -> list[RunRow]:
        """Runs matching every filter given, newest first.

        ``board`` matches the part number or the board name; ``since`` / ``until`` are
        inclusive (a bare date covers that whole UTC day).
        """
        where, params = RunFilter(serial, status, verdict, since, until, board, station).where()
        sql = f"SELECT {self._run_select()} FROM runs"
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY started_at DESC, run_id DESC"
        if limit is not None:
            if isinstance(limit, bool) or not isinstance(limit, int) or limit < 1:
                raise StoreError(f"limit must be a positive whole number, got {limit!r}")
            sql += " LIMIT ?"
            params.append(limit)
        with self._read("listing runs") as conn:
            rows = self._exec(conn, sql, params).fetchall()
        return [self._run_row(r) for r in rows]

    def _child_rows(
        self, run_id: int, doing: str, table: str, columns: str
    ) -> list[tuple[Any, ...]]:
        """A run's rows of a child table, in the order they were stored."""
        with self._read(doing) as conn:
            return self._exec(
                conn,
                f"SELECT {columns} FROM {table} WHERE run_id = ? ORDER BY id",
                (int(run_id),),
            ).fetchall()

    def measurements(self, run_id: int) -> list[MeasurementRow]:
        rows = self._child_rows(run_id, "reading measurements", "measurements", MEAS_COLUMNS)
        for r in rows:
            self._json_column(run_id, f"measurement {r[1]!r} detail_json", r[-1], empty=True)
        return [MeasurementRow(*r) for r in rows]

    def sweep_points(self, run_id: int) -> list[SweepPointRow]:
        rows = self._child_rows(run_id, "reading sweep points", "sweep_points", SWEEP_COLUMNS)
        for r in rows:
            self._json_column(run_id, "sweep point extra_json", r[8], empty=True)
        return [SweepPointRow(*r) for r in rows]

    def _record_rows(self, conn: Any, run_id: int) -> list[tuple[tuple[Any, ...], list]]:
        heads = self._exec(
            conn,
            "SELECT record_id, run_id, channel, label, sample_rate_hz, captured_at "
            "FROM records WHERE run_id = ? ORDER BY record_id",
            (int(run_id),),
        ).fetchall()
        out = []
        for head in heads:
            arrays = self._exec(
                conn,
                "SELECT name, dtype, shape, data FROM record_arrays WHERE record_id = ? "
                "ORDER BY name",
                (head[0],),
            ).fetchall()
            out.append((tuple(head), [tuple(a) for a in arrays]))
        return out

    def records(self, run_id: int) -> list[RecordRow]:
        with self._read("reading raw records") as conn:
            raw = self._record_rows(conn, run_id)
        out: list[RecordRow] = []
        for head, arrays in raw:
            loaded: dict[str, np.ndarray] = {}
            for name, dtype, shape, data in arrays:
                flat = np.frombuffer(bytes(data), dtype=np.dtype(dtype))
                loaded[name] = flat.reshape(json.loads(shape)).copy()
            record_id, run, channel, label, rate, captured = head
            out.append(RecordRow(record_id, run, channel, label, rate, captured, loaded))
        return out

    def query(self, sql: str, params: Sequence[Any], doing: str) -> tuple[list[str], list]:
        """Column names and rows of one read-only query (for DataFrame loading)."""
        with self._read(doing) as conn:
            cur = self._exec(conn, sql, params)
            names = [d[0] for d in cur.description]
            return names, cur.fetchall()

    # --- copying between stores ------------------------------------------------------------

    def run_tokens(self) -> set[str]:
        with self._read("listing run tokens") as conn:
            rows = self._exec(conn, "SELECT run_token FROM runs").fetchall()
        return {r[0] for r in rows}

    def finished_runs_to_copy(self) -> Iterator[tuple[str, FullRun | None]]:
        """(token, everything about the run) of each run, oldest first; None for a run
        still running (it is not copied until it ends)."""
        token_col = "run_token" if self._version >= 2 else "NULL"
        with self._read("listing runs to copy") as conn:
            ids = self._exec(
                conn, f"SELECT run_id, status, {token_col} FROM runs ORDER BY run_id"
            ).fetchall()
        for run_id, status, _ in ids:
            with self._read("reading a run to copy") as conn:
                cols = _COPY_RUN_COLUMNS
                if self._version < 2:
                    cols = self._run_select().replace("run_id, ", "") + ", start_token"
                row = self._exec(
                    conn, f"SELECT {cols} FROM runs WHERE run_id = ?", (run_id,)
                ).fetchone()
                token = row[-2]
                if status == "running":
                    yield token, None
                    continue
                ms = self._exec(
                    conn,
                    f"SELECT {MEAS_COLUMNS} FROM measurements WHERE run_id = ? ORDER BY id",
                    (run_id,),
                ).fetchall()
                sw = self._exec(
                    conn,
                    f"SELECT {SWEEP_COLUMNS} FROM sweep_points WHERE run_id = ? ORDER BY id",
                    (run_id,),
                ).fetchall()
                recs = [
                    (head[2:], arrays)  # without record_id and run_id
                    for head, arrays in self._record_rows(conn, run_id)
                ]
            yield token, FullRun(tuple(row), [tuple(m) for m in ms], [tuple(s) for s in sw], recs)

    def insert_full_run(self, run: FullRun) -> bool:
        """Insert a copied run with its rows in one transaction; False if its token is
        already here (a concurrent copy won).  The retest number is kept when free, else
        the next free one of that serial is taken."""
        cols = _COPY_RUN_COLUMNS.split(", ")
        values = dict(zip(cols, run.row, strict=True))
        for _ in range(RETEST_TRIES):
            try:
                with self._write("copying a run") as conn:
                    if self._exec(
                        conn, "SELECT 1 FROM runs WHERE run_token = ?", (values["run_token"],)
                    ).fetchone():
                        return False
                    taken = self._exec(
                        conn,
                        "SELECT 1 FROM runs WHERE serial = ? AND part_number = ? AND retest = ?",
                        (values["serial"], values["part_number"], values["retest"]),
                    ).fetchone()
                    if taken:
                        values["retest"] = self._exec(
                            conn,
                            "SELECT coalesce(max(retest) + 1, 0) FROM runs "
                            "WHERE serial = ? AND part_number = ?",
                            (values["serial"], values["part_number"]),
                        ).fetchone()[0]
                    marks = ", ".join("?" * len(cols))
                    (run_id,) = self._exec(
                        conn,
                        f"INSERT INTO runs ({', '.join(cols)}) VALUES ({marks}) RETURNING run_id",
                        [values[c] for c in cols],
                    ).fetchall()[0]
                    for m in run.measurements:
                        self._exec(
                            conn,
                            f"INSERT INTO measurements (run_id, {MEAS_COLUMNS}) "
                            f"VALUES ({', '.join('?' * (len(m) + 1))})",
                            (run_id, *m),
                        )
                    for s in run.sweeps:
                        self._exec(
                            conn,
                            f"INSERT INTO sweep_points (run_id, {SWEEP_COLUMNS}) "
                            f"VALUES ({', '.join('?' * (len(s) + 1))})",
                            (run_id, *s),
                        )
                    for head, arrays in run.records:
                        self._insert_record(conn, (run_id, *head), arrays)
                return True
            except StoreError as exc:
                cause = exc.__cause__
                if not isinstance(cause, Exception) or not self._unique_violation(cause):
                    raise
        raise StoreError(f"results database {self.location}: could not copy a run (retests)")

    def identity(self) -> str:
        """A value naming this database, the same through any path or URL that reaches it."""
        with self._read("reading the database identity") as conn:
            row = self._exec(conn, "SELECT value FROM meta WHERE key = 'database_id'").fetchone()
        return str(row[0]) if row else f"{type(self).__name__}:{self.location}"

    # --- lifetime -------------------------------------------------------------------------

    def _close_connection(self) -> None:
        raise NotImplementedError

    def close(self) -> None:
        with self._lock:
            if self._conn is not None:
                self._close_connection()
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


class _Guard:
    """Hold the store's lock, open a transaction for writes, turn driver errors into
    :class:`StoreError` (the driver's exception kept as ``__cause__`` for retry logic)."""

    def __init__(self, store: SQLStore, doing: str, *, write: bool) -> None:
        self.store, self.doing, self.write = store, doing, write
        self._tx: AbstractContextManager[Any] | None = None

    def __enter__(self) -> Any:
        self.store._lock.acquire()
        try:
            conn = self.store._live()
            if self.write:
                self._tx = self.store._transaction(conn)
                self._tx.__enter__()
            return conn
        except self.store._driver_errors() as exc:
            self.store._lock.release()
            raise self.store._error(exc, self.doing) from exc
        except BaseException:
            self.store._lock.release()
            raise

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        try:
            if self._tx is not None:
                try:
                    self._tx.__exit__(exc_type, exc, tb)
                except self.store._driver_errors() as err:
                    if exc is None:
                        raise self.store._error(err, self.doing) from err
            if isinstance(exc, self.store._driver_errors()):
                raise self.store._error(exc, self.doing) from exc
        finally:
            self.store._lock.release()
