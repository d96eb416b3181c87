"""``stageproof demo``: test three demo boards on a simulated bench, no hardware needed.

Starts the simulated bench itself (SCPI servers on 127.0.0.1, ephemeral ports, no
latency), tests three boards of the demo type limits/demo-twin-preamp.toml (shipped in the
package, so an installed copy works from any folder): one good, one with the emitter
bypass capacitor C102 open (channel A's gain falls), one with bias resistor R201 drifted
to 1.5x (channel B clips early on one half-cycle), and prints the verdicts.
"""

from __future__ import annotations

import argparse
import shlex
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from harness.run.sequence import RunResult

from harness.outcomes import look
from harness.store import redact

DEMO_BOARD = "demo-twin-preamp.toml"
DEMO_FIXTURE = "fixture-twin-preamp.toml"
DEMO_DB = "stageproof-demo.db"


@dataclass(frozen=True)
class DemoBoard:
    serial: str
    faults: tuple[str, ...]
    story: str


DEMO_BOARDS: tuple[DemoBoard, ...] = (
    DemoBoard("DEMO-0001", (), "good board"),
    DemoBoard("DEMO-0002", ("C102:open",), "C102 open (emitter bypass, channel A)"),
    DemoBoard("DEMO-0003", ("R201:drift=1.5",), "R201 drifted x1.5 (bias, channel B)"),
)


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "demo",
        help="test three demo boards on a simulated bench",
        description="Start a simulated bench on 127.0.0.1, test a good demo "
        "board and two with injected component faults, store the results "
        "and print the verdicts.",
    )
    p.add_argument("--db", default=DEMO_DB, help=f"results database (default: ./{DEMO_DB})")
    p.add_argument(
        "--keep",
        action="store_true",
        help="keep the working folder (station file, fixture) and print where",
    )
    p.add_argument(
        "--dialect",
        choices=("default", "benchtop"),
        default="default",
        help="which simulated instruments: the SCPI-99 digitiser and generator (default) "
        "or the benchtop scope and generator, each driven by its shipped profile",
    )
    p.set_defaults(func=run)


def run_demo(
    db: str | Path,
    workdir: Path,
    *,
    progress_console=None,
    settle_wait_s: float | None = None,
    dialect: str = "default",
) -> list[tuple[DemoBoard, RunResult]]:
    """Run the three demo boards; returns (board, RunResult) pairs."""
    from harness.io.board import load_board
    from harness.io.packaged import packaged
    from harness.model import compute_limits
    from harness.run.runner import execute, prepare
    from harness.run.sequence import RunOptions
    from harness.sim.bench import SimBench

    board_file = packaged("limits", DEMO_BOARD)
    fixture_file = packaged("fixtures", DEMO_FIXTURE)
    board = load_board(board_file)
    limits = compute_limits(board)
    results = []
    for demo in DEMO_BOARDS:
        station_file = workdir / f"station-{demo.serial}.toml"
        with SimBench(
            board, faults=demo.faults, latency=False, host="127.0.0.1", dialect=dialect
        ) as bench:
            bench.write_station(station_file)
            prep = prepare(board_file, fixture_file, station_file, limits=limits)
            progress = None
            if progress_console is not None:
                from harness.cli.run_args import RichProgress

                progress_console.rule(f"{demo.serial}: {demo.story}")
                progress = RichProgress(progress_console)
            # The simulated board is in steady state at once: verifying settling by a
            # repeated record costs less than waiting the model's settle time, and the run
            # record says which was done.
            opts = RunOptions(
                operator="demo",
                settle="verify" if settle_wait_s is None else "wait",
                settle_wait_s=settle_wait_s,
            )
            results.append((demo, execute(prep, demo.serial, db, options=opts, progress=progress)))
    return results


def run(args: argparse.Namespace) -> int:
    from rich.table import Table
    from rich.text import Text

    from harness.cli.term import make_console

    console = make_console()
    t0 = time.perf_counter()
    tmp = tempfile.mkdtemp(prefix="stageproof-demo-")
    workdir = Path(tmp)
    try:
        results = run_demo(
            args.db, workdir, progress_console=console, dialect=getattr(args, "dialect", "default")
        )
    finally:
        if not args.keep:
            import shutil

            shutil.rmtree(workdir, ignore_errors=True)
    table = Table(title="stageproof demo: three boards of " + DEMO_BOARD)
    table.add_column("serial")
    table.add_column("board")
    table.add_column("verdict")
    table.add_column("failing measurements")
    for demo, res in results:
        colour = look(res.verdict).console_style
        failing = [
            f"{m.channel + ' ' if m.channel else ''}{m.name} ({m.decision})"
            for m in res.measurements
            if not _accepted(m.decision)
        ]
        table.add_row(
            demo.serial,
            demo.story,
            Text(str(res.verdict), style=colour),
            ", ".join(failing) or "-",
        )
    console.print(table)
    console.print(
        Text(f"results stored in {redact(str(args.db))}; {time.perf_counter() - t0:.1f} s"),
        highlight=False,
    )
    if args.keep:
        console.print(Text(f"working folder kept: {workdir}"), highlight=False)
    console.print("next, on the demo's results:", highlight=False)
    for line in follow_up_commands(args.db):
        console.print(Text(f"  {line}"), highlight=False, soft_wrap=True)
    return 0


def follow_up_commands(db: str | Path) -> list[str]:
    """The commands to look at the demo's results, each with ``--db`` of the demo's database:
    without it they would look for the default results file and find none.  A server URL is
    shown without its password (libpq takes it from PGPASSWORD or ~/.pgpass)."""
    q = shlex.quote(redact(str(db)).replace(":***@", "@"))
    _good, gain_fault, bias_fault = (d.serial for d in DEMO_BOARDS)
    return [
        f"stageproof results --db {q}",
        f"stageproof report board --db {q} --serial {gain_fault}",
        f"stageproof diagnose {bias_fault} --db {q}",
        f"stageproof report summary --db {q}",
    ]


def _accepted(decision: str) -> bool:
    from harness.run.decisions import STRICT

    return STRICT.accepts(decision)
