"""Pieces shared by the commands that test boards (``run``, ``line``, ``characterize``,
``demo``): the bench-file arguments, the run settings, the options built from them and the
progress display, so one option means the same in every command."""

from __future__ import annotations

import argparse
from typing import Any

from harness.run.sequence import RunOptions

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
        value = (
            (getattr(row, "reason_label", None) or "-") if row.value is None else f"{row.value:.5g}"
        )
        lim = limits_text(row)
        ch = f"{row.channel}: " if row.channel else ""
        self.console.print(
            f"    {ch}{row.name} = {value} {row.unit} {lim} [{colour}]{row.decision}[/{colour}]",
            highlight=False,
        )

    def note(self, text: str) -> None:
        self.console.print(f"    [dim]{text}[/dim]")


def limits_text(row: Any) -> str:
    """A row's limits and uncertainty as ``[low .. high] U=u`` (empty without limits)."""
    if row.low is None and row.high is None:
        return ""
    lo = "-inf" if row.low is None else f"{row.low:.5g}"
    hi = "+inf" if row.high is None else f"{row.high:.5g}"
    u = "" if row.uncertainty is None else f" U={row.uncertainty:.2g}"
    return f"[{lo} .. {hi}]{u}"


def add_bench_files(p: argparse.ArgumentParser, *, serial_help: str | None = None) -> None:
    """--station, --fixture, --board (and --serial when ``serial_help`` is given)."""
    p.add_argument("--station", required=True, help="station file (TOML)")
    p.add_argument("--fixture", required=True, help="fixture file (TOML)")
    p.add_argument("--board", required=True, help="board file (TOML, limits/)")
    if serial_help is not None:
        p.add_argument("--serial", required=True, help=serial_help)


def add_db(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", default=None, help="results database (default: stageproof-results.db)")


def add_settle_wait(
    p: argparse.ArgumentParser,
    help: str = "seconds to wait after each level change (default: the model's settle time)",
) -> None:
    p.add_argument("--settle-wait", type=float, default=None, metavar="S", help=help)


def add_run_settings(p: argparse.ArgumentParser) -> None:
    """The production run's settings: raw records, settling, the decision policy."""
    p.add_argument("--keep-records", action="store_true", help="store the raw records too")
    add_settle_wait(p)
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


def run_options(args: argparse.Namespace, *, operator: str, **more: Any) -> RunOptions:
    """RunOptions from the arguments of :func:`add_run_settings` (``more`` passed on)."""
    from harness.run.decisions import DecisionPolicy

    return RunOptions(
        operator=operator,
        keep_records=args.keep_records,
        settle="verify" if args.verify_settling else "wait",
        settle_wait_s=args.settle_wait,
        policy=DecisionPolicy(accept_conditional_pass=args.accept_conditional_pass),
        **more,
    )
