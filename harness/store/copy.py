"""Copy runs between results databases: a station's SQLite file into the line's server.

A run is recognised by its unique ``run_token`` (made when it began, kept by every copy),
so copying the same file twice copies nothing the second time.  Each run goes over in one
transaction with all its measurements, sweep points and raw records: an interrupted copy
leaves whole runs or none.  Runs still ``running`` are left for a later copy.  A retest
number already taken at the destination (the same serial tested elsewhere) becomes the
next free one, so numbers stay 0..n-1 there.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from harness.errors import StoreError
from harness.store import is_server_url, open_store, sqlite_path


@dataclass(frozen=True)
class CopyResult:
    source: str
    target: str
    copied: int
    skipped: int  # already at the destination
    running: int  # still running at the source: not copied


def _same_file(a: str | Path, b: str | Path) -> bool:
    if is_server_url(a) or is_server_url(b):
        return False
    pa, pb = sqlite_path(a), sqlite_path(b)
    try:
        return pa.exists() and pb.exists() and os.path.samefile(pa, pb)
    except OSError:
        return False


def copy_runs(source: str | Path, target: str | Path) -> CopyResult:
    """Copy every finished run of ``source`` that ``target`` lacks; create ``target``'s
    schema if needed.  The same database on both sides is refused before anything is
    written."""
    if not is_server_url(target):
        sqlite_path(target)  # an unknown scheme fails before anything is opened
    if _same_file(source, target):
        raise StoreError(
            f"--from and --to name the same database ({source})",
            hint="copy from a station's file into another database",
        )
    with open_store(source, readonly=True) as src:
        same = False
        if is_server_url(target) or sqlite_path(target).exists():
            try:
                with open_store(target, readonly=True) as probe:
                    same = probe.identity() == src.identity()
            except StoreError as exc:  # no schema there yet: opening for writing decides
                text = str(exc)
                if "no stageproof results" not in text and "not a stageproof" not in text:
                    raise
        if same:
            raise StoreError(
                f"--from {src.location} and --to are the same database",
                hint="copy from a station's file into another database",
            )
        with open_store(target) as dst:
            have = dst.run_tokens()
            copied = skipped = running = 0
            for token, run in src.finished_runs_to_copy():
                if run is None:
                    running += 1
                elif token in have:
                    skipped += 1
                elif dst.insert_full_run(run):
                    copied += 1
                    have.add(token)
                else:
                    skipped += 1
            return CopyResult(src.location, dst.location, copied, skipped, running)


__all__ = ["CopyResult", "copy_runs"]
