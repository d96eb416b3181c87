"""Test time of a board with ordinary audio coupling capacitors, and its threshold.

Runs the invented audio demo board (limits/demo-audio-ce.toml: two channels, each a
common-emitter stage with 10 µF in and 100 µF out into 100 kΩ) and the twin preamp demo
board on the simulated bench with latencies on (SimBench(latency=True): the board settles
after every change in real time too), with default run settings, and prints for each:

- test time per board, the part spent waiting for settling, and acquisitions;
- the clipping threshold per channel against the same board in its periodic steady state
  (a settled reference run, settling off), in dB.

Targets (audio board): under 60 s per board; threshold within 0.1 dB of the settled one.

    python benchmarks/bench_settling.py
"""

from __future__ import annotations

import math
import tempfile
import time
from pathlib import Path

from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.model import compute_limits
from harness.run.safety import safe_station
from harness.run.sequence import RunOptions, run_board
from harness.sim.bench import SimBench
from harness.store import open_store

REPO = Path(__file__).resolve().parent.parent
BOARDS = (REPO / "limits" / "demo-audio-ce.toml", REPO / "limits" / "demo-twin-preamp.toml")


def one_run(board, limits, work: Path, *, latency: bool, settling: bool) -> dict:
    work.mkdir(parents=True, exist_ok=True)
    with SimBench(board, latency=latency, settling=settling) as bench:
        station = load_station(bench.write_station(work / "station.toml"))
        fixture = load_fixture(bench.write_fixture(work / "fixture.toml"), board)
        opts = RunOptions() if settling else RunOptions(settle_wait_s=0.0)
        with open_store(work / "bench.db") as store, safe_station(station) as inst:
            t0 = time.perf_counter()
            res = run_board(inst, board, limits, fixture, "BENCH-1", store, options=opts)
            elapsed = time.perf_counter() - t0
    return {
        "time": elapsed,
        "settle": res.settle_waited_s,
        "acq": res.acquisitions,
        "verdict": res.verdict,
        "failing": {k: c.failing for k, c in res.channels.items()},
        "note": res.settle_note,
        "thr": {m.channel: m.value for m in res.measurements if m.name == "clip_input"},
    }


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        for path in BOARDS:
            board = load_board(path)
            limits = compute_limits(board)
            ref = one_run(
                board, limits, Path(tmp) / f"{path.stem}-ref", latency=False, settling=False
            )
            run = one_run(board, limits, Path(tmp) / path.stem, latency=True, settling=True)
            print(
                f"{path.name}: test time {run['time']:.1f} s, settling waits "
                f"{run['settle']:.1f} s, {run['acq']} acquisitions, verdict {run['verdict']}"
            )
            print(f"  {run['note']}")
            for ch, failing in sorted(run["failing"].items()):
                if failing:
                    print(f"  channel {ch} failing: {', '.join(failing)}")
            for ch, value in sorted(run["thr"].items()):
                r = ref["thr"].get(ch)
                if value is None or r is None:
                    print(f"  channel {ch}: threshold {value} (settled {r})")
                    continue
                print(
                    f"  channel {ch}: threshold {value:.4f} V rms, settled {r:.4f} V rms, "
                    f"{20 * math.log10(value / r):+.3f} dB"
                )


if __name__ == "__main__":
    main()
