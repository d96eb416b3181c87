"""Which time constants the wait after a level change follows (harness.model.settling)."""

from __future__ import annotations

from pathlib import Path

import pytest

from harness.io.board import load_board
from harness.model.core import parallel
from harness.model.design import design_channel
from harness.model.limits import compute_limits

AUDIO = Path(__file__).resolve().parents[2] / "limits" / "demo-audio-ce.toml"
TWIN = Path(__file__).resolve().parents[2] / "limits" / "demo-twin-preamp.toml"


def test_output_coupling_into_the_load_only_moves_a_dc_level() -> None:
    """Circuit theory (tau = RC, common practice): the output capacitor charges into the
    load through the stage's output resistance, tau = C_out (R_out + R_L) = 100 µF ×
    (4k7 ∥ r_o + 100 k) ≈ 10.5 s, and only moves the output's DC level; the input capacitor
    recharges through source and bias divider, tau = C_in (R_s + R1 ∥ R2) = 10 µF × (50 +
    47 k ∥ 10 k) = 82.96 ms, and moves the operating point.  The wait is 5 of the latter."""
    board = load_board(AUDIO)
    ch = design_channel(board, "A")
    taus = {name: (kind, tau) for name, kind, tau in ch.time_constants}
    kind, tau = taus["gain.c_out"]
    assert kind == "dc_level"
    assert tau == pytest.approx(100e-6 * (ch.output_ohm + 100e3), rel=1e-9)
    assert 10.4 < tau < 10.5  # R_out is 4k7 in parallel with r_o, a little under 4k7
    kind, tau = taus["gain.c_in.bias"]
    assert kind == "operating_point"
    assert tau == pytest.approx(10e-6 * (50 + float(parallel(47e3, 10e3))), rel=1e-9)
    assert ch.settle_time_s == pytest.approx(
        5 * max(t for k, t in taus.values() if k != "dc_level")
    )
    assert ch.dc_settle_time_s == pytest.approx(5 * taus["gain.c_out"][1])
    assert ch.settle_time_s < 0.5 < 50 < ch.dc_settle_time_s


def test_limits_carry_the_classification_and_wait_for_the_worst_board() -> None:
    """The limits' settle time covers every Monte Carlo board (capacitors +50 %/-20 %: the
    longest wait is about 1.5× the nominal one) and keeps the DC-level time apart."""
    board = load_board(AUDIO)
    lim = compute_limits(board, samples=500).channels["A"]
    nominal = design_channel(board, "A").settle_time_s
    assert nominal < lim.settle_time_s <= 1.5 * nominal * 1.02
    assert lim.time_constants["gain.c_out"]["kind"] == "dc_level"
    assert lim.dc_settle_time_s > 50
    again = type(lim).from_dict(lim.to_dict())
    assert again.time_constants == lim.to_dict()["time_constants"]


def test_interstage_and_bypass_capacitors_move_the_operating_point() -> None:
    """On the twin preamp the emitter bypass C102 (gain stage) shapes the waveform; the
    follower's C103 drives only the load."""
    ch = design_channel(load_board(TWIN), "A")
    kinds = {name: kind for name, kind, _ in ch.time_constants}
    assert kinds["gain.c_e"] == "operating_point"
    assert kinds["gain.c_in"] == "operating_point"
    assert kinds["buffer.c_out"] == "dc_level"
