"""The simulated bench over loopback sockets: pyvisa-py as the client, raw SCPI strings.

Proves the wire protocol with a client outside the project: pyvisa 1.16 /
pyvisa-py 0.8 (``ResourceManager('@py')``, SOCKET resources with LF read and write
terminations, which pyvisa's documentation on termination characters requires for raw sockets),
``query_binary_values`` reading IEEE 488.2 §8.7.9 definite-length blocks.
Robustness: garbage, an oversized line, clients vanishing mid-command and mid-reply, 50
reconnects in a row and power cycles must never crash or wedge a server.
"""

from __future__ import annotations

import contextlib
import os
import socket
import time
from pathlib import Path

import numpy as np
import pytest
import pyvisa

from harness.io.board import load_board
from harness.sim.bench import SimBench

pytestmark = pytest.mark.wire

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def bench():
    board = load_board(REPO / "limits" / "demo-twin-preamp.toml")
    with SimBench(board) as b:
        yield b


@pytest.fixture(scope="module")
def rm():
    """The process's one pyvisa-py manager: pyvisa shares its session between managers of
    one library, so closing a manager here would close every other test's resources."""
    from harness.instruments.session import resource_manager

    return resource_manager("@py")


def open_res(rm, resource: str):
    inst = rm.open_resource(resource, read_termination="\n", write_termination="\n", timeout=5000)
    return inst


def port_of(bench: SimBench, role: str) -> int:
    return bench.servers[role].port


def raw(port: int, data: bytes, *, read: bool = True, timeout_s: float = 3.0) -> bytes:
    with socket.create_connection(("127.0.0.1", port), timeout=timeout_s) as s:
        s.sendall(data)
        if not read:
            return b""
        buf = b""
        while not buf.endswith(b"\n"):
            chunk = s.recv(65536)
            if not chunk:
                break
            buf += chunk
        return buf


def idn_ok(port: int) -> bool:
    return raw(port, b"*IDN?\n").startswith(b"stageproof-sim,")


def test_pyvisa_drives_the_whole_bench_with_raw_scpi(bench: SimBench, rm) -> None:
    """Generator, supply and scope driven only through pyvisa-py with SCPI text; the
    waveform read with query_binary_values (datatype 'b', is_big_endian=True: pyvisa's
    query_binary_values assumes little-endian, SCPI-99 FORMat:BORDer NORMal is big-endian)."""
    res = bench.resources
    gen, scope, psu = (open_res(rm, res[r]) for r in ("generator", "scope", "supply"))
    try:
        for inst, model in ((gen, "SIG-1"), (scope, "DIG-4"), (psu, "PSU-2")):
            assert inst.query("*IDN?").split(",")[:2] == ["stageproof-sim", model]
            inst.write("*RST;*CLS")
        psu.write("SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 12")
        psu.write("SOURce1:CURRent:LEVel:IMMediate:AMPLitude 0.05;:OUTPut1:STATe ON")
        # each instrument has its own connection: wait until the supply has acted before
        # the scope records (a write returns once sent, not once done)
        assert psu.query("*OPC?") == "1"
        gen.write("SOURce1:FUNCtion:SHAPe SINusoid;:SOURce1:FREQuency:CW 1000.9765625")
        gen.write("SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 0.1;:OUTPut1:STATe ON")
        assert gen.query("OUTPut1:STATe?") == "1"
        scope.write("SENSe1:VOLTage:RANGe 0.2;:SENSe2:VOLTage:RANGe 4")
        scope.write("SENSe:SWEep:TINTerval 1E-5;POINts 4096")
        scope.write("TRIGger:SEQuence:SOURce INTernal1;:TRIGger:SEQuence:SLOPe POSitive")
        scope.write("FORMat:DATA INTeger,8;:FORMat:BORDer NORMal")
        scope.write("INITiate:CONTinuous OFF;:INITiate:IMMediate")
        assert scope.query("*OPC?") == "1"
        vin = np.array(
            scope.query_binary_values(
                "FETCh:ARRay:VOLTage? (@1)", datatype="b", is_big_endian=True, container=np.array
            )
        )
        vout = np.array(
            scope.query_binary_values(
                "FETC? (@2)", datatype="b", is_big_endian=True, container=np.array
            )
        )
        assert vin.size == vout.size == 4096
        spec_in = np.abs(np.fft.rfft(vin * 0.2 / 256))
        spec_out = np.abs(np.fft.rfft(vout * 4 / 256))
        gain = spec_out[41] / spec_in[41]  # coherent: J = 41 (Maxim/ADI app note 1040)
        assert 5 < gain < 15
        scope.write("FORMat:DATA REAL,32")
        volts = scope.query_binary_values(
            "FETC? (@2)", datatype="f", is_big_endian=True, container=np.array
        )
        assert np.allclose(volts, vout * 4 / 256, atol=1e-6)
        for inst in (gen, scope, psu):
            assert inst.query("SYSTem:ERRor?") == '0,"No error"'
        gen.write("OUTPut1:STATe OFF")
    finally:
        for inst in (gen, scope, psu):
            inst.close()


def test_block_framing_on_the_wire(bench: SimBench) -> None:
    """IEEE 488.2 §8.7.9: '#', one digit n, n digits of byte count, the bytes, then LF."""
    port = port_of(bench, "scope")
    reply = raw(port, b"FORM INT,16;:SENS:SWE:POIN 1000;:INIT;*OPC?\n")
    assert reply == b"1\n"
    with socket.create_connection(("127.0.0.1", port), timeout=3) as s:
        s.sendall(b"FETC? (@3)\n")
        buf = b""
        while len(buf) < 2006 + 1:
            buf += s.recv(65536)
    assert buf[:6] == b"#42000"
    assert len(buf) == 6 + 2000 + 1 and buf.endswith(b"\n")


def test_servers_bind_loopback_only(bench: SimBench) -> None:
    for srv in bench.servers.values():
        assert srv._listener is not None
        assert srv._listener.getsockname()[0] == "127.0.0.1"
        assert srv.resource.startswith("TCPIP::127.0.0.1::")


def test_garbage_bytes_do_not_crash(bench: SimBench) -> None:
    port = port_of(bench, "generator")
    junk = os.urandom(4096).replace(b"\n", b"") + b"\n\xff\xfe\n\x00\x00\n*IDN\n(((\n"
    raw(port, junk, read=False)
    assert idn_ok(port)
    codes = []
    while True:
        code = int(raw(port, b"SYST:ERR?\n").split(b",")[0])
        if code == 0:
            break
        codes.append(code)
    assert codes and all(-199 <= c <= -100 for c in codes)


def test_oversized_line_is_refused_and_connection_stays_usable(bench: SimBench) -> None:
    port = port_of(bench, "generator")
    with socket.create_connection(("127.0.0.1", port), timeout=3) as s:
        s.sendall(b"FREQ " + b"1" * 200_000 + b"\n")
        s.sendall(b"SYST:ERR?\n")
        reply = b""
        while not reply.endswith(b"\n"):
            reply += s.recv(4096)
        assert reply.startswith(b"-223,")
        s.sendall(b"*IDN?\n")
        assert s.recv(4096).startswith(b"stageproof-sim,SIG-1")


def test_client_vanishing_mid_command_and_mid_reply(bench: SimBench) -> None:
    sport = port_of(bench, "scope")
    raw(sport, b"FORM INT,8;:SENS:SWE:POIN 1000000;:INIT\n", read=False)
    for _ in range(5):
        raw(port_of(bench, "generator"), b"SOUR:FREQ 10", read=False)  # no LF, then gone
        with socket.create_connection(("127.0.0.1", sport), timeout=3) as s:
            s.sendall(b"FETC? (@2)\n")  # a 1 MB reply nobody reads
    assert idn_ok(sport)
    assert raw(port_of(bench, "generator"), b"FREQ?\n") != b"10\n"
    raw(sport, b"SENS:SWE:POIN 1000\n", read=False)


def test_fifty_reconnects_in_a_row(bench: SimBench) -> None:
    port = port_of(bench, "dmm")
    for _ in range(50):
        assert idn_ok(port)


def test_many_clients_at_once(bench: SimBench) -> None:
    port = port_of(bench, "switch")
    socks = [socket.create_connection(("127.0.0.1", port), timeout=3) for _ in range(10)]
    try:
        for s in socks:
            s.sendall(b"*IDN?\n")
        assert all(s.recv(100).startswith(b"stageproof-sim,SW-40") for s in socks)
    finally:
        for s in socks:
            s.close()


def test_no_reply_fault_then_recovery_via_pyvisa(bench: SimBench, rm) -> None:
    """A query that is never answered times out in pyvisa; the next query works (the
    lost reply does not come late; pyvisa documents timeouts in milliseconds and a late reply
    as read by the next query, observed with pyvisa 1.16.2 / pyvisa-py 0.8.1)."""
    inst = open_res(rm, bench.resources["dmm"])
    inst.timeout = 300
    try:
        bench.inject("dmm", "no_reply", on="identify", count=1)
        with pytest.raises(pyvisa.errors.VisaIOError):
            inst.query("*IDN?")
        assert inst.query("*IDN?").startswith("stageproof-sim,DVM-6")
    finally:
        inst.close()


def test_drop_mid_block_closes_the_connection(bench: SimBench) -> None:
    port = port_of(bench, "scope")
    raw(port, b"FORM INT,8;:SENS:SWE:POIN 10000;:INIT\n", read=False)
    bench.inject("scope", "drop_mid_block", on="FETCh", count=1)
    with socket.create_connection(("127.0.0.1", port), timeout=3) as s:
        s.sendall(b"FETC? (@2)\n")
        got = b""
        while True:
            chunk = s.recv(65536)
            if not chunk:
                break
            got += chunk
    assert got.startswith(b"#510000") and len(got) < 10007
    assert idn_ok(port)


def test_power_cycle_refuses_then_returns_in_rst_state(bench: SimBench) -> None:
    port = port_of(bench, "generator")
    raw(port, b"OUTP ON\n", read=False)
    assert raw(port, b"OUTP?\n") == b"1\n"
    bench.inject("generator", "power_cycle", value=0.3, count=1)
    raw(port, b"FREQ 5\n", read=False)
    time.sleep(0.05)
    with pytest.raises(OSError):
        raw(port, b"*IDN?\n")
    bench.wait_listening(2.0)
    assert raw(port, b"OUTP?\n") == b"0\n"
    assert int(raw(port, b"*ESR?\n")) & 128  # power-on bit (IEEE 488.2 §11.5.1.1.1)


def test_stop_ends_all_threads_quickly() -> None:
    board = load_board(REPO / "limits" / "demo-opamp-line.toml")
    bench = SimBench(board).start()
    with socket.create_connection(("127.0.0.1", bench.servers["scope"].port), timeout=3) as idle:
        t = time.monotonic()
        bench.stop()
        assert time.monotonic() - t < 2.0
        # the server closed the idle connection: an orderly end of stream, or a reset
        with contextlib.suppress(ConnectionResetError):
            assert idle.recv(10) == b""
