"""Benchmark: 8 stations writing one results database at once, SQLite and PostgreSQL.

Each station is a process of its own that begins runs and stores measurements one
committed transaction at a time (the sequencer's pattern), timing every
``add_measurement`` call.  Printed per backend: measurement writes per second over all
stations and the p50/p99 latency of one write.  SQLite is a file on the working disk
(every commit fsynced, synchronous=FULL); PostgreSQL is a throwaway cluster with the
server's default durability (fsync on), from tests/support/pg_cluster.py, on 127.0.0.1.

    python benchmarks/bench_store_writers.py [--stations 8] [--writes 300] [--only sqlite]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent


def station(url: str, worker: int, writes: int) -> None:
    """One station: runs of 20 measurements until ``writes`` are stored; prints latencies."""
    from harness.store import MeasurementRow, RunHeader, open_store

    lat: list[float] = []
    with open_store(url) as store:
        while len(lat) < writes:
            run_id = store.begin_run(
                RunHeader(
                    serial=f"SN-{len(lat) // 20:05d}",
                    part_number="PN-BENCH",
                    board_name="bench board",
                    board_file="bench.toml",
                    board_digest="",
                    limits_json="{}",
                    limits_digest="",
                    station=f"station-{worker}",
                    fixture="fx",
                    operator="bench",
                )
            )
            for i in range(20):
                m = MeasurementRow("left", f"m{i}", 1.0 * i, "dB", 0.0, 100.0, 0.1, "pass", "s")
                t0 = time.perf_counter()
                store.add_measurement(run_id, m)
                lat.append(time.perf_counter() - t0)
            store.finish_run(run_id, "complete", "PASS")
    print(json.dumps(lat))


def run_backend(name: str, url: str, stations: int, writes: int) -> None:
    from harness.store import open_store

    open_store(url).close()  # schema created before the clock starts
    t0 = time.perf_counter()
    procs = [
        subprocess.Popen(
            [sys.executable, __file__, "--station", url, str(w), str(writes)],
            stdout=subprocess.PIPE,
            text=True,
            cwd=REPO,
        )
        for w in range(stations)
    ]
    lat: list[float] = []
    for p in procs:
        out, _ = p.communicate(timeout=1800)
        if p.returncode != 0:
            raise SystemExit(f"{name}: a station failed (exit {p.returncode})")
        lat.extend(json.loads(out))
    wall = time.perf_counter() - t0
    a = np.asarray(lat) * 1e3
    print(
        f"{name}: {stations} stations, {a.size} measurement writes in {wall:.1f} s -> "
        f"{a.size / wall:.0f} writes/s; latency p50 {np.percentile(a, 50):.1f} ms, "
        f"p99 {np.percentile(a, 99):.1f} ms, max {a.max():.1f} ms"
    )


def main() -> int:
    if len(sys.argv) > 1 and sys.argv[1] == "--station":
        station(sys.argv[2], int(sys.argv[3]), int(sys.argv[4]))
        return 0
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--stations", type=int, default=8)
    ap.add_argument("--writes", type=int, default=300, help="measurements per station")
    ap.add_argument("--only", choices=("sqlite", "postgresql"))
    args = ap.parse_args()
    if args.only != "postgresql":
        with tempfile.TemporaryDirectory(dir=REPO) as tmp:  # the working disk, not tmpfs
            run_backend("sqlite", str(Path(tmp) / "bench.db"), args.stations, args.writes)
    if args.only != "sqlite":
        sys.path.insert(0, str(REPO))
        from tests.support import pg_cluster

        cluster = pg_cluster.start(durable=True)
        try:
            run_backend("postgresql", cluster.new_database(), args.stations, args.writes)
        finally:
            cluster.stop()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
