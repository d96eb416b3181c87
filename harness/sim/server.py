"""A thin TCP transport around a simulated instrument: raw SCPI over a socket.

One listening socket per instrument on 127.0.0.1 (VISA resource
``TCPIP::127.0.0.1::<port>::SOCKET``), one thread per connection, program messages
terminated by LF (a CR before it is ignored).  All parsing is the device's; the server
only frames lines, delays replies as the device asks and applies the connection faults
(drop mid-block, power cycle).  Robustness rules:

- a line longer than ``max_line`` bytes is discarded up to its LF with error -223 and
  the connection stays usable;
- a client that vanishes mid-command or mid-reply ends only its own thread;
- ``stop()`` closes every socket so no thread stays blocked;
- when the process runs out of file descriptors (EMFILE/ENFILE) or threads, the accept loop
  backs off and keeps accepting, and says so (a warning on the ``harness.sim`` logger and
  :attr:`ScpiServer.trouble`) until a connection is accepted again.
"""

from __future__ import annotations

import contextlib
import errno
import logging
import socket
import threading
from typing import Any

from harness.sim.scpi import ScpiDevice

__all__ = ["LOOPBACK", "MAX_LINE", "ScpiServer"]

log = logging.getLogger("harness.sim")

LOOPBACK = "127.0.0.1"
#: Longest program message accepted (bytes, without the terminator).
MAX_LINE = 64 * 1024
#: accept() failures that pass once the process has resources again (accept(2), ERRORS:
#: EMFILE per-process and ENFILE system-wide descriptor limits, ENOBUFS/ENOMEM memory).
TRANSIENT_ACCEPT = frozenset({errno.EMFILE, errno.ENFILE, errno.ENOBUFS, errno.ENOMEM})
#: Back-off between accept attempts while resources are short: first and longest wait.
BACKOFF_S = (0.01, 0.5)


class ScpiServer:
    """Serve one :class:`ScpiDevice` on ``host:port`` (port 0: the OS picks one)."""

    def __init__(
        self,
        device: ScpiDevice,
        host: str = LOOPBACK,
        port: int = 0,
        *,
        name: str = "instrument",
        max_line: int = MAX_LINE,
    ) -> None:
        self.device = device
        self.host = host
        self.name = name
        self.max_line = max_line
        self._port = port
        self._listener: socket.socket | None = None
        self._conns: set[socket.socket] = set()
        self._guard = threading.Lock()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self.connections_served = 0
        #: Why new connections are not being accepted right now (None: accepting).
        self.trouble: str | None = None

    @property
    def port(self) -> int:
        return self._port

    @property
    def resource(self) -> str:
        return f"TCPIP::{self.host}::{self._port}::SOCKET"

    def start(self) -> ScpiServer:
        self._listen()
        return self

    def _listen(self) -> None:
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((self.host, self._port))
        sock.listen(16)
        self._port = sock.getsockname()[1]
        self._listener = sock
        t = threading.Thread(
            target=self._accept_loop, args=(sock,), name=f"sim-{self.name}-accept", daemon=True
        )
        t.start()
        self._threads.append(t)
        log.debug("%s listening on %s", self.name, self.resource)

    def _accept_loop(self, sock: socket.socket) -> None:
        backoff = BACKOFF_S[0]
        while not self._stop.is_set():
            try:
                conn, _addr = sock.accept()
            except OSError as exc:
                if exc.errno not in TRANSIENT_ACCEPT or sock is not self._listener:
                    return  # listener closed (stop or power cycle)
                # Out of descriptors or memory: the connection waits in the backlog; try
                # again when something is released, never give the port up.
                self._short(f"cannot accept connections: {exc.strerror or exc} ({exc})")
                self._stop.wait(backoff)
                backoff = min(2 * backoff, BACKOFF_S[1])
                continue
            try:
                conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                with self._guard:
                    if self._stop.is_set() or sock is not self._listener:
                        conn.close()
                        return
                    self._threads = [t for t in self._threads if t.is_alive()]
                    t = threading.Thread(
                        target=self._serve, args=(conn,), name=f"sim-{self.name}-conn", daemon=True
                    )
                    t.start()
                    self._conns.add(conn)
                    self.connections_served += 1
                    self._threads.append(t)
            except (OSError, RuntimeError) as exc:  # RuntimeError: no thread could start
                _close(conn)
                self._short(f"cannot serve a new connection: {exc}")
                self._stop.wait(backoff)
                backoff = min(2 * backoff, BACKOFF_S[1])
                continue
            backoff = BACKOFF_S[0]
            if self.trouble is not None:
                log.warning("%s accepting connections again on %s", self.name, self.resource)
                self.trouble = None

    def _short(self, why: str) -> None:
        """Record (and say once per episode) why connections are not being accepted."""
        if self.trouble is None:
            log.warning("%s on %s %s; retrying", self.name, self.resource, why)
        self.trouble = why

    def _serve(self, conn: socket.socket) -> None:
        buf = bytearray()
        discarding = False
        try:
            while not self._stop.is_set():
                data = conn.recv(65536)
                if not data:
                    return
                buf += data
                while True:
                    i = buf.find(b"\n")
                    if i < 0:
                        if len(buf) > self.max_line:
                            if not discarding:
                                self.device.push_error(-223, "command line over 64 KiB")
                            discarding = True
                            buf.clear()
                        break
                    line = bytes(buf[:i])
                    del buf[: i + 1]
                    if discarding:
                        discarding = False  # the tail of a refused line
                        continue
                    if len(line) > self.max_line:
                        self.device.push_error(-223, "command line over 64 KiB")
                        continue
                    if not self._execute(conn, line):
                        return
        except OSError:
            return  # the client vanished; nothing to clean but our own socket
        finally:
            self._drop(conn)

    def _execute(self, conn: socket.socket, line: bytes) -> bool:
        """Run one message and send its reply; False when the connection must end."""
        out = self.device.process(line)
        if out.power_cycle_s is not None:
            self.power_cycle(out.power_cycle_s)
            return False
        wait = out.wait_s()
        if wait > 0 and self._stop.wait(wait):
            return False
        if out.reply is None:
            return True
        if out.close_after is not None:
            conn.sendall(out.reply[: out.close_after])
            return False
        conn.sendall(out.reply)
        return True

    def _drop(self, conn: socket.socket) -> None:
        with self._guard:
            self._conns.discard(conn)
        _close(conn)

    def _close_all(self) -> None:
        with self._guard:
            conns = list(self._conns)
            self._conns.clear()
            listener, self._listener = self._listener, None
        if listener is not None:
            _close(listener)
        for c in conns:
            _close(c)

    def power_cycle(self, off_s: float) -> None:
        """Drop every connection, refuse new ones for ``off_s``, then listen again on the
        same port.  The caller resets the device (:meth:`ScpiDevice.power_cycle`)."""
        log.info("%s power cycle: off for %.3g s", self.name, off_s)
        self._close_all()

        def back() -> None:
            if self._stop.wait(off_s):
                return
            try:
                self._listen()
            except OSError as exc:  # pragma: no cover - port taken meanwhile
                log.error("%s could not listen again on port %d: %s", self.name, self._port, exc)

        t = threading.Thread(target=back, name=f"sim-{self.name}-power", daemon=True)
        with self._guard:
            self._threads.append(t)
        t.start()

    def stop(self, timeout_s: float = 2.0) -> None:
        self._stop.set()
        self._close_all()
        with self._guard:
            threads = list(self._threads)
        for t in threads:
            if t is not threading.current_thread():
                t.join(timeout_s)

    def __enter__(self) -> ScpiServer:
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()


def _close(sock: socket.socket) -> None:
    with contextlib.suppress(OSError):
        sock.shutdown(socket.SHUT_RDWR)
    with contextlib.suppress(OSError):
        sock.close()
