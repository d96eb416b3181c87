"""``stageproof report``: board report, production summary and table export.

    stageproof report board   --db PATH (--serial SN | --run ID) [-o FILE.html] [--png DIR]
    stageproof report summary --db PATH [--since DATE] [--until DATE] [--board PN] [-o FILE.html]
    stageproof report export  --db PATH --format csv|parquet -o DIR [--since/--until/--board]

``stageproof report --db PATH --serial SN`` (no sub-command) is the board report.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from harness import jsontext
from harness.store import DEFAULT_DB


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"run id must be a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"run id must be 1 or more, got {value}")
    return value


def _board_options(p: argparse.ArgumentParser, *, required: bool, listed: bool = True) -> None:
    """The board report's options; ``listed`` False keeps them working on ``report`` itself
    (the short form) but out of its help, which lists only what every kind shares."""

    def say(text: str) -> str:
        return text if listed else argparse.SUPPRESS

    who = p.add_mutually_exclusive_group(required=required)
    who.add_argument("--serial", metavar="SN", help=say("serial number (its newest run is shown)"))
    who.add_argument("--run", type=_positive_int, metavar="ID", help=say("run id"))
    p.add_argument(
        "-o",
        "--output",
        metavar="FILE.html",
        help=say("output file (default: report-<serial>-run<id>.html here)"),
    )
    p.add_argument(
        "--png", metavar="DIR", help=say("also write each plot as PNG (needs matplotlib)")
    )


def _db(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--db", default=DEFAULT_DB, metavar="PATH", help=f"results database (default: {DEFAULT_DB})"
    )


def _range(p: argparse.ArgumentParser) -> None:
    p.add_argument("--since", metavar="DATE", help="first day (YYYY-MM-DD, UTC) or date-time")
    p.add_argument("--until", metavar="DATE", help="last day, included, or date-time (UTC)")
    p.add_argument("--board", metavar="PN", help="only this part number or board name")


def register(subparsers: argparse._SubParsersAction) -> None:
    rep = subparsers.add_parser(
        "report",
        help="board report, production summary, CSV/Parquet export",
        description="Reports from the results database: one board (HTML), a lot or date "
        "range (HTML: yield, distributions, Cp/Cpk), or the tables as CSV/Parquet.  "
        "`stageproof report KIND --help` lists each kind's options; `report --db PATH "
        "--serial SN` (no KIND) is short for `report board`.",
    )
    _db(rep)
    _board_options(rep, required=False, listed=False)
    rep.set_defaults(func=_cmd_board, report_parser=rep)
    sub = rep.add_subparsers(dest="report_command", metavar="KIND")

    board = sub.add_parser(
        "board",
        help="HTML report of one run of one board",
        description="Self-contained HTML report of one run: plots, every "
        "measurement with its limits, uncertainty and decision, run header.",
    )
    _db(board)
    _board_options(board, required=True)
    board.set_defaults(func=_cmd_board)

    summ = sub.add_parser(
        "summary",
        help="HTML summary: yield, distributions, Cp/Cpk",
        description="Yield (first-pass and final), histograms with limits "
        "and process capability of each measurement over a date range.",
    )
    _db(summ)
    _range(summ)
    summ.add_argument(
        "-o",
        "--output",
        metavar="FILE.html",
        default="summary.html",
        help="output file (default: summary.html)",
    )
    summ.add_argument("--png", metavar="DIR", help="also write each histogram as PNG")
    summ.add_argument(
        "--json",
        action="store_true",
        help="print yield and each measurement's capability as JSON (the HTML is still written)",
    )
    summ.set_defaults(func=_cmd_summary)

    exp = sub.add_parser(
        "export",
        help="runs, measurements and sweeps as CSV or Parquet",
        description="Write runs, measurements and sweeps tables, one file each, into a folder.",
    )
    _db(exp)
    exp.add_argument("--format", required=True, choices=("csv", "parquet"))
    exp.add_argument("-o", "--output", required=True, metavar="DIR", help="output folder")
    _range(exp)
    exp.set_defaults(func=_cmd_export)


def _cmd_board(args: argparse.Namespace) -> int:
    from harness.report import write_board_report

    if args.serial is None and args.run is None:
        parser = getattr(args, "report_parser", None)
        if parser is not None:
            parser.print_usage(sys.stderr)
        print(
            "stageproof report: error: give --serial SN or --run ID, or a kind: board, summary, "
            "export",
            file=sys.stderr,
        )
        return 2
    out = args.output
    if out is None:
        from harness.report import load_board_report
        from harness.store import open_store

        with open_store(args.db, readonly=True) as store:
            run = load_board_report(store, serial=args.serial, run_id=args.run).run
        safe = "".join(c if c.isalnum() or c in "-_." else "_" for c in run.serial)
        out = f"report-{safe}-run{run.run_id}.html"
    path, report = write_board_report(
        args.db, out, serial=args.serial, run_id=args.run, png_dir=args.png
    )
    verdict = report.run.verdict or report.run.status
    print(
        f"board report: serial {report.run.serial}, run {report.run.run_id} ({verdict}) -> {path}"
    )
    if args.png:
        print(f"plots as PNG -> {Path(args.png)}")
    return 0


def _cmd_summary(args: argparse.Namespace) -> int:
    from harness.report import write_summary_report

    path, s = write_summary_report(
        args.db, args.output, since=args.since, until=args.until, board=args.board, png_dir=args.png
    )
    from harness.report.stats import CPK_MIN_BOARDS, CPK_THRESHOLD

    flagged = sum(m.capability.flagged for m in s.measurements)
    few = sum(not m.capability.enough for m in s.measurements)
    if getattr(args, "json", False):
        doc = {
            "db": s.db,
            "output": str(path),
            "runs_in_range": s.runs_in_range,
            "serials": s.overall.serials,
            "first_pass_yield": s.overall.first_pass,
            "final_yield": s.overall.final,
            "cpk_threshold": CPK_THRESHOLD,
            "measurements": [
                {"channel": m.channel, "name": m.name, "unit": m.unit, **m.capability.to_dict()}
                for m in s.measurements
            ],
        }
        sys.stdout.write(jsontext.dumps(doc, indent=2) + "\n")
        return 0

    def pct(x: float) -> str:
        return "—" if x != x else f"{100 * x:.1f} %"  # NaN: no finished test in the range

    cpk = f"{flagged} measurement(s) with Cpk under {CPK_THRESHOLD}"
    if few:
        cpk += (
            f", {few} with too few boards for Cpk (n < {CPK_MIN_BOARDS}, common practice: "
            "NIST/SEMATECH e-Handbook ch. 6)"
        )
    print(
        f"summary: {s.runs_in_range} runs, {s.overall.serials} serials, first-pass yield "
        f"{pct(s.overall.first_pass)}, final {pct(s.overall.final)}, {cpk} -> {path}"
    )
    return 0


def _cmd_export(args: argparse.Namespace) -> int:
    from harness.report import export_tables

    paths = export_tables(
        args.db, args.output, args.format, since=args.since, until=args.until, board=args.board
    )
    for p in paths:
        print(f"wrote {p}")
    return 0
