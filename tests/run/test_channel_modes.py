"""Failed channels on the simulated bench: named, recorded, never an abort.

End to end over pyvisa-py against the simulated bench with the fixture the bench writes
itself (as ``stageproof sim serve`` does).  Repair-bench facts (common practice): an open
output coupling capacitor leaves a channel dead with normal DC test points; an open bias
resistor leaves it dead with its collector at the rail; a parasitic oscillation shows as a
strong tone unrelated to the test signal.
"""

from __future__ import annotations

import json

import pytest

from harness.diagnose.fromstore import diagnose_run
from harness.instruments.bench import connect
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.run.sequence import RunOptions, run_board
from harness.store import open_store
from tests.support.bench import sim_bench

pytestmark = pytest.mark.wire

OPTS = RunOptions(settle_wait_s=0.0, extra_frequencies=False)


def _run(board, limits, tmp_path, faults=()):
    with sim_bench(board, tmp_path, faults=faults) as (bench, station_file):
        fixture = load_fixture(bench.write_fixture(tmp_path / "fixture.toml"), board)
        with open_store(tmp_path / "r.db") as store, connect(load_station(station_file)) as inst:
            res = run_board(inst, board, limits, fixture, "SN-1", store, options=OPTS)
            diagnosis = diagnose_run(store, res.run_id, board, top=5)
            run = store.get_run(res.run_id)
    return res, diagnosis, run


def _rows(res, channel):
    return {m.name: m for m in res.measurements if m.channel == channel}


def _detail(row):
    return json.loads(row.detail_json)


def test_good_board_passes_every_dc_point_on_the_fixture_the_sim_writes(board, limits, tmp_path):
    """The DMM is asked for the range that fits each point (the 12 V rail included)."""
    res, _, _run_row = _run(board, limits, tmp_path)
    assert res.verdict == "PASS", res.failing()
    dc = [m for m in res.measurements if m.name.startswith("dc.")]
    assert len(dc) == 12 and all(m.decision == "pass" for m in dc)
    rail = _rows(res, "A")["dc.buffer.collector_v"]
    assert _detail(rail)["range_v"] >= 1.2 * 12.0
    assert all(_detail(m)["mode"] == "working" for m in res.measurements if m.name == "condition")


def test_open_output_capacitor_dead_channel_completes_and_b_is_measured(board, limits, tmp_path):
    res, diagnosis, run = _run(board, limits, tmp_path, faults=("C103:open",))
    assert (run.status, run.verdict) == ("complete", "FAIL")
    a, b = _rows(res, "A"), _rows(res, "B")
    assert _detail(a["condition"])["mode"] == "dead"
    assert a["gain"].value is None and a["gain"].decision == "fail"
    assert "skipped" in _detail(a["clip_input"])["result"]
    assert all(m.decision == "pass" for k, m in a.items() if k.startswith("dc."))
    assert res.channels["B"].verdict == "PASS"
    assert b["clip_input"].value is not None and b["clip_input"].decision == "pass"
    # dead with normal DC: a coupling capacitor in the signal path ranks first
    best = diagnosis.candidates[0]
    assert best.ref in ("C103", "C101") and best.kind == "open", best.spec


def test_open_bias_resistor_dead_channel_points_at_the_bias(board, limits, tmp_path):
    res, diagnosis, _ = _run(board, limits, tmp_path, faults=("R101:open",))
    a = _rows(res, "A")
    assert _detail(a["condition"])["mode"] == "dead"
    assert a["dc.gain.collector_v"].value == pytest.approx(12.0, abs=0.2)  # at the rail
    assert diagnosis.candidates[0].spec == "R101:open"


def test_parasitic_oscillation_is_named_with_frequency_and_level(board, limits, tmp_path):
    res, diagnosis, run = _run(board, limits, tmp_path, faults=("A.buffer:oscillate=400000,0.2",))
    assert (run.status, run.verdict) == ("complete", "FAIL")
    cond = _detail(_rows(res, "A")["condition"])
    assert cond["mode"] == "oscillating"
    assert cond["evidence"]["frequency_hz"] == pytest.approx(400e3, rel=1e-3)
    assert cond["evidence"]["level_vpk"] == pytest.approx(0.2, rel=0.1)
    assert res.channels["B"].verdict == "PASS"
    assert diagnosis.candidates[0].spec.startswith("A.buffer:oscillate=400000")
    assert "A" not in diagnosis.screened_out  # an oscillating channel is no good channel
