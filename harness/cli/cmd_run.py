"""``stageproof run``: test one board on a station and store the verdict.

Exit status: 0 PASS, 1 FAIL, 2 a usage or setup error (bad file, unreachable instrument,
unwritable database, aborted run).
"""

from __future__ import annotations

import argparse
import sys
from typing import Any

from harness import jsontext
from harness.cli import run_args
from harness.cli.run_args import RichProgress
from harness.cli.term import make_console, styled
from harness.errors import RunAborted
from harness.outcomes import look
from harness.run.runner import execute, prepare, validate_serial
from harness.run.sequence import RunResult
from harness.store import utc_now

__all__ = ["RichProgress", "print_verdict", "register", "run"]


def print_verdict(console: Any, result: RunResult, title: str | None = None) -> None:
    """The final table: one line per channel, with the failing measurements named."""
    from rich.table import Table

    table = Table(title=styled(title or f"{result.serial}: {result.verdict or result.status}"))
    table.add_column("channel")
    table.add_column("verdict")
    table.add_column("not accepted")
    for ch, v in result.channels.items():
        colour = look(v.verdict).console_style
        table.add_row(styled(ch), styled(v.verdict, colour), styled(", ".join(v.failing) or "-"))
    console.print(table)
    if result.reason:
        console.print(styled(f"reason: {result.reason}"))
    console.print(
        f"run {result.run_id}, retest {result.retest}, {result.acquisitions} "
        f"acquisitions ({result.search_acquisitions} in the clipping search), "
        f"{result.elapsed_s:.1f} s; {result.settle_note}",
        highlight=False,
    )


def interrupted_words(db: str, serial: str, since: str, *, supply: bool = True) -> str:
    """What Ctrl-C left behind, in the words ``line`` uses: the sources' state and the run
    stored as aborted (read back from the store, never assumed)."""
    from harness.errors import StageproofError
    from harness.store import open_store

    what = "interrupted by the operator (Ctrl-C)"
    try:
        with open_store(db, readonly=True) as store:
            runs = store.list_runs(serial=serial, since=since, limit=1)
    except StageproofError:
        runs = []
    if not runs:
        return f"{what} before the run began: nothing stored"
    run = runs[0]
    sources = "generator and supply" if supply else "generator"
    if "output state unknown" in (run.reason or ""):
        state = "generator output state UNKNOWN: check the generator" + (
            "; supply switched off" if supply else ""
        )
    else:
        state = f"{sources} switched off"
    return f"{what}: {state}, run {run.run_id} stored as {run.status}"


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "run",
        help="test one board and store the verdict",
        description="Test one board: supply and quiescent current, DC test "
        "points, gain, phase, THD, clipping threshold; decide every "
        "measurement against the model's limits and store it.",
    )
    run_args.add_bench_files(p, serial_help="the board's serial number")
    p.add_argument("--operator", default="", help="who runs the test")
    run_args.add_db(p)
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    run_args.add_run_settings(p)
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from rich.text import Text

    from harness.store import DEFAULT_DB

    serial = validate_serial(args.serial)  # before anything touches an instrument
    # limits deferred: the station is made safe before the Monte Carlo runs
    prep = prepare(args.board, args.fixture, args.station, defer_limits=True)
    console = make_console(stderr=args.json)
    progress = None if args.json else RichProgress(console)
    options = run_args.run_options(args, operator=args.operator)
    if not args.json:
        console.print(
            Text.assemble(
                (prep.board.name, "bold"),
                f" ({prep.board.part_number} rev {prep.board.revision}), serial {serial}",
            )
        )
    db = args.db or DEFAULT_DB
    started = utc_now()
    try:
        result = execute(prep, serial, db, options=options, progress=progress)
    except KeyboardInterrupt:
        has_supply = prep.station.get("supply") is not None
        raise RunAborted(interrupted_words(db, serial, started, supply=has_supply)) from None
    if args.json:
        sys.stdout.write(jsontext.dumps(result.to_dict(), indent=2))
        sys.stdout.write("\n")
    else:
        print_verdict(console, result)
    return 0 if result.verdict == "PASS" else 1
