"""Monte Carlo speed: 100,000 boards of a two-stage channel against a per-sample Python loop.

Times the vectorised model (DC operating point with base current, small-signal gain, swing-limited
clipping threshold, low corner, and THD at the nominal level from the large-signal solution over
one period) on 100,000 Monte Carlo boards of the demo twin preamp's channel A (a common-emitter
stage DC-coupled into an emitter follower), and the same model called once per board with
size-one arrays on 2,000 boards, scaled to 100,000.  Target: under 1 s on 2 cores, ratio >= 20.
Also times the THD-criterion clipping level (the per-board guarded interpolation search of
``criterion_level`` over all boards, to ``MC_SEARCH_TOL_DB``; target under 3 s for 100,000
boards on 2 cores) and ``compute_limits`` of the demo board at its default 20,000 samples, the
threshold searched on all of them (up to ``MC_SEARCH_SAMPLES``; target under 1 s).  The
periodic solve runs in numba's compiled kernel (harness.model.periodic_kernel): a warm-up call
compiles it (or loads numba's cache) before the timing, so the best-of-N figures exclude
compilation.  The large-signal chain is the periodic Ebers-Moll solution with soft saturation
and the bias shift under drive (harness.model.periodic).  The machine's load moves these
figures by tens of percent: compare runs made one after the other.

    python benchmarks/bench_montecarlo.py [--samples N] [--loop N] [--workers N]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np

from harness.io.board import load_board
from harness.model import compute_limits
from harness.model.core import evaluate_channel
from harness.model.limits import (
    MC_SEARCH_ITERATIONS,
    MC_SEARCH_POINTS,
    MC_SEARCH_SAMPLES,
    MC_SEARCH_TOL_DB,
    MC_THD_POINTS,
)
from harness.model.params import channel_parameters, sample_arrays

BOARD = Path(__file__).resolve().parent.parent / "limits" / "demo-twin-preamp.toml"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=100_000)
    ap.add_argument("--loop", type=int, default=2_000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    board = load_board(BOARD)
    ch = board.channel("A")
    specs = channel_parameters(board, ch)
    p = sample_arrays(specs, np.random.default_rng(board.policy.seed), args.samples)
    t0 = time.perf_counter()
    compute_limits(board, samples=100, workers=1)  # compiles the kernel, or loads its cache
    t_warm = time.perf_counter() - t0

    def vec(search: bool) -> float:
        best = float("inf")
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            res = evaluate_channel(
                board,
                ch,
                p,
                thd_points=MC_THD_POINTS,
                search_points=MC_SEARCH_POINTS if search else None,
                search_iterations=MC_SEARCH_ITERATIONS,
                search_tol_db=MC_SEARCH_TOL_DB,
                workers=args.workers,
            )
            best = min(best, time.perf_counter() - t0)
        assert res.thd_percent is not None and np.all(np.isfinite(res.thd_percent))
        return best

    t_vec = vec(search=False)
    t0 = time.perf_counter()
    for i in range(args.loop):
        one = {k: v[i : i + 1] for k, v in p.items()}
        evaluate_channel(board, ch, one, thd_points=MC_THD_POINTS, search_points=None)
    t_loop = (time.perf_counter() - t0) * args.samples / args.loop
    t_search = vec(search=True)

    print(
        f"board {BOARD.name}, channel A (2 stages), {args.samples:,} Monte Carlo boards, "
        f"{args.workers} worker thread(s), best of {args.repeat} (compilation excluded: "
        f"warm-up {t_warm:.2f} s)"
    )
    print(
        f"  vectorised: op point + gain + swing clip + THD at nominal ({MC_THD_POINTS} points"
        f"/period): {t_vec:.3f} s   (target < 1 s)"
    )
    print(
        f"  per-sample loop, same model on size-1 arrays ({args.loop:,} boards, scaled): "
        f"{t_loop:.1f} s"
    )
    print(f"  ratio: {t_loop / t_vec:.0f}x   (target >= 20x)")
    print(
        f"  with the THD-criterion clip level (searched to {MC_SEARCH_TOL_DB} dB): "
        f"{t_search:.3f} s   (target < 3 s)"
    )
    t_lim = float("inf")
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        compute_limits(board, workers=args.workers)
        t_lim = min(t_lim, time.perf_counter() - t0)
    print(
        f"  compute_limits, {board.policy.samples:,} samples (threshold searched on "
        f"{min(MC_SEARCH_SAMPLES, board.policy.samples):,}), both channels with worst-case "
        f"corners: {t_lim:.3f} s   (target < 1 s)"
    )


if __name__ == "__main__":
    main()
