"""Transport through real pyvisa-py (``ResourceManager('@py')``) to a tiny SCPI server on
127.0.0.1: every failure a bench shows must come out as one typed error.

Behaviours of pyvisa 1.16.2 / pyvisa-py 0.8.1 relied on, each reproduced on loopback
(SOCKET termination, late replies after a timeout, closed connection seen as a timeout,
refused port seen on first write)."""

from __future__ import annotations

import logging
import threading
import time

import pytest

from harness.errors import (
    ConnectionLost,
    IdentityMismatch,
    InstrumentTimeout,
    MalformedReply,
    ScpiError,
)
from harness.instruments.drivers import Generator
from harness.instruments.scpi import encode_block, encode_values
from harness.instruments.session import Session
from harness.io.profiles import load_profile
from tests.instruments.fakeinst import Cut, FakeInstrument, free_port

TMO_MS = 300
GEN = load_profile("scpi-generator")
SCOPE = load_profile("scpi-scope")


def _session(fake, rm, profile=GEN, **kw) -> Session:
    kw.setdefault("timeout_ms", TMO_MS)
    return Session(
        fake.resource if isinstance(fake, FakeInstrument) else fake, profile, rm=rm, **kw
    )


def test_open_identifies_and_clears_status(fake, rm):
    """IEEE 488.2: *CLS clears the error queue before work starts; *IDN? four fields."""
    with _session(fake, rm, expect_idn="stageproof-test,FAKE-1") as s:
        assert s.identity is not None and s.identity.model == "FAKE-1"
        assert fake.sent(skip_common=False)[:2] == ["*CLS", "*IDN?"]


def test_timeout_is_typed_and_session_resynchronises(fake, rm):
    """pyvisa-py 0.8.1 on a socket: after a timeout a late reply would be read by the next query;
    the session drains it and re-checks *IDN? so the next answer is the right one."""

    def late(_line: str) -> str:
        time.sleep(0.45)  # after the 300 ms timeout
        return "42"

    fake.replies["LATE?"] = late
    fake.replies["VALUE?"] = "7"
    with _session(fake, rm) as s:
        with pytest.raises(InstrumentTimeout) as ei:
            s.query("LATE?")
        assert ei.value.resource == fake.resource and ei.value.command == "LATE?"
        assert ei.value.role == "generator"
        assert s.query("VALUE?") == "7"


def test_unanswered_query_is_a_timeout_not_a_reconnect(fake, rm):
    with _session(fake, rm) as s:
        with pytest.raises(InstrumentTimeout):
            s.query("NOSUCH?")
        assert s.reconnects == 0


def test_queued_error_raises_scpi_error(fake, rm):
    """SCPI-99 SYSTem:ERRor?: -222 'Data out of range' read back after the command."""
    cmd = "SOURce1:FREQuency:CW 1E12"
    fake.rejects[cmd] = (-222, "Data out of range")
    with _session(fake, rm) as s:
        with pytest.raises(ScpiError) as ei:
            s.configure("set_frequency", output=1, frequency_hz=1e12)
        e = ei.value
        assert (e.code, e.text, e.command, e.resource) == (
            -222,
            "Data out of range",
            cmd,
            fake.resource,
        )
        s.configure("set_frequency", output=1, frequency_hz=1e3)  # queue empty again


def test_several_errors_and_a_queue_that_never_empties(fake, rm):
    """SCPI-99: FIFO error queue; a queue that does not reach 0,"No error" within the
    bound is reported as -350 queue overflow."""
    with _session(fake, rm, max_error_reads=5) as s:
        fake.errors.extend([(-102, "Syntax error"), (-113, "Undefined header")])
        assert s.errors() == [(-102, "Syntax error"), (-113, "Undefined header")]
        fake.errors.extend([(-100, "Command error")] * 50)
        errs = s.errors()
        assert len(errs) == 6 and errs[-1][0] == -350


def test_block_with_lf_bytes_inside(fake, rm):
    """IEEE 488.2 §8.7.9: the count, not a terminator, delimits a block; payload bytes equal
    to LF (0x0A) must not end the read."""
    codes = [10, 10, -1, 10, 127, -128] * 1000
    fake.replies["FETCh:ARRay:VOLTage? (@1)"] = encode_values(codes, "int8") + b"\n"
    with _session(fake, rm, profile=SCOPE) as s:
        data = s.query_block("FETCh:ARRay:VOLTage? (@1)", "int8")
        assert data.tolist() == codes


def test_bad_block_header_is_malformed_and_recovers(fake, rm):
    fake.replies["FETCh:ARRay:VOLTage? (@1)"] = "1.0,2.0,3.0"
    fake.replies["VALUE?"] = "7"
    with _session(fake, rm, profile=SCOPE) as s:
        with pytest.raises(MalformedReply) as ei:
            s.query_block("FETCh:ARRay:VOLTage? (@1)", "int8")
        assert ei.value.command == "FETCh:ARRay:VOLTage? (@1)"
        assert s.query("VALUE?") == "7"  # framing lost -> reconnected, stream clean


def test_block_not_followed_by_lf_is_malformed(fake, rm):
    fake.replies["BLK?"] = encode_block(b"abcd") + b"X\n"
    with _session(fake, rm, profile=SCOPE) as s, pytest.raises(MalformedReply, match="LF"):
        s.query_block_bytes("BLK?")


def test_binary_bytes_for_a_text_query_are_a_malformed_reply(fake, rm):
    """Bytes that are not ASCII where a text reply is due (a late binary block read by the
    next query) are the project's typed MalformedReply, never a UnicodeDecodeError."""
    fake.replies["TXT?"] = b"\xfe\xff\x00\x01\n"
    with _session(fake, rm) as s, pytest.raises(MalformedReply, match="not text") as ei:
        s.query("TXT?", retry=False)
    assert ei.value.command == "TXT?"


def test_server_closes_mid_block(fake, rm):
    """pyvisa-py 0.8.1 on a socket: a closed connection shows as a timeout on read; with no answer
    to
    *IDN? afterwards it is a lost connection, not a slow instrument."""
    block = encode_values(list(range(100)) * 40, "int8") + b"\n"
    fake.replies["FETCh:ARRay:VOLTage? (@1)"] = Cut(block[:1000])
    with _session(fake, rm, profile=SCOPE, retries=0) as s:
        with pytest.raises((ConnectionLost, MalformedReply)) as ei:
            s.query_block("FETCh:ARRay:VOLTage? (@1)", "int8", retry=False)
        assert ei.value.resource == fake.resource


def test_power_cycle_reconnects_and_replays_settings(fake, rm):
    """pyvisa-py 0.8.1: a lost socket raises VisaIOError or OSError; close, reopen, re-identify,
    re-configure.  The restarted instrument must receive the settings again."""
    s = _session(fake, rm, retries=2)
    s.open()
    gen = Generator(s)
    gen.configure_sine(1000.0)
    gen.set_level(1.0)
    fake.replies["OUTPut1:STATe?"] = "0"
    fake.restart()
    fake.clear_log()
    assert gen.is_on() is False
    assert s.reconnects == 1
    sent = fake.sent()
    assert sent[:3] == [
        "SOURce1:FUNCtion:SHAPe SINusoid",
        "SOURce1:FREQuency:CW 1000",
        "SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 2.82842712475",
    ]
    assert sent[-1] == "OUTPut1:STATe?"
    s.close()


def test_power_cycle_with_no_retries_raises_then_recovers(fake, rm):
    fake.replies["VALUE?"] = "7"
    with _session(fake, rm, retries=0) as s:
        fake.restart()
        with pytest.raises(ConnectionLost):
            s.query("VALUE?")
        assert s.query("VALUE?") == "7"  # the next call reconnects first


def test_wrong_identity_is_refused(fake, rm):
    s = _session(fake, rm, expect_idn="stageproof-test,SCOPE-9")
    with pytest.raises(IdentityMismatch) as ei:
        s.open()
    assert "FAKE-1" in str(ei.value) and ei.value.resource == fake.resource
    assert not s.is_open


def test_identity_changed_after_power_cycle_is_refused(fake, rm):
    with _session(fake, rm, expect_idn="stageproof-test,FAKE-1") as s:
        fake.idn = "stageproof-test,OTHER-2,SN9,1.0"
        fake.restart()
        with pytest.raises(IdentityMismatch):
            s.query("*IDN?")


def test_unreachable_port_is_connection_lost_naming_resource(rm):
    """pyvisa-py 0.8.1 on a socket: opening a port nobody listens on succeeds; the first write
    raises
    ConnectionRefusedError.  Must fail fast (a hang check, not a speed target)."""
    resource = f"TCPIP::127.0.0.1::{free_port()}::SOCKET"
    s = Session(resource, GEN, rm=rm, timeout_ms=TMO_MS, retries=1)
    t0 = time.monotonic()
    with pytest.raises(ConnectionLost) as ei:
        s.open()
    assert time.monotonic() - t0 < 5.0
    assert resource in str(ei.value)
    assert "not reachable" in str(ei.value)  # said in bench words, not only the OS error


def test_two_threads_get_their_own_replies(fake, rm):
    """Two threads querying one pyvisa resource interleave their writes and reads (observed
    with pyvisa 1.16.2): one lock per instrument around each write+read."""
    fake.replies.update({"A?": "alpha", "B?": "beta"})
    bad: list[str] = []
    with _session(fake, rm, timeout_ms=2000) as s:

        def worker(cmd: str, want: str) -> None:
            for _ in range(40):
                got = s.query(cmd)
                if got != want:
                    bad.append(got)

        ts = [threading.Thread(target=worker, args=a) for a in (("A?", "alpha"), ("B?", "beta"))]
        for t in ts:
            t.start()
        for t in ts:
            t.join()
    assert bad == []


def test_every_io_is_logged_with_resource(fake, rm, caplog):
    fake.replies["VALUE?"] = "7"
    with caplog.at_level(logging.DEBUG, logger="harness.instruments"), _session(fake, rm) as s:
        s.query("VALUE?")
    msgs = [r.getMessage() for r in caplog.records if r.name == "harness.instruments"]
    assert any(m == f"{fake.resource} >> VALUE?" for m in msgs)
    assert any(m == f"{fake.resource} << 7" for m in msgs)
