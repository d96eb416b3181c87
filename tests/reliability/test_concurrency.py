"""Station processes write one results database at once: 4 on an SQLite file, 8 on a
PostgreSQL server (a throwaway cluster the tests start, tests/support/pg_cluster.py).

Each worker (tests/reliability/concurrent_worker.py, a subprocess with its own SimBench)
makes real runs through harness.run.sequence.run_board and store-level runs with the
sequence's write pattern (begin, one committed row at a time, finish), half of them on
serials every worker shares.  Afterwards, read with the backend's own driver (sqlite3,
psycopg; for SQLite PRAGMA integrity_check is ok, sqlite.org/pragma.html), every run each
worker reported is there, complete, with
exactly the rows it wrote; no run is left 'running'; and per serial the retest numbers are
0, 1, ..., n-1 (a unique (serial, part number, retest) index refuses a second run with one
number; the station that loses the race takes the next).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.reliability.rig import REPO, integrity, scaled
from tests.support.db import is_pg, raw_sql

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

#: README figures: concurrent writers and runs per writer, per backend.
PLANS = {
    "sqlite": (4, scaled(3, 20), scaled(60, 600)),
    "postgresql": (8, scaled(1, 10), scaled(20, 300)),
}


@pytest.mark.parametrize("backend", list(PLANS))
def test_writers_share_one_database(
    backend: str, tmp_path: Path, request: pytest.FixtureRequest
) -> None:
    writers, real_runs, store_runs = PLANS[backend]
    runs_total = writers * (real_runs + store_runs)
    db = str(tmp_path / "shared.db") if backend == "sqlite" else request.getfixturevalue("pg_url")
    procs = [
        subprocess.Popen(
            [
                sys.executable,
                "-m",
                "tests.reliability.concurrent_worker",
                str(db),
                str(tmp_path / f"w{w}"),
                str(w),
                str(real_runs),
                str(store_runs),
            ],
            cwd=REPO,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for w in range(writers)
    ]
    reports = []
    for p in procs:
        out, err = p.communicate(timeout=600)
        assert p.returncode == 0, err[-3000:]
        reports.append(json.loads(out.strip().splitlines()[-1]))
    written = [r for rep in reports for r in rep["runs"]]
    assert len(written) == runs_total

    if not is_pg(db):
        assert integrity(Path(db)) == "ok"
    runs = {
        r[0]: r[1:]
        for r in raw_sql(
            db, "SELECT run_id, serial, status, verdict, retest FROM runs ORDER BY run_id"
        )
    }
    meas = dict(raw_sql(db, "SELECT run_id, count(*) FROM measurements GROUP BY run_id"))
    sweep = dict(raw_sql(db, "SELECT run_id, count(*) FROM sweep_points GROUP BY run_id"))
    assert len(runs) == runs_total
    assert len({w["run_id"] for w in written}) == runs_total
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
        assert sorted(retests) == list(range(len(retests))), (serial, retests)
    shared = [s for s in by_serial if s.startswith("SN-SHARED")]
    assert max(len(by_serial[s]) for s in shared) >= writers  # contention really happened
    print(
        f"\n{writers} writers, {runs_total} runs ({writers * real_runs} real), "
        f"{sum(meas.values())} measurements, {len(shared)} shared serials"
    )
