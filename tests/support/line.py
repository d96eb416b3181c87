"""Shared helpers of the production-loop and characterisation tests.

One simulated bench (127.0.0.1, ephemeral ports, no latency) per test module, with a
one-channel fixture without DC test points: the loop's behaviour does not depend on the
number of channels, and ten boards stay fast.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

#: Channel A only, supply on with its current limit, no switch routes, no DMM points.
FIXTURE_TEXT = """\
[fixture]
name = "line test fixture, channel A"
board = "AB-DP2"

[supply]
output = 1
voltage_v = 12.0
current_limit_a = 0.03

[generator]
output = 1

[[channel]]
board_channel = "A"
input_scope = 1
output_scope = 2
input_probe = 1.0
output_probe = 1.0
route = []
"""


@contextmanager
def line_bench(board, tmp: Path) -> Iterator:
    """A started SimBench with its station and fixture files: (bench, station, fixture)."""
    from harness.sim.bench import SimBench

    with SimBench(board, latency=False, host="127.0.0.1") as b:
        station = b.write_station(tmp / "station.toml")
        text = station.read_text()
        station.write_text(re.sub(r"(?m)^timeout_ms = \d+", "timeout_ms = 2000", text))
        fixture = tmp / "fixture.toml"
        fixture.write_text(FIXTURE_TEXT)
        yield b, station, fixture
