"""One VISA resource: typed I/O errors, error-queue checks, identity, reconnect.

Everything the drivers send goes through :class:`Session`, which

- holds one lock per instrument around each write+read (two threads on one socket
  would interleave replies);
- turns every pyvisa/OS failure into :class:`InstrumentTimeout`, :class:`ConnectionLost`
  or :class:`MalformedReply` carrying resource, command and role;
- after a configuration step reads ``SYSTem:ERRor?`` until ``0,"No error"`` (bounded) and
  raises :class:`ScpiError` for the first error found;
- after a timeout resynchronises (drain, ``*IDN?``) because a late reply would otherwise
  be read as the answer to the next query; when the instrument does not answer at all the
  connection is taken as lost;
- on a lost connection (instrument power-cycled, cable pulled) closes, reopens,
  re-identifies, runs the drivers' re-configure hooks and retries, a bounded number of times;
- before any recovery (the resynchronisation after a timeout, every reconnect attempt) runs
  its recovery hooks first: the run layer switches the generator off there, so a board is
  never driven while an instrument is lost;
- refuses an instrument whose ``*IDN?`` is not the one the station expects.

Every I/O is logged at DEBUG on ``harness.instruments`` with the resource name.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import Any, TypeVar, cast

import numpy as np
import pyvisa
from pyvisa import constants
from pyvisa.errors import VisaIOError
from pyvisa.resources import MessageBasedResource

from harness.errors import (
    ConnectionLost,
    IdentityMismatch,
    InstrumentError,
    InstrumentTimeout,
    MalformedReply,
    ScpiError,
)
from harness.instruments.config import Profile
from harness.instruments.scpi import (
    DATATYPES,
    NO_ERROR,
    Identity,
    decode_values,
    parse_block_header,
    parse_error_reply,
    parse_idn,
)

__all__ = ["Session", "resource_manager"]

log = logging.getLogger("harness.instruments")
#: The SCPI trace (``stageproof -v``): every command and reply with its role and timing, at
#: INFO, for a technician writing a profile.
trace = logging.getLogger("harness.instruments.trace")

T = TypeVar("T")

_RMS: dict[str, pyvisa.ResourceManager] = {}
_RM_LOCK = threading.Lock()


def resource_manager(visa_library: str = "@py") -> pyvisa.ResourceManager:
    """One ResourceManager per VISA library per process (pyvisa wants no more)."""
    with _RM_LOCK:
        rm = _RMS.get(visa_library)
        if rm is None:
            try:
                rm = pyvisa.ResourceManager(visa_library)
            except (OSError, ValueError) as exc:
                raise InstrumentError(
                    f"cannot load VISA library {visa_library!r}: {exc}",
                    hint='use "@py" (pip install pyvisa-py) or the path to an installed VISA '
                    "library in station.visa_library",
                ) from exc
            _RMS[visa_library] = rm
        return rm


def _is_socket(resource: str) -> bool:
    return resource.upper().endswith("::SOCKET")


def _is_serial(resource: str) -> bool:
    return resource.upper().startswith("ASRL")


class Session:
    """A connection to one instrument, speaking through its profile.

    No I/O happens in the constructor; call :meth:`open` (or use ``with``).
    """

    def __init__(
        self,
        resource: str,
        profile: Profile,
        role: str | None = None,
        *,
        visa_library: str = "@py",
        timeout_ms: int = 5000,
        retries: int = 1,
        expect_idn: str | None = None,
        rm: pyvisa.ResourceManager | None = None,
        max_error_reads: int = 20,
    ) -> None:
        self.resource = resource
        self.profile = profile
        self.role = role or profile.role
        self.visa_library = visa_library
        self.timeout_ms = int(timeout_ms)
        self.retries = int(retries)
        self.expect_idn = expect_idn
        self.max_error_reads = int(max_error_reads)
        self.identity: Identity | None = None
        self.reconnects = 0
        self._rm = rm
        self._res: Any = None
        self._lock = threading.RLock()
        self._broken = False
        self._in_reconnect = False
        self._hooks: list[Callable[[], None]] = []
        self._recovery_hooks: list[Callable[[], object]] = []
        #: How often this session had to recover (a timeout or a lost connection).
        self.troubles = 0

    # --- life cycle -----------------------------------------------------------------------

    def __enter__(self) -> Session:
        self.open()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @property
    def is_open(self) -> bool:
        return self._res is not None

    def add_reconfigure_hook(self, hook: Callable[[], None]) -> None:
        """``hook()`` runs after every reconnect to restore the instrument's settings."""
        self._hooks.append(hook)

    def add_recovery_hook(self, hook: Callable[[], object]) -> None:
        """``hook()`` runs before every recovery attempt (resynchronise or reconnect); it
        must not raise (an exception is logged and the recovery goes on)."""
        self._recovery_hooks.append(hook)

    def _before_recovery(self) -> None:
        self.troubles += 1
        for hook in self._recovery_hooks:
            try:
                hook()
            except Exception as exc:  # a hook must never stop the recovery
                log.error("%s recovery hook failed: %s", self.resource, exc)

    def open(self) -> Identity:
        """Open the resource, clear its status and check its identity (bounded retries)."""
        with self._lock:
            last: InstrumentError | None = None
            for _attempt in range(self.retries + 1):
                try:
                    self._open_resource()
                    return self._identify()
                except IdentityMismatch:
                    self._close_quietly()
                    raise
                except (ConnectionLost, InstrumentTimeout) as exc:
                    self._close_quietly()
                    last = exc
            assert last is not None
            raise last

    def close(self) -> None:
        with self._lock:
            self._close_quietly()

    def _close_quietly(self) -> None:
        res, self._res = self._res, None
        if res is not None:
            try:
                res.close()
            except (VisaIOError, OSError) as exc:  # closing a dead socket may fail
                log.debug("%s close failed: %s", self.resource, exc)

    def _open_resource(self) -> None:
        self._close_quietly()
        rm = self._rm or resource_manager(self.visa_library)
        log.debug("%s open (role %s, timeout %d ms)", self.resource, self.role, self.timeout_ms)
        try:
            res = cast(
                MessageBasedResource,
                rm.open_resource(self.resource, open_timeout=self.timeout_ms),
            )
        except (VisaIOError, OSError, ValueError) as exc:
            raise ConnectionLost(
                f"cannot open: {exc}",
                resource=self.resource,
                role=self.role,
                hint="check the instrument is on and the resource string; for USB/GPIB "
                "the VISA backend needs its driver",
            ) from exc
        except Exception as exc:
            # pyvisa-py's TCPIP SOCKET session raises a bare Exception("could not connect:
            # <status>") when the connection is not made within open_timeout (a host that
            # drops the handshake, a listener with a full queue); other backends may do
            # likewise.  Anything more specific is a defect and is not hidden.
            if type(exc) is not Exception:
                raise
            raise ConnectionLost(
                f"cannot open: {_backend_words(exc, self.timeout_ms)}",
                resource=self.resource,
                role=self.role,
                hint="check the instrument is on, answers on the network and is not "
                "serving another client; raise timeout_ms if it is slow to accept",
            ) from exc
        res.timeout = self.timeout_ms
        res.write_termination = "\n"
        if _is_socket(self.resource) or _is_serial(self.resource):
            # A raw socket has no END indicator: without a read termination every read
            # times out.
            res.read_termination = "\n"
        if _is_socket(self.resource):
            _set_nodelay(res)
        self._res = res
        self._broken = False

    def _identify(self) -> Identity:
        self._drain()
        self._write_raw(self.profile.render("clear_status"))
        text = self._query_raw(self.profile.render("identify"))
        try:
            ident = parse_idn(text)
        except MalformedReply as exc:
            raise self._typed(MalformedReply, exc.message, "*IDN?") from None
        if self.expect_idn and not ident.matches(self.expect_idn):
            raise IdentityMismatch(
                f"*IDN? says {ident}, station expects {self.expect_idn!r}",
                resource=self.resource,
                command=self.profile.commands["identify"],
                role=self.role,
                hint="fix expect_idn or the resource string in the station file",
            )
        if self.identity is not None and ident.serial != self.identity.serial:
            log.warning(
                "%s serial changed %s -> %s", self.resource, self.identity.serial, ident.serial
            )
        self.identity = ident
        log.debug("%s identified as %s", self.resource, ident)
        return ident

    def reconnect(self) -> Identity:
        """Close, reopen, re-identify and re-configure (used after a power cycle)."""
        with self._lock:
            self.reconnects += 1
            log.warning("%s (%s) reconnecting", self.resource, self.role)
            self._before_recovery()
            self._open_resource()
            ident = self._identify()
            self._in_reconnect = True
            try:
                for hook in self._hooks:
                    hook()
            finally:
                self._in_reconnect = False
            return ident

    # --- raw I/O with typed errors ----------------------------------------------------------

    def _typed(
        self, cls: type[InstrumentError], message: str, command: str | None, hint: str | None = None
    ) -> InstrumentError:
        return cls(message, resource=self.resource, command=command, role=self.role, hint=hint)

    def _call(self, command: str, fn: Callable[[], T]) -> T:
        if self._res is None:
            raise self._typed(
                ConnectionLost,
                "session is not open",
                command,
                "open the session (bench.connect) first",
            )
        try:
            return fn()
        except InstrumentError:
            raise
        except VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                raise self._typed(
                    InstrumentTimeout,
                    f"no reply within {self._res.timeout} ms",
                    command,
                    "check the command is a query the instrument knows, or raise timeout_ms",
                ) from exc
            self._broken = True
            raise self._typed(
                ConnectionLost, f"VISA I/O error: {exc.description}", command
            ) from exc
        except UnicodeDecodeError as exc:
            # binary bytes where text was expected: a late block reply, or framing lost
            self._broken = True
            raise self._typed(
                MalformedReply,
                f"reply is not text ({exc.reason} at byte {exc.start})",
                command,
                "a binary block arrived for a text query: check the profile's fetch and "
                "query commands",
            ) from exc
        except OSError as exc:
            self._broken = True
            raise self._typed(
                ConnectionLost,
                f"{_connection_words(exc)} ({type(exc).__name__}: {exc})",
                command,
                "check the instrument is on and connected, and the resource in the station file",
            ) from exc

    def _trace(self, command: str, reply: str | None, t0: float) -> None:
        """One trace line: role, command, reply (shortened) and the time it took."""
        if not trace.isEnabledFor(logging.INFO):
            return
        ms = (time.perf_counter() - t0) * 1000
        if reply is None:
            trace.info("%-9s >> %s  (%.1f ms)", self.role, command, ms)
        else:
            shown = reply if len(reply) <= 120 else reply[:120] + f"... ({len(reply)} chars)"
            trace.info("%-9s >> %s  << %s  (%.1f ms)", self.role, command, shown, ms)

    def _write_raw(self, command: str) -> None:
        log.debug("%s >> %s", self.resource, command)
        t0 = time.perf_counter()
        self._call(command, lambda: self._res.write(command))
        self._trace(command, None, t0)

    def _query_raw(self, command: str, timeout_ms: int | None = None) -> str:
        def run() -> str:
            self._res.write(command)
            if timeout_ms is None:
                return self._res.read()
            old = self._res.timeout
            self._res.timeout = timeout_ms
            try:
                return self._res.read()
            finally:
                self._res.timeout = old

        log.debug("%s >> %s", self.resource, command)
        t0 = time.perf_counter()
        reply = self._call(command, run).strip()
        log.debug("%s << %s", self.resource, reply if len(reply) < 200 else reply[:200] + "...")
        self._trace(command, reply, t0)
        return reply

    def _read_block_raw(
        self, command: str, timeout_ms: int | None, max_bytes: int | None = None
    ) -> bytes:
        """Write ``command``, then read one definite-length block and its LF exactly.

        The termination character is switched off while the payload is read, so LF bytes
        inside binary data do not split it.  A header promising more than ``max_bytes`` (what
        the caller expects) is refused before the payload is read: a corrupt or hostile
        count of up to 999,999,999 bytes must not become an allocation of that size.
        """
        res = self._res

        def run() -> bytes:
            res.write(command)
            old_tmo = res.timeout
            if timeout_ms is not None:
                res.timeout = timeout_ms
            res.set_visa_attribute(constants.ResourceAttribute.termchar_enabled, constants.VI_FALSE)
            try:
                head = res.read_bytes(2)
                if head[:1] != b"#" or not b"1" <= head[1:2] <= b"9":
                    parse_block_header(head + b"0" * 9)  # raises with the reason
                head += res.read_bytes(int(head[1:2]))
                _hlen, count = parse_block_header(head)
                if max_bytes is not None and count > max_bytes:
                    raise MalformedReply(
                        f"block header promises {count} bytes, {max_bytes} expected",
                        hint="check the scope's record length and data format settings",
                    )
                body = res.read_bytes(count + 1)
            finally:
                res.set_visa_attribute(
                    constants.ResourceAttribute.termchar_enabled, constants.VI_TRUE
                )
                res.timeout = old_tmo
            if body[-1:] != b"\n":
                raise MalformedReply(f"block of {count} bytes not followed by LF")
            return body[:count]

        log.debug("%s >> %s", self.resource, command)
        t0 = time.perf_counter()
        try:
            payload = self._call(command, run)
        except MalformedReply as exc:
            self._broken = True  # framing lost: the stream must be resynchronised
            raise self._typed(MalformedReply, exc.message, command, exc.hint) from None
        log.debug("%s << block of %d bytes", self.resource, len(payload))
        self._trace(command, f"<block of {len(payload)} bytes>", t0)
        return payload

    def _drain(self) -> None:
        """Throw away any late reply still in flight.

        pyvisa-py's ``clear()`` on a SOCKET loops for ever once the peer has closed (its
        recv returns b"" and select keeps reporting readable), so sockets are drained by
        short reads instead; other interfaces get a proper device clear.
        """
        res = self._res
        if res is None:
            return
        if not _is_socket(self.resource):
            try:
                res.clear()
            except (VisaIOError, OSError) as exc:
                log.debug("%s clear failed: %s", self.resource, exc)
            return
        old = res.timeout
        res.timeout = 50
        try:
            for _ in range(64):
                try:
                    junk = res.read_raw()
                except (VisaIOError, OSError):
                    break
                log.debug("%s drained late reply %r", self.resource, junk[:80])
        finally:
            res.timeout = old

    # --- I/O with recovery -------------------------------------------------------------------

    def _alive(self) -> bool:
        """After a timeout: is the instrument still answering?  Resynchronises if so."""
        cmd = self.profile.render("identify")
        try:
            self._drain()
            self._write_raw(cmd)
            for _ in range(16):  # late replies queue up before the answer to this *IDN?
                reply = self._call(cmd, lambda: self._res.read()).strip()
                log.debug("%s << %s (resynchronising)", self.resource, reply[:80])
                try:
                    ident = parse_idn(reply)
                except MalformedReply:
                    continue
                if self.identity is None or ident == self.identity:
                    return True
            return False
        except InstrumentError:
            return False

    def _run(self, command: str, fn: Callable[[], T], *, retry: bool = True) -> T:
        with self._lock:
            attempts = self.retries + 1 if retry and not self._in_reconnect else 1
            last: InstrumentError | None = None
            for attempt in range(attempts):
                if attempt:
                    time.sleep(min(0.25 * 2 ** (attempt - 1), 2.0))  # instrument booting
                try:
                    if self._broken or self._res is None:
                        if self._in_reconnect:
                            raise self._typed(
                                ConnectionLost, "lost again while reconnecting", command
                            )
                        self.reconnect()
                    return fn()
                except InstrumentTimeout as exc:
                    if self._in_reconnect:
                        raise
                    self._before_recovery()
                    if self._alive():
                        raise
                    self._broken = True
                    last = self._typed(
                        ConnectionLost,
                        f"no reply within {self.timeout_ms} ms and no answer to *IDN? after",
                        command,
                        "the instrument may have been switched off or disconnected",
                    )
                    last.__cause__ = exc
                except ConnectionLost as exc:
                    self._broken = True
                    last = exc
                    if not self._in_reconnect:
                        self._before_recovery()
                if attempt < attempts - 1:
                    log.warning("%s %s failed (%s); retrying", self.resource, command, last)
            assert last is not None
            raise last

    # --- public API ----------------------------------------------------------------------------

    def write(self, command: str, *, retry: bool = True) -> None:
        """Send ``command`` (no error check; see :meth:`configure`)."""
        self._run(command, lambda: self._write_raw(command), retry=retry)

    def query(self, command: str, *, timeout_ms: int | None = None, retry: bool = True) -> str:
        """Send ``command`` and return its reply text, stripped."""
        return self._run(command, lambda: self._query_raw(command, timeout_ms), retry=retry)

    def query_block_bytes(
        self,
        command: str,
        *,
        timeout_ms: int | None = None,
        retry: bool = True,
        max_bytes: int | None = None,
    ) -> bytes:
        """Send ``command`` and return the payload of its definite-length block reply; a
        block longer than ``max_bytes`` is refused unread (MalformedReply)."""
        return self._run(
            command, lambda: self._read_block_raw(command, timeout_ms, max_bytes), retry=retry
        )

    def query_block(
        self,
        command: str,
        datatype: str,
        *,
        big_endian: bool = True,
        timeout_ms: int | None = None,
        retry: bool = True,
        max_points: int | None = None,
    ) -> np.ndarray:
        """A binary block reply as a numpy array of ``datatype`` (int8, int16, float32); a
        block of more than ``max_points`` elements is refused before it is read."""
        cap = None
        if max_points is not None:
            cap = (
                max_points * np.dtype(DATATYPES[datatype]).itemsize
                if datatype in DATATYPES
                else None
            )
        payload = self.query_block_bytes(command, timeout_ms=timeout_ms, retry=retry, max_bytes=cap)
        try:
            return decode_values(payload, datatype, big_endian=big_endian)
        except MalformedReply as exc:
            raise self._typed(MalformedReply, exc.message, command) from None

    def _errors_raw(self) -> list[tuple[int, str]]:
        out: list[tuple[int, str]] = []
        cmd = self.profile.render("error_query")
        for _ in range(self.max_error_reads):
            reply = self._query_raw(cmd)
            try:
                code, text = parse_error_reply(reply)
            except MalformedReply as exc:
                raise self._typed(MalformedReply, exc.message, cmd) from None
            if code == NO_ERROR:
                return out
            out.append((code, text))
        out.append((-350, f'Queue overflow (no 0,"No error" in {self.max_error_reads} reads)'))
        return out

    def errors(self) -> list[tuple[int, str]]:
        """Read the error queue until ``0,"No error"`` (at most ``max_error_reads`` reads).

        A queue that never empties is reported as -350 (queue overflow, SCPI-99).
        """
        return self._run(self.profile.render("error_query"), self._errors_raw)

    def _raise_first(self, errs: list[tuple[int, str]], command: str | None) -> None:
        if not errs:
            return
        for code, text in errs[1:]:
            log.warning("%s further error %d,%r after %s", self.resource, code, text, command)
        code, text = errs[0]
        if len(errs) > 1:
            text = f"{text} (+{len(errs) - 1} more)"
        raise ScpiError(code, text, resource=self.resource, command=command, role=self.role)

    def check_errors(self, command: str | None = None) -> None:
        """Raise :class:`ScpiError` for the first queued error (the rest go in the log)."""
        self._raise_first(self.errors(), command)

    def configure(self, op: str, **params: Any) -> str:
        """Render ``op``, send it, then check the error queue.  Returns the text sent.

        Command and check are retried as one unit: after a reconnect the command is sent
        again, not just the error query that noticed the lost connection.
        """
        cmd = self.profile.render(op, **params)

        def unit() -> list[tuple[int, str]]:
            self._write_raw(cmd)
            return self._errors_raw()

        self._raise_first(self._run(cmd, unit), cmd)
        return cmd

    def ask(self, op: str, *, timeout_ms: int | None = None, **params: Any) -> str:
        """Render the query ``op`` and return its reply text."""
        return self.query(self.profile.render(op, **params), timeout_ms=timeout_ms)

    def wait_complete(self, timeout_s: float | None = None, *, retry: bool = True) -> None:
        """``*OPC?``: block until pending operations (an acquisition) have finished."""
        tmo = None if timeout_s is None else max(int(timeout_s * 1000), self.timeout_ms)
        cmd = self.profile.render("wait_complete")
        t0 = time.perf_counter()
        reply = self.query(cmd, timeout_ms=tmo, retry=retry)
        if reply.strip() not in ("1", "+1"):
            raise self._typed(MalformedReply, f"*OPC? answered {reply!r}, expected 1", cmd)
        log.debug("%s operation complete after %.3f s", self.resource, time.perf_counter() - t0)


def _backend_words(exc: Exception, timeout_ms: int) -> str:
    """A VISA backend's bare exception in words: its text, with a numeric VISA status
    code named (``-1073807339`` is ``VI_ERROR_TMO``, VPP-4.3 completion and error codes)."""
    text = str(exc).strip() or "the VISA backend gave no reason"
    head, _, code = text.rpartition(" ")
    try:
        status = constants.StatusCode(int(code))
    except ValueError:
        return text
    if status == constants.StatusCode.error_timeout:
        return f"{head} no connection within {timeout_ms} ms (timeout)"
    return f"{head} {status.name}"


def _connection_words(exc: OSError) -> str:
    """What a socket error means at the bench.  A raw-socket resource opens even when nobody
    listens; the first write then fails (refused, or a broken pipe)."""
    if isinstance(exc, ConnectionRefusedError | BrokenPipeError):
        return "instrument not reachable: nothing answers at this address"
    if isinstance(exc, ConnectionResetError | ConnectionAbortedError):
        return "connection dropped by the instrument (power-cycled or unplugged?)"
    return "connection lost"


def _set_nodelay(res: Any) -> None:
    """Switch Nagle's algorithm off on a raw-socket resource (added by the run layer).

    pyvisa-py does not apply VI_ATTR_TCPIP_NODELAY to SOCKET sessions, so a command followed
    by a query (write, then SYSTem:ERRor?) waits for the peer's delayed ACK: about 40 ms per
    configuration step on loopback.  Best effort: a backend without the socket keeps Nagle.
    """
    import socket

    try:
        sess = res.visalib.sessions.get(res.session)
        sock = getattr(sess, "interface", None)
        if isinstance(sock, socket.socket):
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    except (AttributeError, OSError, TypeError) as exc:  # other backends: leave as is
        log.debug("TCP_NODELAY not set on %s: %s", getattr(res, "resource_name", "?"), exc)
