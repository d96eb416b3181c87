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
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is None:
        parser.print_help()
        return 2
    if args.verbose:
        import logging

        logging.basicConfig(level=logging.DEBUG, format="%(name)s: %(message)s")
    try:
        return int(args.func(args) or 0)
    except StageproofError as exc:
        print(f"stageproof: error: {exc}", file=sys.stderr)
        return exc.exit_status
    except KeyboardInterrupt:
        print("stageproof: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
