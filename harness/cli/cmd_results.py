"""``stageproof results``: list and filter stored runs, or show one run's measurements.

Reads the database read-only, so listing never creates a file or disturbs a station that
is writing.  A table for people by default; ``--json`` and ``--csv`` for other programs.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from dataclasses import asdict
from typing import TYPE_CHECKING, Any

from harness import jsontext
from harness.cli.run_args import value_text
from harness.errors import ValueParseError
from harness.outcomes import look
from harness.quantities import lookup
from harness.store import (
    DEFAULT_DB,
    STATUSES,
    VERDICTS,
    MeasurementRow,
    RunRow,
    open_store,
    parse_when,
)
from harness.store.frame import RUN_FIELDS
from harness.store.rows import MEASUREMENT_FIELDS

if TYPE_CHECKING:
    from rich.console import Console

#: A measurement's columns in the CSV and JSON listing (its detail is shown by ``show``).
_MEAS_FIELDS = tuple(f for f in MEASUREMENT_FIELDS if f != "detail_json")


def _style(word: str | None) -> str:
    return look(word).console_style


def _date(text: str) -> str:
    """argparse type: check the date now (exit 2 with usage) but keep the user's text,
    so a bare date still means the whole day."""
    try:
        parse_when(text)
    except ValueParseError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    return text


def _positive(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"{text!r} is not a positive whole number")
    return n


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "results",
        help="list and filter stored runs, or show one run's measurements",
        description="List runs stored in the results database (newest first), filtered by "
        "serial, status, verdict, date and board; --run ID shows that run's measurements "
        "with their limits and decisions.  Times are UTC, shown and read alike.",
    )
    p.add_argument(
        "--db",
        default=DEFAULT_DB,
        metavar="PATH",
        help=f"results database (default: {DEFAULT_DB} in the current folder)",
    )
    p.add_argument("--serial", metavar="S", help="only this serial number")
    p.add_argument("--status", choices=STATUSES, help="only runs in this state")
    p.add_argument("--verdict", type=str.upper, choices=VERDICTS, help="only this verdict")
    p.add_argument(
        "--since",
        type=_date,
        metavar="DATE",
        help="started on or after (YYYY-MM-DD or ISO date-time; UTC, as listed, unless "
        "an offset such as +02:00 is given)",
    )
    p.add_argument(
        "--until",
        type=_date,
        metavar="DATE",
        help="started on or before (UTC; a bare date includes that whole day)",
    )
    p.add_argument("--board", metavar="PN", help="only this part number (or board name)")
    p.add_argument("--limit", type=_positive, metavar="N", help="at most N runs")
    fmt = p.add_mutually_exclusive_group()
    fmt.add_argument("--json", action="store_true", help="print JSON")
    fmt.add_argument("--csv", action="store_true", help="print CSV")
    p.add_argument(
        "--run", type=_positive, metavar="ID", help="show this run's header and measurements"
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    with open_store(args.db, readonly=True) as store:
        if args.run is not None:
            row = store.get_run(args.run)
            meas = store.measurements(args.run)
            points = store.sweep_points(args.run)
            _show_run(args, row, meas, points)
            return 0
        runs = store.list_runs(
            serial=args.serial,
            status=args.status,
            verdict=args.verdict,
            since=args.since,
            until=args.until,
            board=args.board,
            limit=args.limit,
        )
    rows = [{**r.summary(), "board_name": r.board_name} for r in runs]
    if args.json:
        sys.stdout.write(jsontext.dumps(rows, indent=2))
        sys.stdout.write("\n")
    elif args.csv:
        _write_csv(rows, _LIST_FIELDS)
    else:
        _list_table(store.location, rows)
    return 0


_LIST_FIELDS = ("run_id", *RUN_FIELDS, "reason")


def _write_csv(rows: list[dict[str, Any]], fields: tuple[str, ...]) -> None:
    writer = csv.DictWriter(
        sys.stdout, fieldnames=list(fields), extrasaction="ignore", lineterminator="\n"
    )
    writer.writeheader()
    for r in rows:
        writer.writerow({k: "" if r.get(k) is None else r[k] for k in fields})


def _fmt(x: float | None) -> str:
    return "" if x is None else f"{x:.6g}"


def _when(text: str | None) -> str:
    """Seconds are enough on screen; JSON and CSV keep the full stamp."""
    return "" if not text else text[:19].replace("T", " ")


def _console() -> Console:
    """A console for the terminal's width; 160 columns when piped, so a file keeps
    whole rows instead of 80-column folds."""
    from harness.cli.term import make_console

    console = make_console()
    if not console.is_terminal:
        console = make_console(width=160)
    return console


def _list_table(db: str, rows: list[dict[str, Any]]) -> None:
    from rich.table import Table
    from rich.text import Text

    console = _console()
    if not rows:
        console.print(f"no runs in {db} match")
        return
    table = Table(title=Text(f"runs in {db} (UTC)"))
    for col in (
        "run",
        "serial",
        "part",
        "status",
        "verdict",
        "retest",
        "started",
        "ended",
        "station",
        "operator",
        "reason",
    ):
        table.add_column(col, overflow="fold")
    for r in rows:
        verdict = r["verdict"] or ""
        table.add_row(
            Text(str(r["run_id"])),
            Text(r["serial"]),
            Text(r["part_number"]),
            Text(r["status"]),
            Text(verdict, style=_style(verdict)),
            Text(str(r["retest"])),
            Text(_when(r["started_at"])),
            Text(_when(r["ended_at"])),
            Text(r["station"]),
            Text(r["operator"]),
            Text(r["reason"] or ""),
        )
    console.print(table)


def _show_run(
    args: argparse.Namespace, row: RunRow, meas: list[MeasurementRow], points: list[Any]
) -> None:
    mrows = [{k: getattr(m, k) for k in _MEAS_FIELDS} for m in meas]
    if args.json:
        head = asdict(row)
        head["limits"] = json.loads(head.pop("limits_json"))
        prov = head.pop("limits_provenance")
        head["limits_provenance"] = json.loads(prov) if prov else None
        doc = {
            "run": head,
            "measurements": [{**asdict(m), "reason": m.reason} for m in meas],
            "sweep_points": [asdict(p) for p in points],
        }
        sys.stdout.write(jsontext.dumps(doc, indent=2))
        sys.stdout.write("\n")
        return
    if args.csv:
        _write_csv(mrows, _MEAS_FIELDS)
        return
    from rich.table import Table
    from rich.text import Text

    console = _console()
    info = Table.grid(padding=(0, 2))
    info.add_column(style="bold")
    info.add_column(overflow="fold")
    verdict = row.verdict or "-"
    rows: tuple[tuple[str, str | Text], ...] = (
        ("run", str(row.run_id)),
        ("serial", row.serial),
        (
            "part / board",
            f"{row.part_number} / {row.board_name} ({row.board_file}, "
            f"sha256 {row.board_digest[:12]})",
        ),
        (
            "status",
            Text(f"{row.status}, verdict ") + Text(verdict, _style(verdict)),
        ),
        ("retest", str(row.retest)),
        ("started / ended (UTC)", f"{_when(row.started_at)} / {_when(row.ended_at) or '-'}"),
        ("station / fixture", f"{row.station} / {row.fixture}"),
        ("operator", row.operator),
        ("software", row.software_version),
        (
            "limits",
            f"sha256 {row.limits_digest[:12]}"
            + (f", provenance {row.limits_provenance}" if row.limits_provenance else ""),
        ),
        ("settling", row.settle_note or "-"),
        ("reason", row.reason or "-"),
    )
    for key, value in rows:
        info.add_row(key, value if isinstance(value, Text) else Text(value))
    for role, idn in sorted(row.instruments.items()):
        info.add_row(f"instrument {role}", Text(idn))
    console.print(info)
    table = Table(title=f"measurements of run {row.run_id} ({len(points)} sweep points stored)")
    for col in (
        "channel",
        "measurement",
        "value",
        "unit",
        "low",
        "high",
        "uncertainty",
        "decision",
        "step",
    ):
        table.add_column(col, overflow="fold")
    for m in meas:
        q = lookup(m.name)
        words = (q is not None and q.words) or m.value is None
        cells = (
            m.channel,
            m.name,
            value_text(m, unit=False) if words else _fmt(m.value),
            m.unit,
            _fmt(m.low),
            _fmt(m.high),
            _fmt(m.uncertainty),
        )
        table.add_row(
            *(Text(c) for c in cells),
            Text(m.decision, style=_style(m.decision)),
            Text(m.step),
        )
    console.print(table)
