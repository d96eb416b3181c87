"""The simulated bench's servers survive abuse: after each, ``*IDN?`` still answers right.

Abuse (counts are module constants, README "Reliability"): GARBAGE_ROUNDS rounds of random
bytes (with and without LF), an oversized command (over the server's 64 KiB line limit,
harness.sim.server.MAX_LINE), CLIENT_VANISH clients that close mid-command or right after a
query, and RECONNECTS connect-query-close cycles in a row, on every instrument.  After each
abuse a fresh client sends ``*IDN?`` and must get the instrument's four IEEE 488.2 §10.14
fields (clause number unverified) with the bench's maker and model.
"""

from __future__ import annotations

import random
import socket
from collections.abc import Iterator
from typing import Any

import pytest

from harness.instruments.scpi import parse_idn
from harness.io.board import load_board
from harness.sim.bench import ROLES, SimBench
from harness.sim.server import MAX_LINE
from tests.reliability.rig import scaled, write_rig

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

GARBAGE_ROUNDS = scaled(20, 200)
CLIENT_VANISH = scaled(20, 200)
RECONNECTS = 50
SEED = 4242


@pytest.fixture(scope="module")
def bench(tmp_path_factory: pytest.TempPathFactory) -> Iterator[SimBench]:
    files = write_rig(tmp_path_factory.mktemp("simrobust"))
    with SimBench(load_board(files.board), latency=False, host="127.0.0.1") as b:
        yield b


def _addr(bench: SimBench, role: str) -> tuple[str, int]:
    return "127.0.0.1", bench.servers[role].port


def _ask(bench: SimBench, role: str, text: bytes = b"*IDN?\n", timeout_s: float = 2.0) -> bytes:
    with socket.create_connection(_addr(bench, role), timeout=timeout_s) as s:
        s.sendall(text)
        buf = b""
        while not buf.endswith(b"\n"):
            chunk = s.recv(4096)
            if not chunk:
                break
            buf += chunk
        return buf


def _idn_ok(bench: SimBench, role: str) -> None:
    ident = parse_idn(_ask(bench, role).decode())
    maker, model = bench.devices[role].IDN[:2]
    assert (ident.maker, ident.model) == (maker, model)


@pytest.mark.parametrize("role", ROLES)
def test_garbage_bytes(bench: SimBench, role: str) -> None:
    rng = random.Random(SEED)
    for _ in range(GARBAGE_ROUNDS):
        junk = rng.randbytes(rng.randint(1, 2000))
        with socket.create_connection(_addr(bench, role), timeout=2) as s:
            s.sendall(junk + (b"\n" if rng.random() < 0.7 else b""))
        _idn_ok(bench, role)


@pytest.mark.parametrize("role", ROLES)
def test_oversized_command(bench: SimBench, role: str) -> None:
    """A line over MAX_LINE is refused (the server queues -223) and the same connection
    still answers the next command."""
    with socket.create_connection(_addr(bench, role), timeout=5) as s:
        s.sendall(b"A" * (MAX_LINE * 2 + 17) + b"\n" + b"*IDN?\n")
        buf = b""
        while not buf.endswith(b"\n"):
            chunk = s.recv(4096)
            assert chunk, "connection closed after an oversized command"
            buf += chunk
    assert parse_idn(buf.decode()).maker == bench.devices[role].IDN[0]
    _idn_ok(bench, role)


@pytest.mark.parametrize("role", ROLES)
def test_client_vanishes(bench: SimBench, role: str) -> None:
    rng = random.Random(SEED + 1)
    for i in range(CLIENT_VANISH):
        s = socket.create_connection(_addr(bench, role), timeout=2)
        if i % 2:
            s.sendall(b"*IDN?")  # no terminator: mid-command
        else:
            s.sendall(b"*IDN?;*IDN?;*IDN?\n")  # gone before the reply is read
        if rng.random() < 0.5:
            s.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, b"\x01\x00\x00\x00\x00\x00\x00\x00")
        s.close()  # with linger 0: a reset, not a FIN
        _idn_ok(bench, role)


@pytest.mark.parametrize("role", ROLES)
def test_reconnects_in_a_row(bench: SimBench, role: str) -> None:
    for _ in range(RECONNECTS):
        _idn_ok(bench, role)


def test_scope_block_survives_vanishing_reader(bench: SimBench) -> None:
    """A client that asks for a large waveform block and leaves before reading it."""
    s: Any = socket.create_connection(_addr(bench, "scope"), timeout=2)
    s.sendall(b"SWEep:POINts 100000\n*OPC?\n")
    s.recv(64)
    s.sendall(b"INITiate:IMMediate\nFETCh:ARRay:VOLTage? (@1)\n")
    s.close()
    _idn_ok(bench, "scope")
