"""Long soak by hand: ``python benchmarks/soak.py [BOARDS] [--every N]`` from the repo root.

Runs the production loop of tests/reliability/soakloop.py (one process, instruments kept
connected, harness.run's per-board function on a simulated bench) and prints the RSS and
open-descriptor samples, the time per board and the second-half growth per board.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tests.reliability.soakloop import soak


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("boards", type=int, nargs="?", default=2000)
    ap.add_argument("--every", type=int, default=50, help="sample every N boards")
    ap.add_argument("--full-every", type=int, default=25, help="full sequence every N boards")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        r = soak(Path(tmp), args.boards, every=args.every, full_every=args.full_every)
    print(
        f"{r.boards} boards in {r.elapsed_s:.1f} s ({1000 * r.elapsed_s / r.boards:.1f} ms "
        f"per board); statuses {r.statuses}"
    )
    print("boards  RSS MiB  FDs")
    for n, rss, fds in r.samples:
        print(f"{n:6d}  {rss / 2**20:7.1f}  {fds:3d}")
    print(f"second-half growth: RSS {r.slope(1) / 1024:.2f} kB/board, FDs {r.slope(2):.4f}/board")
    return 0


if __name__ == "__main__":
    sys.exit(main())
