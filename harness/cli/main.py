"""The ``stageproof`` command: one sub-command per module ``harness.cli.cmd_<name>``.

Each command module exposes ``register(subparsers)``, which adds its parser and sets
``func(args) -> int`` as the parser default.  ``main`` turns every
:class:`~harness.errors.StageproofError` into one line on stderr and exit status 2, so a
user mistake never ends in a traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Callable, Sequence

from harness import __version__
from harness.errors import StageproofError

#: Sub-command modules, in the order ``--help`` lists them.
COMMANDS: tuple[str, ...] = (
    "demo",
    "run",
    "line",
    "limits",
    "analyze",
    "sim",
    "results",
    "report",
    "diagnose",
    "characterize",
    "store",
    "web",
)


class _Parser(argparse.ArgumentParser):
    """argparse exits with status 2 on usage errors already; keep its one-line message."""


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stageproof",
        description="Automated bench test of amplifier boards against limits computed "
        "from a model of the board.",
    )
    parser.add_argument("--version", action="version", version=f"stageproof {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0, help=_VERBOSE_HELP)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        importlib.import_module(f"harness.cli.cmd_{name}").register(sub)
    _verbose_everywhere(parser)
    return parser


_VERBOSE_HELP = (
    "SCPI trace on stderr: every command and reply with its timing (-vv: all debug logging); "
    "accepted before or after the sub-command"
)


def _verbose_everywhere(parser: argparse.ArgumentParser) -> None:
    """``-v`` after the sub-command too (``stageproof run ... -v``): every sub-parser takes
    it, counting into the same place, and leaves the value alone when it is not given."""
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for child in action.choices.values():
                if not any("--verbose" in a.option_strings for a in child._actions):
                    child.add_argument(
                        "-v",
                        "--verbose",
                        action="count",
                        default=argparse.SUPPRESS,
                        help=_VERBOSE_HELP,
                    )
                _verbose_everywhere(child)


def _start_trace(level: int) -> Callable[[], None]:
    """Send the SCPI trace (and with -vv everything at DEBUG) to stderr, timed from now."""
    import logging
    import time

    t0 = time.perf_counter()

    class _Since(logging.Formatter):
        def format(self, record: logging.LogRecord) -> str:
            return f"{time.perf_counter() - t0:9.3f} s  {record.getMessage()}"

    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(_Since())
    if level >= 2:
        logging.basicConfig(level=logging.DEBUG, format="%(name)s: %(message)s")
    trace = logging.getLogger("harness.instruments.trace")
    old = (trace.level, trace.propagate)
    trace.setLevel(logging.INFO)
    trace.addHandler(handler)
    trace.propagate = False

    def stop() -> None:
        trace.removeHandler(handler)
        trace.setLevel(old[0])
        trace.propagate = old[1]

    return stop


def main(argv: Sequence[str] | None = None) -> int:
    """Run one sub-command; its exit status (0 PASS or done, 1 FAIL, 2 error or aborted).

    Ctrl-C anywhere, start-up included (reading files, computing limits, connecting), ends
    in one line and status 2 like any other abort: 1 would read as FAIL to a script, and a
    command that tests boards reports what it switched off and stored itself."""
    stop_trace = None
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if getattr(args, "func", None) is None:
            parser.print_help()
            return 2
        if getattr(args, "verbose", 0):
            stop_trace = _start_trace(int(args.verbose))
        return int(args.func(args) or 0)
    except StageproofError as exc:
        print(f"stageproof: error: {exc}", file=sys.stderr)
        return exc.exit_status
    except KeyboardInterrupt:
        print("stageproof: error: interrupted by the operator (Ctrl-C)", file=sys.stderr)
        return 2
    except RecursionError:
        # Only a pathological input gets here (the file readers refuse deep nesting first).
        print(
            "stageproof: error: input nested too deeply to process (fix: check the file "
            "for runaway brackets)",
            file=sys.stderr,
        )
        return 2
    except BrokenPipeError:
        return 0
    finally:
        if stop_trace is not None:
            stop_trace()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
