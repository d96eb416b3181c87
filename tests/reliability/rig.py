"""Shared rig of the reliability suite: a small realistic board, its fixture, a started
simulated bench with short timeouts, and read-only looks into a results database.

The board is the demo twin preamp cut to channel A, with 2,000 Monte Carlo samples and no
extra frequencies: the same circuit and sequence, at a third of the cost per run, so the
suite can afford hundreds of runs in CI.  It is derived from limits/demo-twin-preamp.toml
at test time, so it follows every change of the demo board.
"""

from __future__ import annotations

import math
import os
import re
import sqlite3
import subprocess
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[2]
DEMO_BOARD = REPO / "limits" / "demo-twin-preamp.toml"
DEMO_FIXTURE = REPO / "fixtures" / "fixture-twin-preamp.toml"
PART_NUMBER = "AB-DP1-REL"


def soak_mode() -> bool:
    """True when the long counts were asked for (``--soak`` or ``STAGEPROOF_SOAK=1``)."""
    return os.environ.get("STAGEPROOF_SOAK", "").strip() not in ("", "0")


def scaled(ci: int, soak: int) -> int:
    """The count for this mode."""
    return soak if soak_mode() else ci


def board_text() -> str:
    """The demo board cut to its first channel, lighter limits, no extra frequencies."""
    text = DEMO_BOARD.read_text()
    starts = [m.start() for m in re.finditer(r"(?m)^\[\[channel\]\]", text)]
    if len(starts) > 1:
        text = text[: starts[1]]
    text = re.sub(r"(?m)^samples = \d+", "samples = 2000", text)
    text = re.sub(r"(?m)^extra_frequencies_hz = \[.*\]", "extra_frequencies_hz = []", text)
    text = re.sub(r'(?m)^part_number = ".*"', f'part_number = "{PART_NUMBER}"', text)
    text = re.sub(r'(?m)^name = "(.*)"', r'name = "\1 (channel A, reliability rig)"', text, count=1)
    return text


def fixture_text() -> str:
    """The demo fixture for channel A only (its test points included)."""
    text = DEMO_FIXTURE.read_text()
    blocks = re.split(r"(?m)^(?=\[\[)", text)
    keep = [b for b in blocks if 'board_channel = "B"' not in b]
    out = "".join(keep)
    return re.sub(r'(?m)^board = "[^"]*"', f'board = "{PART_NUMBER}"', out)


@dataclass(frozen=True)
class RigFiles:
    board: Path
    fixture: Path


def write_rig(folder: Path) -> RigFiles:
    folder.mkdir(parents=True, exist_ok=True)
    b = folder / "rel-board.toml"
    f = folder / "rel-fixture.toml"
    b.write_text(board_text())
    f.write_text(fixture_text())
    return RigFiles(b, f)


def short_station(path: Path, timeout_ms: int, retries: int = 1) -> Path:
    """Rewrite a station file the sim wrote with a short I/O timeout."""
    text = path.read_text()
    text = re.sub(r"(?m)^timeout_ms = \d+", f"timeout_ms = {timeout_ms}", text)
    text = re.sub(r"(?m)^retries = \d+", f"retries = {retries}", text)
    path.write_text(text)
    return path


@contextmanager
def started_bench(
    board: Any, folder: Path, *, timeout_ms: int = 2000, retries: int = 1
) -> Iterator[tuple[Any, Path]]:
    """A SimBench on 127.0.0.1 (ephemeral ports, no latency) and its station file."""
    from harness.sim.bench import SimBench

    with SimBench(board, latency=False, host="127.0.0.1") as bench:
        station = short_station(bench.write_station(folder / "station.toml"), timeout_ms, retries)
        yield bench, station


def safe_vpp(board: Any) -> float:
    """The board's safe input level as the generator's Vpp setting at high impedance
    (rms to peak-to-peak of a sine: 2·√2)."""
    return board.conditions.safe_input_vrms * 2 * math.sqrt(2)


def generator_off(bench: Any) -> bool:
    """The simulated generator's output is off now (its own state, not the client's)."""
    return not bench.generator.output_on


class LiveRun:
    """One ``stageproof`` subprocess whose stdout is read line by line as it comes."""

    def __init__(self, cmd: list[str], env: dict[str, str], *, stdin: int | None = None) -> None:
        self.proc = subprocess.Popen(
            cmd,
            stdin=stdin,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            env=env,
            cwd=REPO,
            text=True,
            bufsize=1,
        )
        self.lines: list[str] = []
        self._lock = threading.Lock()
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            with self._lock:
                self.lines.append(line.rstrip("\n"))

    def printed(self) -> list[str]:
        with self._lock:
            return list(self.lines)

    def finish(self, timeout_s: float) -> tuple[int, str]:
        rc = self.proc.wait(timeout_s)
        self._reader.join(5)
        err = self.proc.stderr.read() if self.proc.stderr else ""
        for pipe in (self.proc.stdin, self.proc.stdout, self.proc.stderr):
            if pipe is not None:
                pipe.close()
        return rc, err


# --- read-only looks into a results database --------------------------------------------------


def snapshot(db: Path) -> tuple[set[tuple], dict[int, str]]:
    """(measurement rows, run statuses) visible now, read with a plain sqlite3 connection
    (no project code), so the check does not trust the store it checks."""
    if not db.exists():
        return set(), {}
    uri = f"file:{db}?mode=ro"
    try:
        conn = sqlite3.connect(uri, uri=True, timeout=10)
    except sqlite3.OperationalError:
        return set(), {}
    try:
        try:
            rows = conn.execute(
                "SELECT id, run_id, channel, name, value, decision, step FROM measurements"
            ).fetchall()
            runs = dict(conn.execute("SELECT run_id, status FROM runs").fetchall())
        except sqlite3.OperationalError as exc:  # schema not created yet
            if "no such table" in str(exc):
                return set(), {}
            raise
    finally:
        conn.close()
    return set(rows), runs


def integrity(db: Path) -> str:
    conn = sqlite3.connect(db, timeout=10)
    try:
        return conn.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        conn.close()
