"""One station process of the concurrency test: real runs and store-level runs on one db.

``python -m tests.reliability.concurrent_worker DB FOLDER WORKER N_REAL N_STORE`` prints one
JSON line: every run it wrote with its serial and the number of measurements and sweep
points it stored, for the parent to check against the database.
"""

from __future__ import annotations

import json
import random
import sys
from pathlib import Path

#: Serials every worker tests, so retest numbers are counted under contention.
SHARED_SERIALS = tuple(f"SN-SHARED-{j:02d}" for j in range(8))


def _header(serial: str, worker: int) -> object:
    from harness.store import RunHeader

    return RunHeader(
        serial=serial,
        part_number="AB-DP1-REL",
        board_name="reliability rig",
        board_file="rel-board.toml",
        board_digest="0" * 64,
        limits_json="{}",
        limits_digest="0" * 64,
        station=f"station-{worker}",
        fixture="rel-fixture",
        operator="concurrency",
        instruments={"generator": "sim"},
        software_version="test",
        settle_note="none",
    )


def main(argv: list[str]) -> int:
    from harness.io.board import load_board
    from harness.io.fixture import load_fixture
    from harness.io.station import load_station
    from harness.model import compute_limits
    from harness.run.safety import safe_station
    from harness.run.sequence import RunOptions, run_board
    from harness.store import MeasurementRow, SweepPointRow, open_store
    from tests.reliability.rig import started_bench, write_rig

    db, folder, worker, n_real, n_store = (
        argv[0],
        Path(argv[1]),
        int(argv[2]),
        int(argv[3]),
        int(argv[4]),
    )
    rng = random.Random(1000 + worker)
    written: list[dict] = []
    files = write_rig(folder)
    board = load_board(files.board)
    limits = compute_limits(board)
    fixture = load_fixture(files.fixture, board, scope_inputs=4)
    with started_bench(board, folder) as (_bench, station_file), open_store(db) as store:
        store.recover_aborted()
        with safe_station(load_station(station_file)) as inst:
            for i in range(n_real):
                serial = SHARED_SERIALS[i % len(SHARED_SERIALS)] if i % 2 else f"SN-W{worker}-R{i}"
                res = run_board(
                    inst,
                    board,
                    limits,
                    fixture,
                    serial,
                    store,
                    options=RunOptions(settle_wait_s=0.0),
                )
                written.append(
                    {
                        "run_id": res.run_id,
                        "serial": serial,
                        "measurements": len(res.measurements),
                        "sweep": len(store.sweep_points(res.run_id)),
                        "real": True,
                    }
                )
        for i in range(n_store):
            serial = rng.choice(SHARED_SERIALS) if rng.random() < 0.5 else f"SN-W{worker}-S{i}"
            run_id = store.begin_run(_header(serial, worker))
            n_m = rng.randint(3, 12)
            n_s = rng.randint(0, 6)
            for k in range(max(n_m, n_s)):
                if k < n_m:
                    store.add_measurement(
                        run_id,
                        MeasurementRow(
                            channel="A",
                            name=f"m{k}",
                            value=rng.random(),
                            unit="V",
                            low=0.0,
                            high=1.0,
                            uncertainty=0.01,
                            decision="pass",
                            step="nominal",
                        ),
                    )
                if k < n_s:
                    store.add_sweep_point(
                        run_id,
                        SweepPointRow(
                            channel="A",
                            sweep="clip",
                            level_vrms=0.1 * (k + 1),
                            gain_db=20.0,
                            thd_percent=0.1,
                            thdn_percent=0.2,
                            clipped=False,
                            clip_side=None,
                        ),
                    )
            store.finish_run(run_id, "complete", "PASS")
            written.append(
                {
                    "run_id": run_id,
                    "serial": serial,
                    "measurements": n_m,
                    "sweep": n_s,
                    "real": False,
                }
            )
    print(json.dumps({"worker": worker, "runs": written}))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
