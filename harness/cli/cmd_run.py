"""``ampbench run``: test one board on a station and store the verdict.

Exit status: 0 PASS, 1 FAIL, 2 a usage or setup error (bad file, unreachable instrument,
unwritable database, aborted run).
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from harness.run.runner import execute, prepare, validate_serial
from harness.run.sequence import RunOptions, RunResult

_COLOURS = {
    "pass": "green",
    "info": "cyan",
    "conditional pass": "yellow",
    "conditional fail": "yellow",
    "not resolvable": "magenta",
    "fail": "red",
}


class RichProgress:
    """Progress lines with rich: one line per step, one per measurement."""

    def __init__(self, console: Any) -> None:
        self.console = console

    def step(self, name: str, text: str) -> None:
        self.console.print(f"[bold]> {name}[/bold]: {text}")

    def measurement(self, row: Any) -> None:
        colour = _COLOURS.get(row.decision, "white")
        value = "-" if row.value is None else f"{row.value:.5g}"
        lim = _limits_text(row)
        ch = f"{row.channel}: " if row.channel else ""
        self.console.print(
            f"    {ch}{row.name} = {value} {row.unit} {lim} [{colour}]{row.decision}[/{colour}]",
            highlight=False,
        )

    def note(self, text: str) -> None:
        self.console.print(f"    [dim]{text}[/dim]")


def _limits_text(row: Any) -> str:
    if row.low is None and row.high is None:
        return ""
    lo = "-inf" if row.low is None else f"{row.low:.5g}"
    hi = "+inf" if row.high is None else f"{row.high:.5g}"
    u = "" if row.uncertainty is None else f" U={row.uncertainty:.2g}"
    return f"[{lo} .. {hi}]{u}"


def print_verdict(console: Any, result: RunResult, title: str | None = None) -> None:
    """The final table: one line per channel, with the failing measurements named."""
    from rich.table import Table

    table = Table(title=title or f"{result.serial}: {result.verdict or result.status}")
    table.add_column("channel")
    table.add_column("verdict")
    table.add_column("not accepted")
    for ch, v in result.channels.items():
        colour = "green" if v.verdict == "PASS" else "red"
        table.add_row(ch, f"[{colour}]{v.verdict}[/{colour}]", ", ".join(v.failing) or "-")
    console.print(table)
    if result.reason:
        console.print(f"reason: {result.reason}")
    console.print(
        f"run {result.run_id}, retest {result.retest}, {result.acquisitions} "
        f"acquisitions ({result.search_acquisitions} in the clipping search), "
        f"{result.elapsed_s:.1f} s; {result.settle_note}",
        highlight=False,
    )


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "run",
        help="test one board and store the verdict",
        description="Test one board: supply and quiescent current, DC test "
        "points, gain, phase, THD, clipping threshold; decide every "
        "measurement against the model's limits and store it.",
    )
    p.add_argument("--station", required=True, help="station file (TOML)")
    p.add_argument("--fixture", required=True, help="fixture file (TOML)")
    p.add_argument("--board", required=True, help="board file (TOML, limits/)")
    p.add_argument("--serial", required=True, help="the board's serial number")
    p.add_argument("--operator", default="", help="who runs the test")
    p.add_argument("--db", default=None, help="results database (default: ampbench-results.db)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--keep-records", action="store_true", help="store the raw records too")
    p.add_argument(
        "--settle-wait",
        type=float,
        default=None,
        metavar="S",
        help="seconds to wait after each level change (default: the model's settle time)",
    )
    p.add_argument(
        "--verify-settling",
        action="store_true",
        help="repeat records after level changes until they agree, instead of waiting",
    )
    p.add_argument(
        "--accept-conditional-pass",
        action="store_true",
        help="count 'conditional pass' as pass (shared risk; default: FAIL)",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from rich.console import Console

    from harness.run.decisions import DecisionPolicy
    from harness.store import DEFAULT_DB

    serial = validate_serial(args.serial)  # before anything touches an instrument
    prep = prepare(args.board, args.fixture, args.station)
    console = Console(stderr=args.json)
    progress = None if args.json else RichProgress(console)
    options = RunOptions(
        operator=args.operator,
        keep_records=args.keep_records,
        settle="verify" if args.verify_settling else "wait",
        settle_wait_s=args.settle_wait,
        policy=DecisionPolicy(accept_conditional_pass=args.accept_conditional_pass),
    )
    if not args.json:
        console.print(
            f"[bold]{prep.board.name}[/bold] ({prep.board.part_number} rev "
            f"{prep.board.revision}), serial {serial}",
            highlight=False,
        )
    result = execute(prep, serial, args.db or DEFAULT_DB, options=options, progress=progress)
    if args.json:
        json.dump(result.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print_verdict(console, result)
    return 0 if result.verdict == "PASS" else 1
