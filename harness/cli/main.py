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
from collections.abc import Sequence

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
    parser.add_argument("-v", "--verbose", action="store_true", help="log instrument traffic")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        importlib.import_module(f"harness.cli.cmd_{name}").register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run one sub-command; its exit status (0 PASS or done, 1 FAIL, 2 error or aborted).

    Ctrl-C anywhere, start-up included (reading files, computing limits, connecting), ends
    in one line and status 2 like any other abort: 1 would read as FAIL to a script, and a
    command that tests boards reports what it switched off and stored itself."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if getattr(args, "func", None) is None:
            parser.print_help()
            return 2
        if args.verbose:
            import logging

            logging.basicConfig(level=logging.DEBUG, format="%(name)s: %(message)s")
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


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
