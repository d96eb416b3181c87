"""``stageproof results`` shows and reads times in one zone, UTC, whatever the machine's
zone: a time copied from the listing, typed back as ``--since``/``--until``, filters on
exactly that instant.  Run in processes whose TZ is nine hours east of UTC, where reading a
naive time as local would shift every filter by nine hours."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path

from store_worker import header

from harness.store import open_store

REPO = Path(__file__).resolve().parents[2]
#: POSIX TZ syntax: the offset is west-positive, so "XST-9" is nine hours east of UTC
#: (IEEE Std 1003.1, Base Definitions, 8.3 "Other Environment Variables", TZ).
EAST_9 = "XST-9"


def _results(db: Path, *argv: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO), TZ=EAST_9, COLUMNS="200")
    return subprocess.run(
        [sys.executable, "-m", "harness.cli.main", "results", "--db", str(db), *argv],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )


def test_filters_read_the_zone_the_listing_shows(tmp_path):
    db = tmp_path / "r.db"
    with open_store(db) as store:
        run_id = store.begin_run(header("SN-TZ-1"))
        store.finish_run(run_id, "complete", "PASS")
    listing = _results(db)
    assert listing.returncode == 0, listing.stderr
    assert "(UTC)" in listing.stdout
    shown = re.search(r"\d{4}-\d\d-\d\d \d\d:\d\d:\d\d", listing.stdout)
    assert shown, listing.stdout
    started = datetime.fromisoformat(shown.group(0))
    minute = timedelta(minutes=1)

    def listed(*argv: str) -> bool:
        proc = _results(db, "--json", *argv)
        assert proc.returncode == 0, proc.stderr
        return "SN-TZ-1" in proc.stdout

    assert listed("--since", (started - minute).isoformat())
    assert not listed("--since", (started + minute).isoformat())
    assert listed("--until", (started + minute).isoformat())
    assert not listed("--until", (started - minute).isoformat())
    # the whole UTC day of the run, and an explicit offset taken as written
    assert listed("--since", started.date().isoformat(), "--until", started.date().isoformat())
    later = (started + minute + timedelta(hours=9)).isoformat() + "+09:00"
    assert not listed("--since", later)


def test_help_states_the_zone():
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.run(
        [sys.executable, "-m", "harness.cli.main", "results", "--help"],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    text = " ".join(proc.stdout.split())
    assert "UTC" in text and "local" not in text
