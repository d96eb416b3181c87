"""``stageproof characterize`` on the simulated bench.

External checks: the low −3 dB corner is where the gain is 20·log10(1/√2) = −3.01 dB
below mid-band (definition of the half-power point, common practice); the measured one
must lie in the model's tolerance band and, since the simulated board has nominal parts,
within 5 % of the model's nominal corner (the model treats each coupling capacitor as a
first-order section with the resistance it sees; the simulator solves the whole circuit,
so they differ by a few per cent; linear interpolation after bisection adds < 0.5 %).
The safe input level is a hard bound on every commanded amplitude (common practice:
protect the DUT input), checked on the simulated generator's own log.
"""

from __future__ import annotations

import itertools
import json
import math

import pytest

from harness.cli.main import main
from harness.model import compute_limits
from harness.store import open_store
from tests.support.bench import BOARD_FILE
from tests.support.line import line_bench

pytestmark = pytest.mark.wire


@pytest.fixture(scope="module")
def bench(board, tmp_path_factory):
    """One simulated bench per module: (bench, station file, fixture file)."""
    with line_bench(board, tmp_path_factory.mktemp("line")) as b:
        yield b


def test_characterize_on_sim(bench, board, tmp_path, capsys):
    b, station, fixture = bench
    db, report = tmp_path / "char.db", tmp_path / "proto.html"
    start = len(b.generator_log)
    rc = main(
        [
            "characterize",
            "--station",
            str(station),
            "--fixture",
            str(fixture),
            "--board",
            str(BOARD_FILE),
            "--serial",
            "PROTO-7",
            "--db",
            str(db),
            "-o",
            str(report),
            "--settle-wait",
            "0",
            "--per-decade",
            "5",
        ]
    )
    out = capsys.readouterr().out
    assert rc == 0, out

    limits = compute_limits(board).channels["A"]
    corner = limits.low_corner_hz
    with open_store(db) as store:
        (run,) = store.list_runs()
        assert run.status == "complete" and run.verdict == "PASS"
        ms = {m.name: m for m in store.measurements(run.run_id) if m.channel == "A"}
        pts = store.sweep_points(run.run_id)
    measured = ms["low_corner"].value
    assert corner.low <= measured <= corner.high
    assert abs(measured / corner.nominal - 1) < 0.05, (measured, corner.nominal)
    assert ms["low_corner"].decision == "pass"

    level = [p for p in pts if p.sweep == "level"]
    freq = [p for p in pts if p.sweep == "frequency"]
    assert len(level) >= 20 and len(freq) >= 15
    fs = [json.loads(p.extra_json)["frequency_hz"] for p in freq]
    assert min(fs) < corner.low and max(fs) >= 15000
    # level steps of 1 dB from 20 dB under nominal, rising
    commanded = [json.loads(p.extra_json)["commanded_vrms"] for p in level]
    nom = board.conditions.nominal_input_vrms
    assert math.isclose(commanded[0], nom / 10, rel_tol=1e-9)
    steps = [20 * math.log10(b2 / b1) for b1, b2 in itertools.pairwise(commanded)]
    assert all(0 < s <= 1.0 + 1e-9 for s in steps)
    # the sweep stopped at the criterion: the last point meets it, the one before does not
    crit = board.conditions.clip_thd_percent
    assert level[-1].thd_percent >= crit > level[-2].thd_percent
    # the measured threshold against the model's band
    assert ms["clip_input"].decision == "pass"

    # never above the safe level (open-circuit amplitude, Vpp = 2·√2·Vrms)
    safe_vpp = board.conditions.safe_input_vrms * 2 * math.sqrt(2)
    amps = [e.value for e in b.generator_log[start:] if e.what == "amplitude_vpp"]
    assert amps and max(amps) <= safe_vpp * (1 + 1e-6)
    outs = [e for e in b.generator_log[start:] if e.what in ("output", "reset")]
    assert outs[-1].what == "reset" or outs[-1].value == 0.0

    html = report.read_text()
    assert html.startswith("<!DOCTYPE html>") and html.count("<svg") >= 3
    assert "model low-corner band" in html and "measured corner" in html


def test_level_sweep_capped_at_safe_level(board, tmp_path):
    """A board whose criterion lies above the safe level: the sweep ends exactly at the
    safe level, never above (safe level lowered below the threshold for the test)."""
    import dataclasses

    from harness.instruments.bench import connect
    from harness.io.fixture import load_fixture
    from harness.io.station import load_station
    from harness.run.characterize import CharacterizeOptions, characterize
    from harness.sim.bench import SimBench
    from tests.support.line import FIXTURE_TEXT

    cond = dataclasses.replace(board.conditions, safe_input_vrms=0.12)
    low_safe = dataclasses.replace(board, conditions=cond)
    limits = compute_limits(low_safe, samples=200)
    (tmp_path / "f.toml").write_text(FIXTURE_TEXT)
    fx = load_fixture(tmp_path / "f.toml", low_safe, scope_inputs=4)
    opts = CharacterizeOptions(
        settle_wait_s=0.0,
        level_below_db=3.0,
        f_start_hz=200.0,
        f_stop_hz=2000.0,
        points_per_decade=1,
        refine_steps=0,
    )
    with SimBench(low_safe, latency=False) as sb:
        station = load_station(sb.write_station(tmp_path / "s.toml"))
        with open_store(tmp_path / "c.db") as store, connect(station) as inst:
            res = characterize(inst, low_safe, limits, fx, "PROTO-S", store, options=opts)
        amps = [e.value for e in sb.generator_log if e.what == "amplitude_vpp"]
    ch = res.channels["A"]
    assert "safe input level" in ch.stopped_because
    assert math.isclose(ch.level_points[-1].commanded_vrms, 0.12, rel_tol=1e-12)
    assert max(amps) <= 0.12 * 2 * math.sqrt(2) * (1 + 1e-6)
    assert res.max_commanded_vrms <= 0.12
