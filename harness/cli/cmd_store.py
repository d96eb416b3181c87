"""``stageproof store copy``: move a station's results into another database.

    stageproof store copy --from sqlite:///station3.db --to postgresql://user@host/line

Idempotent: runs already at the destination (by their unique run token) are skipped, so
running it again copies nothing twice.  Prints what was copied and skipped.
"""

from __future__ import annotations

import argparse

from harness.errors import StoreError


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "store",
        help="results database tools (copy runs between databases)",
        description="Tools for the results database.",
    )
    sub = p.add_subparsers(dest="store_command", metavar="ACTION")
    cp = sub.add_parser(
        "copy",
        help="copy runs that the destination lacks (by run token); twice copies nothing twice",
        description="Copy every finished run of --from that --to does not hold yet, with its "
        "measurements, sweep points and raw records, one run per transaction.  Runs still "
        "running are left for a later copy.",
    )
    cp.add_argument(
        "--from",
        dest="source",
        required=True,
        metavar="URL",
        help="database to read (file path, sqlite:///file.db or postgresql://...)",
    )
    cp.add_argument(
        "--to",
        dest="target",
        required=True,
        metavar="URL",
        help="database to add the runs to (created if it is a new SQLite file)",
    )
    cp.set_defaults(func=run_copy)
    p.set_defaults(func=lambda args: _no_action(p))


def _no_action(p: argparse.ArgumentParser) -> int:
    p.print_help()
    return 2


def run_copy(args: argparse.Namespace) -> int:
    from harness.store.copy import copy_runs

    if not args.source.strip() or not args.target.strip():
        raise StoreError("--from and --to need a database", hint="e.g. --from station3.db")
    res = copy_runs(args.source, args.target)
    print(
        f"copied {res.copied} run(s) from {res.source} to {res.target}; skipped "
        f"{res.skipped} already there"
        + (f", {res.running} still running (copy again once they end)" if res.running else "")
    )
    return 0
