"""The drivers against the simulated bench (harness.sim.bench.SimBench) over real
pyvisa-py sockets on 127.0.0.1: the whole stack, no fakes in between."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from harness.errors import IdentityMismatch, ScpiError
from harness.instruments.bench import connect
from harness.io.board import load_board
from harness.io.station import load_station
from harness.sim.bench import SimBench

pytestmark = pytest.mark.wire

REPO = Path(__file__).resolve().parents[2]
BOARD = REPO / "limits" / "demo-twin-preamp.toml"


@pytest.fixture(scope="module")
def board():
    return load_board(BOARD)


@pytest.fixture
def sim(board, tmp_path):
    with SimBench(board) as bench:
        yield bench, load_station(bench.write_station(tmp_path / "station.toml"))


def test_identities_and_a_record_at_the_set_level(sim, rm):
    """A 1 kHz sine set to 50 mVrms at high impedance shows 50 mVrms (±2 %, the board's
    input impedance loads the 50 ohm source a little) on the input probe; rms of a sine =
    peak/√2 over whole cycles (definition).  100 kS/s, 10 cycles in 1000 samples."""
    bench, station = sim
    with connect(station, rm=rm) as ins:
        assert ins.identities["scope"].model == "DIG-4"
        ins.supply.configure(12.0, 0.03)
        ins.supply.output(True)
        ins.generator.configure_sine(1000.0)
        setting = ins.generator.set_level(0.05)
        assert setting == pytest.approx(0.05 * 2 * math.sqrt(2))  # profile unit vpp, high-Z
        ins.generator.output(True)
        assert ins.generator.is_on()
        ins.scope.configure_input(1, range_vpp=0.4)
        ins.scope.configure_input(2, range_vpp=8.0)
        ins.scope.configure_timebase(1e5, 1000)
        ins.scope.configure_trigger(1)
        acq = ins.scope.acquire([1, 2])
        v_in = acq.volts[1]
        assert len(v_in) == 1000 and acq.bits == 8
        assert np.sqrt(np.mean((v_in - v_in.mean()) ** 2)) == pytest.approx(0.05, rel=0.02)
        assert acq.adc_limits[1] == (-0.2, 0.2 - 0.4 / 256)
        assert ins.supply.current_a() > 0 and not ins.supply.tripped()
    log = bench.generator_log
    assert any(e.what == "amplitude_vpp" and e.value == pytest.approx(setting) for e in log)
    assert log[-1].what == "output" and log[-1].value == 0.0  # close() switched it off


def test_dmm_through_switch(sim, rm):
    _bench, station = sim
    with connect(station, rm=rm) as ins:
        ins.supply.configure(12.0, 0.03)
        ins.supply.output(True)
        with ins.switch.routed([101]):
            v = ins.dmm.dc_volts()
        assert 0.0 < v < 12.0  # a collector sits between the rails


def test_scope_power_cycle_mid_run(sim, rm):
    """A power-cycled instrument (pyvisa-py 0.8.1 on a socket: a timeout on read, then a
    refused write) is reconnected, re-identified, given its settings again and acquires."""
    bench, station = sim
    with connect(station, rm=rm) as ins:
        sc = ins.scope
        sc.configure_input(1, range_vpp=0.4)
        sc.configure_timebase(1e5, 1000)
        sc.configure_trigger(1)
        sc.acquire([1])
        bench.power_cycle("scope", 0.2)
        acq = sc.acquire([1])
        assert len(acq.volts[1]) == 1000
        assert sc.session.reconnects == 1


def test_simulator_refusal_is_a_scpi_error(sim, rm):
    """The sim's SCPI parser queues -222 or similar for a setting out of range."""
    _bench, station = sim
    with connect(station, rm=rm) as ins, pytest.raises(ScpiError) as ei:
        ins.generator.session.configure("set_frequency", output=1, frequency_hz=1e12)
    assert ei.value.code < 0 and "FREQuency" in (ei.value.command or "")


def test_wrong_instrument_at_a_resource(sim, rm, tmp_path):
    station_text = (tmp_path / "station.toml").read_text()
    text = station_text.replace("stageproof-sim,DIG-4", "stageproof-sim,SIG-1")
    bad = tmp_path / "bad.toml"
    bad.write_text(text)
    with pytest.raises(IdentityMismatch) as ei:
        connect(load_station(bad), rm=rm)
    assert ei.value.role == "scope"


def test_open_all_is_read_back_and_a_relay_left_closed_is_an_error(sim, rm, tmp_path):
    """A switch profile whose ``open_all`` does nothing (``*WAI``, IEEE 488.2 §10.39:
    wait-to-continue, changes no state) leaves relay 101 closed: the read-back with
    ``query_closed`` finds it, and the driver says so instead of reporting the routes open.
    A watched relay (a fixture route) is read back even when this session never closed it."""
    from harness.errors import InstrumentError

    bench, _station = sim
    text = (REPO / "fixtures/instruments/scpi-switch.toml").read_text()
    prof = tmp_path / "deaf-switch.toml"
    prof.write_text(text.replace('open_all = "ROUTe:OPEN:ALL"', 'open_all = "*WAI"'))
    st = tmp_path / "station-deaf.toml"
    st.write_text(bench.station_text(profiles={"switch": str(prof)}))
    with connect(load_station(st), rm=rm) as ins:
        ins.switch.close([101])
        with pytest.raises(InstrumentError, match=r"relay\(s\) 101 still read closed"):
            ins.switch.open_all()
        assert bench.switch.closed == {101}  # the truth: still closed
        bench.switch.handle(b"ROUTe:OPEN (@101)")
        ins.switch.open_all()  # nothing left closed: no error
        bench.switch.handle(b"ROUTe:CLOSe (@205)")  # closed behind the session's back
        ins.switch.watch([205])
        with pytest.raises(InstrumentError, match="205"):
            ins.switch.open_all()
        bench.switch.handle(b"ROUTe:OPEN (@205)")
