"""``stageproof diagnose SERIAL``: the most likely faulty components of a failed board.

Reads the board's latest run (or ``--run ID``) from the results store read-only, loads the
board file the run names (or ``--board``), warns when its digest differs from the run's, and
prints the top candidates with the evidence for each.  ``--json`` for other programs.
"""

from __future__ import annotations

import argparse
import math
import sys
from typing import Any

from harness import jsontext
from harness.diagnose import Candidate, Diagnosis, diagnose_run
from harness.errors import StoreError
from harness.io.board import load_board, load_stored_board
from harness.store import DEFAULT_DB, open_store


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "diagnose",
        help="rank the likely faulty components of a failed board from its stored run",
        description="Rank single-fault hypotheses (open, short, drift, low beta, shorted "
        "junction, open bypass) by how well the stage model with each fault explains the "
        "run's measurements.",
    )
    p.add_argument("serial", help="serial number of the board")
    p.add_argument("--db", default=DEFAULT_DB, help=f"results database (default {DEFAULT_DB})")
    p.add_argument("--board", help="board file (default: the file the run names)")
    p.add_argument(
        "--run", type=int, dest="run_id", help="run id (default: the latest run of SERIAL)"
    )
    p.add_argument("--top", type=int, default=5, help="candidates to show (default 5)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    if args.top < 1:
        raise StoreError("--top must be 1 or more", hint="e.g. --top 5")
    with open_store(args.db, readonly=True) as store:
        if args.run_id is not None:
            row = store.get_run(args.run_id)
            if row.serial != args.serial:
                raise StoreError(
                    f"run {args.run_id} is of serial {row.serial!r}, not {args.serial!r}",
                    hint="check --run or the serial number",
                )
        else:
            runs = store.list_runs(serial=args.serial)
            if not runs:
                raise StoreError(
                    f"no run of serial {args.serial!r} in {store.location}",
                    hint="check the serial number and --db",
                )
            row = max(runs, key=lambda r: (r.started_at, r.run_id))
        board = (
            load_board(args.board)
            if args.board
            else load_stored_board(row.board_text, row.board_file)
        )
        diag = diagnose_run(store, row.run_id, board)
    for w in diag.warnings:
        print(f"warning: {w}", file=sys.stderr)
    if args.json:
        print(jsontext.dumps(diag.to_dict(top=args.top), indent=2, default=_json))
        return 0
    _print(diag, args.top)
    return 0


def _json(o: Any) -> Any:
    if isinstance(o, float) and not math.isfinite(o):
        return None
    return str(o)


def _fmt(x: Any) -> str:
    if x is None:
        return "-"
    if isinstance(x, str):
        return x
    if isinstance(x, float) and not math.isfinite(x):
        return "dead" if x < 0 else "-"
    return f"{x:.4g}"


def _print(diag: Diagnosis, top: int) -> None:
    from rich.table import Table
    from rich.text import Text

    from harness.cli.term import make_console

    console = make_console(width=120) if not sys.stdout.isatty() else make_console()
    console.print(
        Text.assemble(
            ("Diagnosis", "bold"), f" serial {diag.serial}, run {diag.run_id}, {diag.board_name}"
        )
    )
    if diag.screened_out:
        console.print(
            "channels that agree with a good board (not searched): " + ", ".join(diag.screened_out)
        )
    t = Table(show_lines=False)
    for col in ("#", "candidate", "fitted", "score", "share", "explains", "contradicts"):
        t.add_column(col)
    for i, c in enumerate(diag.top(top), start=1):
        t.add_row(
            str(i),
            _label(c),
            _fmt(c.fitted_value),
            f"{c.score:.1f}",
            f"{100 * c.probability:.0f} %",
            ", ".join(c.explained) or "-",
            ", ".join(c.contradicts) or "-",
        )
    console.print(t)
    for i, c in enumerate(diag.top(min(top, 3)), start=1):
        e = Table(title=Text(f"#{i} {_label(c)}: evidence"), title_justify="left")
        for col in ("measurement", "measured", "predicted", "sigma", "z"):
            e.add_column(col)
        for ev in c.evidence:
            z = ev.z
            e.add_row(
                ev.name,
                _fmt(ev.measured),
                _fmt(ev.predicted),
                _fmt(ev.sigma),
                "-" if z is None else f"{z:+.1f}",
            )
        console.print(e)


def _label(c: Candidate) -> str:
    if c.kind == "none":
        return "no fault (a good board)"
    tail = f" ({c.detail})" if c.detail else ""
    dead = " [degraded model]" if c.degraded else ""
    return f"{c.ref} {c.kind}{tail}{dead}"
