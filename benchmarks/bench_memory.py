"""Memory figures: Monte Carlo bytes per board against the estimate, and capture reading.

For each demo board, the tracemalloc peak and the time of compute_limits at a few sample
counts, the bytes per board, and harness.model.limits.limits_memory_bytes beside them (the
estimate `limits` and `run` refuse on; it must stay above the measured peak).  Then the peak
of reading a CSV capture as a multiple of the file's size (target: under 3).

    python benchmarks/bench_memory.py [--samples 20000,80000] [--rows 400000]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from harness.io.board import load_board
from harness.io.capture import read_capture, write_capture_csv
from harness.model import compute_limits
from harness.model.limits import limits_memory_bytes

REPO = Path(__file__).resolve().parent.parent
BOARDS = ("limits/demo-twin-preamp.toml", "limits/demo-opamp-line.toml")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", default="20000,80000")
    ap.add_argument("--rows", type=int, default=400_000)
    args = ap.parse_args()
    for name in BOARDS:
        board = load_board(REPO / name)
        stages = max(len(c.stages) for c in board.channels)
        for n in (int(s) for s in args.samples.split(",")):
            tracemalloc.start()
            t0 = time.perf_counter()
            compute_limits(board, samples=n)
            elapsed = time.perf_counter() - t0
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            est = limits_memory_bytes(board, n)
            print(
                f"{name} ({stages} stage(s)/channel) {n} boards: peak {peak / n:.0f} B/board, "
                f"estimate {est / n:.0f} B/board ({'ok' if est >= peak else 'UNDER'}), "
                f"{elapsed / n * 1e6:.0f} us/board"
            )
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "capture.csv"
        t = np.arange(args.rows) / 100_000.0
        x = np.sin(2 * np.pi * 1000.0 * t)
        write_capture_csv(path, t, x, -10 * x)
        size = os.path.getsize(path)
        tracemalloc.start()
        read_capture(path)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        print(f"CSV capture {size / 1e6:.1f} MB: reader peak {peak / size:.2f} x the file (< 3)")


if __name__ == "__main__":
    main()
