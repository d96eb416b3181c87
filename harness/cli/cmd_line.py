"""``stageproof line``: the production loop — scan, test, big verdict, next board.

The operator's name is asked once; then serial numbers are read one line at a time
(typed, or from a barcode scanner acting as a keyboard).  The verdict is drawn as a big
word in block letters inside a coloured frame, so it reads from a metre away, for
colour-blind operators and on a monochrome terminal alike.

Exit status: 0 when the session ends normally (quit / exit typed, end of input, Ctrl-C at
the prompt), 2 when it ends on an error (a setup or store error, an instrument lost and not
reconnected).
"""

from __future__ import annotations

import argparse
import os
import sys
import unicodedata
from typing import TYPE_CHECKING, Any, Literal, TextIO

from harness.cli import run_args
from harness.cli.run_args import RichProgress
from harness.cli.term import make_console
from harness.errors import ValueParseError
from harness.outcomes import look
from harness.run.line import BoardOutcome, LineHeader, SessionSummary, run_line
from harness.run.runner import ensure_limits, prepare
from harness.run.sequence import RunResult
from harness.store import redact

if TYPE_CHECKING:
    from harness.instruments.bench import Instruments

#: Longest line read from the terminal; a longer one (two labels, a stuck key) is read to
#: its end and refused, so its tail never becomes the next serial number.
MAX_LINE = 4096
MAX_OPERATOR = 64
#: The prompts say what they want: asked once, then before each board.
OPERATOR_PROMPT = "name of the operator> "
SERIAL_PROMPT = "scan or type the board's serial> "

# Block letters of our own design: 7 rows, each "X" drawn two cells wide.
_GLYPHS: dict[str, tuple[str, ...]] = {
    "P": ("XXXXX ", "XX  XX", "XX  XX", "XXXXX ", "XX    ", "XX    ", "XX    "),
    "A": (" XXXX ", "XX  XX", "XX  XX", "XXXXXX", "XX  XX", "XX  XX", "XX  XX"),
    "S": (" XXXXX", "XX    ", "XX    ", " XXXX ", "    XX", "    XX", "XXXXX "),
    "F": ("XXXXXX", "XX    ", "XX    ", "XXXXX ", "XX    ", "XX    ", "XX    "),
    "I": ("XXXXXX", "  XX  ", "  XX  ", "  XX  ", "  XX  ", "  XX  ", "XXXXXX"),
    "L": ("XX    ", "XX    ", "XX    ", "XX    ", "XX    ", "XX    ", "XXXXXX"),
    " ": ("   ",) * 7,
}


def big_word(word: str, ink: str = "█") -> list[str]:
    """``word`` (letters of PASS / FAIL) in 7-row block letters, one string per row."""
    rows = [""] * 7
    for i, ch in enumerate(word.upper()):
        glyph = _GLYPHS.get(ch)
        if glyph is None:
            raise ValueError(f"no block letter for {ch!r}")
        for r in range(7):
            cells = "".join(ink * 2 if c == "X" else "  " for c in glyph[r])
            rows[r] += ("  " if i else "") + cells
    width = max(len(r) for r in rows)
    return [r.ljust(width) for r in rows]


def read_line(stream: TextIO, limit: int = MAX_LINE) -> str | None:
    """One line from ``stream`` without its ending; None at end of input.  A line longer
    than ``limit`` is consumed to its end and returned truncated to ``limit + 1``
    characters (so it is still refused as too long)."""
    line = stream.readline(limit)
    if line == "":
        return None
    if len(line) >= limit and not line.endswith("\n"):
        while True:  # drain the rest of the over-long line
            more = stream.readline(limit)
            if more == "" or more.endswith("\n"):
                break
        return line[: limit + 1] + "…"
    return line.rstrip("\r\n")


def discard_typeahead(stream: TextIO) -> bool:
    """Throw away whatever was typed on the terminal ``stream`` and not read yet; True when
    something could be discarded this way (``stream`` is a terminal).

    A line typed or scanned while a board is under test would otherwise become the answer
    to the next prompt at once: the next board's serial before anyone could change the
    board, so one physical board would be stored under two serials.  termios.tcflush with
    TCIFLUSH drops data received but not read (POSIX termios, tcflush()).  Input that is
    not a terminal (a pipe, a file) is a script written beforehand: its lines are taken in
    order and nothing is discarded.  In canonical mode a terminal read returns at most one
    line, so Python's own buffer holds nothing beyond the line already returned.
    """
    try:
        fd = stream.fileno()
    except (AttributeError, OSError, ValueError):
        return False  # an in-memory stream: a script
    if not os.isatty(fd):
        return False
    try:
        import termios
    except ImportError:  # not a POSIX system
        return False
    try:
        termios.tcflush(fd, termios.TCIFLUSH)
    except (termios.error, OSError):
        return False
    return True


def check_operator(name: str) -> str:
    """An operator name: printable, at most 64 characters."""
    s = name.strip()
    if not s:
        raise ValueParseError(name, "the operator name is empty", hint="type your name or id")
    if len(s) > MAX_OPERATOR:
        raise ValueParseError(s[:20] + "...", f"longer than {MAX_OPERATOR} characters")
    for ch in s:
        if not ch.isprintable() or unicodedata.category(ch).startswith("C"):
            raise ValueParseError(
                s.encode("unicode_escape").decode(),
                f"operator name has a control character (U+{ord(ch):04X})",
            )
    return s


class StepProgress:
    """One dim line per step; measurements only with ``details``."""

    def __init__(self, console: Any, details: bool = False) -> None:
        self.console = console
        self.inner = RichProgress(console) if details else None

    def step(self, name: str, text: str) -> None:
        if self.inner is not None:
            self.inner.step(name, text)
        else:
            from rich.text import Text

            self.console.print(Text(f"  {name}: {text}", style="dim"))

    def measurement(self, row: Any) -> None:
        if self.inner is not None:
            self.inner.measurement(row)

    def note(self, text: str) -> None:
        if self.inner is not None:
            self.inner.note(text)


class TerminalUI:
    """The loop's terminal: rich output on ``console``, lines from ``stdin``."""

    def __init__(self, console: Any, stdin: TextIO, *, details: bool = False) -> None:
        self.console = console
        self.stdin = stdin
        self.details = details
        enc = (getattr(console, "encoding", "") or "").lower()
        self.ink = "█" if "utf" in enc else "#"

    def prompt(self, text: str) -> str | None:
        """Ask on a fresh line of input: anything typed on the terminal before the prompt
        appears (while a board was under test) is discarded, see :func:`discard_typeahead`."""
        discard_typeahead(self.stdin)
        self.console.print(text, end="", highlight=False, markup=False, soft_wrap=True)
        self.console.file.flush()
        return read_line(self.stdin)

    def header(self, info: LineHeader) -> None:
        from rich.panel import Panel
        from rich.table import Table

        t = Table.grid(padding=(0, 2))
        t.add_column(style="bold")
        t.add_column()
        t.add_row("board", f"{info.board_name} ({info.part_number} rev {info.revision})")
        t.add_row("board file", info.board_file)
        t.add_row("station", info.station)
        t.add_row("fixture", info.fixture)
        t.add_row("operator", info.operator)
        t.add_row("results", redact(info.db))
        t.add_row("limits digest", info.limits_digest)
        if info.limits_method:
            t.add_row("limits", info.limits_method)
        for role, idn in info.instruments.items():
            t.add_row(role, idn)
        self.console.print(Panel(t, title="stageproof production line", expand=False))
        self.console.print(
            "Scan or type a serial number and press Enter; quit, exit or Ctrl-C ends.",
            highlight=False,
        )

    def read_serial(self) -> str | None:
        return self.prompt(SERIAL_PROMPT)

    def ask(self, question: str, *, default: bool) -> bool:
        hint = "[Y/n]" if default else "[y/N]"
        while True:
            answer = self.prompt(f"{question} {hint} ")
            if answer is None:
                self.console.print("")
                return default
            a = answer.strip().lower()
            if not a:
                return default
            if a in ("y", "yes"):
                return True
            if a in ("n", "no"):
                return False
            self.console.print("answer y or n", highlight=False)

    def message(self, text: str, kind: Literal["info", "warning", "error"] = "info") -> None:
        style = {"info": "", "warning": "bold yellow", "error": "bold red"}[kind]
        label = {"info": "", "warning": "WARNING: ", "error": "ERROR: "}[kind]
        self.console.print(
            f"{label}{text}", style=style or None, highlight=False, markup=False, soft_wrap=True
        )

    def testing(self, serial: str, retest: int) -> None:
        from rich.text import Text

        flag = f"  RETEST #{retest}" if retest else ""
        self.console.rule(Text(f"testing {serial}{flag}"))

    def verdict(self, outcome: BoardOutcome, result: RunResult | None) -> None:
        from rich.align import Align
        from rich.panel import Panel
        from rich.text import Text

        serial = outcome.serial
        retest = f"RETEST #{outcome.retest}" if outcome.retest else "first test"
        if outcome.outcome == "ABORTED":
            body = Text(f"ABORTED — {outcome.reason or 'no verdict'}", style="bold")
            self.console.print(
                Panel(body, title=Text(f"{serial} · {retest}"), border_style="yellow", expand=False)
            )
            self.console.print(
                f"VERDICT {serial}: ABORTED ({retest})", highlight=False, soft_wrap=True
            )
            return
        shown = look(outcome.outcome)
        big = Text("\n".join(big_word(outcome.outcome, self.ink)), style=shown.console_banner)
        lines: list[Any] = [Align.center(big)]
        if outcome.failing:
            lines.append(Text("not accepted: " + ", ".join(outcome.failing)))
        if result is not None and result.reason:
            lines.append(Text(f"reason: {result.reason}"))
        from rich.console import Group

        self.console.print(
            Panel(
                Group(*lines),
                title=Text(f"{serial} · {retest}"),
                subtitle=Text(f"run {outcome.run_id}"),
                border_style=shown.console_style,
                padding=(1, 2),
            )
        )
        # the word once more as plain text: logs, screen readers, copy and paste
        self.console.print(
            f"VERDICT {serial}: {outcome.outcome} ({retest})", highlight=False, soft_wrap=True
        )

    def summary(self, s: SessionSummary) -> None:
        from rich.table import Table

        t = Table(title=f"session summary (ended by {s.ended_by or 'operator'})")
        for col in (
            "boards",
            "pass",
            "fail",
            "yield",
            "first-pass yield",
            "runs",
            "retests",
            "aborted",
            "refused scans",
        ):
            t.add_column(col, justify="right")
        y = "-" if s.yield_percent is None else f"{s.yield_percent:.1f} %"
        fp = "-" if s.first_pass_percent is None else f"{s.first_pass_percent:.1f} %"
        t.add_row(
            str(s.boards),
            str(s.passed),
            str(s.failed),
            y,
            fp,
            str(s.runs),
            str(s.retests),
            str(s.aborted),
            str(s.refused),
        )
        self.console.print(t)
        self.console.print(
            f"SUMMARY boards={s.boards} pass={s.passed} fail={s.failed} yield={y} "
            f"runs={s.runs} retests={s.retests} aborted={s.aborted} refused={s.refused}",
            highlight=False,
            soft_wrap=True,
        )
        if s.error:
            self.console.print(f"session ended on: {s.error}", style="bold red", markup=False)

    def progress(self) -> StepProgress:
        return StepProgress(self.console, self.details)


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "line",
        help="production loop: scan a serial, test, show the verdict, next board",
        description="Test board after board on one station: limits computed once, "
        "instruments kept connected, a big PASS/FAIL after each board, a session "
        "summary at the end (quit, exit, end of input or Ctrl-C at the prompt).",
    )
    run_args.add_bench_files(p)
    run_args.add_db(p)
    p.add_argument("--operator", default=None, help="who tests (asked once when not given)")
    p.add_argument("--scanner-prefix", default="", help="text the scanner sends before a code")
    p.add_argument("--scanner-suffix", default="", help="text the scanner sends after a code")
    p.add_argument("--details", action="store_true", help="print every measurement")
    run_args.add_run_settings(p)
    p.add_argument(
        "--max-points",
        type=int,
        default=None,
        metavar="N",
        help="cap on the record length (shorter: faster, higher THD floor)",
    )
    p.add_argument(
        "--no-extra-frequencies",
        action="store_true",
        help="skip the gain at the board's extra frequencies (information only)",
    )
    p.set_defaults(func=run)


def run(args: argparse.Namespace, *, stdin: TextIO | None = None, console: Any = None) -> int:
    from harness.store import DEFAULT_DB

    stdin = stdin if stdin is not None else sys.stdin
    console = console or make_console()
    if args.max_points is not None and args.max_points < 1:
        raise ValueParseError(str(args.max_points), "--max-points must be a positive count")
    # Every file is read, the station locked and made safe (a crashed session may have left
    # it driving a board) and the limits computed before the operator is asked anything.
    from harness.run.safety import connect_safe
    from harness.run.station_lock import station_lock

    prep = prepare(args.board, args.fixture, args.station, defer_limits=True)
    with station_lock(prep.station):
        instruments: Instruments | None = connect_safe(prep.station, relays=prep.fixture.relays)
        try:
            prep = ensure_limits(prep)
            ui = TerminalUI(console, stdin, details=args.details)
            operator = _operator(args, ui, console)
            if operator is None:
                return 0  # nobody there: nothing tested
            kw: dict[str, Any] = {}
            if args.max_points is not None:
                kw["max_points"] = args.max_points
            options = run_args.run_options(
                args, operator=operator, extra_frequencies=not args.no_extra_frequencies, **kw
            )
            handed, instruments = instruments, None  # the session closes it from here
            summary = run_line(
                prep,
                args.db or DEFAULT_DB,
                ui,
                operator=operator,
                options=options,
                scanner_prefix=args.scanner_prefix,
                scanner_suffix=args.scanner_suffix,
                instruments=handed,
            )
        finally:
            if instruments is not None:
                instruments.close()
    return 2 if summary.error else 0


def _operator(args: argparse.Namespace, ui: TerminalUI, console: Any) -> str | None:
    """The operator's name from --operator, else asked once; None when nobody answers."""
    if args.operator is not None:
        return check_operator(args.operator)
    while True:
        try:
            name = ui.prompt(OPERATOR_PROMPT)
        except KeyboardInterrupt:
            console.print("")
            return None
        if name is None:
            return None
        try:
            return check_operator(name)
        except ValueParseError as exc:
            ui.message(str(exc), "error")
