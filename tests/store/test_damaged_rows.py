"""A results database edited outside stageproof: every command that meets the damaged row
ends in one line naming the run and the column, exit status 2 — never a traceback, never
the damaged value shown as if it were right.

The damage is made with the sqlite3 module the way a hand edit would: SQLite keeps a text
value in an INTEGER column as text (SQLite documentation, "Datatypes In SQLite", 3.4
column affinity), so ``pid = 'abc'`` is accepted by the database itself.
"""

from __future__ import annotations

import json
import sqlite3

import pytest
from store_worker import header, measurement

from harness.cli.main import main
from harness.errors import StoreError
from harness.store import SweepPointRow, open_store

DAMAGE = {
    "instruments_json": "UPDATE runs SET instruments_json = '{bad' WHERE run_id = ?",
    "limits_json": "UPDATE runs SET limits_json = '{bad' WHERE run_id = ?",
    "limits_provenance": "UPDATE runs SET limits_provenance = '{bad' WHERE run_id = ?",
    "pid": "UPDATE runs SET pid = 'abc' WHERE run_id = ?",
    "retest": "UPDATE runs SET retest = 'x' WHERE run_id = ?",
    "detail_json": "UPDATE measurements SET detail_json = '[1,' WHERE run_id = ?",
    "started_at": "UPDATE runs SET started_at = 'yesterday' WHERE run_id = ?",
}


def _damaged_db(tmp_path, what: str, *, running: bool = False):
    db = tmp_path / "r.db"
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-DMG-1"))
        store.add_measurement(run_id, measurement(1))
        store.add_sweep_point(run_id, SweepPointRow("left", "clip", 0.1, 20.0, 0.1, 0.2, False))
        if not running:
            store.finish_run(run_id, "complete", "PASS")
    conn = sqlite3.connect(db)
    with conn:
        conn.execute(DAMAGE[what], (run_id,))
    conn.close()
    return db, run_id


def _one_line(capsys, argv) -> str:
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("stageproof: error:") and err.count("\n") == 1, err
    return err


@pytest.mark.parametrize(
    ("what", "argv"),
    [
        ("instruments_json", ["results"]),
        ("instruments_json", ["diagnose", "SN-DMG-1"]),
        ("limits_json", ["results", "--run", "1", "--json"]),
        ("limits_provenance", ["report", "board", "--run", "1"]),
        ("pid", ["results"]),
        ("retest", ["results", "--serial", "SN-DMG-1"]),
        ("detail_json", ["results", "--run", "1"]),
        # the summary reads only the columns it uses (pid is not one); the export reads all
        ("pid", ["report", "export", "--format", "csv", "-o", "out"]),
        ("started_at", ["report", "summary"]),
    ],
)
def test_damaged_row_one_line(tmp_path, capsys, monkeypatch, what, argv):
    monkeypatch.chdir(tmp_path)
    db, run_id = _damaged_db(tmp_path, what)
    err = _one_line(capsys, [*argv, "--db", str(db)])
    assert f"run {run_id}" in err and what in err, err


def test_damaged_pid_of_a_running_run(tmp_path):
    """Start-up recovery of abandoned runs meets a pid that is not a number."""
    db, run_id = _damaged_db(tmp_path, "pid", running=True)
    with open_store(db) as store, pytest.raises(StoreError, match=f"run {run_id}.*pid"):
        store.recover_aborted()


def test_sound_rows_still_read(tmp_path, capsys):
    db = tmp_path / "ok.db"
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-OK-1"))
        store.add_measurement(run_id, measurement(1))
        store.finish_run(run_id, "complete", "PASS")
    assert main(["results", "--db", str(db), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)[0]["serial"] == "SN-OK-1"
