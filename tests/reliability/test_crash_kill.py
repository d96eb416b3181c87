"""Crash durability: ``stageproof run`` killed with SIGKILL at random moments loses nothing.

Each kill is a real subprocess ``python -m harness.cli.main run ...`` against one simulated
bench started by the test, killed with SIGKILL (no handler, no ``finally``: what a power cut
or the OOM killer does to the process).  The kill moments are stratified over the duration
of a complete run measured first (stratum k of N is ``[k/N, (k+1)/N)`` of it, a seeded
random point inside): the first third spread over start-up (timed from the launch), the
rest over the sequence (timed from its first step line), so they cover start-up, store
opening, supply, DC points, the nominal
record and the clipping search by construction.  After every kill:

- ``PRAGMA integrity_check`` answers ``ok`` (SQLite's own check, sqlite.org/pragma.html);
- every row visible in the database just before the kill is still there after it, and every
  measurement the run had printed (``RichProgress`` prints a row only after the store has
  committed it) is in the database;
- the killed run is marked ``aborted`` by the next run's start (``recover_aborted``);
- the generator was never commanded above the board's safe level, killed or not.

A final run on the same station completes with a verdict.
"""

from __future__ import annotations

import os
import random
import re
import signal
import sqlite3
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import pytest

from harness.io.board import load_board
from tests.reliability.rig import (
    LiveRun,
    integrity,
    safe_vpp,
    scaled,
    snapshot,
    started_bench,
    write_rig,
)

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

#: Runs killed with SIGKILL (README: "runs killed").
KILLS = scaled(30, 200)
SEED = 20240607
#: Share of the kills aimed at start-up (before the first step); the rest hit the sequence.
STARTUP_SHARE = 1 / 3
#: Sequence kills are spread over this share of the shortest warm-up sequence.
SPAN_SHARE = 0.85
#: A measurement line of the run's progress output: ``    A: gain = 32.1 dB [..] pass``.
_MEAS = re.compile(r"^\s{4}(?:(?P<ch>[^:\s]+): )?(?P<name>[A-Za-z_][\w.@]*) = ")
_STEP = re.compile(r"^> (?P<step>\w+):")


def _reported(lines: list[str]) -> tuple[list[tuple[str, str]], str | None]:
    """Measurements the run had printed (channel, name) and the last step it announced."""
    rows: list[tuple[str, str]] = []
    step = None
    for ln in lines:
        m = _STEP.match(ln)
        if m:
            step = m.group("step")
            continue
        m = _MEAS.match(ln)
        if m:
            rows.append((m.group("ch") or "", m.group("name")))
    return rows, step


def _serial_runs(db: Path) -> dict[str, list[tuple[int, str, str | None]]]:
    import sqlite3

    conn = sqlite3.connect(db, timeout=10)
    try:
        out: dict[str, list[tuple[int, str, str | None]]] = {}
        for run_id, serial, status, reason in conn.execute(
            "SELECT run_id, serial, status, reason FROM runs ORDER BY run_id"
        ):
            out.setdefault(serial, []).append((run_id, status, reason))
        return out
    finally:
        conn.close()


def _measured(db: Path, run_id: int) -> list[tuple[str, str]]:
    import sqlite3

    conn = sqlite3.connect(db, timeout=10)
    try:
        return [
            tuple(r)
            for r in conn.execute(
                "SELECT channel, name FROM measurements WHERE run_id = ? ORDER BY id", (run_id,)
            )
        ]
    finally:
        conn.close()


@dataclass
class _LaneResult:
    span_s: float
    killed: list[str]
    phases: dict[str, int]
    max_vpp: float
    safe_vpp: float


def _lane(folder: Path, strata: list[float]) -> _LaneResult:
    """Kill one run per stratum (fractions of the run span) against one bench and db."""
    rig = write_rig(folder)
    board = load_board(rig.board)
    db = folder / "results.db"
    env = {**os.environ, "PYTHONUNBUFFERED": "1", "COLUMNS": "200", "NO_COLOR": "1", "TERM": "dumb"}
    with started_bench(board, folder, timeout_ms=2000) as (bench, station):

        def cmd(serial: str) -> list[str]:
            return [
                sys.executable,
                "-m",
                "harness.cli.main",
                "run",
                "--station",
                str(station),
                "--fixture",
                str(rig.fixture),
                "--board",
                str(rig.board),
                "--serial",
                serial,
                "--db",
                str(db),
                "--settle-wait",
                "0",
            ]

        # Three complete runs first: they prove the station works and time the two phases
        # the kills are spread over: start-up (imports, files, limits, store, connect) up to
        # the first step line, and the sequence from there to the stored verdict.
        spans: list[float] = []
        for n in range(3):
            t0 = time.monotonic()
            first = LiveRun(cmd(f"SN-WARM{n}"), env)
            while first.proc.poll() is None and _reported(first.printed())[1] is None:
                time.sleep(0.005)
            t1 = time.monotonic()
            # the sequence ends when the store holds the verdict, not when the process has
            # exited: interpreter shutdown after the verdict is no moment to kill into
            serial_w = f"SN-WARM{n}"
            while first.proc.poll() is None:
                try:
                    mine_w = _serial_runs(db).get(serial_w, [])
                except sqlite3.OperationalError:  # schema not created yet
                    mine_w = []
                if mine_w and mine_w[0][1] in ("complete", "aborted"):
                    break
                time.sleep(0.005)
            t2 = time.monotonic()
            rc, err = first.finish(120)
            startup_s = t1 - t0
            spans.append(t2 - t1)
            assert rc in (0, 1), f"warm-up run failed ({rc}):\n{err}"
            warm_rows, _ = _reported(first.printed())
            assert warm_rows, f"the run printed no measurements: {first.printed()}\n{err}"
        # the sequence's length varies from run to run (about +-30 % here): spread the kills
        # over the shortest one seen, so they fall inside the sequence and not after it
        span_s = SPAN_SHARE * min(spans)

        phases: dict[str, int] = {}
        killed: list[str] = []
        for i, frac in enumerate(strata):
            serial = f"SN-{folder.name}-{i:03d}"
            run = LiveRun(cmd(serial), env)
            if frac < STARTUP_SHARE:  # during start-up, timed from the launch
                delay = startup_s * frac / STARTUP_SHARE
            else:  # during the sequence, timed from its first step line
                while run.proc.poll() is None and _reported(run.printed())[1] is None:
                    time.sleep(0.002)
                delay = span_s * (frac - STARTUP_SHARE) / (1 - STARTUP_SHARE)
            end = time.monotonic() + delay
            while time.monotonic() < end and run.proc.poll() is None:
                time.sleep(0.002)
            before, _ = snapshot(db)
            printed = run.printed()
            run.proc.send_signal(signal.SIGKILL)
            rc, _err = run.finish(30)
            after, runs_after = snapshot(db)
            rows, step = _reported(printed)
            mine = _serial_runs(db).get(serial, [])
            status = runs_after.get(mine[0][0]) if mine else None
            if status in ("complete", "aborted"):
                phase = "after the verdict"
            elif step is None:
                phase = "start-up" if status is None else "store opened"
            else:
                phase = step
            phases[phase] = phases.get(phase, 0) + 1

            assert integrity(db) == "ok", f"kill {i} ({delay:.2f} s): integrity_check failed"
            assert before <= after, f"kill {i}: rows visible before the kill vanished"
            if rows:
                assert mine, f"kill {i}: {len(rows)} measurements printed, no run stored"
                stored = _measured(db, mine[0][0])
                missing = [r for r in rows if r not in stored]
                assert not missing, f"kill {i}: printed but not stored: {missing}"
            if rc == -signal.SIGKILL and status == "running":
                killed.append(serial)  # killed mid-run (not between finish and exit)
            # the previous killed run is aborted once this run has begun its own
            if mine and len(killed) >= 2 and killed[-1] == serial:
                prev = _serial_runs(db)[killed[-2]]
                assert prev[0][1] == "aborted", f"run of {killed[-2]} not recovered: {prev}"

        # The next run on the same station works, and recovers the last kill.
        last = LiveRun(cmd("SN-AFTER"), env)
        rc, err = last.finish(120)
        assert rc in (0, 1), f"run after the kills failed ({rc}):\n{err}"
        max_vpp = bench.max_commanded_vpp()
    runs = _serial_runs(db)
    assert runs["SN-AFTER"][0][1] == "complete"
    for serial in killed:
        ((_run_id, status, reason),) = runs[serial]
        assert status == "aborted", (serial, status)
        assert reason and "ended without finishing" in reason, reason
    assert not [s for s, rs in runs.items() for r in rs if r[1] == "running"]
    return _LaneResult(startup_s + span_s, killed, phases, max_vpp, safe_vpp(board))


def test_sigkill_at_random_moments_loses_nothing(tmp_path: Path) -> None:
    """KILLS runs killed with SIGKILL at stratified seeded moments, in two lanes (two
    benches, two databases) so both cores work; see the module doc.  Reference: SQLite's
    PRAGMA integrity_check (sqlite.org/pragma.html#pragma_integrity_check)."""
    rng = random.Random(SEED)
    fracs = [(k + rng.random()) / KILLS for k in range(KILLS)]
    rng.shuffle(fracs)
    lanes = [fracs[0::2], fracs[1::2]]
    with ThreadPoolExecutor(max_workers=len(lanes)) as pool:
        futures = [pool.submit(_lane, tmp_path / f"lane{n}", part) for n, part in enumerate(lanes)]
        results = [f.result() for f in futures]
    phases: dict[str, int] = {}
    for r in results:
        for k, v in r.phases.items():
            phases[k] = phases.get(k, 0) + v
        assert r.max_vpp <= r.safe_vpp * (1 + 1e-9)
    killed = sum(len(r.killed) for r in results)
    spans = ", ".join(f"{r.span_s:.2f}" for r in results)
    print(
        f"\n{KILLS} kills over runs of {spans} s; {killed} killed mid-run; phases at the "
        f"kill: {dict(sorted(phases.items()))}"
    )
    assert sum(phases.values()) == KILLS
    # the stratified moments really covered the sequence, from start-up to the sweep
    assert phases.get("start-up", 0) >= 1
    assert sum(phases.get(p, 0) for p in ("nominal", "clip")) >= 3, phases
    assert killed >= KILLS // 3, phases
