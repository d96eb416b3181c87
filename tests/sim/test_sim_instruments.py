"""The simulated instruments in-process (no sockets), with the real board physics behind.

References: IEEE 488.2 §8.7.9 (definite-length blocks); the scope profile's scaling rule
(fixtures/instruments/scpi-scope.toml: volts = offset + code · range / 2**bits); numpy's
rfft as the reference spectrum; common practice for CV/CC bench supplies.
"""

from __future__ import annotations

import math
import time
from pathlib import Path

import numpy as np
import pytest

from harness.instruments.scpi import parse_block
from harness.io.board import load_board
from harness.sim.bench import SimBench
from harness.sim.physics import BoardSim

REPO = Path(__file__).resolve().parents[2]
TWIN = REPO / "limits" / "demo-twin-preamp.toml"


@pytest.fixture(scope="module")
def board():
    return load_board(TWIN)


@pytest.fixture
def bench(board) -> SimBench:
    b = SimBench(board)
    b.supply.handle("VOLT 12;CURR 0.05;OUTP ON")
    b.generator.handle("FREQ 1000;VOLT 0.1;OUTP ON")
    return b


def fetch(bench: SimBench, n: int, dtype: str = ">i1") -> np.ndarray:
    payload, _ = parse_block(bench.scope.handle(f"FETC? (@{n})".encode()))
    return np.frombuffer(payload, dtype).astype(float)


def amplitude(v: np.ndarray, fs: float, f: float) -> float:
    """Fundamental peak by least squares (reference: numpy.linalg.lstsq)."""
    t = np.arange(v.size) / fs
    a = np.column_stack([np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t), np.ones_like(t)])
    c, *_ = np.linalg.lstsq(a, v, rcond=None)
    return float(math.hypot(c[0], c[1]))


def acquire(bench: SimBench, *cmds: str) -> None:
    for c in ("SENS:SWE:TINT 1E-5;POIN 4096", "FORM:DATA INT,8", *cmds, "INIT:CONT OFF;:INIT:IMM"):
        bench.scope.handle(c.encode())
    assert bench.scope.handle(b"SYST:ERR?") == b'0,"No error"\n'


def test_generator_emf_is_half_the_vpp_setting(bench: SimBench, board) -> None:
    """amplitude_unit vpp at a high-Z calibrated load: EMF peak = setting / 2, and the
    board input is that EMF divided by 50 Ω and the input impedance (voltage divider)."""
    acquire(bench, "SENS1:VOLT:RANG 0.2")
    v = fetch(bench, 1) * 0.2 / 256
    a = amplitude(v, 1e5, 1000.0)
    ref = BoardSim(board).respond("A", 0.05, 1000.0, 0.0, 50.0)
    expected = amplitude(np.asarray(ref.evaluate(np.arange(4096) / 1e5)[0]), 1e5, 1000.0)
    assert a == pytest.approx(expected, rel=0.01)
    assert 0.95 * 0.05 < a < 0.05  # loaded slightly by the board


def test_probe_tip_volts_and_range_rounding(bench: SimBench) -> None:
    """Range, offset and data are at the probe tip: a 10:1 probe with an 8 Vpp tip range
    uses the 0.8 Vpp front-end range and gives the same volts as 1:1 at 8 Vpp."""
    acquire(bench, "SENS2:VOLT:RANG 8")
    direct = amplitude(fetch(bench, 2) * 8 / 256, 1e5, 1000.0)
    acquire(bench, "INP2:ATT 10", "SENS2:VOLT:RANG 8")
    assert bench.scope.handle(b"SENS2:VOLT:RANG?") == b"8\n"
    probed = amplitude(fetch(bench, 2) * 8 / 256, 1e5, 1000.0)
    assert probed == pytest.approx(direct, rel=0.02)
    bench.scope.handle(b"SENS2:VOLT:RANG 3")  # 0.3 V at the input: rounds up to 0.4 x 10
    assert bench.scope.handle(b"SENS2:VOLT:RANG?") == b"4\n"


def test_over_range_clips_at_extreme_codes(bench: SimBench) -> None:
    acquire(bench, "SENS2:VOLT:RANG 0.4")
    codes = fetch(bench, 2)
    assert codes.max() == 127 and codes.min() == -128
    assert np.mean(codes == 127) > 0.1


def test_offset_and_scaling_rule(bench: SimBench) -> None:
    """volts = offset + code · range / 256 (the profile's rule): with an offset of +1 V the
    codes of the same signal shift by 1 V / LSB."""
    acquire(bench, "SENS1:VOLT:RANG 0.8", "SENS1:VOLT:OFFS 0")
    base = fetch(bench, 1).mean()
    acquire(bench, "SENS1:VOLT:RANG 0.8", "SENS1:VOLT:OFFS 0.1")
    shifted = fetch(bench, 1).mean()
    assert base - shifted == pytest.approx(0.1 / (0.8 / 256), abs=0.5)


def test_formats_and_byte_orders_describe_the_same_record(bench: SimBench) -> None:
    """INT,8 / INT,16 / REAL,32, NORMal (big-endian) and SWAPped, one record: all agree."""
    acquire(bench, "SENS2:VOLT:RANG 4")
    int8 = fetch(bench, 2)
    bench.scope.handle(b"FORM:DATA INT,16;BORD SWAP")
    assert np.array_equal(fetch(bench, 2, "<i2"), int8)
    bench.scope.handle(b"FORM:DATA REAL,32;:FORM:BORD NORM")
    assert np.allclose(fetch(bench, 2, ">f4"), int8 * 4 / 256, atol=1e-6)
    bench.scope.handle(b"FORM ASC")
    text = bench.scope.handle(b"FETC? (@2)").decode().strip().split(",")
    assert np.allclose(np.array(text, float), int8 * 4 / 256, atol=1e-9)
    # FORM? leaves the path at the root, so BORDer needs its FORMat again (header path rule)
    assert bench.scope.handle(b"FORM?;:FORM:BORD?") == b"ASC,0;NORM\n"


def test_trigger_starts_the_record_on_the_rising_crossing(bench: SimBench) -> None:
    """The record begins at the trigger input rising through the level (within a sample)."""
    acquire(bench, "SENS1:VOLT:RANG 0.2", "TRIG:SOUR INT1;SLOP POS;LEV 0.02")
    v = fetch(bench, 1) * 0.2 / 256
    assert v[:3].mean() == pytest.approx(0.02, abs=0.006)
    assert v[5] > v[0]


def test_noise_floor_of_an_unconnected_input(bench: SimBench) -> None:
    """Input 4 is wired to nothing: 0.2 LSB rms noise (quantised) + 20 µV rms; the ADC
    must dither between codes 0 and ±1 rarely, so the rms code is small but non-zero."""
    acquire(bench, "SENS4:VOLT:RANG 0.04")
    codes = fetch(bench, 4)
    rms = float(np.sqrt(np.mean(codes**2)))
    sigma = math.hypot(0.2, 20e-6 / (0.04 / 256))
    assert 0.3 * sigma < rms < 1.5 * sigma


def test_adc_nonlinearity_makes_about_minus_60_dbc_at_full_scale(board) -> None:
    """Coherent record (fs 100 kS/s, N 4096, J 41 -> 1000.9765625 Hz, coherent
    sampling after Maxim/ADI application note 1040) of a
    near-full-scale input: HD2 and HD3 from numpy.fft.rfft bins 82 and 123 sit near the
    configured -60 dBc (HD2 scales with amplitude: -60 dB + 20 log10(A/FS))."""
    bench = SimBench(board)
    bench.supply.handle("VOLT 12;CURR 0.05;OUTP ON")
    bench.generator.handle("FREQ 1000.9765625;VOLT 0.38;OUTP ON")
    acquire(bench, "SENS1:VOLT:RANG 0.4")
    codes = fetch(bench, 1)
    spec = np.abs(np.fft.rfft(codes))
    fund = spec[41]
    a_fs = fund * 2 / 4096 / 128
    hd2 = 20 * np.log10(spec[82] / fund)
    hd3 = 20 * np.log10(spec[123] / fund)
    assert 0.8 < a_fs < 1.0
    assert hd2 == pytest.approx(-60 + 20 * np.log10(a_fs), abs=3)
    assert hd3 == pytest.approx(-60 + 40 * np.log10(a_fs), abs=3)


def test_dmm_reads_the_routed_test_point(bench: SimBench, board) -> None:
    """Relay 101 = channel A gain collector, 102 = emitter (as in
    fixtures/fixture-twin-preamp.toml); none closed reads ~0 V; two closed: -221."""
    op = BoardSim(board).operating_point("A", supply_v=12.0)
    assert float(bench.dmm.handle(b"MEAS:VOLT:DC?")) == pytest.approx(0.0, abs=1e-4)
    bench.switch.handle(b"ROUT:CLOS (@101)")
    assert float(bench.dmm.handle(b"MEAS:VOLT:DC? AUTO")) == pytest.approx(
        op["gain.collector_v"], abs=1e-4
    )
    bench.switch.handle(b"ROUT:OPEN:ALL;:ROUT:CLOS (@102)")
    assert float(bench.dmm.handle(b"MEAS:VOLT:DC? 10")) == pytest.approx(
        op["gain.emitter_v"], abs=1e-4
    )
    assert bench.dmm.handle(b"MEAS:VOLT:DC? 0.1") == b"9.9E37\n"  # over range
    bench.switch.handle(b"ROUT:CLOS (@103)")
    assert bench.switch.handle(b"ROUT:CLOS? (@101:103)") == b"0,1,1\n"
    assert bench.dmm.handle(b"MEAS:VOLT:DC?") == b"9.91E37\n"
    assert bench.dmm.handle(b"SYST:ERR?").startswith(b"-221")


def test_dmm_autoranges_on_def_and_reads_a_rail_test_point(bench: SimBench, board) -> None:
    """SCPI-99 vol. 1, MEASure (from memory): the range parameter DEFault leaves the range
    to the instrument, so the rail (relay 104, channel A buffer collector; 12.2 V, inside the
    board's 12 V 2 % supply) reads as such with DEF, while an explicit 1 V range overloads
    on it (9.9E37, SCPI infinity)."""
    bench.supply.handle(b"VOLT 12.2;CURR 0.05;OUTP ON")
    bench.switch.handle(b"ROUT:CLOS (@104)")
    for form in (b"MEAS:VOLT:DC? DEF", b"MEAS:VOLT:DC? DEFault", b"MEAS:VOLT:DC?"):
        assert float(bench.dmm.handle(form)) == pytest.approx(12.2, abs=0.01)
    assert bench.dmm.handle(b"MEAS:VOLT:DC? 1") == b"9.9E37\n"
    assert float(bench.dmm.handle(b"MEAS:VOLT:DC? 15")) == pytest.approx(12.2, abs=0.01)
    assert bench.dmm.handle(b"SYST:ERR?").startswith(b"0,")


def test_supply_current_limit_folds_back_and_kills_the_board(bench: SimBench, board) -> None:
    """Common practice (CV/CC supply): above the limit the output holds the limit current
    and its voltage falls; the board then has no signal at its output."""
    i_q = BoardSim(board).supply_current_a(12.0)
    assert float(bench.supply.handle(b"MEAS:CURR?")) == pytest.approx(i_q, abs=1e-5)
    assert bench.supply.handle(b"SOUR:CURR:PROT:TRIP?") == b"0\n"
    limit = i_q / 4
    bench.supply.handle(f"CURR {limit}".encode())
    assert bench.supply.handle(b"SOUR1:CURR:PROT:TRIP?") == b"1\n"
    assert float(bench.supply.handle(b"MEAS:CURR?")) == pytest.approx(limit, abs=1e-5)
    assert float(bench.supply.handle(b"MEAS:VOLT?")) < 0.5 * 12
    acquire(bench, "SENS2:VOLT:RANG 4")
    assert amplitude(fetch(bench, 2) * 4 / 256, 1e5, 1000.0) < 0.1


def test_supply_off_means_a_dead_board(bench: SimBench) -> None:
    acquire(bench, "SENS2:VOLT:RANG 4")
    alive = amplitude(fetch(bench, 2) * 4 / 256, 1e5, 1000.0)
    bench.supply.handle(b"OUTP OFF")
    amps, volts = bench.supply.handle(b"MEAS:CURR?;:MEAS:VOLT?").split(b";")
    assert abs(float(amps)) < 1e-5 and float(volts) == 0.0
    acquire(bench, "SENS2:VOLT:RANG 4")
    dead = amplitude(fetch(bench, 2) * 4 / 256, 1e5, 1000.0)
    assert alive > 0.3 and dead < 0.02


def test_generator_output_off_gives_no_drive(bench: SimBench) -> None:
    bench.generator.handle(b"OUTP OFF")
    acquire(bench, "SENS1:VOLT:RANG 0.2")
    assert np.abs(fetch(bench, 1)).max() <= 2


def test_generator_log_records_levels_and_output_history(bench: SimBench) -> None:
    bench.generator.handle(b"VOLT 0.5;OUTP OFF;VOLT 2;*RST")
    log = bench.generator_log
    assert [e.time_s for e in log] == sorted(e.time_s for e in log)
    amps = [e.value for e in log if e.what == "amplitude_vpp"]
    assert amps[-4:] == [0.1, 0.5, 2.0, 0.1]  # *RST sets the default amplitude again
    assert [on for _, on in bench.output_history][-3:] == [True, False, False]
    assert bench.max_commanded_vpp() == 2.0
    assert bench.max_commanded_vpp(while_on=True) == 0.5
    assert [e.what for e in bench.supply_log][-3:] == ["voltage_v", "current_limit_a", "output"]


def test_component_fault_reaches_the_physics(board) -> None:
    """A drifted emitter resistor moves channel A's collector, not channel B's."""
    bench = SimBench(board, faults=["R104:drift=1.5"])
    bench.supply.handle(b"VOLT 12;CURR 0.05;OUTP ON")
    bench.switch.handle(b"ROUT:CLOS (@101)")
    a = float(bench.dmm.handle(b"MEAS:VOLT:DC?"))
    bench.switch.handle(b"ROUT:OPEN:ALL;:ROUT:CLOS (@201)")
    b = float(bench.dmm.handle(b"MEAS:VOLT:DC?"))
    assert a - b > 0.1


def test_latency_model_holds_opc_for_the_acquisition(board) -> None:
    """With latency on, *OPC? after INIT waits record length / sample rate (0.1 s here)."""
    bench = SimBench(board, latency=True)
    bench.supply.handle(b"VOLT 12;CURR 0.05;OUTP ON")
    bench.scope.handle(b"SENS:SWE:TINT 1E-4;POIN 1000")
    t = time.monotonic()
    bench.scope.handle(b"INIT;*OPC?")
    assert time.monotonic() - t >= 0.1
    fast = SimBench(board)
    fast.scope.handle(b"SENS:SWE:TINT 1E-4;POIN 1000;:INIT")  # physics solved and cached
    t = time.monotonic()
    fast.scope.handle(b"INIT;*OPC?")
    assert time.monotonic() - t < 0.05


def test_injected_block_faults_in_process(bench: SimBench) -> None:
    acquire(bench, "SENS2:VOLT:RANG 4")
    full = bench.scope.handle(b"FETC? (@2)")
    bench.inject("scope", "bad_block_header", on="fetch", count=1)
    assert bench.scope.handle(b"FETC? (@2)").startswith(b"#9abc")
    bench.inject("scope", "drop_mid_block", count=1)
    cut = bench.scope.handle(b"FETC? (@2)")
    assert 0 < len(cut) < len(full)
    assert bench.scope.handle(b"FETC? (@2)") == full


def test_signal_faults_add_an_oscillation_and_hum_at_their_level(board) -> None:
    """``A.buffer:oscillate=400000,0.2`` adds 0.2 V peak at 400 kHz at channel A's output
    (the follower drives the output connector); ``B:hum=50,0.01`` adds 10 mV peak mains hum
    at channel B's input, amplified by the channel; from numpy.fft.rfft of a coherent record
    (10 MS/s, 100000 points: 400 kHz in bin 4000; 50 Hz needs 20 ms at 1 MS/s)."""
    from harness.sim.physics import parse_fault

    osc = SimBench(board, faults=["A.buffer:oscillate=400000,0.2"])
    osc.supply.handle(b"VOLT 12;CURR 0.05;OUTP ON")
    osc.scope.handle(b"SENS2:VOLT:RANG 2;:SWE:TINT 1E-7;:SWE:POIN 100000;:TRIG:SOUR IMM")
    osc.scope.handle(b"INIT")
    codes, lsb, _ = osc.devices["scope"].codes(2)
    spec = np.abs(np.fft.rfft(codes * lsb)) * 2 / len(codes)
    assert spec[4000] == pytest.approx(0.2, rel=0.03)
    assert np.max(spec[10:3990]) < 0.01
    # without the supply the board does not oscillate
    osc.supply.handle(b"OUTP OFF")
    osc.scope.handle(b"INIT")
    codes, lsb, _ = osc.devices["scope"].codes(2)
    assert np.max(np.abs(np.fft.rfft(codes * lsb))[1:] * 2 / len(codes)) < 0.01

    hum = SimBench(board, faults=[parse_fault("B:hum=50,0.01", board)])
    hum.supply.handle(b"VOLT 12;CURR 0.05;OUTP ON")
    hum.scope.handle(b"SENS3:VOLT:RANG 0.8;:SWE:TINT 1E-6;:SWE:POIN 100000;:TRIG:SOUR IMM")
    hum.scope.handle(b"INIT")
    codes, lsb, _ = hum.devices["scope"].codes(3)
    spec = np.abs(np.fft.rfft(codes * lsb)) * 2 / len(codes)
    gain = 10 ** (19.4 / 20)  # the demo channel's gain, about 19.4 dB (limits)
    assert spec[5] == pytest.approx(0.01 * gain, rel=0.1)  # 50 Hz: bin 5 of 0.1 s
    assert spec[10] == pytest.approx(0.005 * gain, rel=0.1)
