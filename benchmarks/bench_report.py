"""Benchmark: summary report over 10,000 stored runs (target: under 1 s), SQLite and PostgreSQL.

Builds a results database through the store's own API in a temporary folder (on /dev/shm
when it exists: the store fsyncs every commit, which on a disk makes building 10,000 runs
take minutes; the summary itself only reads), then times ``write_summary_report``, split
into loading + statistics and HTML rendering, and one board report for comparison.

With ``--postgres`` the same runs are copied (``store copy``) into a throwaway PostgreSQL
cluster (tests/support/pg_cluster.py: Debian's server binaries, 127.0.0.1) and the summary is
timed there too.

    python benchmarks/bench_report.py [--runs 10000] [--keep DIR] [--postgres]
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import numpy as np

from harness.report import (
    load_summary,
    render_summary_html,
    write_board_report,
    write_summary_report,
)
from harness.store import MeasurementRow, RunHeader, open_store

TARGET_S = 1.0
CHANNELS = ("left", "right")
# name: (unit, nominal, spread (1 sigma), low, high) -- invented demo figures
QUANTITIES = {
    "gain": ("dB", 20.0, 0.35, 19.0, 21.0),
    "thd": ("%", 0.05, 0.01, None, 0.1),
    "clip_input": ("V rms", 0.8, 0.04, 0.65, None),
    "phase": ("deg", 180.0, 0.5, 177.0, 183.0),
    "gain@20Hz": ("dB", 19.6, 0.2, None, None),
    "dc.q1.collector_v": ("V", 6.1, 0.12, 5.6, 6.6),
    "dc.q1.emitter_v": ("V", 1.08, 0.03, 0.95, 1.2),
    "dc.q2.emitter_v": ("V", 4.2, 0.08, 3.9, 4.5),
}


def _header(serial: str) -> RunHeader:
    return RunHeader(
        serial=serial,
        part_number="AB-100",
        board_name="demo twin preamp",
        board_file="limits/demo-twin-preamp.toml",
        board_digest="b" * 64,
        limits_json=json.dumps({"provenance": {"method": "monte-carlo", "samples": 2000}}),
        limits_digest="c" * 64,
        station="bench-1",
        fixture="fixture-twin",
        operator="op",
        instruments={
            "generator": "STAGEPROOF-SIM,GEN,1,0.1",
            "scope": "STAGEPROOF-SIM,SCOPE,2,0.1",
        },
    )


def build(db: Path, runs: int, seed: int = 1) -> tuple[int, int]:
    """``runs`` runs, about 8 % of them retests of a failed serial; returns (runs, rows)."""
    rng = np.random.default_rng(seed)
    rows = 0
    failed: list[str] = []
    serial_no = 0
    with open_store(db) as store:
        for _ in range(runs):
            if failed and rng.random() < 0.08:
                serial = failed.pop()
            else:
                serial_no += 1
                serial = f"SN{serial_no:06d}"
            run_id = store.begin_run(_header(serial))
            verdict = "PASS"
            for ch in CHANNELS:
                for name, (unit, nom, sd, low, high) in QUANTITIES.items():
                    v = float(rng.normal(nom, sd))
                    ok = (low is None or v >= low) and (high is None or v <= high)
                    verdict = verdict if ok else "FAIL"
                    store.add_measurement(
                        run_id,
                        MeasurementRow(
                            ch, name, v, unit, low, high, sd / 5, "pass" if ok else "fail", ch
                        ),
                    )
                    rows += 1
            store.add_measurement(
                run_id,
                MeasurementRow(
                    "",
                    "supply_current",
                    float(rng.normal(0.012, 0.0004)),
                    "A",
                    0.010,
                    0.014,
                    1e-4,
                    "pass",
                    "supply",
                ),
            )
            rows += 1
            store.finish_run(run_id, "complete", verdict)
            if verdict == "FAIL":
                failed.append(serial)
    return runs, rows


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10_000)
    ap.add_argument("--keep", type=Path, help="build the database in this folder and keep it")
    ap.add_argument("--postgres", action="store_true", help="time the summary on PostgreSQL too")
    args = ap.parse_args()
    shm = Path("/dev/shm")
    with tempfile.TemporaryDirectory(dir=shm if shm.is_dir() else None) as tmp:
        folder = args.keep or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        db = folder / "bench-results.db"
        if db.exists():
            print(f"using existing {db}")
        else:
            t0 = time.perf_counter()
            n_runs, n_rows = build(db, args.runs)
            print(
                f"built {n_runs} runs, {n_rows} measurements in "
                f"{time.perf_counter() - t0:.1f} s ({db})"
            )
        t0 = time.perf_counter()
        summary = load_summary(db)
        t1 = time.perf_counter()
        html = render_summary_html(summary)
        t2 = time.perf_counter()
        path, _ = write_summary_report(db, folder / "summary.html")
        t3 = time.perf_counter()
        total = t3 - t2
        print(
            f"summary of {summary.runs_in_range} runs, {summary.overall.serials} serials, "
            f"{len(summary.measurements)} measurements, {len(html) / 1e6:.2f} MB HTML"
        )
        print(f"  load + statistics: {t1 - t0:.3f} s")
        print(f"  render HTML:       {t2 - t1:.3f} s")
        print(
            f"  write_summary_report (all of it): {total:.3f} s; target {TARGET_S:.1f} s; "
            f"ratio {total / TARGET_S:.2f} -> {'OK' if total < TARGET_S else 'TOO SLOW'}"
        )
        t4 = time.perf_counter()
        write_board_report(db, folder / "board.html", serial="SN000001")
        print(f"  one board report: {time.perf_counter() - t4:.3f} s")
        print(
            f"first-pass yield {100 * summary.overall.first_pass:.1f} %, "
            f"final {100 * summary.overall.final:.1f} % -> {path}"
        )
        ok = total < TARGET_S
        if args.postgres:
            ok = _postgres(db) and ok
    return 0 if ok else 1


def _postgres(db: Path) -> bool:
    """Copy the SQLite runs into a throwaway cluster and time the summary there."""
    import sys

    from harness.store.copy import copy_runs

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    from tests.support import pg_cluster

    cluster = pg_cluster.start()
    try:
        url = cluster.new_database()
        t0 = time.perf_counter()
        res = copy_runs(db, url)
        print(f"postgresql: copied {res.copied} runs in {time.perf_counter() - t0:.1f} s")
        load_summary(url)  # first query plans and warms the server's cache
        t1 = time.perf_counter()
        summary = load_summary(url)
        took = time.perf_counter() - t1
        print(
            f"postgresql: summary of {summary.runs_in_range} runs {took:.3f} s; target "
            f"{TARGET_S:.1f} s -> {'OK' if took < TARGET_S else 'TOO SLOW'}"
        )
        return took < TARGET_S
    finally:
        cluster.stop()


if __name__ == "__main__":
    raise SystemExit(main())
