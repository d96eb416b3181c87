"""Four station processes write one SQLite results file at once.

Each worker (tests/reliability/concurrent_worker.py, a subprocess with its own SimBench)
makes real runs through harness.run.sequence.run_board and store-level runs with the
sequence's write pattern (begin, one committed row at a time, finish), half of them on
serials every worker shares.  Afterwards, read with plain sqlite3: PRAGMA integrity_check
is ok (sqlite.org/pragma.html), every run each worker reported is there, complete, with
exactly the rows it wrote; no run is left 'running'; and per serial the retest numbers are
0, 1, ..., n-1 in run order (each begin_run counts earlier runs inside its own write
transaction, so two stations can never give one board the same number).
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from tests.reliability.rig import REPO, integrity, scaled

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

#: README figures: concurrent writers and runs per writer.
WRITERS = 4
REAL_RUNS = scaled(3, 20)
STORE_RUNS = scaled(60, 600)
RUNS_TOTAL = WRITERS * (REAL_RUNS + STORE_RUNS)


def test_four_writers_one_database(tmp_path: Path) -> None:
    db = tmp_path / "shared.db"
    procs = [
        subprocess.Popen(
            [
                sys.executable,
                "-m",
                "tests.reliability.concurrent_worker",
                str(db),
                str(tmp_path / f"w{w}"),
                str(w),
                str(REAL_RUNS),
                str(STORE_RUNS),
            ],
            cwd=REPO,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for w in range(WRITERS)
    ]
    reports = []
    for p in procs:
        out, err = p.communicate(timeout=600)
        assert p.returncode == 0, err[-3000:]
        reports.append(json.loads(out.strip().splitlines()[-1]))
    written = [r for rep in reports for r in rep["runs"]]
    assert len(written) == RUNS_TOTAL

    assert integrity(db) == "ok"
    conn = sqlite3.connect(db)
    try:
        runs = {
            r[0]: r[1:]
            for r in conn.execute(
                "SELECT run_id, serial, status, verdict, retest FROM runs ORDER BY run_id"
            )
        }
        meas = dict(conn.execute("SELECT run_id, count(*) FROM measurements GROUP BY run_id"))
        sweep = dict(conn.execute("SELECT run_id, count(*) FROM sweep_points GROUP BY run_id"))
    finally:
        conn.close()
    assert len(runs) == RUNS_TOTAL
    assert len({w["run_id"] for w in written}) == RUNS_TOTAL
    for w in written:
        serial, status, verdict, _retest = runs[w["run_id"]]
        assert serial == w["serial"]
        assert status == "complete" and verdict in ("PASS", "FAIL"), (w, status)
        assert meas.get(w["run_id"], 0) == w["measurements"], w
        assert sweep.get(w["run_id"], 0) == w["sweep"], w
    assert not [r for r in runs.values() if r[1] == "running"]
    by_serial: dict[str, list[int]] = {}
    for _run_id, (serial, _s, _v, retest) in sorted(runs.items()):
        by_serial.setdefault(serial, []).append(retest)
    for serial, retests in by_serial.items():
        assert retests == list(range(len(retests))), (serial, retests)
    shared = [s for s in by_serial if s.startswith("SN-SHARED")]
    assert max(len(by_serial[s]) for s in shared) >= WRITERS  # contention really happened
    print(
        f"\n{WRITERS} writers, {RUNS_TOTAL} runs ({WRITERS * REAL_RUNS} real), "
        f"{sum(meas.values())} measurements, {len(shared)} shared serials"
    )
