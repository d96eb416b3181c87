"""Connecting means connecting safe: every source off before anything else, one process per
station, the generator off before any reconnect.

Real sockets on 127.0.0.1 to a SimBench; the instruments' own state (the simulated
generator's output, the supply's outputs, the switch's relays) is the evidence, never what
the harness believes.  The station lock is a real ``flock`` held by a real second process.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest

from harness.errors import InstrumentError, StationBusy
from harness.io.station import load_station
from harness.run.safety import connect_safe, safe_station
from harness.run.station_lock import lock_path, take_lock
from tests.support.bench import REPO, free_port, sim_bench

pytestmark = pytest.mark.wire


def _drive(bench: Any) -> None:
    """What a crashed session leaves behind: generator at 0.65 Vpp and on, both supply
    outputs on, a relay closed (sent in-process, as another client would)."""
    bench.generator.handle(b"SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 0.65")
    bench.generator.handle(b"OUTPut1:STATe ON")
    bench.supply.handle(b"OUTPut1:STATe ON")
    bench.supply.handle(b"OUTPut2:STATe ON")
    bench.switch.handle(b"ROUTe:CLOSe (@101)")
    assert bench.generator.output_on and bench.supply.outputs[1].on and bench.switch.closed


def _sources(bench: Any) -> tuple[bool, bool, bool]:
    """(generator on, any supply output on, any relay closed): the instruments' own state."""
    return (
        bench.generator.output_on,
        any(o.on for o in bench.supply.outputs.values()),
        bool(bench.switch.closed),
    )


def _spy_first(device: Any, bench: Any) -> list[tuple[bool, bool, bool]]:
    """The sources' state when ``device`` receives its first command."""
    seen: list[tuple[bool, bool, bool]] = []
    process = device.process

    def spy(line: Any) -> Any:
        if not seen:
            seen.append(_sources(bench))
        return process(line)

    device.process = spy
    return seen


@pytest.fixture()
def lock_dir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    d = tmp_path / "locks"
    monkeypatch.setenv("STAGEPROOF_LOCK_DIR", str(d))
    return d


def test_connect_switches_every_source_off_before_the_scope_is_touched(board, tmp_path, lock_dir):
    with sim_bench(board, tmp_path) as (bench, station_file):
        _drive(bench)
        first_scope = _spy_first(bench.scope, bench)
        inst = connect_safe(load_station(station_file))
        try:
            assert first_scope == [(False, False, False)]
            assert _sources(bench) == (False, False, False)
        finally:
            inst.close()


def test_failed_connect_still_switches_off_what_it_reached(board, tmp_path, lock_dir):
    """The scope unreachable: the connect fails, yet generator and supply are off."""
    with sim_bench(board, tmp_path, timeout_ms=300) as (bench, station_file):
        _drive(bench)
        text = station_file.read_text()
        scope_res = bench.resources["scope"]
        dead = scope_res.replace(scope_res.split("::")[2], str(free_port()))
        station_file.write_text(text.replace(scope_res, dead))
        with pytest.raises(InstrumentError, match="scope"):
            connect_safe(load_station(station_file))
        assert _sources(bench) == (False, False, False)


def test_failed_generator_still_leaves_supply_off(board, tmp_path, lock_dir):
    """The generator refused (wrong identity): the supply is still reached and off."""
    with sim_bench(board, tmp_path) as (bench, station_file):
        _drive(bench)
        text = station_file.read_text()
        gen_block = text.index("[instrument.generator]")
        idn = text.index("expect_idn", gen_block)
        end = text.index("\n", idn)
        station_file.write_text(text[:idn] + 'expect_idn = "nobody,NOTHING"' + text[end:])
        with pytest.raises(InstrumentError, match="expects"):
            connect_safe(load_station(station_file))
        assert not any(o.on for o in bench.supply.outputs.values())
        assert not bench.switch.closed


def test_close_switches_the_supply_off_too(board, tmp_path, lock_dir):
    """What `line`'s quit does: every source safe, the supply included."""
    with sim_bench(board, tmp_path) as (bench, station_file):
        inst = connect_safe(load_station(station_file))
        inst.supply.configure(12.0, 0.03, output=1)
        inst.supply.output(True, output=1)
        inst.generator.output(True)
        assert _sources(bench)[:2] == (True, True)
        inst.close()
        assert _sources(bench) == (False, False, False)
        assert inst.closing_states == {"generator": "off", "supply": "off", "switch": "off"}


def test_generator_off_before_a_lost_scope_is_reconnected(board, tmp_path, lock_dir):
    """The scope power-cycles while the generator drives the board: the generator is off
    before the scope session's first command after the reconnect."""
    with sim_bench(board, tmp_path, timeout_ms=500) as (bench, station_file):
        inst = connect_safe(load_station(station_file))
        try:
            inst.generator.set_level(0.05)
            inst.generator.output(True)
            assert bench.generator.output_on
            bench.power_cycle("scope", 0.2)
            first_after = _spy_first(bench.scope, bench)
            inst.scope.session.query("*IDN?")
            assert first_after and first_after[0][0] is False
            assert not bench.generator.output_on
            assert inst.scope.session.reconnects == 1
        finally:
            inst.close()


# --- one process per station ------------------------------------------------------------------

_HOLD = """
import sys, time
from harness.run.station_lock import take_lock
lock = take_lock([(sys.argv[1], "generator")], "bench-7")
print("held", flush=True)
time.sleep(120)
"""


def _holder(resource: str, lock_dir: Path) -> subprocess.Popen:
    env = {**os.environ, "STAGEPROOF_LOCK_DIR": str(lock_dir), "PYTHONPATH": str(REPO)}
    proc = subprocess.Popen(
        [sys.executable, "-c", _HOLD, resource],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
        cwd=REPO,
    )
    assert proc.stdout is not None
    assert proc.stdout.readline().strip() == "held", proc.stderr.read() if proc.stderr else ""
    return proc


def test_second_process_gets_one_line_naming_the_holder(lock_dir):
    """flock(2) is per open file and released by the kernel when the holder dies, SIGKILL
    included (Linux man-pages, flock(2))."""
    res = "TCPIP::127.0.0.1::5999::SOCKET"
    proc = _holder(res, lock_dir)
    try:
        # VISA names are case-insensitive and board 0 is the default: the same instrument
        with pytest.raises(StationBusy) as ei:
            take_lock([("tcpip0::127.0.0.1::5999::socket", "generator")])
        text = str(ei.value)
        assert "\n" not in text
        assert f"pid {proc.pid} on host {socket.gethostname()}" in text
        assert "since 20" in text and "UTC" in text
        assert "station_lock" in text or "-c" in text  # the holder's command line
        assert "generator" in text
        # another instrument of another station is free meanwhile
        take_lock([("TCPIP::127.0.0.1::6000::SOCKET", "scope")]).release()
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        for pipe in (proc.stdout, proc.stderr):
            if pipe is not None:
                pipe.close()
    lock = take_lock([(res, "generator")])  # the kernel released the dead holder's lock
    assert lock.resources == [res]
    lock.release()
    assert not lock_path(res, lock_dir).exists()


def test_lock_is_all_or_none(lock_dir):
    proc = _holder("TCPIP::127.0.0.1::7001::SOCKET", lock_dir)
    try:
        with pytest.raises(StationBusy):
            take_lock(
                [
                    ("TCPIP::127.0.0.1::7000::SOCKET", "generator"),
                    ("TCPIP::127.0.0.1::7001::SOCKET", "scope"),
                ]
            )
        # the first one was given back when the second was refused
        take_lock([("TCPIP::127.0.0.1::7000::SOCKET", "generator")]).release()
    finally:
        proc.kill()
        proc.wait(10)
        for pipe in (proc.stdout, proc.stderr):
            if pipe is not None:
                pipe.close()


def test_safe_station_holds_the_lock_for_the_session(board, tmp_path, lock_dir):
    with sim_bench(board, tmp_path) as (bench, station_file):
        station = load_station(station_file)
        with safe_station(station), pytest.raises(StationBusy, match="station busy"):
            take_lock([(bench.resources["scope"], "scope")])
        take_lock([(bench.resources["scope"], "scope")]).release()


def test_a_fixture_relay_a_crashed_process_left_closed_is_read_back_at_connect(
    board, tmp_path, lock_dir
):
    """The fixture's routes are read back after the switch's open-all at connect, so a
    relay closed behind this process's back (a crashed run) is seen; with a switch whose
    open-all does nothing (``*WAI``, IEEE 488.2 §10.39) the connect refuses, naming it."""
    from harness.errors import SafetyError

    with sim_bench(board, tmp_path) as (bench, station_file):
        text = (REPO / "fixtures/instruments/scpi-switch.toml").read_text()
        prof = tmp_path / "deaf-switch.toml"
        prof.write_text(text.replace('open_all = "ROUTe:OPEN:ALL"', 'open_all = "*WAI"'))
        deaf = tmp_path / "station-deaf.toml"
        deaf.write_text(bench.station_text(profiles={"switch": str(prof)}))
        bench.switch.handle(b"ROUTe:CLOSe (@102)")
        inst = connect_safe(load_station(deaf))  # not told the fixture: 102 goes unseen
        inst.close()
        with pytest.raises(SafetyError, match="switch route not confirmed off"):
            connect_safe(load_station(deaf), relays=(101, 102))
        assert bench.switch.closed == {102}
        inst = connect_safe(load_station(station_file), relays=(101, 102))  # a working switch
        assert not bench.switch.closed
        inst.close()
