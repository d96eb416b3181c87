"""The run's settling waits against a simulated board that really settles.

The invented audio demo board (limits/demo-audio-ce.toml: 10 µF in, 100 µF out into
100 kΩ) on a SimBench with settling on; the harness's waits go to the bench's clock
(``bench.sleep``), so the board sees the time pass and the test does not wait it out.  The
reference is the same board in its periodic steady state (settling off).  Both sides:
with the model's waits the clipping threshold equals the settled one within 0.1 dB; with
no wait at all it does not (the output capacitor, charging into the load through R_C,
holds the collector low: common practice, circuit theory).
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from harness.instruments.bench import connect
from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.model import compute_limits
from harness.run.sequence import RunOptions, run_board
from harness.sim.bench import SimBench
from harness.store import open_store

pytestmark = pytest.mark.wire

AUDIO = Path(__file__).resolve().parents[2] / "limits" / "demo-audio-ce.toml"


@pytest.fixture(scope="module")
def audio():
    board = load_board(AUDIO)
    return board, compute_limits(board, samples=2000)


def _threshold(audio, tmp_path, *, settling: bool, wait: bool):
    board, limits = audio
    tmp_path.mkdir(parents=True)
    with SimBench(board, settling=settling, host="127.0.0.1") as bench:
        station = bench.write_station(tmp_path / "station.toml")
        fixture = load_fixture(bench.write_fixture(tmp_path / "fixture.toml"), board)
        opts = RunOptions(
            extra_frequencies=False,
            settle_wait_s=None if wait else 0.0,
            sleep=bench.sleep,
        )
        with open_store(tmp_path / "r.db") as store, connect(load_station(station)) as inst:
            res = run_board(inst, board, limits, fixture, "SN-1", store, options=opts)
    rows = {m.channel: m.value for m in res.measurements if m.name == "clip_input"}
    return res, rows


def test_right_wait_matches_settled_threshold_and_no_wait_does_not(audio, tmp_path):
    _, settled = _threshold(audio, tmp_path / "s", settling=False, wait=False)
    res, waited = _threshold(audio, tmp_path / "w", settling=True, wait=True)
    _, hasty = _threshold(audio, tmp_path / "n", settling=True, wait=False)
    assert "after supply on" in res.settle_note and "AC-coupled" in res.settle_note
    assert res.settle_waited_s > 15  # the supply-on wait, on the bench's clock
    for ch in ("A", "B"):
        assert abs(20 * math.log10(waited[ch] / settled[ch])) < 0.1
        assert abs(20 * math.log10(hasty[ch] / settled[ch])) > 0.1
