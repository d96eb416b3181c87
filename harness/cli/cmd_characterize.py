"""``stageproof characterize``: level and frequency sweeps of a prototype against the model.

Writes the run to the results store like any other (sweeps "level" and "frequency") and
an HTML report (``-o``, one self-contained file) that overlays each measured curve on the
model: the model's tolerance bands shaded, its nominal values as dashed rules.  The plots
use harness.report's SVG helper (harness/report/plot.py) and page frame.

Exit status: 0 when every compared quantity lies in the model's band, 1 otherwise, 2 on a
setup error or an aborted run.
"""

from __future__ import annotations

import argparse
import math
from pathlib import Path
from typing import Any

from harness.cli.run_args import RichProgress, add_bench_files, add_db, add_settle_wait
from harness.cli.term import make_console
from harness.run.characterize import CharacterizationResult, CharacterizeOptions


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "characterize",
        help="level and frequency sweeps of a prototype, compared with the model",
        description="Sweep the input level (fine steps up to the clipping criterion or "
        "the safe level) and the frequency (log-spaced, bracketing the low corner), "
        "compare gain, THD, clipping threshold and the low -3 dB corner with the "
        "model's bands, store every point and write an HTML report.",
    )
    add_bench_files(p, serial_help="the prototype's serial number")
    add_db(p)
    p.add_argument("-o", "--output", default=None, help="HTML report (default: char-SERIAL.html)")
    p.add_argument("--operator", default="", help="who runs it")
    p.add_argument("--step-db", type=float, default=1.0, help="level step (dB, default 1)")
    p.add_argument(
        "--below-db",
        type=float,
        default=20.0,
        help="start this many dB under the nominal level (default 20)",
    )
    p.add_argument(
        "--f-start",
        type=float,
        default=10.0,
        help="lowest frequency (Hz, default 10; extended down to bracket the low corner)",
    )
    p.add_argument(
        "--f-stop", type=float, default=20000.0, help="highest frequency (Hz, default 20000)"
    )
    p.add_argument(
        "--per-decade", type=int, default=6, help="frequency points per decade (default 6)"
    )
    add_settle_wait(p, "seconds after each change (default: the model's settle time)")
    p.add_argument(
        "--max-points",
        type=int,
        default=8192,
        help="cap on the record length (default 8192; shorter: faster, higher THD floor)",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from rich.text import Text

    from harness.run.characterize import characterize
    from harness.run.runner import ensure_limits, prepare, validate_serial
    from harness.run.safety import safe_station
    from harness.store import DEFAULT_DB, open_store

    serial = validate_serial(args.serial)
    out = Path(args.output or f"char-{_safe_name(serial)}.html")
    _check_output(out)
    opts = CharacterizeOptions(
        operator=args.operator,
        level_step_db=args.step_db,
        level_below_db=args.below_db,
        f_start_hz=args.f_start,
        f_stop_hz=args.f_stop,
        points_per_decade=args.per_decade,
        settle_wait_s=args.settle_wait,
        max_points=args.max_points,
    )
    prep = prepare(args.board, args.fixture, args.station, defer_limits=True)
    from dataclasses import replace

    opts = replace(opts, station_name=getattr(prep.station, "name", "") or args.station)
    console = make_console()
    console.print(
        Text.assemble(
            (prep.board.name, "bold"),
            f" ({prep.board.part_number}), prototype {serial}: characterisation",
        )
    )
    # lock and make the station safe first; then the limits, the store and the sweeps
    with safe_station(prep.station, relays=prep.fixture.relays) as inst:
        prep = ensure_limits(prep)
        with open_store(args.db or DEFAULT_DB) as store:
            store.recover_aborted()
            result = characterize(
                inst,
                prep.board,
                prep.computed_limits,
                prep.fixture,
                serial,
                store,
                options=opts,
                progress=RichProgress(console),
                board_file=prep.board_file,
            )
    out.write_text(render_html(result), encoding="utf-8")
    for name, ch in result.channels.items():
        corner = "-" if ch.measured_corner_hz is None else f"{ch.measured_corner_hz:.4g} Hz"
        model = ch.model.get("low_corner_hz")
        mtxt = (
            ""
            if model is None
            else f" (model {model.nominal:.4g} Hz, band {_n(model.low)} .. {_n(model.high)})"
        )
        console.print(f"channel {name}: low corner {corner}{mtxt}", highlight=False)
    console.print(f"{result.verdict}: run {result.run_id}; report {out}", highlight=False)
    return 0 if result.verdict == "PASS" else 1


def _n(x: float | None) -> str:
    return "-" if x is None else f"{x:.4g}"


def _safe_name(serial: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in serial)


def _check_output(out: Path) -> None:
    from harness.errors import ReportError

    if out.is_dir():
        raise ReportError("-o", f"{out} is a folder", hint="give a file name ending in .html")
    if not out.parent.is_dir():
        raise ReportError(
            "-o",
            f"folder {out.parent} does not exist",
            hint=f"create it (mkdir -p {out.parent}) or choose another -o",
        )


def channel_plots(result: CharacterizationResult, name: str) -> list[Any]:
    """The channel's measured curves over the model's bands (harness.report.plot data)."""
    from harness.report.plot import Band, Plot, Rule, Series

    ch = result.channels[name]
    m = ch.model
    plots = []
    lv = [p for p in ch.level_points if p.gain_db is not None]
    if lv:
        clip = m.get("clip_input_vrms")
        bands = []
        rules = []
        if clip is not None:
            bands.append(Band(clip.low, clip.high, "model clipping-threshold band", axis="x"))
            rules.append(Rule(clip.nominal, "model threshold", axis="x"))
        rules.append(Rule(result.safe_input_vrms, "safe input level", axis="x", colour="#D55E00"))
        thd = [p for p in lv if p.thd_percent is not None and p.thd_percent > 0]
        if result.criterion_thd_percent is not None:
            rules.append(
                Rule(result.criterion_thd_percent, "criterion", axis="y", colour="#CC79A7")
            )
        plots.append(
            Plot(
                f"{name}: THD against input level",
                "input level (V rms)",
                "THD (%)",
                series=(
                    Series(
                        tuple(p.input_vrms for p in thd),
                        tuple(p.thd_percent for p in thd if p.thd_percent is not None),
                        "measured THD",
                    ),
                ),
                bands=tuple(bands),
                rules=tuple(rules),
                x_log=True,
                y_log=True,
            )
        )
        g = m.get("gain_db")
        gb = (Band(g.low, g.high, "model gain band"),) if g is not None else ()
        gr = (Rule(g.nominal, "model gain"),) if g is not None else ()
        plots.append(
            Plot(
                f"{name}: gain against input level",
                "input level (V rms)",
                "gain (dB)",
                series=(
                    Series(
                        tuple(p.input_vrms for p in lv),
                        tuple(p.gain_db for p in lv if p.gain_db is not None),
                        "measured gain",
                    ),
                ),
                bands=gb + tuple(b for b in bands if b.axis == "x"),
                rules=gr,
                x_log=True,
            )
        )
    rel = ch.relative_db()
    if rel:
        c = m.get("low_corner_hz")
        bands = [Band(c.low, c.high, "model low-corner band", axis="x")] if c else []
        rules = [Rule(-3.0, "-3 dB", axis="y")]
        if c is not None:
            rules.append(Rule(c.nominal, "model corner", axis="x"))
        if ch.measured_corner_hz is not None:
            rules.append(
                Rule(
                    ch.measured_corner_hz, "measured corner", axis="x", colour="#0072B2", dash="2 2"
                )
            )
        plots.append(
            Plot(
                f"{name}: gain against frequency (relative to mid-band)",
                "frequency (Hz)",
                "gain re mid-band (dB)",
                series=(Series(tuple(f for f, _ in rel), tuple(d for _, d in rel), "measured"),),
                bands=tuple(bands),
                rules=tuple(rules),
                x_log=True,
            )
        )
    return plots


def render_html(result: CharacterizationResult) -> str:
    """The whole report: header, comparison table, plots per channel."""
    from harness.report.html import badge, e, kv_table, num, page, table
    from harness.report.plot import render_svg

    head = kv_table(
        [
            ("board", e(f"{result.board_name} ({result.part_number})")),
            ("serial", e(result.serial)),
            ("run", e(result.run_id)),
            ("status", e(result.status)),
            ("test frequency", e(f"{result.frequency_hz:g} Hz")),
            (
                "nominal / safe input",
                e(f"{result.nominal_input_vrms:g} / {result.safe_input_vrms:g} V rms"),
            ),
            ("highest level commanded", e(f"{result.max_commanded_vrms:.4g} V rms")),
            ("clipping criterion", e(result.criterion)),
            ("settling", e(result.settle_note)),
            ("limits digest", f'<span class="mono">{e(result.limits_digest)}</span>'),
            ("generator at the end", e(result.generator_state)),
        ]
    )
    rows = [
        (
            e(m.channel or "board"),
            e(m.name),
            num(m.value),
            e(m.unit),
            num(m.low),
            num(m.high),
            badge(m.decision),
        )
        for m in result.measurements
    ]
    body = [
        f"<h1>Characterisation of {e(result.serial)}</h1>",
        f"<p>{badge(result.verdict, big=True)} <span class='muted'>{e(result.reason)}</span></p>",
        head,
        "<h2>Measured against the model</h2>",
        "<p class='note'>Decisions: simple acceptance against the model's band "
        "(ILAC G8:09/2019 §4.2.1, no guard band). Low corner: −3 dB against the mid-band "
        "gain, interpolated in log f between bracketing points after bisection.</p>",
        table(
            ["channel", "quantity", "measured", "unit", "model low", "model high", "agreement"],
            rows,
            numeric=(2, 4, 5),
        ),
    ]
    for name in result.channels:
        body.append(f"<h2>Channel {e(name)}</h2><div class='plots'>")
        for plot in channel_plots(result, name):
            body.append(f"<figure>{render_svg(plot)}</figure>")
        body.append("</div>")
        ch = result.channels[name]
        pts = sorted(ch.frequency_points, key=lambda p: p.frequency_hz)
        frows = [
            (
                num(p.frequency_hz),
                num(p.gain_db),
                num(
                    None
                    if p.gain_db is None or ch.reference_gain_db is None
                    else p.gain_db - ch.reference_gain_db
                ),
                num(p.phase_deg),
            )
            for p in pts
        ]
        body.append("<h3>Frequency sweep</h3>")
        body.append(
            table(
                ["frequency (Hz)", "gain (dB)", "re mid-band (dB)", "phase (deg)"],
                frows,
                numeric=(0, 1, 2, 3),
            )
        )
        lrows = [
            (
                num(p.commanded_vrms),
                num(p.input_vrms),
                num(p.gain_db),
                num(p.thd_percent),
                e("yes" if p.clipped else "no"),
            )
            for p in ch.level_points
        ]
        body.append(f"<h3>Level sweep</h3><p>{e(ch.stopped_because)}</p>")
        body.append(
            table(
                ["commanded (V rms)", "measured input (V rms)", "gain (dB)", "THD (%)", "clipped"],
                lrows,
                numeric=(0, 1, 2, 3),
            )
        )
    footer = e(
        f"stageproof characterisation, {result.acquisitions} acquisitions, {result.elapsed_s:.1f} s"
    )
    if not math.isfinite(result.elapsed_s):  # pragma: no cover - defensive
        footer = "stageproof characterisation"
    return page(f"Characterisation {result.serial}", "".join(body), footer=footer)
