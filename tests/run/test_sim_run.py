"""Whole runs against the simulated bench over pyvisa-py (loopback sockets).

External checks: the faults a technician expects (common practice: an open emitter
bypass capacitor leaves the unbypassed emitter resistance in the gain, A_v ≈ R_C/R_E';
a drifted bias resistor moves the operating point and limits one half-cycle first), and the
clipping threshold of the simulated board computed
directly from its physics on a fine level grid with the measure layer.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from harness.io.fixture import load_fixture
from harness.run.sequence import RunOptions, run_board
from harness.store import open_store
from tests.support.bench import FIXTURE_FILE, ends_off, measurement, sim_bench

pytestmark = pytest.mark.wire

#: The simulated board is in periodic steady state at once: no settling wait needed
#: (the demo and real benches wait the model's settle time or verify by repeating).
FAST = RunOptions(settle_wait_s=0.0)
#: Fault runs skip the extra frequencies (information only) to keep the suite quick.
FAULT = RunOptions(settle_wait_s=0.0, extra_frequencies=False)


def _run(board, limits, tmp_path, faults=(), options=FAST):
    from harness.instruments.bench import connect
    from harness.io.station import load_station

    with sim_bench(board, tmp_path, faults) as (bench, station_file):
        station = load_station(station_file)
        fixture = load_fixture(FIXTURE_FILE, board, scope_inputs=4)
        with open_store(tmp_path / "r.db") as store, connect(station) as inst:
            store.recover_aborted()
            res = run_board(inst, board, limits, fixture, "SN-SIM", store, options=options)
            sweep = store.sweep_points(res.run_id)
        log = bench.generator_log
        max_on = bench.max_commanded_vpp(while_on=True)
    return res, sweep, log, max_on


@pytest.fixture(scope="module")
def good_folder(tmp_path_factory):
    return tmp_path_factory.mktemp("good")


@pytest.fixture(scope="module")
def good(board, limits, good_folder):
    return _run(board, limits, good_folder)


def test_run_keeps_the_board_file_text(good, board, good_folder):
    """The stored board text is the exact file the limits came from: its SHA-256
    (FIPS 180-4, Python's hashlib) is the board's digest."""
    import hashlib

    res = good[0]
    with open_store(good_folder / "r.db", readonly=True) as store:
        text = store.get_run(res.run_id).board_text
    assert text is not None
    assert hashlib.sha256(text.encode("utf-8")).hexdigest() == board.digest


def test_good_board_passes(good, board):
    res, _sweep, log, max_on = good
    assert res.verdict == "PASS", [(m.channel, m.name, m.decision) for m in res.failing()]
    assert res.status == "complete"
    assert ends_off(log)
    safe_vpp = board.conditions.safe_input_vrms * 2 * math.sqrt(2)
    assert max_on <= safe_vpp * (1 + 1e-6)
    assert res.acquisitions <= 12


def test_threshold_agrees_with_physics(good, board):
    """The search's threshold against the simulated board's own: BoardSim periodic
    response on a 0.05 dB grid, THD from harness.measure.analyze_uniform (THD_F of
    harmonics 2..10, IEC 61000-2-2 definition), crossing of the board's 1 % criterion
    interpolated on log THD vs level in dB; agreement within 0.2 dB."""
    from harness.measure import analyze_uniform, plan_coherent
    from harness.sim.physics import BoardSim

    res = good[0]
    found = measurement(res, "A", "clip_input").value
    sim = BoardSim(board)
    plan = plan_coherent(board.conditions.frequency_hz, [2e5], [8192])
    t = np.arange(plan.n_samples) / plan.sample_rate_hz
    crit = board.conditions.clip_thd_percent
    levels, thd = [], []
    for db in np.arange(-0.6, 0.61, 0.05):
        emf = found * 10 ** (db / 20)
        r = sim.respond("A", emf * math.sqrt(2), plan.frequency_hz, source_ohm=50.0)
        x, y = r.evaluate(t)
        a = analyze_uniform(x, y, plan.sample_rate_hz, frequency_hz=plan.frequency_hz)
        levels.append(20 * math.log10(a.input_vrms))
        thd.append(math.log10(a.thd_percent / crit))
    levels_a, thd_a = np.array(levels), np.array(thd)
    i = int(np.flatnonzero(thd_a >= 0)[0])
    assert i > 0, "grid does not bracket the crossing"
    x0, x1, f0, f1 = levels_a[i - 1], levels_a[i], thd_a[i - 1], thd_a[i]
    true_db = x0 - f0 * (x1 - x0) / (f1 - f0)
    err_db = 20 * math.log10(found) - true_db
    print(f"threshold error {err_db:+.3f} dB")
    assert abs(err_db) < 0.2


def test_open_bypass_capacitor_lowers_gain(board, limits, tmp_path):
    """C102 open: channel A's gain falls (common practice: the bypassed emitter resistor
    now degenerates the stage, A_v ≈ R_C/(R_E + R_E,bypassed)), about 20·log10((220+1200)/220)
    ≈ 16 dB less in the simple formula, less with the follower's loading; B is untouched."""
    res, *_ = _run(board, limits, tmp_path, faults=("C102:open",), options=FAULT)
    assert res.verdict == "FAIL"
    ga = measurement(res, "A", "gain")
    assert ga.decision == "fail" and ga.value < ga.low - 3.0
    assert measurement(res, "B", "gain").decision == "pass"
    # A's fault leaves B alone: its own verdict, drawn from its own rows only, is a pass
    assert res.channels["B"].verdict == "PASS"
    assert res.channels["A"].verdict == "FAIL"
    assert "gain (fail)" in res.channels["A"].failing


def test_drifted_bias_resistor_lowers_threshold_on_one_side(board, limits, tmp_path):
    """R201 x1.5: channel B's bias moves, one half-cycle limits early: the clipping
    threshold is low on B, every clipped record of B limits on the same half-cycle, and A
    still passes its threshold."""
    res, sweep, log, _ = _run(board, limits, tmp_path, faults=("R201:drift=1.5",), options=FAULT)
    cb = measurement(res, "B", "clip_input")
    assert cb.decision == "fail" and cb.value < cb.low
    assert measurement(res, "A", "clip_input").decision == "pass"
    sides = {p.clip_side for p in sweep if p.channel == "B" and p.clipped}
    assert len(sides) == 1 and None not in sides
    side_row = measurement(res, "B", "clip_side")
    assert json.loads(side_row.detail_json)["side"] in ("positive", "negative")
    assert ends_off(log)


def test_every_stored_measurement_is_a_registered_quantity(good, limits, good_folder):
    """Each row of a whole run names a quantity of the registry (harness.quantities), in its
    unit, with an outcome for its decision, and with the bounds of the limit the registry
    says it is decided against: the reports and the diagnosis read rows by that registry."""
    from harness.model.limits import Limit
    from harness.outcomes import OUTCOMES
    from harness.quantities import DC_PREFIX, lookup

    res = good[0]
    with open_store(good_folder / "r.db", readonly=True) as store:
        rows = store.measurements(res.run_id)
    assert {m.name for m in rows} >= {"gain", "thd", "phase", "clip_input", "condition"}
    checked = 0
    for m in rows:
        q = lookup(m.name)
        assert q is not None, m.name
        assert m.unit == q.unit, m
        assert m.decision in OUTCOMES, m
        assert (m.channel == "") == q.board, m
        if q.limit is None:
            continue
        if q.board:
            lim = getattr(limits, q.limit)
        elif m.name.startswith(DC_PREFIX):
            lim = limits.channels[m.channel].operating_point[q.limit]
        else:
            lim = getattr(limits.channels[m.channel], q.limit)
        if isinstance(lim, Limit) and m.value is not None and m.decision != "info":
            assert (m.low, m.high) == pytest.approx((lim.low, lim.high)), m
            checked += 1
    assert checked >= 2 * len(limits.channels)
