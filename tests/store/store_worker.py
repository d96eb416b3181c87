"""A station process for the store tests, run as a separate Python process.

Modes (argv[1]):
  crash DB SERIAL      begin a run, then store measurements (and now and then a sweep point
                       and a raw record) forever, printing the count after each commit
                       returns; the test SIGKILLs it at a random moment.
  hold DB SERIAL N     begin a run, store N measurements, print "ready RUN_ID", wait for a
                       line on stdin, finish the run PASS, print "done".
  load DB WORKER RUNS MEAS  RUNS runs of MEAS measurements each, serials shared with the other
                       workers (retests must come out 0..workers-1), then print "ok".
"""

from __future__ import annotations

import json
import sys

import numpy as np

from harness.store import MeasurementRow, RunHeader, SweepPointRow, open_store

RECORD_LEN = 4096


def header(serial: str, part_number: str = "PN-100", **changes: object) -> RunHeader:
    """A plausible run header for an invented board."""
    fields: dict[str, object] = {
        "serial": serial,
        "part_number": part_number,
        "board_name": "demo-twin-preamp",
        "board_file": "limits/demo-twin-preamp.toml",
        "board_digest": "0" * 64,
        "limits_json": json.dumps(
            {
                "channels": {"left": {"gain_db": [19.0, 20.0, 21.0]}},
                "provenance": {"method": "worst-case", "seed": 7},
            }
        ),
        "limits_digest": "1" * 64,
        "station": "station-1",
        "fixture": "fixture-twin",
        "operator": "tester",
        "instruments": {
            "generator": "stageproof-sim,GEN-1,001,1.0",
            "scope": "stageproof-sim,SCOPE-1,002,2.0",
        },
        "settle_note": "waited 5 coupling time constants after each level step",
    }
    fields.update(changes)
    return RunHeader(**fields)  # type: ignore[arg-type]


def measurement(i: int, channel: str = "left") -> MeasurementRow:
    return MeasurementRow(channel, f"m{i}", float(i), "dB", 0.0, 1e9, 0.01, "pass", "gain")


def crash(db: str, serial: str) -> None:
    with open_store(db) as store:
        run_id = store.begin_run(header(serial))
        print(f"run {run_id}", flush=True)
        i = 0
        while True:
            if i % 5 == 4:
                store.add_sweep_point(
                    run_id, SweepPointRow("left", "clip", 0.01 * i, 20.0, 0.1, 0.2, False)
                )
                data = np.full(RECORD_LEN, i, dtype=np.float32)
                store.add_record(run_id, "left", f"r{i}", 1e5, {"input": data, "output": -data})
            store.add_measurement(run_id, measurement(i))
            i += 1
            print(i, flush=True)


def hold(db: str, serial: str, n: int) -> None:
    with open_store(db) as store:
        run_id = store.begin_run(header(serial))
        for i in range(n):
            store.add_measurement(run_id, measurement(i))
        print(f"ready {run_id}", flush=True)
        sys.stdin.readline()
        store.finish_run(run_id, "complete", "PASS")
        print("done", flush=True)


def load(db: str, worker: int, runs: int, meas: int) -> None:
    with open_store(db) as store:
        for j in range(runs):
            run_id = store.begin_run(header(f"SN-{j:03d}", station=f"station-{worker}"))
            for i in range(meas):
                store.add_measurement(run_id, measurement(i))
            store.finish_run(run_id, "complete", "PASS" if (j + worker) % 3 else "FAIL")
    print("ok", flush=True)


if __name__ == "__main__":
    mode, args = sys.argv[1], sys.argv[2:]
    if mode == "crash":
        crash(args[0], args[1])
    elif mode == "hold":
        hold(args[0], args[1], int(args[2]))
    elif mode == "load":
        load(args[0], int(args[1]), int(args[2]), int(args[3]))
    else:
        raise SystemExit(f"unknown mode {mode!r}")
