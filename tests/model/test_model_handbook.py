"""The model's DC, gain and large-signal formulas against handbook values and reference libraries.

Each test names its outside source in its docstring.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants as const
from scipy.special import iv

from harness.io.board import load_board
from harness.model import design_channel, large_signal_harmonics, operating_point, thermal_voltage
from harness.model.core import solve_junction
from tests.support.boards import board_text, make_board, write_board

V_T = thermal_voltage(300.0)


def _is_for_vbe(vbe: float, ic: float) -> float:
    """I_S that puts V_BE at ``vbe`` when I_C = ``ic`` (the handbooks take V_BE as given)."""
    return ic / math.expm1(vbe / V_T)


def test_thermal_voltage_codata() -> None:
    """kT/q at 300 K from CODATA constants (scipy.constants.k, scipy.constants.e): 25.85 mV."""
    assert thermal_voltage(300.0) == pytest.approx(const.k * 300.0 / const.e, rel=1e-12)
    assert thermal_voltage(300.0) == pytest.approx(0.025852, abs=2e-6)


def test_malvino_divider_bias(tmp_path) -> None:
    """Malvino, voltage-divider bias worked example: V_CC 10 V, R1 10k, R2 2k2, R_E 1k, R_C 3k6
    gives V_B 1.78 V, V_E 1.08 V, V_C 6.14 V (book values to 10 mV, V_BE 0.7 V; beta 100 is our
    inference).  The model solves V_BE from I_S; I_S is chosen for 0.7 V at the book's current.
    """
    board = make_board(
        tmp_path,
        vcc=10.0,
        r1="10k",
        r2="2k2",
        re="1k",
        rc="3k6",
        beta=100,
        is_a=_is_for_vbe(0.7, 1.073e-3),
    )
    op = operating_point(board, "X")
    assert op["gain.base_v"] == pytest.approx(1.78, abs=0.01)
    assert op["gain.emitter_v"] == pytest.approx(1.08, abs=0.01)
    assert op["gain.collector_v"] == pytest.approx(6.14, abs=0.01)


def test_boylestad_exact_analysis_gain(tmp_path) -> None:
    """Boylestad & Nashelsky §5.6 (voltage-divider CE, R_E bypassed): V_CC 22 V, R1 56k, R2 8k2,
    R_C 6k8, R_E 1k5, beta 90.  Exact Thevenin analysis (I_B with (beta+1)R_E, V_BE 0.7 V,
    r_e = V_T/I_E at 25.85 mV) gives A_v = -R_C/r_e = -351.6; the book's approximate analysis
    gives -368.8, 5 % away.  The handbook formula takes alpha = 1; the model's hybrid-pi gain is
    -alpha·R_C/r_e, so the model's gain times (beta+1)/beta must be -351.6.
    """
    board = make_board(
        tmp_path,
        vcc=22.0,
        r1="56k",
        r2="8k2",
        rc="6k8",
        re="1R",
        bypass='re_bypassed = "1k5"\n  c_e = "1000u"',
        beta=90,
        is_a=_is_for_vbe(0.7, 1.3219e-3),
    )
    d = design_channel(board, "X", params={"gain.re": 0.0, "source_ohm": 0.0})
    stage = d.stages[0]
    assert stage.gain * 91 / 90 == pytest.approx(-351.6, rel=2e-3)
    assert abs(stage.gain * 91 / 90 - -368.8) > 10  # and it is not the approximate analysis
    assert stage.vb_v - stage.ve_v == pytest.approx(0.7, abs=2e-3)


def test_degenerated_gain_near_rc_over_re(tmp_path) -> None:
    """Common practice: the gain of a degenerated CE stage is close to R_C/R_E when R_E >> r_e
    (here R_E 2k2 against r_e about 38 ohm at 0.7 mA: within 3 %)."""
    board = make_board(tmp_path, r1="68k", r2="15k", rc="4k7", re="2k2", load="1G")
    d = design_channel(board, "X")
    assert d.gain == pytest.approx(-4700 / 2200, rel=0.03)
    assert d.inverting


def test_vbe_and_vce_sat_are_trade_values() -> None:
    """Common practice: V_BE of a small silicon transistor 0.6-0.7 V at about 1 mA; the demo
    board's V_CE(sat) range lies in the usual 0.1-0.4 V span (typ) and the solved V_BE inside its
    own data-sheet range."""
    board = load_board("limits/demo-twin-preamp.toml")
    d = design_channel(board, "A")
    for s in d.stages:
        assert 0.6 <= s.vb_v - s.ve_v <= 0.7
    t = board.channel("A").stages[0].transistor
    assert 0.1 <= t.vce_sat_v.typ <= 0.4
    assert t.vbe_v.min <= d.stages[0].vb_v - d.stages[0].ve_v <= t.vbe_v.max


@pytest.mark.parametrize("x", [0.1, 0.5, 1.0])
def test_exponential_stage_harmonics_are_bessel_ratios(tmp_path, x) -> None:
    """Abramowitz & Stegun 9.6.34 (generating function exp(x cos t) = I_0(x) + 2 sum I_n(x) cos nt):
    an undegenerated exponential stage driven by a sine of peak x·V_T has HD_n = I_n(x)/I_1(x)
    (scipy.special.iv).  The model's large-signal engine is run with R_E = 0, an ideal voltage
    source (source_ohm 0: the base current drops nothing) and a load light enough that the
    collector stays out of saturation.  (The textbook treatment of this result,
    e.g. in Gray & Meyer's chapter on large-signal behaviour, is from memory.)"""
    board = make_board(
        tmp_path,
        r1="68k",
        r2="15k",
        rc="1k",
        re="1R",
        bypass='re_bypassed = "1k2"\n  c_e = "1000u"',
        load="1G",
    )
    h = large_signal_harmonics(
        board, "X", x * V_T / math.sqrt(2.0), params={"gain.re": 0.0, "source_ohm": 0.0}
    )
    for n in (2, 3, 4):
        assert h[n] / h[1] == pytest.approx(iv(n, x) / iv(1, x), rel=1e-6)
    thd = math.sqrt(sum((iv(n, x) / iv(1, x)) ** 2 for n in range(2, 11)))
    assert math.sqrt(float(np.sum(h[2:] ** 2))) / h[1] == pytest.approx(thd, rel=1e-6)


def _stage_rows(col, rows: int, m: int, vbe: float, vbc: float):
    """The stage coefficients as ``(rows, 1)`` columns and a flat start over ``m + 1``
    points (junction voltages, and mean currents of 5 uA base and 1 mA collector)."""
    from harness.model.periodic import PeriodicState

    c = {k: np.full((rows, 1), v) for k, v in col.items()}
    start = PeriodicState(
        np.full((rows, m + 1), vbe),
        np.full((rows, m + 1), vbc),
        np.full(rows, 5e-6),
        np.full(rows, 1e-3),
    )
    return c, start


def _periodic_residuals(state, drive, col, w) -> tuple[float, float, float, float]:
    """Largest residuals of the periodic stage's equations at ``state``: the base-emitter and
    base-collector loops (V) and the two mean currents (A), from the Ebers-Moll transport
    form (equations in harness.model.periodic's docstring) recomputed here with numpy."""
    vbe, vbc, mb, mc = state.vbe, state.vbc, state.m_b[:, None], state.m_c[:, None]
    i_s, v_t, b_r = col["is_a"], col["v_t"], col["beta_r"]
    icc, iec = i_s * np.expm1(vbe / v_t), i_s * np.expm1(vbc / v_t)
    ic = (icc - iec) * (1 - vbc * col["inv_vaf"]) - iec / b_r
    ib = icc / col["beta_f"] + iec / b_r
    vb = col["v_th"] - (col["r_th"] - col["r_b"]) * mb + drive - col["r_b"] * ib
    ve = col["k_e"] * (mb + mc) + col["r_e"] * (ib + ic)
    vc = col["v_cc"] - (col["r_cdc"] - col["r_cac"]) * mc - col["r_cac"] * ic
    return (
        float(np.max(np.abs(vb - ve - vbe))),
        float(np.max(np.abs(vb - vc - vbc))),
        float(np.max(np.abs(ib @ w - mb[:, 0]))),
        float(np.max(np.abs(ic @ w - mc[:, 0]))),
    )


def test_newton_solvers_converge() -> None:
    """The implicit junction equations are solved to rounding level: the periodic Ebers-Moll
    stage (harness.model.periodic, equations in its docstring, Ebers & Moll, Proc. IRE 1954)
    from rest into deep saturation, and the bias loop; residuals recomputed here with numpy."""
    from harness.model.core import _cos_weights
    from harness.model.periodic import solve_periodic

    m = 16
    cos_t, basis = _cos_weights(m, 0)
    w = basis[:, 0]
    rows = 4
    drive = np.array([0.0, 0.05, 0.5, 3.0])[:, None] * cos_t[None, :]
    col = {
        "is_a": 1e-14,
        "beta_f": 200.0,
        "beta_r": 3.0,
        "inv_vaf": 1 / 80.0,
        "v_t": V_T,
        "v_th": 2.0,
        "r_th": 8e3,
        "r_b": 6e3,
        "k_e": 900.0,
        "r_e": 100.0,
        "v_cc": 12.0,
        "r_cdc": 4.7e3,
        "r_cac": 3e3,
    }
    c, start = _stage_rows(col, rows, m, 0.6, -4.0)
    sol = solve_periodic(drive, c, w, start)
    be, bc, mean_b, mean_c = _periodic_residuals(sol.state, drive, col, w)
    assert be < 1e-9 and bc < 1e-9
    assert mean_b < 1e-15 and mean_c < 1e-12
    assert np.max(sol.state.vbc[3]) > 0.4  # the heaviest drive did saturate the collector
    v_src = np.array([0.2, 0.8, 2.0, 12.0])
    k = np.array([1e3, 1e4, 1.5e3, 1e5])
    v = solve_junction(v_src, k, np.full(4, 1e-14), np.full(4, V_T))
    resid = v + k * 1e-14 * np.expm1(v / V_T) - v_src
    assert np.max(np.abs(resid)) < 1e-12


def test_board_text_helper_roundtrip(tmp_path) -> None:
    """The test helper writes a board the loader accepts (guards the other tests' set-up)."""
    board = load_board(write_board(tmp_path, board_text()))
    assert board.channel("X").stages[0].rc.nominal == 4700


@pytest.mark.parametrize("inv_vaf", [1 / 80.0, 0.0])
def test_periodic_newton_stops_within_its_tolerance(inv_vaf: float) -> None:
    """The periodic solve takes a row as converged once Newton's quadratic error bound on
    its last step is below tol_v; carried on to rounding level (the slower exact path), the
    junction voltages move less than tol_v, with and without the Early effect (the second
    uses the Jacobian's product form), and the loops' residuals (Ebers & Moll, Proc. IRE
    1954, recomputed here) vanish."""
    from harness.model.core import _cos_weights
    from harness.model.periodic import solve_periodic

    m = 16
    cos_t, basis = _cos_weights(m, 0)
    w = basis[:, 0]
    levels = np.array([0.0, 0.01, 0.05, 0.2, 0.5, 1.0, 3.0])
    rows = levels.size
    drive = levels[:, None] * cos_t[None, :]
    col = {
        "is_a": 2e-14,
        "beta_f": 150.0,
        "beta_r": 4.0,
        "inv_vaf": inv_vaf,
        "v_t": V_T,
        "v_th": 2.2,
        "r_th": 9e3,
        "r_b": 5e3,
        "k_e": 1e3,
        "r_e": 200.0,
        "v_cc": 15.0,
        "r_cdc": 6.8e3,
        "r_cac": 4e3,
    }
    c, start = _stage_rows(col, rows, m, 0.62, -5.0)
    tol = 1e-10
    sol = solve_periodic(drive, c, w, start, tol_v=tol)
    exact = solve_periodic(drive, c, w, sol.state, tol_v=1e-24, max_iterations=4)
    assert np.max(np.abs(sol.state.vbe - exact.state.vbe)) < tol
    assert np.max(np.abs(sol.state.vbc - exact.state.vbc)) < tol
    be, bc, _, _ = _periodic_residuals(sol.state, drive, col, w)
    assert be < 1e-9 and bc < 1e-9
    assert np.max(sol.state.vbc[-1]) > 0.4  # the heaviest drive saturates the collector
