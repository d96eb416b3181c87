"""The profile language for benchtop instruments: load-time checks, the drivers' read-back,
preamble scaling, chunked reads, polled acquisition state, high-resolution mode and dBm.

External facts used (each named beside its test): the preamble convention of benchtop
scopes, volts = (code − y_reference)·y_increment + y_origin (common practice); power into
a resistor P = V²/R, so 0 dBm (1 mW) into 50 Ω is 0.22361 V rms (Ohm's law and the
definition of dBm, common practice); a 1-2-5 setting ladder (common practice); averaging
N samples lowers uncorrelated noise by √N (common practice).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from harness.errors import (
    InstrumentTimeout,
    MalformedReply,
    ProfileError,
    ReadbackMismatch,
    ScpiError,
)
from harness.instruments.drivers import Generator, Scope, amplitude_setting
from harness.instruments.scpi import encode_values, ladder_values, parse_preamble
from harness.instruments.session import Session
from harness.io.board import load_board
from harness.io.profiles import load_profile
from harness.sim.bench import SimBench
from tests.instruments.fakeinst import FakeInstrument

REPO = Path(__file__).resolve().parents[2]
PROFILES = REPO / "fixtures" / "instruments"
SCOPE_TEXT = (PROFILES / "benchtop-scope.toml").read_text()
GEN_TEXT = (PROFILES / "benchtop-generator.toml").read_text()


def _variant(tmp_path: Path, text: str, *edits: tuple[str, str], name: str = "p.toml"):
    for old, new in edits:
        assert old in text, old
        text = text.replace(old, new, 1)
    p = tmp_path / name
    p.write_text(text)
    return p


# --- load-time checks -----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("old", "new", "field", "words"),
    [
        ('scaling = "preamble"', 'scaling = "formula"', "settings.scaling", "must be one of"),
        (
            "y_reference = 6 }",
            "y_reference = 6, y_gain = 7 }",
            "settings.preamble_fields",
            "unknown preamble field 'y_gain'",
        ),
        (", y_reference = 6 }", " }", "settings.preamble_fields", "y_reference"),
        (
            'query_preamble = "DUMP{input}:SCALing?"\n',
            "",
            "commands.query_preamble",
            'scaling = "preamble"',
        ),
        (
            'fetch = "DUMP{input}:DATA? {start},{stop}"',
            'fetch = "DUMP{input}:DATA?"',
            "commands.fetch",
            "max_points_per_read",
        ),
        ('done_reply = "DONE"', 'done_reply = ""', "settings.done_reply", "poll"),
        ('query_acquire_state = "RUN:STATe?"\n', "", "commands.query_acquire_state", "poll"),
        ("high_resolution = false", "high_resolution = true", "settings.high_resolution", ""),
        ("scales_v_div = {", "# scales_v_div = {", "settings.scales_v_div", "per_division"),
        ('query_scale = "VIEW{input}:SCALe?"\n', "", "commands.query_scale", "read back"),
        (
            'query_sample_interval = "TBASe:INTerval?"\n',
            "",
            "commands.query_sample_interval",
            "required operation missing",
        ),
        (
            "time_scales_s_div = {",
            "# time_scales_s_div = {",
            "settings.time_scales_s_div",
            "per_division",
        ),
        (
            'ladder = "1-2-5", min = 1e-3',
            'ladder = "1-3-10", min = 1e-3',
            "settings.scales_v_div",
            "ladder must be one of",
        ),
        ("format_names = {", "# format_names = {", "settings.format_names", "uint8"),
        ("index_base = 1", "index_base = 2", "settings.index_base", "0"),
        (
            "max_points_per_read = 5000",
            "max_points_per_read = -1",
            "settings.max_points_per_read",
            ">= 0",
        ),
    ],
)
def test_scope_profile_errors_name_file_field_and_fix(tmp_path, old, new, field, words):
    """Every mode names what it needs; each mistake is one typed error with file and field."""
    edits = [(old, new)]
    if "high_resolution = true" in new:
        edits.append(('set_high_resolution = "RUN:FINE {state}"\n', ""))
        field = "commands.set_high_resolution"
    p = _variant(tmp_path, SCOPE_TEXT, *edits)
    with pytest.raises(ProfileError) as ei:
        load_profile(p)
    e = ei.value
    assert e.path == str(p)
    assert e.location is not None and e.location.startswith(field), e
    assert words in str(e)
    # the fix: in the hint, or the rule in the reason
    assert e.hint or "must" in e.reason or "known" in e.reason


def test_generator_dbm_needs_a_finite_load(tmp_path):
    p = _variant(tmp_path, GEN_TEXT, ("calibrated_load = 50", 'calibrated_load = "high_z"'))
    with pytest.raises(ProfileError, match="dBm needs a finite load"):
        load_profile(p)


def test_shipped_benchtop_profiles_load_from_the_one_shipped_copy():
    """The benchtop profiles are found where every shipped profile is (fixtures/instruments,
    reached through the package) and name themselves."""
    for name in ("benchtop-scope", "benchtop-generator"):
        prof = load_profile(name)
        assert prof.name == name
        assert Path(prof.path).resolve() == (REPO / "fixtures" / "instruments" / f"{name}.toml")


def test_ladder_is_one_two_five():
    """1-2-5 ladder (common practice): 1 mV/div to 10 V/div is 13 steps."""
    assert ladder_values((1.0, 2.0, 5.0), 1e-3, 10.0) == (
        0.001,
        0.002,
        0.005,
        0.01,
        0.02,
        0.05,
        0.1,
        0.2,
        0.5,
        1.0,
        2.0,
        5.0,
        10.0,
    )


# --- preamble parser -----------------------------------------------------------------------

FIELDS = {
    "points": 1,
    "x_increment": 2,
    "x_origin": 3,
    "y_increment": 4,
    "y_origin": 5,
    "y_reference": 6,
}


def test_preamble_fields_by_position():
    got = parse_preamble("BYTE,20000,5E-6,0,3.90625E-3,0.25,128", FIELDS)
    assert got == {
        "points": 20000,
        "x_increment": 5e-6,
        "x_origin": 0.0,
        "y_increment": 3.90625e-3,
        "y_origin": 0.25,
        "y_reference": 128,
    }


@pytest.mark.parametrize(
    ("reply", "words"),
    [
        ("BYTE,20000,5E-6,0,3.9E-3,0.25", "no field 6 (y_reference)"),
        ("BYTE,20000,5E-6,0,abc,0.25,128", "field 4 (y_increment) is not a number"),
        ("BYTE,20000,5E-6,0,,0.25,128", "no field 4"),
        ("BYTE,20000,-5E-6,0,3.9E-3,0.25,128", "x_increment) must be positive"),
        ("BYTE,2.5,5E-6,0,3.9E-3,0.25,128", "points) is not a count"),
        ("BYTE,20000,5E-6,0,9.91E37,0.25,128", "y_increment) is not a number"),
    ],
)
def test_bad_preamble_is_a_malformed_reply_naming_the_field(reply, words):
    with pytest.raises(MalformedReply, match=words.replace("(", r"\(").replace(")", r"\)")):
        parse_preamble(reply, FIELDS)


# --- drivers against a fake benchtop scope (exact SCPI text) ---------------------------------


def _open(cls, fake: FakeInstrument, rm, path_or_name, role=None):
    prof = load_profile(path_or_name)
    s = Session(fake.resource, prof, rm=rm, timeout_ms=500)
    s.open()
    fake.clear_log()
    return cls(s)


def _fake_scope(fake: FakeInstrument, n: int, codes: np.ndarray, pre: str, *, short: int = 0):
    fake.replies["TBASe:INTerval?"] = "5E-6"
    fake.replies["TBASe:POINts?"] = str(n)
    fake.replies["RUN:STATe?"] = "DONE"
    fake.replies["DUMP1:SCALing?"] = pre
    for first in range(0, n, 5000):
        last = min(first + 5000, n)
        chunk = codes[first:last]
        if short and first == 5000:
            chunk = chunk[:-short]
        fake.replies[f"DUMP1:DATA? {first + 1},{last}"] = encode_values(chunk, "uint8") + b"\n"


def test_benchtop_scope_timing_preamble_and_chunks_on_the_wire(fake, rm):
    """s/div from the ladder and a depth that holds the record; timing read back; three
    reads of at most 5000 points by 1-based start and stop; volts from the preamble
    (common practice: (code − y_reference)·y_increment + y_origin)."""
    sc = _open(Scope, fake, rm, "benchtop-scope")
    n = 12000
    codes = np.resize(np.array([0, 1, 127, 128, 129, 200, 255], dtype=np.uint8), n)
    _fake_scope(fake, n, codes, "BYTE,12000,5E-6,0,0.01,0.5,128")
    setup = sc.configure_input(1, range_vpp=0.15)
    assert setup.range_vpp == pytest.approx(0.2)  # 20 mV/div x 10 divisions, read back
    tb = sc.configure_timebase(2e5, 12000)
    assert (tb.sample_rate_hz, tb.points) == (2e5, 12000)
    sc.configure_trigger(1)
    acq = sc.acquire([1])
    want = (codes.astype(float) - 128) * 0.01 + 0.5
    np.testing.assert_allclose(acq.volts[1], want, rtol=0, atol=1e-12)
    assert acq.adc_limits[1] == pytest.approx(((0 - 128) * 0.01 + 0.5, (255 - 128) * 0.01 + 0.5))
    assert fake.sent() == [
        "VIEW1:ENABle ON",
        "VIEW1:PROBe 1",
        "VIEW1:SCALe 0.02",
        "VIEW1:SCALe?",
        "VIEW1:POSition 0",
        "VIEW1:COUPling DC",
        "VIEW1:BWLimit OFF",
        "TBASe:DEPTh 20000",  # 2e5 S/s x 0.01 s/div x 10 div
        "TBASe:DIVision 0.01",  # smallest 1-2-5 step >= 12000 / 2e5 / 10 = 6 ms
        "TBASe:INTerval?",
        "TBASe:POINts?",
        "CATCh:SOURce VIEW1;:CATCh:EDGE RISE;:CATCh:LEVel 0",
        "RUN:FINE OFF",
        "DUMP:ENCoding BYTE",
        "RUN:SINGle",
        "RUN:STATe?",
        "DUMP1:SCALing?",
        "DUMP1:DATA? 1,5000",
        "DUMP1:DATA? 5001,10000",
        "DUMP1:DATA? 10001,12000",
    ]
    sc.session.close()


def test_chunk_shorter_than_announced_is_a_typed_error(fake, rm):
    sc = _open(Scope, fake, rm, "benchtop-scope")
    n = 12000
    _fake_scope(fake, n, np.full(n, 128, dtype=np.uint8), "BYTE,12000,5E-6,0,0.01,0,128", short=3)
    sc.configure_input(1, range_vpp=0.15)
    sc.configure_timebase(2e5, 12000)
    sc.configure_trigger(1)
    with pytest.raises(MalformedReply) as ei:
        sc.acquire([1])
    assert "4997 points for points 5001-10000, 5000 announced" in str(ei.value)
    assert ei.value.role == "scope" and ei.value.hint
    sc.session.close()


def test_preamble_missing_fields_stops_the_acquisition(fake, rm):
    sc = _open(Scope, fake, rm, "benchtop-scope")
    _fake_scope(fake, 1000, np.zeros(1000, dtype=np.uint8), "BYTE,1000,5E-6")
    fake.replies["TBASe:POINts?"] = "1000"
    sc.configure_input(1, range_vpp=0.15)
    sc.configure_timebase(2e5, 1000)
    sc.configure_trigger(1)
    with pytest.raises(MalformedReply, match=r"no field 3 \(x_origin\)") as ei:
        sc.acquire([1])
    assert ei.value.command == "DUMP1:SCALing?" and ei.value.role == "scope"
    sc.session.close()


def test_status_poll_that_never_finishes_times_out(fake, rm, tmp_path):
    p = _variant(tmp_path, SCOPE_TEXT, ("acquire_margin_s = 2.0", "acquire_margin_s = 0.2"))
    sc = _open(Scope, fake, rm, p)
    _fake_scope(fake, 1000, np.zeros(1000, dtype=np.uint8), "BYTE,1000,5E-6,0,0.01,0,128")
    fake.replies["TBASe:POINts?"] = "1000"
    fake.replies["RUN:STATe?"] = "WAIT"
    sc.configure_input(1, range_vpp=0.15)
    sc.configure_timebase(2e5, 1000)
    sc.configure_trigger(1)
    with pytest.raises(InstrumentTimeout, match="never 'DONE'") as ei:
        sc.acquire([1])
    assert ei.value.role == "scope" and "done_reply" in (ei.value.hint or "")
    sc.session.close()


def test_ascii_transfer_gives_the_same_volts(fake, rm, tmp_path):
    p = _variant(tmp_path, SCOPE_TEXT, ('transfer = "block"', 'transfer = "ascii"'))
    sc = _open(Scope, fake, rm, p)
    _fake_scope(fake, 1000, np.zeros(1000, dtype=np.uint8), "TEXT,1000,5E-6,0,0.01,0.5,128")
    fake.replies["TBASe:POINts?"] = "1000"
    codes = np.resize(np.array([0, 128, 255]), 1000)
    for first in (0,):
        fake.replies[f"DUMP1:DATA? {first + 1},1000"] = ",".join(str(c) for c in codes)
    sc.configure_input(1, range_vpp=0.15)
    sc.configure_timebase(2e5, 1000)
    sc.configure_trigger(1)
    acq = sc.acquire([1])
    np.testing.assert_allclose(acq.volts[1], (codes - 128) * 0.01 + 0.5, atol=1e-12)
    assert "DUMP:ENCoding TEXT" in fake.sent()
    sc.session.close()


@pytest.mark.parametrize(
    ("query", "reply", "call", "setting"),
    [
        ("VIEW1:SCALe?", "0.5", lambda sc: sc.configure_input(1, range_vpp=0.15), "vertical scale"),
    ],
)
def test_scope_read_back_mismatch_names_instrument_and_setting(
    fake, rm, query, reply, call, setting
):
    sc = _open(Scope, fake, rm, "benchtop-scope")
    fake.replies[query] = reply
    with pytest.raises(ReadbackMismatch) as ei:
        call(sc)
    assert setting in str(ei.value) and ei.value.role == "scope" and ei.value.read_back == 0.5
    sc.session.close()


def test_sample_rate_scope_must_take_the_rate_it_is_sent(fake, rm):
    sc = _open(Scope, fake, rm, "scpi-scope")
    fake.replies["SENSe:SWEep:TINTerval?"] = "2E-5"
    with pytest.raises(ReadbackMismatch, match="sample rate") as ei:
        sc.configure_timebase(1e5, 8192)
    assert ei.value.read_back == pytest.approx(5e4)
    sc.session.close()


# --- generator: dBm, load, frequency resolution ------------------------------------------


def test_dbm_arithmetic():
    """0 dBm = 1 mW; into 50 ohm V = sqrt(P·R) = 0.22361 V rms (P = V²/R).  The level is
    across the 50 ohm load the generator is set for; open circuit the EMF is twice that."""
    v50 = math.sqrt(1e-3 * 50)
    kw = {"unit": "dbm", "calibrated_load_ohm": 50.0, "output_ohm": 50.0}
    assert amplitude_setting(v50, load_ohm=50.0, **kw) == pytest.approx(0.0, abs=1e-12)
    assert amplitude_setting(2 * v50, load_ohm=math.inf, **kw) == pytest.approx(0.0, abs=1e-12)
    assert amplitude_setting(10 * v50, load_ohm=50.0, **kw) == pytest.approx(20.0)


def test_generator_sets_unit_and_load_first_and_reads_everything_back(fake, rm):
    g = _open(Generator, fake, rm, "benchtop-generator")
    fake.replies["TERMinal:LOAD?"] = "50"
    fake.replies["TONE:FREQuency?"] = "1234.568"
    f = g.configure_sine(1234.56789)
    assert f == 1234.568
    assert fake.sent() == [
        "TONE:LEVel:UNIT DBM",
        "TERMinal:LOAD 50",
        "TERMinal:LOAD?",
        "TONE:SHAPe SINE",
        "TONE:FREQuency 1234.568",  # on the generator's 1 mHz grid
        "TONE:FREQuency?",
    ]
    g.session.close()


@pytest.mark.parametrize(
    ("query", "reply", "setting"),
    [("TONE:FREQuency?", "999.5", "frequency"), ("TERMinal:LOAD?", "9.9E37", "load")],
)
def test_generator_read_back_mismatch(fake, rm, query, reply, setting):
    g = _open(Generator, fake, rm, "benchtop-generator")
    fake.replies.setdefault("TERMinal:LOAD?", "50")
    fake.replies[query] = reply
    with pytest.raises(ReadbackMismatch) as ei:
        g.configure_sine(1000.0)
    assert ei.value.setting == setting and ei.value.role == "generator"
    g.session.close()


def test_generator_amplitude_read_back_mismatch(fake, rm):
    g = _open(Generator, fake, rm, "benchtop-generator")
    fake.replies["TERMinal:LOAD?"] = "50"
    fake.replies["TONE:LEVel?"] = "-30"  # the generator clamped the level
    with pytest.raises(ReadbackMismatch, match="amplitude") as ei:
        g.set_level(0.05)
    assert ei.value.requested == pytest.approx(-19.0309, abs=1e-4)
    g.session.close()


# --- drivers against the simulated benchtop bench ------------------------------------------

BOARD = load_board(REPO / "limits" / "demo-twin-preamp.toml")


@pytest.fixture(scope="module")
def benchtop():
    with SimBench(BOARD, dialect="benchtop", latency=True) as bench:
        yield bench


def _session(bench, role: str, rm, profile):
    s = Session(bench.resources[role], load_profile(profile), role, rm=rm, timeout_ms=3000)
    s.open()
    return s


def test_instrument_chosen_timing_is_used(benchtop, rm):
    """The scope takes 0.01 s/div (smallest 1-2-5 step over 16384 / 2e5 / 10) and a
    20000-point depth: it samples at 2e5 S/s and records 20000 points; asked for 16383 of
    them the driver reads just those, in chunks."""
    sc = Scope(_session(benchtop, "scope", rm, "benchtop-scope"))
    try:
        sc.configure_input(1, range_vpp=0.2)
        tb = sc.configure_timebase(2e5, 16384)
        assert (tb.sample_rate_hz, tb.points) == (2e5, 20000)
        sc.configure_trigger(1)
        acq = sc.acquire([1], points=16383)
        assert acq.n_samples == 16383 and acq.sample_rate_hz == 2e5
    finally:
        sc.session.close()


def test_opc_does_not_wait_on_this_scope(benchtop, rm, tmp_path):
    """A profile that trusts *OPC? reads while the record is still being taken: the scope
    refuses (-230) and the driver stops with that error; polling the run state works."""
    p = _variant(tmp_path, SCOPE_TEXT, ('acquire_done = "poll"', 'acquire_done = "opc"'))
    sc = Scope(_session(benchtop, "scope", rm, p))
    try:
        sc.configure_input(1, range_vpp=0.2)
        sc.configure_timebase(1e4, 2000)  # 0.2 s of record
        sc.configure_trigger(1)
        with pytest.raises(ScpiError) as ei:
            sc.acquire([1])
        assert ei.value.code == -230
    finally:
        sc.session.close()


def _sine_residual_rms(v: np.ndarray, f: float, fs: float) -> float:
    t = np.arange(len(v)) / fs
    a = np.column_stack([np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t), np.ones_like(t)])
    coef, *_ = np.linalg.lstsq(a, v, rcond=None)
    return float(np.sqrt(np.mean((v - a @ coef) ** 2)))


def test_high_resolution_mode_lowers_the_noise(benchtop, rm, tmp_path):
    """12-bit averaged records: the residual of a three-parameter sine fit (IEEE Std 1241
    Annex B.1) falls well below the 8-bit one (quantisation lsb/√12 shrinks 16x and
    averaging lowers the input noise)."""
    hires = _variant(tmp_path, SCOPE_TEXT, ("high_resolution = false", "high_resolution = true"))
    g = Generator(_session(benchtop, "generator", rm, "benchtop-generator"))
    res = {}
    try:
        f = g.configure_sine(1000.0)
        g.set_level(0.05)
        g.output(True)
        for name, prof in (("normal", "benchtop-scope"), ("fine", hires)):
            sc = Scope(_session(benchtop, "scope", rm, prof))
            try:
                sc.configure_input(1, range_vpp=0.2)
                sc.configure_timebase(2e5, 20000)
                sc.configure_trigger(1)
                acq = sc.acquire([1])
                res[name] = (acq.bits, _sine_residual_rms(acq.volts[1], f, acq.sample_rate_hz))
            finally:
                sc.session.close()
    finally:
        g.safe_off()
        g.session.close()
    assert res["normal"][0] == 8 and res["fine"][0] == 12
    assert res["fine"][1] < 0.2 * res["normal"][1]


UNSHIPPED = """
[profile]
name = "lab-scope"
role = "scope"

[settings]
inputs = 2
vertical = "range"
ranges_vpp = [0.5, 1, 2, 5]
horizontal = "record_time"
sample_rates_hz = [1e4, 1e5]
record_lengths = [2048, 4096]
adc_bits = 12
data_format = "int16"
byte_order = "little"
format_names = { int16 = "WORD,LE" }
scaling = "range_and_bits"

[commands]
identify = "*IDN?"
clear_status = "*CLS"
error_query = "SYST:ERR?"
wait_complete = "*OPC?"
input_on = "CH{input}:ON"
set_range = "CH{input}:FS {range_vpp}"
query_range = "CH{input}:FS?"
set_offset = "CH{input}:OFS {offset_v}"
set_coupling = "CH{input}:CPL {coupling}"
set_bandwidth_limit = "CH{input}:BW {state}"
set_record_time = "ACQ:TIME {record_s}"
set_record_length = "ACQ:LEN {points}"
query_sample_interval = "ACQ:DT?"
query_record_length = "ACQ:N?"
set_trigger = "TRIG {source},{level_v}"
set_data_format = "DATA:ENC {format}"
single = "ACQ:GO"
fetch = "DATA? {input}"
"""


def test_a_dialect_we_do_not_ship_works_from_its_profile_alone(fake, rm, tmp_path):
    """Range vertical, record-time horizontal, signed 12-bit codes in little-endian words,
    range-and-bits scaling: volts = offset + code·range/2^12 (the profile's convention)."""
    p = tmp_path / "lab-scope.toml"
    p.write_text(UNSHIPPED)
    sc = _open(Scope, fake, rm, p)
    fake.replies["ACQ:DT?"] = "1E-5"
    fake.replies["ACQ:N?"] = "4096"
    codes = np.resize(np.array([-2048, -1, 0, 1, 2047], dtype=np.int16), 4096)
    fake.replies["DATA? 1"] = encode_values(codes, "int16", big_endian=False) + b"\n"
    setup = sc.configure_input(1, range_vpp=0.8, offset_v=0.1)
    tb = sc.configure_timebase(1e5, 4096)
    sc.configure_trigger(1)
    acq = sc.acquire([1], points=4000)
    assert setup.range_vpp == 1.0 and (tb.sample_rate_hz, tb.points) == (1e5, 4096)
    np.testing.assert_allclose(acq.volts[1], 0.1 + codes[:4000] * 1.0 / 4096, atol=1e-12)
    assert "ACQ:TIME 0.04096" in fake.sent() and "DATA:ENC WORD,LE" in fake.sent()
    sc.session.close()
