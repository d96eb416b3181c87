"""Pieces shared by the commands that test boards (``run``, ``line``, ``characterize``,
``demo``): the bench-file arguments, the run settings, the options built from them and the
progress display, so one option means the same in every command."""

from __future__ import annotations

import argparse
import json
import math
from typing import Any

from harness.outcomes import look
from harness.quantities import CLIP_SIDE
from harness.run.sequence import RunOptions


class RichProgress:
    """Progress lines with rich: one line per step, one per measurement."""

    def __init__(self, console: Any) -> None:
        self.console = console

    def step(self, name: str, text: str) -> None:
        from rich.text import Text

        self.console.print(Text.assemble(("> " + name, "bold"), f": {text}"))

    def measurement(self, row: Any) -> None:
        from rich.text import Text

        colour = look(row.decision).console_style
        ch = f"{row.channel}: " if row.channel else ""
        lim = limits_text(row)
        line = Text(f"    {ch}{row.name} = {value_text(row)}{' ' + lim if lim else ''} ")
        line.append(row.decision, style=colour)
        self.console.print(line, highlight=False)

    def note(self, text: str) -> None:
        from rich.text import Text

        self.console.print(Text(f"    {text}", style="dim"))


def _detail(row: Any) -> dict[str, Any]:
    text = getattr(row, "detail_json", None)
    if not text:
        return {}
    try:
        doc = json.loads(text)
    except ValueError:
        return {}
    return doc if isinstance(doc, dict) else {}


def value_text(row: Any, *, unit: bool = True) -> str:
    """A row's value with its unit, in words where a bare number would mislead: the
    clipping side as the half-cycle it names (its stored value is only the asymmetry
    figure behind it), a threshold above the safe level as ``> 0.6 V rms (safe level)``."""
    detail = _detail(row)
    suffix = f" {row.unit}" if row.unit and unit else ""
    if row.name == CLIP_SIDE.name:
        side = detail.get("side")
        word = f"{side} half-cycle" if side in ("positive", "negative") else "not determined"
        if row.value is not None:
            word += f" (asymmetry {row.value:+.3g})"
        return word
    if row.value is None:
        safe = detail.get("safe_input_vrms")
        if detail.get("result") == "threshold above safe level" and isinstance(safe, int | float):
            return f"> {safe:g}{suffix} (safe level)"
        return getattr(row, "reason_label", None) or "-"
    return f"{row.value:.5g}{suffix}"


def limits_text(row: Any) -> str:
    """A row's limits and uncertainty: ``[low .. high]``, or ``≤ high`` / ``≥ low`` for a
    one-sided limit, then ``U=u`` (empty without limits)."""
    if row.low is None and row.high is None:
        return ""
    if row.low is None:
        text = f"≤ {row.high:.5g}"
    elif row.high is None:
        text = f"≥ {row.low:.5g}"
    else:
        text = f"[{row.low:.5g} .. {row.high:.5g}]"
    u = "" if row.uncertainty is None else f" U={row.uncertainty:.2g}"
    return text + u


def add_bench_files(p: argparse.ArgumentParser, *, serial_help: str | None = None) -> None:
    """--station, --fixture, --board (and --serial when ``serial_help`` is given)."""
    p.add_argument("--station", required=True, help="station file (TOML)")
    p.add_argument("--fixture", required=True, help="fixture file (TOML)")
    p.add_argument("--board", required=True, help="board file (TOML, limits/)")
    if serial_help is not None:
        p.add_argument("--serial", required=True, help=serial_help)


def add_db(p: argparse.ArgumentParser) -> None:
    p.add_argument("--db", default=None, help="results database (default: stageproof-results.db)")


def seconds(text: str) -> float:
    """argparse type: a wait in seconds, finite and not negative (0 means no wait)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
    if not math.isfinite(value) or value < 0:
        raise argparse.ArgumentTypeError(
            f"{text!r} must be 0 or more seconds (0: no wait after a level change)"
        )
    return value


def add_settle_wait(
    p: argparse.ArgumentParser | argparse._MutuallyExclusiveGroup,
    help: str = "seconds to wait after each level change, 0 or more "
    "(default: the model's settle time)",
) -> None:
    p.add_argument("--settle-wait", type=seconds, default=None, metavar="S", help=help)


def add_run_settings(p: argparse.ArgumentParser) -> None:
    """The production run's settings: raw records, settling, the decision policy.

    ``--settle-wait`` and ``--verify-settling`` are two ways to settle and exclude each
    other: given both, the wait would be silently ignored."""
    p.add_argument("--keep-records", action="store_true", help="store the raw records too")
    settle = p.add_mutually_exclusive_group()
    add_settle_wait(settle)
    settle.add_argument(
        "--verify-settling",
        action="store_true",
        help="repeat records after level changes until they agree, instead of waiting "
        "(not with --settle-wait)",
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
