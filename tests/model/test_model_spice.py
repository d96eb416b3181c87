"""The model against ngspice (Debian package ngspice; Gummel-Poon BJT with the board's IS and
BF, VAF infinite) on netlists written from the same board files by harness.model.spice.

Tolerances: bias within 20 mV (the model and SPICE solve the same junction equations; the
residue is ngspice's convergence tolerance and its base-collector leakage terms); small-signal
gain within 1 % (both are linearisations at the same bias); THD within 3 % of its value plus
0.005 percentage points (ngspice's fourier interpolates a 200-point grid of a 2.5 us step
transient: a few 1e-5 of numerical floor, visible in its own higher harmonics).
"""

from __future__ import annotations

import math

import pytest

from harness.io.board import load_board
from harness.model import design_channel, large_signal_harmonics, operating_point
from harness.model.spice import channel_netlist, parse_fourier, parse_values
from tests.support.boards import make_board

pytestmark = pytest.mark.ngspice

DEMO = "limits/demo-twin-preamp.toml"


def _gain(values: dict[str, float]) -> float:
    return math.hypot(values["gr"], values["gi"]) * (1 if values["gr"] >= 0 else -1)


def _check_channel(spice, board, channel: str, levels_vrms: tuple[float, ...]) -> None:
    op = operating_point(board, channel)
    d = design_channel(board, channel)
    out = spice(channel_netlist(board, channel))
    v = parse_values(out)
    for j, st in enumerate(board.channel(channel).stages):
        if f"{st.name}.base_v" in op:
            assert v[f"v(b{j})"] == pytest.approx(op[f"{st.name}.base_v"], abs=0.02)
            assert v[f"v(e{j})"] == pytest.approx(op[f"{st.name}.emitter_v"], abs=0.02)
        if f"{st.name}.collector_v" in op and st.kind == "common_emitter":
            assert v[f"v(c{j})"] == pytest.approx(op[f"{st.name}.collector_v"], abs=0.02)
    assert _gain(v) == pytest.approx(d.gain, rel=0.01)
    for level in levels_vrms:
        out = spice(channel_netlist(board, channel, amplitude_vpk=level * math.sqrt(2.0)))
        thd_spice, _ = parse_fourier(out)
        h = large_signal_harmonics(board, channel, level)
        thd_model = 100.0 * math.sqrt(float((h[2:] ** 2).sum())) / h[1]
        assert thd_model == pytest.approx(thd_spice, rel=0.03, abs=0.005), level


def test_common_emitter_stage_against_ngspice(spice, tmp_path) -> None:
    """A single partly bypassed CE stage (invented values): bias, gain and THD at three levels
    against ngspice .op / .ac / .tran + fourier."""
    board = make_board(
        tmp_path,
        r1="47k",
        r2="10k",
        rc="3k3",
        re="100R",
        bypass='re_bypassed = "820R"\n  c_e = "220u"',
        load="22k",
        beta=250,
        is_a=2e-14,
    )
    _check_channel(spice, board, "X", (0.005, 0.015, 0.03))


def test_demo_twin_preamp_against_ngspice(spice) -> None:
    """Demo channel A (CE stage DC-coupled into a follower; the follower's base current loads
    the collector): bias, gain and THD at the nominal level and two others against ngspice."""
    board = load_board(DEMO)
    _check_channel(spice, board, "A", (0.02, board.conditions.nominal_input_vrms, 0.15))


def test_demo_thd_criterion_level_against_ngspice(spice) -> None:
    """At the input level where the model puts THD = 1 % (the board's clip criterion), ngspice's
    fourier THD of the same circuit is 1 % within 0.05 percentage points."""
    board = load_board(DEMO)
    d = design_channel(board, "A")
    out = spice(channel_netlist(board, "A", amplitude_vpk=d.thd_clip_input_vrms * math.sqrt(2)))
    thd_spice, _ = parse_fourier(out)
    assert thd_spice == pytest.approx(board.conditions.clip_thd_percent, abs=0.05)


def test_demo_opamp_channels_gain_against_ngspice(spice) -> None:
    """Demo op-amp channels (finite open-loop gain, coupling capacitors at 1 kHz): small-signal
    gain against ngspice .ac."""
    board = load_board("limits/demo-opamp-line.toml")
    for name in ("MIC", "AUX"):
        v = parse_values(spice(channel_netlist(board, name)))
        assert _gain(v) == pytest.approx(design_channel(board, name).gain, rel=0.01)
