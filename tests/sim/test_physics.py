"""The simulated board's physics without ngspice: faults, conservation, supply, interpolation,
op-amp stages against handbook formulas, fault syntax."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from harness.errors import FaultSpecError, StageproofError
from harness.io.board import load_board
from harness.sim.physics import BoardSim, Fault, component_refs, parse_fault

REPO = Path(__file__).resolve().parents[2]
TWIN = REPO / "limits" / "demo-twin-preamp.toml"
OPAMP = REPO / "limits" / "demo-opamp-line.toml"


@pytest.fixture(scope="module")
def twin():
    return load_board(TWIN)


@pytest.fixture(scope="module")
def good(twin):
    return BoardSim(twin)


def _gain(r) -> float:
    return abs(r.harmonics("out")[1]) / abs(r.harmonics("in")[1])


def _stage(board, channel, kind):
    return next(s for s in board.channel(channel).stages if s.kind == kind)


# --- faults: what a technician expects ------------------------------------------------------


def test_open_bypass_lowers_gain(twin, good):
    """Removing the emitter bypass puts R_E,bypassed in the signal path: the gain falls
    towards (R_C∥R_L')/(r_e + R_E + R_E,byp) (voltage-divider CE stage,
    Boylestad & Nashelsky §5.6; common practice).  Both fault spellings (stage and designator) must
    give the same board."""
    ce = _stage(twin, "A", "common_emitter")
    g0 = _gain(good.respond("A", 1e-3, 1000.0))
    by_stage = _gain(BoardSim(twin, ["A.gain:open_bypass"]).respond("A", 1e-3, 1000.0))
    by_ref = _gain(BoardSim(twin, [f"{ce.c_e.ref}:open_bypass"]).respond("A", 1e-3, 1000.0))
    assert by_stage == pytest.approx(by_ref, rel=1e-9)
    ratio_formula = (ce.re.nominal + 26e-3 / 1e-3) / (
        ce.re.nominal + ce.re_bypassed.nominal + 26e-3 / 1e-3
    )
    assert by_stage / g0 == pytest.approx(ratio_formula, rel=0.15)
    assert by_stage < 0.6 * g0


def _half_swings(r) -> tuple[float, float]:
    v = r.v_out - np.mean(r.v_out)
    return float(v.max()), float(-v.min())


def test_drifted_bias_resistor_moves_bias_and_one_clipping_side(twin, good):
    """R1 (supply to base) drifted up by 30 %: V_B and I_C fall, the collector rises towards
    the rail (Thevenin bias formula, Boylestad & Nashelsky §4 voltage-divider bias).  The stage
    then meets cutoff sooner: under a drive
    that clips, the output's positive half-cycle (follower of the collector going up) shrinks
    a lot while the negative one does not (common practice: a drifted bias resistor moves the
    clipping threshold on one side only)."""
    ce = _stage(twin, "A", "common_emitter")
    bad = BoardSim(twin, [f"{ce.r1.ref}:drift=1.3"])
    op_g, op_b = good.operating_point("A"), bad.operating_point("A")
    assert op_b["gain.base_v"] < op_g["gain.base_v"] - 0.2
    assert op_b["gain.collector_v"] > op_g["gain.collector_v"] + 0.5
    pos_g, neg_g = _half_swings(good.respond("A", 0.6, 1000.0))
    pos_b, neg_b = _half_swings(bad.respond("A", 0.6, 1000.0))
    assert pos_b < 0.85 * pos_g
    assert abs(neg_b - neg_g) < 0.5 * abs(pos_b - pos_g)


def test_low_beta_shifts_bias_as_the_divider_formula_says(twin, good):
    """β = 40: I_B = (V_TH − V_BE)/(R_TH + (β+1)R_E) (Boylestad & Nashelsky §4 voltage-divider
    bias, exact analysis) with V_BE read from the simulated stage; the simulated
    collector voltage agrees within 1 %, and is well above the good board's."""
    ce = _stage(twin, "A", "common_emitter")
    bad = BoardSim(twin, ["A.gain:low_beta=40"])
    op = bad.operating_point("A")
    vcc = twin.supply.v_pos
    r1, r2, rc = ce.r1.nominal, ce.r2.nominal, ce.rc.nominal
    re_total = ce.re.nominal + ce.re_bypassed.nominal
    v_th, r_th = vcc * r2 / (r1 + r2), r1 * r2 / (r1 + r2)
    vbe = op["gain.base_v"] - op["gain.emitter_v"]
    beta = 40.0
    ib = (v_th - vbe) / (r_th + (beta + 1) * re_total)
    # collector current plus the follower's base current (it hangs on the collector)
    buf = _stage(twin, "A", "emitter_follower")
    i_buf_b = op["buffer.emitter_v"] / buf.re.nominal / (buf.transistor.beta.typ + 1)
    vc = vcc - rc * (beta * ib + i_buf_b)
    assert op["gain.collector_v"] == pytest.approx(vc, rel=0.01)
    assert op["gain.collector_v"] > good.operating_point("A")["gain.collector_v"] + 0.5


@pytest.mark.parametrize("junction", ["be", "ce"])
def test_shorted_junction_kills_the_stage(twin, good, junction):
    """A shorted B-E junction leaves the transistor no V_BE (no collector current: collector at
    the rail); a shorted C-E ties collector to emitter.  Either way the channel's gain
    collapses (common practice)."""
    bad = BoardSim(twin, [f"A.gain:shorted_junction={junction}"])
    assert _gain(bad.respond("A", 1e-3, 1000.0)) < 0.05 * _gain(good.respond("A", 1e-3, 1000.0))
    op = bad.operating_point("A")
    if junction == "be":
        assert op["gain.collector_v"] > twin.supply.v_pos - 0.1
    else:
        assert op["gain.collector_v"] == pytest.approx(op["gain.emitter_v"], abs=0.01)
    # the other channel is untouched
    assert _gain(bad.respond("B", 1e-3, 1000.0)) == pytest.approx(
        _gain(good.respond("B", 1e-3, 1000.0)), rel=1e-6
    )


def test_open_and_short_resistors_and_capacitors(twin, good):
    """Open collector resistor: no collector current, the channel goes dead.  Shorted input
    coupling capacitor: the generator's 50 Ω to ground then sits on the base and pulls the
    bias down to almost nothing (common practice)."""
    ce = _stage(twin, "A", "common_emitter")
    g0 = _gain(good.respond("A", 1e-3, 1000.0))
    open_rc = BoardSim(twin, [f"{ce.rc.ref}:open"])
    assert _gain(open_rc.respond("A", 1e-3, 1000.0)) < 0.01 * g0
    short_cin = BoardSim(twin, [f"{ce.c_in.ref}:short"])
    assert short_cin.operating_point("A")["gain.base_v"] < 0.05
    open_cin = BoardSim(twin, [f"{ce.c_in.ref}:open"])
    assert _gain(open_cin.respond("A", 1e-3, 1000.0)) < 0.01 * g0


def test_coupling_capacitor_drift_moves_the_low_corner(twin, good):
    """C_in × 0.05 raises the input high-pass corner 1/(2π C_in R_in) twenty-fold: the gain at
    100 Hz falls while the gain at 10 kHz stays (first-order high-pass; common practice)."""
    ce = _stage(twin, "A", "common_emitter")
    bad = BoardSim(twin, [f"{ce.c_in.ref}:drift=0.05"])
    assert _gain(bad.respond("A", 1e-3, 100.0)) < 0.8 * _gain(good.respond("A", 1e-3, 100.0))
    assert _gain(bad.respond("A", 1e-3, 1e4)) == pytest.approx(
        _gain(good.respond("A", 1e-3, 1e4)), rel=0.02
    )


# --- conservation, supply -------------------------------------------------------------------


def test_kcl_supply_current_equals_ground_return(twin, good):
    """KCL over the whole board at DC (Kirchhoff; common practice): the current taken from the
    rail equals the current returned to ground through R2, R_E,byp and the follower's R_E,
    computed here from the operating point voltages by Ohm's law alone."""
    total = 0.0
    for ch in twin.channels:
        op = good.operating_point(ch.name)
        ce = _stage(twin, ch.name, "common_emitter")
        ef = _stage(twin, ch.name, "emitter_follower")
        re, rb = ce.re.nominal, ce.re_bypassed.nominal
        v_e2 = op["gain.emitter_v"] * rb / (re + rb)
        total += (
            op["gain.base_v"] / ce.r2.nominal + v_e2 / rb + op["buffer.emitter_v"] / (ef.re.nominal)
        )
    assert good.supply_current_a() == pytest.approx(total, rel=1e-6)


def test_supply_off_gives_no_output(twin):
    """Supply at 0 V: no bias, transistors off; a nominal input passes nothing (common
    practice: an unpowered board is silent) and draws no current."""
    sim = BoardSim(twin, supply_v=0.0)
    level = twin.conditions.nominal_input_vrms * math.sqrt(2)
    r = sim.respond("A", level, 1000.0)
    assert np.max(np.abs(r.v_out)) < 1e-3
    assert abs(sim.supply_current_a()) < 1e-9
    assert all(abs(v) < 1e-6 for v in sim.operating_point("A").values())


def test_low_supply_clips_earlier(twin, good):
    """Half the supply: smaller collector current and headroom, so a drive that is clean at
    12 V distorts (common practice)."""
    low = BoardSim(twin, supply_v=twin.supply.v_pos / 2)

    def thd(r):
        h = np.abs(r.harmonics("out"))
        return np.sqrt(np.sum(h[2:] ** 2)) / h[1]

    assert thd(low.respond("A", 0.2, 1000.0)) > 3 * thd(good.respond("A", 0.2, 1000.0))
    assert low.supply_current_a() < 0.7 * good.supply_current_a()


# --- periodic response and interpolation ----------------------------------------------------


def test_evaluate_is_band_limited_fourier_series(good):
    """evaluate() against a direct Fourier-series sum of the period's DFT (numpy.fft.rfft as the
    reference, trigonometric interpolation): agreement to 1e-6 of the amplitude; periodic in T;
    equal to the samples on the grid."""
    r = good.respond("A", 0.5, 1000.0)
    n = len(r.v_out)
    spec = np.fft.rfft(r.v_out) / n
    rng = np.random.default_rng(1)
    t = rng.uniform(0, 5e-3, 200)
    k = np.arange(len(spec))
    w = np.where((k == 0) | (k == n // 2), 1.0, 2.0)
    ref = (
        w[None, :] * (spec[None, :] * np.exp(2j * np.pi * k[None, :] * 1000.0 * t[:, None]))
    ).real.sum(axis=1)
    _, v = r.evaluate(t)
    swing = np.ptp(r.v_out)
    assert np.max(np.abs(v - ref)) < 1e-6 * swing
    _, v2 = r.evaluate(t + 3 * r.period_s)
    assert np.max(np.abs(v2 - v)) < 1e-6 * swing
    vin_grid, vout_grid = r.evaluate(r.t_s)
    assert np.max(np.abs(vout_grid - r.v_out)) < 1e-9 * swing
    assert np.max(np.abs(vin_grid - r.v_in)) < 1e-9 * swing


def test_source_resistance_divides_the_input(twin, good):
    """v_in is after the source resistance: at 600 Ω the input connector sees
    Z_in/(Z_in + R_s) of the EMF (voltage divider; common practice), so less than at 50 Ω."""
    a50 = abs(good.respond("A", 1e-3, 1000.0).harmonics("in")[1])
    a600 = abs(good.respond("A", 1e-3, 1000.0, source_ohm=600.0).harmonics("in")[1])
    assert a50 == pytest.approx(1e-3, rel=0.01)
    z_in = 600.0 * a600 / (1e-3 - a600)  # input impedance implied by the divider
    assert 1e-3 * z_in / (z_in + 50.0) == pytest.approx(a50, rel=1e-3)
    assert a600 < 0.97e-3


def test_cache_returns_the_same_point(good):
    """The sequencer asks for the same point repeatedly: answered from the cache."""
    r1 = good.respond("B", 0.1, 1000.0)
    before = good.stats["cached"]
    assert good.respond("B", 0.1, 1000.0) is r1
    assert good.stats["cached"] == before + 1


# --- op-amp stages against the closed-loop formulas ----------------------------------------


@pytest.fixture(scope="module")
def line():
    return load_board(OPAMP)


def test_opamp_gains_follow_finite_loop_gain_formula(line):
    """Closed-loop gain with a single-pole op-amp A(f) = A0/(1 + j f A0/GBW):
    G = G_ideal / (1 + 1/(A β)) with β the feedback fraction (Horowitz & Hill, The Art of
    Electronics, ch. 4, from memory).  Non-inverting 1 + R_F/R_G, inverting −R_F/R_IN
    (source and C_in add to R_IN: at 1 kHz |Z_C| of 2.2 µF is small and included)."""
    sim = BoardSim(line)
    f = 1000.0
    mic = line.channel("MIC").stages[0]
    om = mic.opamp
    a = om.open_loop_gain / (1 + 1j * f * om.open_loop_gain / om.gbw_hz)
    g_ideal = 1 + mic.r_f.nominal / mic.r_g.nominal
    zcg = 1 / (2j * np.pi * f * mic.c_g.nominal)
    beta = (mic.r_g.nominal + zcg) / (mic.r_g.nominal + zcg + mic.r_f.nominal)
    expect = abs((1 / beta) / (1 + 1 / (a * beta)))
    assert _gain(sim.respond("MIC", 1e-3, f)) == pytest.approx(expect, rel=2e-3)
    assert g_ideal == pytest.approx(expect, rel=0.01)
    aux = line.channel("AUX").stages[0]
    r_in = aux.r_in.nominal + 1 / (2j * np.pi * f * aux.c_in.nominal)
    beta_i = r_in / (r_in + aux.r_f.nominal)
    expect_i = abs(aux.r_f.nominal / r_in / (1 + 1 / (a * beta_i)))
    r = sim.respond("AUX", 1e-3, f)
    # gain from the input connector: the connector voltage is across C_in + R_in
    assert _gain(r) == pytest.approx(expect_i, rel=2e-3)
    assert (r.harmonics("out")[1] / r.harmonics("in")[1]).real < 0  # inverting


def test_opamp_output_clips_at_rails_minus_headroom(line):
    """Overdriven, the output stops at V± ∓ headroom (data-sheet output swing; the macro-model's
    clamp has a 50 mV knee) less the drop on its output resistance, and the supply current
    includes the quiescent current."""
    sim = BoardSim(line)
    r = sim.respond("MIC", 2.0, 1000.0)
    om = line.channel("MIC").stages[0].opamp
    # the clamp level behind the macro-model's 20 Ω open-loop output resistance, across the load
    r_load = line.channel("MIC").load_ohm.nominal
    vo_max = (line.supply.v_pos - om.headroom_v.typ) * r_load / (r_load + 20.0)
    assert np.max(r.v_out) == pytest.approx(vo_max, abs=0.1)
    assert np.min(r.v_out) == pytest.approx(-vo_max, abs=0.1)
    assert sim.supply_current_a() >= 2 * om.quiescent_a.typ * 0.99


# --- fault syntax -------------------------------------------------------------------------


def test_parse_fault_forms():
    """The documented forms parse to the documented faults and print back."""
    assert parse_fault("R104:drift=1.3") == Fault("drift", "R104", 1.3)
    assert parse_fault("C102:open") == Fault("open", "C102")
    assert parse_fault("A.gain:low_beta=40") == Fault("low_beta", "A.gain", 40.0)
    assert parse_fault("A.gain:shorted_junction=be") == Fault("shorted_junction", "A.gain", "be")
    assert parse_fault(" C101 : short ").spec == "C101:short"
    for text in ("R104:drift=1.3", "A.gain:shorted_junction=ce", "C102:open_bypass"):
        assert parse_fault(text).spec == text


@pytest.mark.parametrize(
    "text, word",
    [
        ("R104", "expected"),
        ("R104:melt", "unknown fault kind"),
        ("R104:drift", "needs a value"),
        ("R104:drift=abc", "not a number"),
        ("R104:drift=-1", "positive"),
        ("R104:open=2", "no value"),
        ("A.gain:shorted_junction=bc", "junction"),
    ],
)
def test_parse_fault_errors_name_the_fix(text, word):
    with pytest.raises(FaultSpecError) as exc:
        parse_fault(text)
    assert word in str(exc.value)
    assert isinstance(exc.value, StageproofError) and isinstance(exc.value, ValueError)


def test_unknown_designator_lists_valid_ones(twin):
    with pytest.raises(FaultSpecError) as exc:
        BoardSim(twin, ["R999:open"])
    assert "R104" in str(exc.value) and "A.gain" in str(exc.value)
    with pytest.raises(FaultSpecError):
        BoardSim(twin, ["A.nothing:low_beta=10"])
    with pytest.raises(FaultSpecError):
        BoardSim(twin, ["R104:open_bypass"])  # a resistor is not a bypass capacitor


def test_component_refs_are_the_board_files_designators(twin):
    """component_refs lists exactly the ref fields of the board file (read here with tomllib,
    not through the loader)."""
    doc = tomllib.loads(TWIN.read_text())
    refs = {
        v["ref"]
        for ch in doc["channel"]
        for st in ch["stage"]
        for v in st.values()
        if isinstance(v, dict) and "ref" in v
    }
    got = component_refs(twin)
    assert set(got) == refs
    assert got == sorted(got, key=lambda r: (r[0], int(r[1:])))
