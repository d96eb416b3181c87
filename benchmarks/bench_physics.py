"""Cost of the simulated board's physics: one new response point, a cached one, and
evaluate() on a 1e6-sample record.  Target: a new CE+EF point under ~150 ms."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from harness.io.board import load_board
from harness.sim.physics import BoardSim

REPO = Path(__file__).resolve().parents[1]


def main() -> None:
    board = load_board(REPO / "limits" / "demo-twin-preamp.toml")
    line = load_board(REPO / "limits" / "demo-opamp-line.toml")
    for label, b, ch in (("CE+EF", board, "A"), ("op-amp", line, "MIC")):
        times = []
        for level in (0.001, 0.07, 0.3, 0.7, 1.5, 3.0):
            sim = BoardSim(b)  # fresh: no warm start, no cache
            t0 = time.perf_counter()
            sim.respond(ch, level, 1000.0)
            times.append(time.perf_counter() - t0)
        print(
            f"{label}: new point (cold) median {np.median(times) * 1e3:.1f} ms, "
            f"max {max(times) * 1e3:.1f} ms over {len(times)} levels"
        )
        sim = BoardSim(b)
        levels = np.geomspace(0.05, 2.0, 25)
        t0 = time.perf_counter()
        for level in levels:
            sim.respond(ch, float(level), 1000.0)
        step = (time.perf_counter() - t0) / len(levels)
        t0 = time.perf_counter()
        for level in levels:
            sim.respond(ch, float(level), 1000.0)
        cached = (time.perf_counter() - t0) / len(levels)
        print(
            f"{label}: level sweep (warm start) {step * 1e3:.1f} ms/point, cached "
            f"{cached * 1e6:.1f} us/point, ratio {step / cached:.0f}x"
        )
    r = BoardSim(board).respond("A", 0.5, 1000.0)
    t = np.arange(1_000_000) / 1e6
    r.evaluate(t[:10])
    t0 = time.perf_counter()
    r.evaluate(t)
    print(f"evaluate 1e6 samples: {(time.perf_counter() - t0) * 1e3:.1f} ms")


if __name__ == "__main__":
    main()
