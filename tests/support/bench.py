"""Shared helpers of the tests that drive a simulated bench: the demo files and a bench
factory (127.0.0.1, ephemeral ports, short timeouts)."""

from __future__ import annotations

import re
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
BOARD_FILE = REPO / "limits" / "demo-twin-preamp.toml"
FIXTURE_FILE = REPO / "fixtures" / "fixture-twin-preamp.toml"


def fast_station(path: Path, timeout_ms: int = 1000) -> Path:
    """A station file written by the sim, with a short I/O timeout for fault tests."""
    text = path.read_text()
    path.write_text(re.sub(r"(?m)^timeout_ms = \d+", f"timeout_ms = {timeout_ms}", text))
    return path


@contextmanager
def sim_bench(
    board, tmp_path: Path, faults=(), timeout_ms: int = 2000, dialect: str = "default"
) -> Iterator:
    """A started SimBench (127.0.0.1, ephemeral ports, no latency) and its station file."""
    from harness.sim.bench import SimBench

    with SimBench(board, faults=faults, latency=False, host="127.0.0.1", dialect=dialect) as bench:
        station = fast_station(bench.write_station(tmp_path / "station.toml"), timeout_ms)
        yield bench, station


def free_port() -> int:
    """A loopback port nobody listens on (bound, read, released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def connections(bench) -> dict[str, int]:
    """TCP connections each simulated instrument has accepted so far."""
    return {role: srv.connections_served for role, srv in bench.servers.items()}


def measurement(res, channel: str, name: str):
    """The run result's measurement row of ``name`` on ``channel``."""
    return next(m for m in res.measurements if m.channel == channel and m.name == name)


def ends_off(log) -> bool:
    """The simulated generator's last output event is off (or a reset, which is off)."""
    outs = [e for e in log if e.what in ("output", "reset")]
    return not outs or outs[-1].what == "reset" or outs[-1].value == 0.0
