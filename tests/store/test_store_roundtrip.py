"""The SQLite results store: round trips, retests, validation, opening errors.

External references: SQLite documentation (sqlite.org/pragma.html: ``journal_mode``,
``synchronous``, ``user_version``, ``integrity_check`` answers "ok"; sqlite.org/wal.html),
read back through Python's own ``sqlite3`` module, independent of the store's code.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import sqlite3
import subprocess
from pathlib import Path

import numpy as np
import pytest
from store_worker import header, measurement

from harness.errors import StoreError, ValueParseError
from harness.store import (
    DEFAULT_DB,
    SCHEMA_VERSION,
    MeasurementRow,
    ResultStore,
    SQLiteStore,
    SweepPointRow,
    open_store,
)


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "results.db"


def test_round_trip_run_measurements_sweep_and_record(db: Path) -> None:
    """Everything written comes back equal; arrays keep shape, and float64 becomes
    float32 within float32's relative rounding 2**-24 (IEEE 754 binary32, 24-bit
    significand)."""
    with open_store(db) as store:
        assert isinstance(store, ResultStore)
        h = header("SN-0001")
        run_id = store.begin_run(h)
        m1 = MeasurementRow(
            "left",
            "gain_db",
            20.02,
            "dB",
            19.5,
            20.5,
            0.04,
            "pass",
            "gain",
            "2024-05-01T10:00:00+02:00",
            json.dumps({"level_vrms": 0.1}),
        )
        m2 = MeasurementRow(
            "right", "thd_percent", float("nan"), "%", None, 1.0, None, "not resolvable", "thd"
        )
        store.add_measurement(run_id, m1)
        store.add_measurement(run_id, m2)
        p = SweepPointRow(
            "left", "clip", 0.5, 19.9, 0.8, 0.9, True, "negative", json.dumps({"attempt": 2})
        )
        store.add_sweep_point(run_id, p)
        x = np.linspace(-1.0, 1.0, 3000).reshape(3, 1000)
        codes = np.arange(-128, 128, dtype=np.int16)
        rec_id = store.add_record(run_id, "left", "level 0.5", 1e5, {"output": x, "codes": codes})
        store.finish_run(run_id, "complete", "FAIL", reason=None)

        run = store.get_run(run_id)
        assert (run.serial, run.part_number, run.status, run.verdict, run.retest) == (
            "SN-0001",
            "PN-100",
            "complete",
            "FAIL",
            0,
        )
        assert run.instruments == h.instruments
        assert json.loads(run.limits_json) == json.loads(h.limits_json)
        assert json.loads(run.limits_provenance or "") == {"method": "worst-case", "seed": 7}
        assert run.settle_note == h.settle_note
        assert run.host and run.pid == os.getpid()
        assert run.started_at <= run.ended_at

        got = store.measurements(run_id)
        assert got[0] == MeasurementRow(
            "left",
            "gain_db",
            20.02,
            "dB",
            19.5,
            20.5,
            0.04,
            "pass",
            "gain",
            "2024-05-01T08:00:00.000000+00:00",
            json.dumps({"level_vrms": 0.1}),
        )
        assert got[1].value is None and got[1].low is None and got[1].high == 1.0
        assert store.sweep_points(run_id) == [p]

        (rec,) = store.records(run_id)
        assert rec.record_id == rec_id and rec.sample_rate_hz == 1e5
        assert rec.arrays["output"].dtype == np.float32 and rec.arrays["output"].shape == (3, 1000)
        np.testing.assert_allclose(rec.arrays["output"], x, rtol=2.0**-24, atol=0)
        assert rec.arrays["codes"].dtype == np.int16
        np.testing.assert_array_equal(rec.arrays["codes"], codes)


def test_record_kept_as_float64_when_asked(db: Path) -> None:
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-1"))
        x = np.array([1 / 3, 2 / 3])
        store.add_record(run_id, "left", "exact", 1e3, {"y": x}, as_float32=False)
        (rec,) = store.records(run_id)
        assert rec.arrays["y"].dtype == np.float64
        np.testing.assert_array_equal(rec.arrays["y"], x)


def test_each_measurement_is_committed_before_add_returns(db: Path) -> None:
    """A second, independent connection sees every row as soon as add_measurement
    returns (SQLite WAL: readers see all committed transactions, sqlite.org/wal.html)."""
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-2"))
        other = sqlite3.connect(db)
        try:
            for i in range(5):
                store.add_measurement(run_id, measurement(i))
                count = other.execute("SELECT count(*) FROM measurements").fetchone()[0]
                assert count == i + 1
        finally:
            other.close()


def test_pragmas_wal_full_and_schema_version(db: Path) -> None:
    """journal_mode WAL persists in the file; synchronous FULL is 2 (sqlite.org/pragma.html)."""
    with open_store(db) as store:
        assert store.path == db
        assert store._live().execute("PRAGMA synchronous").fetchone()[0] == 2
    conn = sqlite3.connect(db)
    try:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    finally:
        conn.close()


def test_newer_schema_is_refused(db: Path) -> None:
    open_store(db).close()
    conn = sqlite3.connect(db)
    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    conn.close()
    with pytest.raises(StoreError, match="upgrade stageproof"):
        open_store(db)


def test_foreign_sqlite_file_is_refused(db: Path) -> None:
    conn = sqlite3.connect(db)
    conn.execute("CREATE TABLE parts (pn TEXT)")
    conn.close()
    with pytest.raises(StoreError, match="not a stageproof results database"):
        open_store(db)


def test_retest_counting(db: Path) -> None:
    """Retest number = earlier runs of the same serial + part number, whatever their
    outcome (common practice: first-pass yield counts only retest 0)."""
    with open_store(db) as store:
        assert store.retest_count("SN-A", "PN-100") == 0
        ids = [store.begin_run(header("SN-A")) for _ in range(3)]
        store.finish_run(ids[0], "aborted", None, reason="operator stop")
        store.finish_run(ids[1], "complete", "FAIL")
        other = store.begin_run(header("SN-A", part_number="PN-200"))
        b = store.begin_run(header("SN-B"))
        assert [store.get_run(i).retest for i in ids] == [0, 1, 2]
        assert store.get_run(other).retest == 0
        assert store.get_run(b).retest == 0
        assert store.retest_count("SN-A", "PN-100") == 3


def test_serial_is_a_parameter_never_sql(db: Path) -> None:
    evil = "SN'); DROP TABLE runs; --"
    with open_store(db) as store:
        run_id = store.begin_run(header(evil))
        store.begin_run(header("SN-plain"))
        assert [r.run_id for r in store.list_runs(serial=evil)] == [run_id]
        assert store.get_run(run_id).serial == evil
        assert len(store.list_runs()) == 2


def test_list_runs_filters(db: Path) -> None:
    with open_store(db) as store:
        a = store.begin_run(header("SN-1"))
        b = store.begin_run(header("SN-2", part_number="PN-200", board_name="demo-opamp-line"))
        c = store.begin_run(header("SN-1"))
        store.finish_run(a, "complete", "PASS")
        store.finish_run(b, "complete", "FAIL")
        assert [r.run_id for r in store.list_runs()] == [c, b, a]  # newest first
        assert [r.run_id for r in store.list_runs(serial="SN-1")] == [c, a]
        assert [r.run_id for r in store.list_runs(status="running")] == [c]
        assert [r.run_id for r in store.list_runs(verdict="FAIL")] == [b]
        assert [r.run_id for r in store.list_runs(board="PN-200")] == [b]
        assert [r.run_id for r in store.list_runs(board="demo-opamp-line")] == [b]
        assert [r.run_id for r in store.list_runs(limit=2)] == [c, b]
        started = store.get_run(b).started_at
        assert [r.run_id for r in store.list_runs(since=started)] == [c, b]
        assert [r.run_id for r in store.list_runs(until=started)] == [b, a]
        today = store.get_run(a).started_at  # UTC; the filter reads local dates
        assert store.list_runs(since="2000-01-01", until="2999-12-31") != []
        assert store.list_runs(until="2000-01-01") == []
        assert store.list_runs(since="2999-01-01") == []
        assert today
        with pytest.raises(ValueParseError, match="YYYY-MM-DD"):
            store.list_runs(since="01/05/2024")
        with pytest.raises(StoreError, match="status"):
            store.list_runs(status="done")
        with pytest.raises(StoreError, match="limit"):
            store.list_runs(limit=0)


def test_finish_and_add_refuse_a_run_that_is_not_running(db: Path) -> None:
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-3"))
        with pytest.raises(StoreError, match="needs a verdict"):
            store.finish_run(run_id, "complete", None)
        with pytest.raises(StoreError, match="must be 'complete' or 'aborted'"):
            store.finish_run(run_id, "running", None)
        store.finish_run(run_id, "aborted", None, reason="supply tripped")
        assert store.get_run(run_id).reason == "supply tripped"
        with pytest.raises(StoreError, match="is aborted, not running"):
            store.add_measurement(run_id, measurement(0))
        with pytest.raises(StoreError, match="is aborted, not running"):
            store.finish_run(run_id, "complete", "PASS")
        with pytest.raises(StoreError, match="no run 999"):
            store.add_measurement(999, measurement(0))
        with pytest.raises(StoreError, match="no run 999"):
            store.get_run(999)
        assert store.measurements(run_id) == []


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"serial": ""}, "serial number is empty"),
        ({"serial": 17}, "serial number must be text"),
        ({"limits_json": "{not json"}, "limits_json is not valid JSON"),
        ({"instruments": {"scope": 3}}, "instruments must map"),
    ],
)
def test_bad_header_is_a_store_error(kwargs: dict[str, object], match: str) -> None:
    with pytest.raises(StoreError, match=match):
        header(**{"serial": "SN-1", **kwargs})  # type: ignore[arg-type]


def test_bad_rows_are_store_errors() -> None:
    with pytest.raises(StoreError, match="value must be a number"):
        MeasurementRow("left", "gain_db", "20", "dB", None, None, None, "pass", "gain")  # type: ignore[arg-type]
    with pytest.raises(StoreError, match="not ISO 8601"):
        MeasurementRow("left", "gain_db", 1.0, "dB", None, None, None, "pass", "gain", "noon")
    for level in (None, float("nan")):
        with pytest.raises(StoreError, match="level_vrms must be a finite number"):
            SweepPointRow("left", "clip", level, None, None, None, False)  # type: ignore[arg-type]


def test_unwritable_paths_fail_at_open(tmp_path: Path) -> None:
    """Each message names the path and the fix; nothing is created on the way."""
    missing = tmp_path / "no-such-folder" / "r.db"
    with pytest.raises(StoreError, match="does not exist") as err:
        open_store(missing)
    assert str(missing.parent) in str(err.value) and "mkdir" in str(err.value)
    assert not missing.parent.exists()

    with pytest.raises(StoreError, match="is a folder") as err:
        open_store(tmp_path)
    assert str(tmp_path) in str(err.value)

    # /proc is a pseudo file system where no file can be created, even by root (proc(5)).
    with pytest.raises(StoreError, match="cannot open results database /proc/") as err:
        open_store("/proc/stageproof-results.db")
    assert "writable" in str(err.value)


def _make_read_only(path: Path) -> str:
    """chmod for a normal user; root ignores modes, so use the immutable flag (chattr(1))."""
    if os.geteuid() != 0:
        path.chmod(0o444)
        return "chmod"
    chattr = shutil.which("chattr")
    if (
        chattr is None
        or subprocess.run([chattr, "+i", str(path)], check=False, capture_output=True).returncode
        != 0
    ):
        pytest.skip("running as root and chattr +i is not available here")
    return "chattr"


def test_read_only_database_fails_at_open_not_at_first_write(db: Path) -> None:
    """open_store proves write access by committing a transaction."""
    open_store(db).close()
    how = _make_read_only(db)
    try:
        with pytest.raises(StoreError, match="read-only") as err:
            open_store(db)
        assert str(db) in str(err.value) and "writable" in str(err.value)
        with open_store(db, readonly=True) as ro:  # listing still works
            assert ro.list_runs() == []
    finally:
        if how == "chattr":
            subprocess.run(["chattr", "-i", str(db)], check=True)
        else:
            db.chmod(0o644)


def test_locked_database_times_out_with_a_clear_error(db: Path) -> None:
    open_store(db).close()
    holder = sqlite3.connect(db, isolation_level=None)
    holder.execute("BEGIN IMMEDIATE")
    try:
        with pytest.raises(StoreError, match=r"stayed locked for 0\.2 s"):
            open_store(db, busy_timeout_s=0.2)
    finally:
        holder.execute("ROLLBACK")
        holder.close()


def test_urls_and_default_path(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    assert DEFAULT_DB == "stageproof-results.db"
    with socket.socket() as s:  # a port on 127.0.0.1 that nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with pytest.raises(StoreError, match="cannot reach PostgreSQL server"):
        open_store(f"postgresql://u:pw@127.0.0.1:{port}/stageproof")
    with pytest.raises(StoreError, match="unknown results store URL scheme"):
        open_store("mysql://x/y")
    with open_store(f"sqlite:///{tmp_path / 'abs.db'}") as store:
        assert isinstance(store, SQLiteStore) and store.path == tmp_path / "abs.db"
    monkeypatch.chdir(tmp_path)
    with open_store("sqlite:///rel.db") as store:
        assert store.path == Path("rel.db")
    assert (tmp_path / "rel.db").exists()


def test_readonly_open_needs_an_existing_database(db: Path) -> None:
    with pytest.raises(StoreError, match="no results database at"):
        open_store(db, readonly=True)
    assert not db.exists()
    open_store(db).close()
    with open_store(db, readonly=True) as ro, pytest.raises(StoreError, match="read-only"):
        ro.begin_run(header("SN-1"))


def test_closed_store_refuses_work(db: Path) -> None:
    store = open_store(db)
    store.close()
    store.close()  # idempotent
    with pytest.raises(StoreError, match="is closed"):
        store.list_runs()
