"""Speed of fault diagnosis: one failed board ranked in under 2 s (target).

Measures the demo twin preamp with R104 drifted x1.6 on the simulated board (in-process,
harness.sim.physics), then times ``rank_faults`` cold (tolerance spreads computed) and warm
(spreads cached, as a repair station diagnosing many boards of one type would).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests" / "diagnose"))

from simmeasure import measure_board  # noqa: E402

from harness.diagnose import rank_faults, tolerance_spread  # noqa: E402
from harness.io.board import load_board  # noqa: E402

TARGET_S = 2.0


def main() -> int:
    board = load_board(ROOT / "limits" / "demo-twin-preamp.toml")
    meas = measure_board(board, ("R104:drift=1.6",))
    t0 = time.perf_counter()
    cands = rank_faults(board, meas)
    cold = time.perf_counter() - t0
    f = board.conditions.extra_frequencies_hz
    spreads = {c.name: tolerance_spread(board, c, f) for c in board.channels}
    runs = []
    for _ in range(3):
        t0 = time.perf_counter()
        rank_faults(board, meas, spreads=spreads)
        runs.append(time.perf_counter() - t0)
    warm = min(runs)
    print(f"board: {board.name}, fault R104:drift=1.6, best: {cands[0].spec}")
    print(
        f"diagnosis cold (with tolerance Monte Carlo): {cold:.3f} s  "
        f"({cold / TARGET_S:.2f} of the {TARGET_S:g} s target)"
    )
    print(
        f"diagnosis warm (spreads cached):             {warm:.3f} s  "
        f"({warm / TARGET_S:.2f} of the target)"
    )
    return 0 if cold < TARGET_S else 1


if __name__ == "__main__":
    raise SystemExit(main())
