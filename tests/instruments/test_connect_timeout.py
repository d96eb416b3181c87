"""A connection that is not made within the open timeout.

A listening socket whose accept queue is full drops further handshakes (Linux tcp(7):
with ``tcp_abort_on_overflow`` off, a full backlog makes the kernel ignore the SYN, so the
client's connect neither succeeds nor is refused).  pyvisa-py's SOCKET session then raises a
bare ``Exception("could not connect: <status>")``; the session must turn it into a typed,
one-line ConnectionLost naming the resource.
"""

from __future__ import annotations

import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager

import pytest

from harness.errors import ConnectionLost
from harness.instruments.session import Session
from harness.io.profiles import load_profile

GEN = load_profile("scpi-generator")


@contextmanager
def full_backlog() -> Iterator[int]:
    """A port on 127.0.0.1 that listens but accepts no one: its queue filled first."""
    srv = socket.socket()
    fill: list[socket.socket] = []
    try:
        srv.bind(("127.0.0.1", 0))
        srv.listen(0)
        port = srv.getsockname()[1]
        for _ in range(4):
            c = socket.socket()
            c.setblocking(False)
            c.connect_ex(("127.0.0.1", port))
            fill.append(c)
        time.sleep(0.2)
        yield port
    finally:
        for c in fill:
            c.close()
        srv.close()


def test_connect_timeout_is_connection_lost(rm):
    with full_backlog() as port:
        resource = f"TCPIP::127.0.0.1::{port}::SOCKET"
        s = Session(resource, GEN, rm=rm, timeout_ms=300, retries=0)
        with pytest.raises(ConnectionLost) as ei:
            s.open()
    text = str(ei.value)
    assert resource in text and "no connection within 300 ms" in text, text
