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


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "analyze",
        help="analyse a capture file (gain, phase, THD, THD+N, clipping)",
        description="Offline analysis of a capture: CSV with header time_s,input_v,output_v "
        "or .npz with arrays of those names.",
    )
    p.add_argument("capture", help="capture file (.csv or .npz)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--adc-bits", type=int, default=None, help="scope ADC resolution in bits")
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
    p.add_argument("--method", choices=("fit", "fft"), default="fit")
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
    t.add_row(
        "THD", res.thd_report + (f"  ({d['thd_db']:.1f} dB)" if d["thd_db"] is not None else "")
    )
    t.add_row("THD+N", fmt(d["thdn_percent"], ".4g", " %"))
    t.add_row("SINAD", fmt(d["sinad_db"], ".1f", " dB"))
    t.add_row("clipping", f"yes, {res.clip_side} half-cycle" if res.clipped else "no")
    t.add_row("floor", f"THD {res.floor.thd_percent:.2g} %, THD+N {res.floor.thdn_percent:.2g} %")
    if res.over_range:
        t.add_row(Text("over-range", style="red"), str(res.reason))
    make_console().print(t)
    return 0
