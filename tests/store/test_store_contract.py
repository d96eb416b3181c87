"""The ResultStore contract, run against both backends (SQLite file, real PostgreSQL).

Each check reads back with the backend's own driver (sqlite3 / psycopg) or recomputes the
expected answer with pandas from the unfiltered rows, independent of the store's SQL.
PostgreSQL facts used: a session-level advisory lock is released when its session ends
(PostgreSQL manual §13.3.5 "Advisory Locks"); a unique index refuses a duplicate key with
SQLSTATE 23505 (Appendix A, "unique_violation").  SQLite: a UNIQUE index refuses a
duplicate (sqlite.org/lang_createindex.html).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from store_worker import header, measurement

from harness.errors import StoreError
from harness.report import load_summary
from harness.store import (
    SCHEMA_VERSION,
    MeasurementRow,
    SweepPointRow,
    load_frame,
    open_store,
)
from harness.store.copy import copy_runs
from tests.support.db import raw_sql, reap, stamp_newer_schema

WORKER = Path(__file__).with_name("store_worker.py")


def _fill(url: str) -> dict[str, int]:
    """Six runs over two stations, two boards, a retested serial; returns serial -> id."""
    ids = {}
    with open_store(url) as store:
        plan = [
            ("SN-1", "PN-100", "st-a", "PASS", "2024-05-01T08:00:00+00:00"),
            ("SN-2", "PN-100", "st-a", "FAIL", "2024-05-01T09:00:00+00:00"),
            ("SN-2", "PN-100", "st-b", "PASS", "2024-05-02T09:00:00+00:00"),
            ("SN-3", "PN-200", "st-b", "PASS", "2024-05-02T10:00:00+00:00"),
            ("SN-4", "PN-200", "st-b", "FAIL", "2024-05-03T10:00:00+00:00"),
            ("SN-5", "PN-100", "st-a", "PASS", "2024-05-03T11:00:00+00:00"),
        ]
        for k, (sn, pn, st, verdict, _when) in enumerate(plan):
            run_id = store.begin_run(header(sn, pn, station=st, board_name=f"board {pn}"))
            for i in range(3):
                m = measurement(i)
                store.add_measurement(
                    run_id,
                    MeasurementRow(
                        "left",
                        m.name,
                        float(k * 10 + i),
                        "dB",
                        0.0,
                        100.0,
                        0.1,
                        "pass" if verdict == "PASS" or i else "fail",
                        "gain",
                    ),
                )
            store.finish_run(run_id, "complete", verdict)
            ids[f"{sn}#{k}"] = run_id
        # fixed start times, so date filters have something definite to cut
        for k, (_sn, _pn, _st, _v, when) in enumerate(plan):
            raw_sql(url, "UPDATE runs SET started_at = ? WHERE run_id = ?", (when, k + 1))
    return ids


def test_round_trip_and_run_identity(store_url: str) -> None:
    """What is written comes back equal; each run gets a unique token; the board file's
    text is kept with the run."""
    board_text = 'name = "x"  # the board file as it was\n'
    with open_store(store_url) as store:
        a = store.begin_run(header("SN-RT", board_text=board_text))
        store.add_measurement(a, measurement(1))
        store.add_sweep_point(a, SweepPointRow("left", "clip", 0.25, 19.9, 0.5, 0.6, True, "pos"))
        x = np.linspace(-1, 1, 2000).reshape(2, 1000)
        store.add_record(a, "left", "nominal", 1e5, {"output": x, "codes": np.arange(5)})
        store.finish_run(a, "complete", "PASS")
        b = store.begin_run(header("SN-RT"))
        run = store.get_run(a)
        assert (run.status, run.verdict, run.retest, run.board_text) == (
            "complete",
            "PASS",
            0,
            board_text,
        )
        assert store.get_run(b).retest == 1
        assert len(run.run_token) == 32 and run.run_token != store.get_run(b).run_token
        (m,) = store.measurements(a)
        assert (m.name, m.value, m.unit, m.low, m.high, m.decision) == (
            "m1",
            1.0,
            "dB",
            0.0,
            1e9,
            "pass",
        )
        (pt,) = store.sweep_points(a)
        assert (pt.level_vrms, pt.clipped, pt.clip_side) == (0.25, True, "pos")
        (rec,) = store.records(a)
        np.testing.assert_allclose(rec.arrays["output"], x, rtol=2**-24)
        np.testing.assert_array_equal(rec.arrays["codes"], np.arange(5))
    tokens = raw_sql(store_url, "SELECT count(DISTINCT run_token) FROM runs")
    assert tokens == [(2,)]


def test_retest_numbers_are_guarded_by_a_unique_constraint(store_url: str) -> None:
    """The database itself refuses a second run with the same serial, part and retest."""
    with open_store(store_url) as store:
        first = store.begin_run(header("SN-U"))
        store.finish_run(first, "complete", "PASS")
    row = raw_sql(store_url, "SELECT * FROM runs WHERE run_id = ?", (first,))
    assert row
    with pytest.raises(Exception, match=r"(?i)unique|duplicate"):
        raw_sql(
            store_url,
            "INSERT INTO runs (serial, part_number, board_name, board_file, board_digest, "
            "limits_json, limits_digest, station, fixture, operator, instruments_json, "
            "software_version, settle_note, status, retest, started_at, heartbeat_at, host, "
            "pid, run_token) SELECT serial, part_number, board_name, board_file, board_digest,"
            " limits_json, limits_digest, station, fixture, operator, instruments_json, "
            "software_version, settle_note, status, retest, started_at, heartbeat_at, host, "
            "pid, 'another-token' FROM runs WHERE run_id = ?",
            (first,),
        )


def test_filters_are_the_same_as_filtering_every_row(store_url: str) -> None:
    """load_frame and list_runs with filters give exactly what pandas keeps of the whole
    table (the filters run in SQL; pandas is the independent reference)."""
    _fill(store_url)
    every = load_frame(store_url, "measurements")
    runs_all = load_frame(store_url, "runs")
    assert len(every) == 18 and len(runs_all) == 6
    cases = [
        ({"station": "st-b"}, every["station"] == "st-b"),
        ({"serial": "SN-2"}, every["serial"] == "SN-2"),
        ({"board": "PN-200"}, every["part_number"] == "PN-200"),
        ({"board": "board PN-200"}, every["board_name"] == "board PN-200"),
        (
            {"since": "2024-05-02T00:00:00+00:00", "until": "2024-05-02T23:59:59+00:00"},
            every["started_at"].dt.strftime("%Y-%m-%d") == "2024-05-02",
        ),
    ]
    for kwargs, keep in cases:
        got = load_frame(store_url, "measurements", **kwargs)
        want = every[keep]
        assert got["measurement_id"].tolist() == want["measurement_id"].tolist(), kwargs
        listed = open_store(store_url, readonly=True)
        try:
            ids = sorted(r.run_id for r in listed.list_runs(**kwargs))
        finally:
            listed.close()
        assert ids == sorted(want["run_id"].unique().tolist()), kwargs
    narrow = load_frame(store_url, "measurements", columns=("run_id", "value"), station="st-a")
    assert list(narrow.columns) == ["run_id", "value"]
    assert narrow["value"].dtype == np.float64 and len(narrow) == 9
    with pytest.raises(StoreError, match="no column"):
        load_frame(store_url, "runs", columns=("run_id; DROP TABLE runs",))


def test_summary_is_the_same_on_both_backends(store_url: str, tmp_path: Path) -> None:
    """The summary over a backend equals the summary over an SQLite copy of it."""
    _fill(store_url)
    s = load_summary(store_url, since="2024-05-01", until="2024-05-03", board="PN-100")
    # PN-100 serials SN-1 (PASS), SN-2 (FAIL then PASS), SN-5 (PASS): hand count
    assert (s.overall.serials, s.overall.first_pass_count, s.overall.final_count) == (3, 2, 3)
    assert s.runs_in_range == 4
    first = {m.label: m.values.tolist() for m in s.measurements}
    # one value per serial: its first finished test in range (runs 1, 2, 6 -> k 0, 1, 5)
    assert first["left.m0"] == [0.0, 10.0, 50.0]


def test_live_run_of_another_process_is_never_aborted_and_a_killed_one_is(
    store_url: str,
) -> None:
    """The liveness rule: a run is dead only when its lock is free.  A live station's run
    survives recover_aborted even with a stale heartbeat and a pid that names nobody; once
    the station is SIGKILLed its run is marked aborted, from another process."""
    child = subprocess.Popen(
        [sys.executable, str(WORKER), "hold", store_url, "SN-LIVE", "2"],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        assert child.stdout is not None
        line = child.stdout.readline()
        assert line.startswith("ready"), child.stderr.read() if child.stderr else line
        run_id = int(line.split()[1])
        # as seen from another PID namespace or host: a pid that is no process here
        raw_sql(
            store_url,
            "UPDATE runs SET pid = 999999999, host = 'elsewhere', "
            "heartbeat_at = '2000-01-01T00:00:00.000000+00:00' WHERE run_id = ?",
            (run_id,),
        )
        with open_store(store_url) as store:
            assert store.recover_aborted() == []
            assert store.recover_aborted(stale_after_s=0.0) == []
            assert store.get_run(run_id).status == "running"
            child.kill()
            child.wait(timeout=10)
            assert store.recover_aborted() == [run_id]
            run = store.get_run(run_id)
            assert run.status == "aborted" and "ended without finishing" in (run.reason or "")
            assert len(store.measurements(run_id)) == 2
            assert store.recover_aborted() == []
    finally:
        reap(child)


def test_newer_schema_is_refused_for_reading_and_writing(store_url: str) -> None:
    open_store(store_url).close()
    stamp_newer_schema(store_url, SCHEMA_VERSION + 1)
    for readonly in (False, True):
        with pytest.raises(StoreError, match="made by a newer version") as err:
            open_store(store_url, readonly=readonly)
        assert "upgrade stageproof" in str(err.value)


def test_copy_is_idempotent_by_run_token(store_url: str, tmp_path: Path) -> None:
    """A station file copied into the backend twice: the second copy adds nothing.  A run
    still running is left behind.  Everything of a copied run arrives."""
    station = tmp_path / "station3.db"
    with open_store(station) as store:
        a = store.begin_run(header("SN-C", board_text="board text"))
        store.add_measurement(a, measurement(0))
        store.add_sweep_point(a, SweepPointRow("left", "clip", 0.2, 20.0, 0.1, 0.2, False))
        store.add_record(a, "left", "r", 1e5, {"input": np.arange(4.0)})
        store.finish_run(a, "complete", "FAIL")
        b = store.begin_run(header("SN-C"))
        store.add_measurement(b, measurement(1))
        store.finish_run(b, "complete", "PASS")
        store.begin_run(header("SN-RUNNING"))
        with open_store(store_url) as target:  # the serial was tested on the line before
            t = target.begin_run(header("SN-C"))
            target.finish_run(t, "complete", "FAIL")
        first = copy_runs(station, store_url)
        assert (first.copied, first.skipped, first.running) == (2, 0, 1)
        again = copy_runs(f"sqlite:///{station}", store_url)
        assert (again.copied, again.skipped, again.running) == (0, 2, 1)
    with open_store(store_url, readonly=True) as target:
        runs = sorted(target.list_runs(serial="SN-C"), key=lambda r: r.run_id)
        assert [r.retest for r in runs] == [0, 1, 2]  # renumbered after the line's own run
        copied = runs[1]
        assert copied.board_text == "board text" and copied.verdict == "FAIL"
        assert [m.name for m in target.measurements(copied.run_id)] == ["m0"]
        assert len(target.sweep_points(copied.run_id)) == 1
        np.testing.assert_array_equal(
            target.records(copied.run_id)[0].arrays["input"], np.arange(4.0)
        )
        assert not target.list_runs(serial="SN-RUNNING")
    back = copy_runs(store_url, tmp_path / "back.db")  # and out again, to a new file
    assert (back.copied, back.skipped, back.running) == (3, 0, 0)
    with open_store(tmp_path / "back.db", readonly=True) as again:
        assert sorted(r.retest for r in again.list_runs(serial="SN-C")) == [0, 1, 2]
        assert {r.run_token for r in again.list_runs()} == set(raw_sql_tokens(store_url))


def raw_sql_tokens(url: str) -> list[str]:
    return [t for (t,) in raw_sql(url, "SELECT run_token FROM runs")]


def test_copy_into_the_same_database_is_refused_and_writes_nothing(store_url: str) -> None:
    _fill(store_url)
    before = raw_sql(store_url, "SELECT count(*) FROM runs")
    with pytest.raises(StoreError, match="same database"):
        copy_runs(store_url, store_url)
    assert raw_sql(store_url, "SELECT count(*) FROM runs") == before


def test_diagnosis_reads_the_board_from_the_store(store_url: str, tmp_path: Path) -> None:
    """A run keeps its board file's text: the board report's diagnosis works after the
    file is gone (the stored text is what is read)."""
    from harness.io.board import load_stored_board

    repo = Path(__file__).resolve().parents[2]
    text = (repo / "limits" / "demo-twin-preamp.toml").read_text()
    with open_store(store_url) as store:
        run_id = store.begin_run(header("SN-B", board_text=text, board_file="/gone/board.toml"))
        store.finish_run(run_id, "complete", "PASS")
        run = store.get_run(run_id)
    board = load_stored_board(run.board_text, run.board_file)
    assert board.part_number and board.channels
    with pytest.raises(Exception, match="--board FILE"):
        load_stored_board(None, "/gone/board.toml")


def test_frames_keep_their_types(store_url: str) -> None:
    _fill(store_url)
    runs = load_frame(store_url, "runs")
    assert isinstance(runs["started_at"].dtype, pd.DatetimeTZDtype)
    assert runs["retest"].dtype == np.int64
    assert json.loads(runs["instruments_json"].iloc[0])
