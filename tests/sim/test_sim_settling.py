"""The simulated board settles with its circuit's time constants (harness.sim.settling).

External checks: an RC charging from a step decays as e^(-t/RC) (circuit theory, common
practice); the output capacitor of the invented audio demo board charges into its load with
tau = C_out (R_out + R_L) = 100 µF × (about 4.68 k + 100 k) ≈ 10.5 s; its charging current
through R_C holds the collector below its rest point by R_C/(R_C + R_L) of the output's DC
step.  The periodic steady state is the limit of the transient.  (The run-level check of
both sides, a right wait and none, is tests/run/test_settling_run.py.)
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from harness.io.board import load_board
from harness.model.design import design_channel
from harness.sim.bench import SimBench
from harness.sim.physics import BoardSim

AUDIO = Path(__file__).resolve().parents[2] / "limits" / "demo-audio-ce.toml"


@pytest.fixture(scope="module")
def audio():
    return load_board(AUDIO)


def _read(bench: SimBench, relay: int) -> float:
    bench.switch.handle(b"ROUT:OPEN:ALL;:ROUT:CLOS (@%d)" % relay)
    return float(bench.dmm.handle(b"MEAS:VOLT:DC? 15"))


def test_collector_after_supply_on_follows_the_output_rc_and_tends_to_steady_state(audio):
    steady = BoardSim(audio).operating_point("A", supply_v=12.0)["gain.collector_v"]
    bench = SimBench(audio, settling=True)
    bench.supply.handle(b"VOLT 12;CURR 0.05;OUTP ON")
    bench.sleep(20.0)
    d20 = steady - _read(bench, 101)
    bench.sleep(10.0)
    d30 = steady - _read(bench, 101)
    ch = design_channel(audio, "A")
    tau = 100e-6 * (ch.output_ohm + 100e3)
    assert d20 > 0.01  # still held down by the charging current
    assert d30 / d20 == pytest.approx(math.exp(-10.0 / tau), rel=0.05)
    bench.sleep(300.0)
    assert _read(bench, 101) == pytest.approx(steady, abs=1e-4)  # the limit


def test_a_board_without_settling_is_always_in_steady_state(audio):
    steady = BoardSim(audio).operating_point("A", supply_v=12.0)["gain.collector_v"]
    bench = SimBench(audio)
    assert not bench.settling
    bench.supply.handle(b"VOLT 12;CURR 0.05;OUTP ON")
    assert _read(bench, 101) == pytest.approx(steady, abs=1e-4)
