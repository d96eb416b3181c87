"""The production loop used by the soak test and benchmarks/soak.py.

The simulated bench runs in a process of its own (``stageproof sim serve``), as instruments
do on a real bench, so the memory measured is the harness's, not the simulator's caches.

One process, the station taken and connected once as every command does (the station lock,
then each source in its safe state: harness.run.safety.safe_station), the run layer's
per-board function (harness.run.sequence.run_board) called for board after board on one
simulated bench and one results database, with RSS (psutil) and open file descriptors
sampled every ``every`` boards.  Most boards get the short sequence (1000-point records,
no clipping search: ``max_search_acquisitions=0``); every ``full_every``-th board the full
one, so the search's code path is soaked too.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np


@dataclass
class SoakResult:
    boards: int
    elapsed_s: float
    samples: list[tuple[int, int, int]] = field(default_factory=list)  # (board, rss, fds)
    statuses: dict[str, int] = field(default_factory=dict)

    def slope(self, which: int) -> float:
        """Least-squares growth per board over the second half of the samples."""
        half = self.samples[len(self.samples) // 2 :]
        x = np.array([s[0] for s in half], dtype=float)
        y = np.array([s[which] for s in half], dtype=float)
        if len(x) < 2:
            return 0.0
        return float(np.polyfit(x, y, 1)[0])


@contextmanager
def served_bench(board_file: Path, folder: Path, *, timeout_ms: int = 2000) -> Iterator[Path]:
    """``stageproof sim serve`` in a child process; yields its station file (short timeouts)."""
    from tests.reliability.rig import short_station

    station = folder / "station-served.toml"
    fixture = folder / "fixture-served.toml"
    cmd = [
        sys.executable,
        "-m",
        "harness.cli.main",
        "sim",
        "serve",
        str(board_file),
        "--station-out",
        str(station),
        "--fixture-out",
        str(fixture),
    ]
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    log = folder / "sim-serve.log"
    with log.open("wb") as err:
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err, env=env)
    try:
        deadline = time.monotonic() + 60
        while not (station.exists() and fixture.exists()):
            if proc.poll() is not None:
                raise RuntimeError(f"sim serve exited: {log.read_text()[-2000:]}")
            if time.monotonic() > deadline:
                raise RuntimeError("sim serve did not write its station file within 60 s")
            time.sleep(0.05)
        time.sleep(0.2)  # the file is written once the servers listen; let it be complete
        yield short_station(station, timeout_ms)
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def soak(folder: Path, boards: int, *, every: int = 10, full_every: int = 25) -> SoakResult:
    import psutil

    from harness.io.board import load_board
    from harness.io.fixture import load_fixture
    from harness.io.station import load_station
    from harness.model import compute_limits
    from harness.run.safety import safe_station
    from harness.run.sequence import RunOptions, run_board
    from harness.store import open_store
    from tests.reliability.rig import write_rig

    files = write_rig(folder)
    board = load_board(files.board)
    limits = compute_limits(board)
    fixture = load_fixture(files.fixture, board, scope_inputs=4)
    short = RunOptions(settle_wait_s=0.0, max_points=1000, max_search_acquisitions=0)
    full = RunOptions(settle_wait_s=0.0)
    proc = psutil.Process()
    res = SoakResult(boards, 0.0)
    t0 = time.perf_counter()
    with (
        served_bench(files.board, folder) as station_file,
        open_store(folder / "soak.db") as store,
    ):
        store.recover_aborted()
        with safe_station(load_station(station_file)) as inst:
            for n in range(boards):
                opts = full if n % full_every == full_every - 1 else short
                r = run_board(inst, board, limits, fixture, f"SOAK-{n:05d}", store, options=opts)
                res.statuses[r.status] = res.statuses.get(r.status, 0) + 1
                if n % every == every - 1:
                    res.samples.append((n + 1, proc.memory_info().rss, proc.num_fds()))
    res.elapsed_s = time.perf_counter() - t0
    return res
