"""Crash and fault behaviour against the simulated bench: SIGKILL mid-sweep leaves a
consistent database, and injected instrument faults never leave the generator on or drive
the board above its safe level."""

from __future__ import annotations

import math
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.errors import StageproofError
from harness.io.fixture import load_fixture
from harness.run.sequence import RunOptions, run_board
from harness.store import open_store
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, REPO, sim_bench

pytestmark = [pytest.mark.wire, pytest.mark.reliability]


def _count(db: Path) -> int:
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1.0)
        try:
            return int(con.execute("SELECT COUNT(*) FROM measurements").fetchone()[0])
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def test_sigkill_mid_sweep_leaves_consistent_db(board, tmp_path):
    """SQLite's own PRAGMA integrity_check after a SIGKILL; the next start marks the run
    aborted; every measurement stored before the kill is still there."""
    db = tmp_path / "r.db"
    with sim_bench(board, tmp_path) as (_bench, station):
        cmd = [
            sys.executable,
            "-m",
            "harness.cli.main",
            "run",
            "--station",
            str(station),
            "--fixture",
            str(FIXTURE_FILE),
            "--board",
            str(BOARD_FILE),
            "--serial",
            "SN-KILL",
            "--db",
            str(db),
            "--settle-wait",
            "0.4",
        ]
        err_file = tmp_path / "stderr.txt"
        with err_file.open("wb") as err:
            proc = subprocess.Popen(
                cmd,
                cwd=REPO,
                stdout=subprocess.DEVNULL,
                stderr=err,
                env={**os.environ, "COLUMNS": "100"},
            )
        try:
            deadline = time.monotonic() + 60
            seen = 0
            while time.monotonic() < deadline and proc.poll() is None:
                seen = _count(db)
                if seen >= 8:  # supply, DC points, nominal: now in the search
                    break
                time.sleep(0.05)
            assert proc.poll() is None, err_file.read_text()
            assert seen >= 8
            proc.send_signal(signal.SIGKILL)
            proc.wait(10)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    con = sqlite3.connect(db)
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        con.close()
    with open_store(db) as store:
        recovered = store.recover_aborted()
        runs = store.list_runs()
        assert [r.run_id for r in runs] == recovered
        assert runs[0].status == "aborted"
        assert len(store.measurements(runs[0].run_id)) >= seen


FAULTS = st.tuples(
    st.sampled_from(["generator", "scope", "supply", "dmm", "switch"]),
    st.sampled_from(["no_reply", "drop_mid_block", "queue_error", "power_cycle"]),
    st.integers(min_value=0, max_value=120),
)


@given(fault=FAULTS)
@settings(
    max_examples=8,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
def test_safety_under_instrument_faults(board, limits, tmp_path_factory, fault):
    """Whatever instrument fails and when: the simulated generator's output ends off and no
    level above the board's safe input level is ever applied (the sim's own log)."""
    from harness.instruments.bench import connect
    from harness.io.station import load_station

    role, kind, after = fault
    tmp = tmp_path_factory.mktemp("fault")
    fixture = load_fixture(FIXTURE_FILE, board, scope_inputs=4)
    opts = RunOptions(settle_wait_s=0.0, extra_frequencies=False)
    with sim_bench(board, tmp, timeout_ms=300) as (bench, station_file):
        value = 0.2 if kind == "power_cycle" else None
        bench.inject(role, kind, after=after, count=1, value=value)
        outcome = "complete"
        with open_store(tmp / "r.db") as store:
            try:
                with connect(load_station(station_file)) as inst:
                    run_board(inst, board, limits, fixture, "SN-F", store, options=opts)
            except StageproofError:
                outcome = "aborted"
            runs = store.list_runs()
        log = bench.generator_log
        max_on = bench.max_commanded_vpp(while_on=True)
    safe_vpp = board.conditions.safe_input_vrms * 2 * math.sqrt(2)
    assert max_on <= safe_vpp * (1 + 1e-6)
    outs = [e for e in log if e.what in ("output", "reset")]
    assert not outs or outs[-1].what == "reset" or outs[-1].value == 0.0
    if runs:
        assert runs[0].status in ("complete", "aborted")
        assert (runs[0].status == "aborted") == (outcome == "aborted")
