"""Schema versions, migration with a backup, read-only opening, liveness across PID
namespaces.

References: SQLite's ``PRAGMA user_version`` (sqlite.org/pragma.html#pragma_user_version),
the backup API (sqlite.org/backup.html, Python's ``sqlite3.Connection.backup``), URI
``mode=ro`` / ``immutable=1`` (sqlite.org/uri.html); flock(2) locks belong to the open
file and are released when the process ends; pid_namespaces(7): pids inside a new PID
namespace start again at 1, so a pid seen from outside names another process.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from store_worker import header, measurement

from harness.errors import StoreError
from harness.store import SCHEMA_VERSION, open_store
from harness.store.schema import SQLITE, migration_statements
from tests.support.db import reap

REPO = Path(__file__).resolve().parents[2]
WORKER = Path(__file__).with_name("store_worker.py")

_V1_RUN = (
    "INSERT INTO runs (serial, part_number, board_name, board_file, board_digest, limits_json, "
    "limits_digest, station, fixture, operator, instruments_json, software_version, "
    "settle_note, status, verdict, retest, started_at, ended_at, heartbeat_at, host, pid) "
    "VALUES (?, 'PN-100', 'old board', 'limits/demo-twin-preamp.toml', '', '{}', '', 'st-old',"
    " 'fx', 'op', '{}', '0.0.9', '', 'complete', 'PASS', ?, ?, ?, ?, 'host-old', 4242)"
)


def _v1_database(path: Path, retests: tuple[int, ...] = (0, 1)) -> None:
    """A database as schema version 1 wrote it (the version-1 DDL, user_version 1)."""
    conn = sqlite3.connect(path)
    try:
        for statement in migration_statements(1, SQLITE):
            conn.execute(statement)
        for k, retest in enumerate(retests):
            when = f"2024-04-0{k + 1}T10:00:00.000000+00:00"
            conn.execute(_V1_RUN, ("SN-OLD", retest, when, when, when))
            conn.execute(
                "INSERT INTO measurements (run_id, channel, name, value, unit, low, high, "
                "uncertainty, decision, step, measured_at) VALUES (?, 'left', 'gain', 20.0, "
                "'dB', 19.0, 21.0, 0.1, 'pass', 'gain', ?)",
                (k + 1, when),
            )
        conn.execute("PRAGMA user_version = 1")
        conn.commit()
    finally:
        conn.close()


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_version_1_is_migrated_after_a_backup(tmp_path: Path) -> None:
    db = tmp_path / "old.db"
    _v1_database(db)
    with open_store(db) as store:
        old = store.list_runs(serial="SN-OLD")
        assert [r.retest for r in sorted(old, key=lambda r: r.run_id)] == [0, 1]
        assert all(
            r.board_text is None and r.run_token.startswith("v1:host-old:4242:") for r in old
        )
        new = store.begin_run(header("SN-OLD"))
        assert store.get_run(new).retest == 2
    backup = tmp_path / "old.db.schema-v1.bak"
    conn = sqlite3.connect(backup)
    try:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == 1
        assert conn.execute("SELECT count(*) FROM runs").fetchone()[0] == 2
    finally:
        conn.close()
    conn = sqlite3.connect(db)
    try:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    finally:
        conn.close()


def test_a_failed_migration_leaves_version_1_untouched(tmp_path: Path) -> None:
    """Two runs with one retest number (a hand edit) break the new unique index: the
    migration's one transaction rolls back and the file stays at version 1."""
    db = tmp_path / "bad.db"
    _v1_database(db, retests=(0, 0))
    with pytest.raises(StoreError, match="UNIQUE"):
        open_store(db)
    conn = sqlite3.connect(db)
    try:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == 1
        cols = [r[1] for r in conn.execute("PRAGMA table_info(runs)")]
        assert "run_token" not in cols
    finally:
        conn.close()


def test_version_1_reads_read_only_without_a_write(tmp_path: Path) -> None:
    """Listing never migrates: an old station file is read as it is, tokens derived the
    same way the migration derives them."""
    db = tmp_path / "old.db"
    _v1_database(db)
    before = _digest(db)
    with open_store(db, readonly=True) as store:
        runs = store.list_runs()
        assert len(runs) == 2 and runs[0].board_text is None
        tokens = {r.run_token for r in runs}
    assert _digest(db) == before
    with open_store(db) as store:  # migrated: the same tokens
        assert {r.run_token for r in store.list_runs()} == tokens


def _can_unshare(*flags: str) -> bool:
    if shutil.which("unshare") is None:
        return False
    probe = subprocess.run(
        ["unshare", *flags, "true"], capture_output=True, timeout=10, check=False
    )
    return probe.returncode == 0


@pytest.mark.skipif(not _can_unshare("-m"), reason="needs unshare -m (root) for a ro mount")
def test_results_on_a_read_only_database(tmp_path: Path) -> None:
    """`stageproof results` on a database in a read-only mount (no -shm can be made)."""
    folder = tmp_path / "ro"
    folder.mkdir()
    db = folder / "r.db"
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-RO"))
        store.add_measurement(run_id, measurement(0))
        store.finish_run(run_id, "complete", "PASS")
    for extra in folder.glob("r.db-*"):
        extra.unlink()
    script = (
        f"mount --bind -o ro {folder} {folder} && "
        f"{sys.executable} -m harness.cli.main results --db {db} --json"
    )
    done = subprocess.run(
        ["unshare", "-m", "sh", "-c", script],
        capture_output=True,
        text=True,
        cwd=REPO,
        env={**os.environ, "PYTHONPATH": str(REPO)},
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert '"SN-RO"' in done.stdout


@pytest.mark.skipif(not _can_unshare("-p", "-f", "--mount-proc"), reason="needs unshare -p (root)")
def test_live_run_in_another_pid_namespace_is_not_aborted(tmp_path: Path) -> None:
    """A station in its own PID namespace (a container with the host's name) stores pid
    1; outside, pid 1 is another process.  Its run must stay running while it lives."""
    db = tmp_path / "ns.db"
    open_store(db).close()
    child = subprocess.Popen(
        [
            "unshare",
            "-p",
            "-f",
            "--mount-proc",
            sys.executable,
            str(WORKER),
            "hold",
            str(db),
            "SN-NS",
            "2",
        ],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=REPO,
    )
    try:
        assert child.stdout is not None and child.stdin is not None
        line = child.stdout.readline()
        assert line.startswith("ready"), child.stderr.read() if child.stderr else line
        run_id = int(line.split()[1])
        with open_store(db) as store:
            assert store.get_run(run_id).pid == 1  # the namespace's own numbering
            assert store.recover_aborted() == []
            assert store.get_run(run_id).status == "running"
            child.stdin.write("\n")
            child.stdin.flush()
            assert child.stdout.readline().strip() == "done"
            assert store.get_run(run_id).status == "complete"
    finally:
        reap(child)


def test_an_old_station_file_copies_once_and_stays_old(tmp_path: Path) -> None:
    """store copy reads a version-1 file as it is (never migrating the source) and the
    derived tokens make a second copy add nothing."""
    from harness.store.copy import copy_runs

    old = tmp_path / "old.db"
    _v1_database(old)
    before = _digest(old)
    first = copy_runs(old, tmp_path / "line.db")
    again = copy_runs(old, tmp_path / "line.db")
    assert (first.copied, again.copied, again.skipped) == (2, 0, 2)
    assert _digest(old) == before
