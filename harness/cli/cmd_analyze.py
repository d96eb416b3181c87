"""``stageproof analyze CAPTURE``: offline analysis of a two-channel capture file."""

from __future__ import annotations

import argparse

from harness import jsontext
from harness.errors import AnalysisError
from harness.io.capture import read_capture
from harness.measure import analyze_record


def _limits(text: str | None, vpp: float | None, name: str) -> tuple[float, float] | None:
    if text is not None:
        try:
            lo, hi = (float(v) for v in text.split(","))
        except ValueError:
            raise AnalysisError(
                f"{name}: expected MIN,MAX in volts, got {text!r}", hint=f"e.g. {name} -4,4"
            ) from None
        return lo, hi
    if vpp is not None:
        if vpp <= 0:
            raise AnalysisError(f"range must be positive, got {vpp!r} Vpp")
        return -vpp / 2, vpp / 2
    return None


def _remove_scope_harmonics(res, cap, in_adc, out_adc, k_max: int):
    """The record's THD with the digitiser's own harmonics removed, by the test run's own
    estimator (:func:`harness.run.bench_ops.added_thd_percent`) under its conditions."""
    from dataclasses import replace
    from types import SimpleNamespace

    import numpy as np

    from harness.run.bench_ops import FILL_MATCH, _fills_match, added_thd_percent

    if in_adc is None or out_adc is None:
        raise AnalysisError(
            "--remove-scope-harmonics needs both channels' ADC limits",
            hint="give --in-adc/--out-adc MIN,MAX or --range-vpp",
        )
    if res.thd_percent is None:
        return res
    x, y = np.asarray(cap.input_v, dtype=float), np.asarray(cap.output_v, dtype=float)
    n = len(y)
    cycles = round(res.frequency_hz * n / res.sample_rate_hz)
    if not res.coherent or cycles < 1:
        raise AnalysisError(
            "--remove-scope-harmonics needs a coherent record (a whole number of cycles)",
            hint="capture f = J·fs/N with J and N coprime, or leave the option out",
        )
    if not _fills_match(x, y, in_adc, out_adc, FILL_MATCH):
        raise AnalysisError(
            "--remove-scope-harmonics: input and output do not fill their ADC ranges alike "
            f"(within {FILL_MATCH:g}x); the estimate would amplify the input's noise",
            hint="capture with ranges that both channels fill about equally",
        )
    plan = SimpleNamespace(cycles=cycles, n_samples=n)
    corr = added_thd_percent(x, y, plan, in_adc, out_adc, k_max=k_max)
    if corr is None:
        return res
    return replace(
        res,
        thd_percent=corr,
        thd_db=float(20 * np.log10(corr / 100)) if corr > 0 else None,
        thd_raw_percent=res.thd_percent,
        scope_harmonics_removed=True,
    )


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "analyze",
        help="analyse a capture file (gain, phase, THD, THD+N, clipping)",
        description="Offline analysis of a capture: CSV with header time_s,input_v,output_v "
        "or .npz with arrays of those names.",
    )
    p.add_argument("capture", help="capture file (.csv or .npz)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument(
        "--adc-bits",
        type=int,
        default=None,
        help="scope ADC resolution in bits, for the quantisation floor (default: none "
        "assumed, the floor is the record's own noise)",
    )
    p.add_argument("--range-vpp", type=float, default=None, help="ADC range of both channels")
    p.add_argument("--in-range-vpp", type=float, default=None, help="input channel ADC range")
    p.add_argument("--out-range-vpp", type=float, default=None, help="output channel ADC range")
    p.add_argument("--in-adc", default=None, metavar="MIN,MAX", help="input ADC limits, volts")
    p.add_argument("--out-adc", default=None, metavar="MIN,MAX", help="output ADC limits, volts")
    p.add_argument("--k-max", type=int, default=10, help="highest harmonic (default 10)")
    p.add_argument("--bandwidth", type=float, default=None, help="analysis bandwidth, Hz")
    p.add_argument("--frequency", type=float, default=None, help="start frequency, Hz")
    p.add_argument("--in-probe", type=float, default=1.0, help="input probe factor (10 for 10:1)")
    p.add_argument("--out-probe", type=float, default=1.0, help="output probe factor")
    p.add_argument(
        "--method",
        choices=("fit", "fft"),
        default="fit",
        help="fundamental by sine fit (default; IEEE Std 1057 four-parameter fit) or by the "
        "windowed FFT peak",
    )
    p.add_argument(
        "--remove-scope-harmonics",
        action="store_true",
        help="report the THD the board adds: the scope's own harmonics, estimated from the "
        "input record, removed as a test run does (needs --in-adc/--out-adc or ranges, a "
        "coherent record and both channels filling their ranges alike)",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    cap = read_capture(args.capture)
    in_adc = _limits(args.in_adc, args.in_range_vpp or args.range_vpp, "--in-adc")
    out_adc = _limits(args.out_adc, args.out_range_vpp or args.range_vpp, "--out-adc")
    res = analyze_record(
        cap.time_s,
        cap.input_v,
        cap.output_v,
        in_adc=in_adc,
        out_adc=out_adc,
        adc_bits=args.adc_bits,
        in_probe=args.in_probe,
        out_probe=args.out_probe,
        k_max=args.k_max,
        bandwidth_hz=args.bandwidth,
        frequency_hz=args.frequency,
        method=args.method,
    )
    if args.remove_scope_harmonics:
        res = _remove_scope_harmonics(res, cap, in_adc, out_adc, args.k_max)
    d = res.to_dict()
    if args.json:
        print(jsontext.dumps({"capture": cap.path, **d}, indent=2))
        return 0
    from rich.table import Table
    from rich.text import Text

    from harness.cli.term import make_console

    def fmt(v: float | None, spec: str, unit: str = "") -> str:
        return "—" if v is None else f"{v:{spec}}{unit}"

    t = Table(title=Text(f"{cap.path}: {cap.n_samples} samples"), show_header=False)
    t.add_column("quantity", style="bold")
    t.add_column("value")
    t.add_row(
        "frequency", fmt(d["frequency_hz"], ".6g", " Hz") + ("  (coherent)" if res.coherent else "")
    )
    t.add_row("input / output", f"{res.input_vrms:.4g} V rms / {res.output_vrms:.4g} V rms")
    t.add_row("gain", fmt(d["gain_db"], ".3f", " dB"))
    t.add_row(
        "phase",
        fmt(d["phase_deg"], ".2f", "°") + ("  (inverting)" if abs(res.phase_deg) > 90 else ""),
    )
    what = (
        f"  scope's own harmonics removed (raw record {res.thd_raw_percent:.4g} %)"
        if res.scope_harmonics_removed and res.thd_raw_percent is not None
        else "  raw record (scope's own harmonics included)"
    )
    t.add_row(
        "THD",
        res.thd_report
        + (f"  ({d['thd_db']:.1f} dB)" if d["thd_db"] is not None else "")
        + (what if res.thd_percent is not None else ""),
    )
    t.add_row("THD+N", fmt(d["thdn_percent"], ".4g", " %"))
    t.add_row("SINAD", fmt(d["sinad_db"], ".1f", " dB"))
    t.add_row("clipping", f"yes, {res.clip_side} half-cycle" if res.clipped else "no")
    t.add_row("floor", f"THD {res.floor.thd_percent:.2g} %, THD+N {res.floor.thdn_percent:.2g} %")
    if res.over_range:
        t.add_row(Text("over-range", style="red"), str(res.reason))
    make_console().print(t)
    return 0
