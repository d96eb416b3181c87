"""Crash recovery and several processes on one file.

A child process begins a run and stores measurements, printing the count after each
commit returns; it is SIGKILLed at a random moment, ten times.  Afterwards SQLite's own
``PRAGMA integrity_check`` must answer "ok" (sqlite.org/pragma.html#pragma_integrity_check),
every reported measurement must be there, and recover_aborted must mark those runs aborted.
Owner liveness reads /proc/<pid>/stat field 22, starttime (proc(5), Linux man-pages).
"""

from __future__ import annotations

import os
import random
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from store_worker import RECORD_LEN, header, measurement

from harness.store import open_store
from harness.store.owner import Owner, owner_alive, start_token
from tests.support.db import is_pg, reap

WORKER = Path(__file__).with_name("store_worker.py")
needs_proc = pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs /proc")


def _spawn(*args: str) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, str(WORKER), *args],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def test_sigkill_mid_write_loses_nothing_and_is_recovered(store_url: str) -> None:
    """On SQLite and on PostgreSQL: the killed station's lock goes with it (flock(2); the
    server ends the session and its advisory locks), so its run is found aborted."""
    db = store_url
    rng = random.Random(20240501)
    kills: list[tuple[int | None, int]] = []  # (run id, commits the child reported)
    for k in range(10):
        child = _spawn("crash", db, "SN-CRASH")
        assert child.stdout is not None
        run_id: int | None = None
        reported = 0
        if k in (3, 7):  # kill while it starts: importing, opening, creating, beginning
            time.sleep(rng.uniform(0.0, 0.25))
        else:
            line = child.stdout.readline()
            assert line.startswith("run "), child.stderr.read() if child.stderr else line
            run_id = int(line.split()[1])
            for _ in range(rng.randint(1, 25)):
                reported = int(child.stdout.readline())
            time.sleep(rng.uniform(0.0, 0.004))  # land inside a later transaction
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=10)
        assert child.returncode == -signal.SIGKILL
        for line in child.stdout.read().splitlines():  # printed before the kill, unread
            if line.startswith("run "):
                run_id = int(line.split()[1])
            elif line.strip():
                reported = int(line)
        child.stdout.close()
        assert child.stderr is not None
        child.stderr.close()
        if child.stdin:
            child.stdin.close()
        kills.append((run_id, reported))

    if not is_pg(db):
        conn = sqlite3.connect(db)
        try:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        finally:
            conn.close()

    with open_store(db) as store:
        running = {r.run_id for r in store.list_runs(status="running")}
        known = {rid for rid, _ in kills if rid is not None}
        assert known <= running
        assert sorted(store.recover_aborted()) == sorted(running)
        assert store.recover_aborted() == []  # idempotent
        for run_id, reported in kills:
            if run_id is None:
                continue
            run = store.get_run(run_id)
            assert run.status == "aborted" and run.verdict is None
            assert "ended without finishing" in (run.reason or "")
            values = [m.value for m in store.measurements(run_id)]
            # the kill may land after a commit and before its print: one more, never fewer
            assert len(values) in (reported, reported + 1)
            assert values == [float(i) for i in range(len(values))]  # no gaps
            for rec in store.records(run_id):
                i = int(rec.label[1:])
                np.testing.assert_array_equal(rec.arrays["input"], np.full(RECORD_LEN, i))
                np.testing.assert_array_equal(rec.arrays["output"], -np.full(RECORD_LEN, i))
        runs = store.list_runs(serial="SN-CRASH")
        assert sorted(r.retest for r in runs) == list(range(len(runs)))

        new = store.begin_run(header("SN-CRASH"))
        store.add_measurement(new, measurement(0))
        store.finish_run(new, "complete", "PASS")
        assert store.get_run(new).retest == len(runs)
        assert store.get_run(new).status == "complete"


@needs_proc
def test_live_process_run_is_not_marked_aborted(tmp_path: Path) -> None:
    db = tmp_path / "live.db"
    child = _spawn("hold", str(db), "SN-LIVE", "3")
    try:
        assert child.stdout is not None and child.stdin is not None
        line = child.stdout.readline()
        assert line.startswith("ready "), line
        run_id = int(line.split()[1])
        with open_store(db) as store:
            mine = store.begin_run(header("SN-MINE"))  # this process: alive too
            assert store.recover_aborted() == []
            assert store.recover_aborted(stale_after_s=0.0) == []  # alive beats stale
            assert store.get_run(run_id).status == "running"
            assert store.get_run(mine).status == "running"
            child.stdin.write("\n")
            child.stdin.flush()
            assert child.stdout.readline().strip() == "done"
            assert child.wait(timeout=10) == 0
            run = store.get_run(run_id)
            assert (run.status, run.verdict, len(store.measurements(run_id))) == (
                "complete",
                "PASS",
                3,
            )
    finally:
        reap(child)


@needs_proc
def test_reused_pid_and_foreign_host(tmp_path: Path) -> None:
    """Runs written by schema version 1 (no run lock, token 'v1:...') keep the pid rule: a
    live pid with another start token is not the owner (pid reuse after a reboot); a run
    owned on another host is left alone unless its heartbeat is stale."""
    db = tmp_path / "owner.db"
    with open_store(db) as store:
        reused = store.begin_run(header("SN-R"))
        foreign = store.begin_run(header("SN-F"))
        raw = sqlite3.connect(db)
        try:
            raw.execute("UPDATE runs SET run_token = 'v1:' || run_id")
            raw.execute("UPDATE runs SET start_token = 'boot:1' WHERE run_id = ?", (reused,))
            raw.execute("UPDATE runs SET host = 'station-elsewhere' WHERE run_id = ?", (foreign,))
            raw.commit()
        finally:
            raw.close()
        assert store.recover_aborted() == [reused]
        assert store.get_run(foreign).status == "running"
        assert store.recover_aborted(stale_after_s=3600.0) == []
        assert store.recover_aborted(stale_after_s=0.0) == [foreign]
        assert "silent since" in (store.get_run(foreign).reason or "")


@needs_proc
def test_owner_alive_reads_proc_start_time() -> None:
    """proc(5): a pid's starttime (field 22) is fixed for the life of the process."""
    me = os.getpid()
    token = start_token(me)
    assert token is not None and token == start_token(me)
    host = socket.gethostname()
    assert owner_alive(Owner(host, me, token)) is True
    assert owner_alive(Owner(host, me, token + "0")) is False
    assert owner_alive(Owner("another-host", me, token)) is None
    done = subprocess.run(
        [sys.executable, "-c", "import os; print(os.getpid())"],
        capture_output=True,
        text=True,
        check=True,
    )
    assert owner_alive(Owner(host, int(done.stdout), "x:1")) is False


def test_four_processes_share_one_file(tmp_path: Path) -> None:
    """4 processes x 25 runs x 10 measurements, at once: every row present, and retest
    numbers of a serial tested by all four are exactly 0..3 (counted inside the same
    IMMEDIATE transaction as the insert).  No process creates the file beforehand: the
    four race to create the schema, as stations starting together on a new line would."""
    db = tmp_path / "shared.db"
    workers = [_spawn("load", str(db), str(w), "25", "10") for w in range(4)]
    for w in workers:
        out, err = w.communicate(timeout=120)
        assert w.returncode == 0, err
        assert out.strip() == "ok"
    with open_store(db) as store:
        runs = store.list_runs()
        assert len(runs) == 100
        assert all(r.status == "complete" for r in runs)
        for r in runs:
            assert [m.value for m in store.measurements(r.run_id)] == [float(i) for i in range(10)]
        by_serial: dict[str, list[int]] = {}
        for r in runs:
            by_serial.setdefault(r.serial, []).append(r.retest)
        assert len(by_serial) == 25
        assert all(sorted(v) == [0, 1, 2, 3] for v in by_serial.values())
        assert {r.station for r in runs} == {f"station-{w}" for w in range(4)}


def test_eight_stations_on_one_postgresql_server(pg_url: str) -> None:
    """8 station processes x 12 runs x 8 measurements at once on one server, every serial
    tested by all eight: every run and row present, no run left running, and per serial
    the retest numbers exactly 0..7 (the unique (serial, part, retest) index settles each
    race; the loser takes the next number).  The eight race to create the schema too."""
    workers = [_spawn("load", pg_url, str(w), "12", "8") for w in range(8)]
    for w in workers:
        out, err = w.communicate(timeout=300)
        assert w.returncode == 0, err[-2000:]
        assert out.strip() == "ok"
    with open_store(pg_url, readonly=True) as store:
        runs = store.list_runs()
        assert len(runs) == 96
        assert not [r for r in runs if r.status != "complete"]
        for r in runs:
            assert [m.value for m in store.measurements(r.run_id)] == [float(i) for i in range(8)]
        by_serial: dict[str, list[int]] = {}
        for r in runs:
            by_serial.setdefault(r.serial, []).append(r.retest)
        assert len(by_serial) == 12
        assert all(sorted(v) == list(range(8)) for v in by_serial.values())
        assert {r.station for r in runs} == {f"station-{w}" for w in range(8)}


def test_two_stations_killed_and_restarted_at_random(pg_url: str) -> None:
    """Two stations test one serial on one server and are SIGKILLed and restarted at
    random, five times: nothing reported stored is lost, retest numbers stay 0..n-1,
    and every killed run is found aborted by the next station."""
    rng = random.Random(20240502)
    reported: dict[int, int] = {}
    for _ in range(5):
        kids = [_spawn("crash", pg_url, "SN-TWO") for _ in range(2)]
        first: list[str] = []
        for child in kids:  # both writing (a kill during start-up is the test above)
            assert child.stdout is not None
            first.append(child.stdout.readline())
        time.sleep(rng.uniform(0.0, 0.3))
        for child in kids:
            child.send_signal(signal.SIGKILL)
        for child, head in zip(kids, first, strict=True):
            child.wait(timeout=10)
            assert child.stdout is not None and child.stderr is not None
            run_id, count = None, 0
            for line in [head, *child.stdout.read().splitlines()]:
                if line.startswith("run "):
                    run_id = int(line.split()[1])
                elif line.strip():
                    count = int(line)
            if run_id is not None:
                reported[run_id] = count
            for s in (child.stdin, child.stdout, child.stderr):
                if s:
                    s.close()
        with open_store(pg_url) as store:  # the next station starts: recovers first
            store.recover_aborted()
    assert reported
    with open_store(pg_url, readonly=True) as store:
        runs = store.list_runs(serial="SN-TWO")
        assert sorted(r.retest for r in runs) == list(range(len(runs)))
        assert all(r.status == "aborted" for r in runs)
        for run_id, count in reported.items():
            values = [m.value for m in store.measurements(run_id)]
            assert len(values) in (count, count + 1)
            assert values == [float(i) for i in range(len(values))]
