"""Test time per board: the sequencer's bracketed search against a plain level sweep.

Runs the two-channel demo board (limits/demo-twin-preamp.toml) on the simulated bench with
its realistic latencies (SimBench(latency=True)), waiting the model's settle time after
each level change, and prints for the harness run and for a baseline, a plain sweep in
0.5 dB steps from the nominal level to past the clipping threshold of both channels:

- acquisitions per board (both channels recorded together in each),
- test time per board and the part spent waiting on instruments / settling,
- the harness overhead (time not waiting on instruments) as a fraction of test time,
- the ratios.

Then the same harness run on the simulated benchtop dialect (per-division scope that chooses
its own timing, preamble scaling, reads of at most 5000 points, polled run state; dBm
generator), printed beside the default dialect's: no more acquisitions, overhead still
under 20 %.

Targets: <= 8 acquisitions per board for both channels; overhead < 20 % of test time.

    python benchmarks/bench_run.py [--settle-wait S]
"""

from __future__ import annotations

import argparse
import math
import tempfile
import time
from pathlib import Path

from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.measure import analyze_uniform, clip_threshold, plan_coherent
from harness.model import compute_limits
from harness.run.bench_ops import choose_range
from harness.run.safety import safe_station
from harness.run.sequence import RunOptions, run_board
from harness.sim.bench import SimBench
from harness.store import open_store

REPO = Path(__file__).resolve().parent.parent
BOARD = REPO / "limits" / "demo-twin-preamp.toml"
FIXTURE = REPO / "fixtures" / "fixture-twin-preamp.toml"


def harness_run(
    board, limits, work: Path, settle_wait_s: float | None, dialect: str = "default"
) -> dict:
    with SimBench(board, latency=True, dialect=dialect) as bench:
        station = load_station(bench.write_station(work / f"station-h-{dialect}.toml"))
        fixture = load_fixture(FIXTURE, board, scope_inputs=4)
        with open_store(work / f"bench-{dialect}.db") as store, safe_station(station) as inst:
            t0 = time.perf_counter()
            res = run_board(
                inst,
                board,
                limits,
                fixture,
                "BENCH-1",
                store,
                options=RunOptions(settle_wait_s=settle_wait_s),
            )
            elapsed = time.perf_counter() - t0
    thr = {m.channel: m.value for m in res.measurements if m.name == "clip_input"}
    return {
        "acq": res.acquisitions,
        "search_acq": res.search_acquisitions,
        "time": elapsed,
        "instrument": res.instrument_s,
        "waiting": res.waiting_s,
        "overhead": res.overhead_s,
        "verdict": res.verdict,
        "thr": thr,
    }


def baseline_sweep(board, limits, work: Path, settle_s: float) -> dict:
    """Nominal level upwards in 0.5 dB steps until both channels are past the criterion;
    same instruments, same settle wait, same analysis, ranges set for every step."""
    crit = board.conditions.clip_thd_percent
    with SimBench(board, latency=True) as bench:
        station = load_station(bench.write_station(work / "station-b.toml"))
        with safe_station(station) as inst:
            t0 = time.perf_counter()
            g, s = inst.generator, inst.scope
            inst.supply.configure(board.supply.v_pos, 0.03)
            inst.supply.output(True)
            time.sleep(settle_s)
            plan = plan_coherent(
                board.conditions.frequency_hz,
                s.sample_rates_hz,
                [n for n in s.record_lengths if n <= 8192],
                min_cycles=5,
            )
            s.configure_timebase(plan.sample_rate_hz, plan.n_samples)
            s.configure_trigger(1)
            g.configure_sine(plan.frequency_hz)
            level = board.conditions.nominal_input_vrms
            g.set_level(level)
            g.output(True)
            gain = 10 ** (limits.channels["A"].gain_db.nominal / 20)
            points: dict[str, list[tuple[float, float, float]]] = {"A": [], "B": []}
            acq = 0
            while level <= board.conditions.safe_input_vrms:
                g.set_level(level)
                s.configure_input(1, range_vpp=choose_range(2.83 * level, s.ranges_vpp))
                out_r = choose_range(min(2.83 * level * gain, 13.2), s.ranges_vpp, 0.4)
                s.configure_input(2, range_vpp=out_r)
                s.configure_input(3, range_vpp=out_r)
                time.sleep(settle_s)
                a = s.acquire([1, 2, 3])
                acq += 1
                done = True
                for ch, n in (("A", 2), ("B", 3)):
                    r = analyze_uniform(
                        a.volts[1],
                        a.volts[n],
                        a.sample_rate_hz,
                        in_adc=a.adc_limits[1],
                        out_adc=a.adc_limits[n],
                        adc_bits=a.bits,
                        frequency_hz=plan.frequency_hz,
                    )
                    if r.thd_percent is not None:
                        points[ch].append((r.input_vrms, r.thd_percent, r.gain_db))
                        done = done and r.thd_percent > crit
                    else:
                        done = False
                if done:
                    break
                level *= 10 ** (0.5 / 20)
            g.output(False)
            inst.supply.output(False)
            elapsed = time.perf_counter() - t0
    thr = {}
    for ch, pts in points.items():
        lv, thd, gdb = (list(x) for x in zip(*pts, strict=True))
        thr[ch] = clip_threshold(lv, thd, gdb).level_vrms
    return {"acq": acq, "time": elapsed, "thr": thr}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument(
        "--settle-wait",
        type=float,
        default=None,
        help="override the model's settle time (s) for both runs",
    )
    args = ap.parse_args()
    board = load_board(BOARD)
    limits = compute_limits(board)
    settle = (
        args.settle_wait
        if args.settle_wait is not None
        else max(c.settle_time_s for c in limits.channels.values())
    )
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        h = harness_run(board, limits, work, args.settle_wait)
        b = baseline_sweep(board, limits, work, settle)
        t = harness_run(board, limits, work, args.settle_wait, dialect="benchtop")
    print(f"board {board.part_number}, two channels, sim latency on, settle wait {settle:.3g} s")
    print(
        f"harness : {h['acq']:3d} acquisitions ({h['search_acq']} in the clipping search), "
        f"{h['time']:6.2f} s, verdict {h['verdict']}"
    )
    print(
        f"          instruments {h['instrument']:.2f} s, settling {h['waiting']:.2f} s, "
        f"overhead {h['overhead']:.2f} s = {100 * h['overhead'] / h['time']:.1f} % "
        "(target < 20 %)"
    )
    print(
        f"baseline: {b['acq']:3d} acquisitions (0.5 dB sweep, nominal to past clipping), "
        f"{b['time']:6.2f} s"
    )
    print(
        f"ratio   : acquisitions {b['acq'] / h['acq']:.2f}x fewer "
        f"(search alone {b['acq'] / max(h['search_acq'], 1):.2f}x), "
        f"time {b['time'] / h['time']:.2f}x shorter (harness run includes supply, DC points, "
        "extra frequencies)"
    )
    for ch in ("A", "B"):
        hv, bv = h["thr"].get(ch), b["thr"].get(ch)
        if hv and bv:
            print(
                f"threshold {ch}: search {hv:.4f} V rms, sweep {bv:.4f} V rms "
                f"({20 * math.log10(hv / bv):+.3f} dB), resolution 0.1 dB vs 0.5 dB steps"
            )
    target = "met" if h["acq"] <= 8 else "NOT met"
    print(f"target <= 8 acquisitions per board: {target} ({h['acq']})")
    print()
    print("dialect   acquisitions  test time  instruments  settling  overhead  verdict")
    for name, r in (("default", h), ("benchtop", t)):
        print(
            f"{name:<9} {r['acq']:12d}  {r['time']:8.2f} s  {r['instrument']:9.2f} s  "
            f"{r['waiting']:6.2f} s  {100 * r['overhead'] / r['time']:6.1f} %  {r['verdict']}"
        )
    more = "no more" if t["acq"] <= h["acq"] else f"{t['acq'] - h['acq']} more"
    ok = "met" if t["overhead"] < 0.2 * t["time"] else "NOT met"
    print(f"benchtop: {more} acquisitions than default; overhead < 20 % of test time: {ok}")


if __name__ == "__main__":
    main()
