"""A tiny SCPI-over-TCP instrument for transport tests (127.0.0.1 only).

It answers the IEEE 488.2 common queries and ``SYSTem:ERRor?`` and otherwise does what
the test tells it: fixed replies per command, commands that queue an error, replies cut
off by closing the connection.  Every line received is recorded, so a test can check the
exact SCPI text a driver sent.  ``restart()`` closes every connection and listens again on
the same port, as an instrument does after a power cycle.
"""

from __future__ import annotations

import contextlib
import socket
import socketserver
import threading
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

Reply = bytes | str | Callable[[str], "bytes | str | Cut | None"]


@dataclass(frozen=True)
class Cut:
    """Send ``data`` then close the connection (an instrument switched off mid-reply)."""

    data: bytes


class _Handler(socketserver.StreamRequestHandler):
    server: _Server

    def handle(self) -> None:
        inst = self.server.inst
        inst._track(self.connection)
        try:
            while True:
                raw = self.rfile.readline()
                if not raw:
                    return
                line = raw.decode("ascii", "replace").strip()
                if not line:
                    continue
                out = inst.respond(line)
                if out is None:
                    continue
                if isinstance(out, Cut):
                    self.wfile.write(out.data)
                    self.wfile.flush()
                    self.connection.shutdown(socket.SHUT_RDWR)
                    return
                self.wfile.write(out)
                self.wfile.flush()
        except OSError:
            return


class _Server(socketserver.ThreadingTCPServer):
    allow_reuse_address = True
    daemon_threads = True
    inst: FakeInstrument


class FakeInstrument:
    def __init__(self, idn: str = "stageproof-test,FAKE-1,SN0001,1.0") -> None:
        self.idn = idn
        self.lines: list[str] = []
        self.errors: deque[tuple[int, str]] = deque()
        self.replies: dict[str, Reply] = {}
        self.rejects: dict[str, tuple[int, str]] = {}
        #: header -> last value set: a query of the same header with no fixed reply answers
        #: it, as an instrument reads its settings back
        self.settings: dict[str, str] = {}
        self.port = 0
        self._srv: _Server | None = None
        self._thread: threading.Thread | None = None
        self._conns: list[socket.socket] = []
        self._lock = threading.Lock()

    # -- behaviour
    def respond(self, line: str) -> bytes | Cut | None:
        with self._lock:
            self.lines.append(line)
        key = line.upper()
        if key == "*IDN?":
            return (self.idn + "\n").encode()
        if key == "*CLS":
            self.errors.clear()
            return None
        if key == "*OPC?":
            return b"1\n"
        if key in ("SYSTEM:ERROR?", "SYST:ERR?", "SYSTEM:ERROR:NEXT?"):
            if self.errors:
                code, text = self.errors.popleft()
                return f'{code},"{text}"\n'.encode()
            return b'0,"No error"\n'
        if line in self.rejects:
            self.errors.append(self.rejects[line])
            return None
        rep = self.replies.get(line)
        if callable(rep):
            rep = rep(line)
        if rep is None and not line.endswith("?") and " " in line and ";" not in line:
            header, value = line.split(" ", 1)
            self.settings[header.upper()] = value
        if rep is None and line.endswith("?") and line[:-1].upper() in self.settings:
            rep = self.settings[line[:-1].upper()]
        if rep is None:
            if line.endswith("?"):
                self.errors.append((-113, "Undefined header"))
            return None
        if isinstance(rep, Cut):
            return rep
        if isinstance(rep, str):
            rep = (rep + "\n").encode()
        return rep

    def sent(self, skip_common: bool = True) -> list[str]:
        """Lines received, without the *IDN?/*CLS/error-queue chatter."""
        with self._lock:
            lines = list(self.lines)
        if not skip_common:
            return lines
        noise = {"*IDN?", "*CLS", "SYSTEM:ERROR?", "SYST:ERR?"}
        return [x for x in lines if x.upper() not in noise]

    def clear_log(self) -> None:
        with self._lock:
            self.lines.clear()

    # -- life cycle
    def _track(self, conn: socket.socket) -> None:
        with self._lock:
            self._conns.append(conn)

    def start(self) -> FakeInstrument:
        srv = _Server(("127.0.0.1", self.port), _Handler)
        srv.inst = self
        self.port = srv.server_address[1]
        self._srv = srv
        self._thread = threading.Thread(
            target=srv.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True
        )
        self._thread.start()
        return self

    def stop(self) -> None:
        if self._srv is not None:
            self._srv.shutdown()
            self._srv.server_close()
            self._srv = None
        with self._lock:
            conns, self._conns = self._conns, []
        for c in conns:
            with contextlib.suppress(OSError):
                c.shutdown(socket.SHUT_RDWR)
            c.close()

    def restart(self) -> None:
        """Power cycle: drop every connection, forget the error queue, listen again."""
        self.stop()
        self.errors.clear()
        self.start()

    @property
    def resource(self) -> str:
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    def __enter__(self) -> FakeInstrument:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


def free_port() -> int:
    """A port nobody listens on (bound, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]
