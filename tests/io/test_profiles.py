"""Profiles and station files: the defaults load, and each kind of mistake names file,
field and fix."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from harness.errors import ProfileError, StationFileError
from harness.io.profiles import (
    ROLE_OPS,
    ROLES,
    load_profile,
)
from harness.io.station import load_station, validate_resource

REPO = Path(__file__).resolve().parents[2]
FIXTURE_PROFILES = REPO / "fixtures" / "instruments"
GEN = (FIXTURE_PROFILES / "scpi-generator.toml").read_text()


@pytest.mark.parametrize("role", ROLES)
def test_default_profiles_load_and_cover_every_required_operation(role):
    prof = load_profile(f"scpi-{role}")
    assert prof.role == role
    for op, spec in ROLE_OPS[role].items():
        if spec.required:
            assert prof.has(op), op


@pytest.mark.parametrize("role", ROLES)
def test_default_profiles_use_scpi_long_short_form_headers(role):
    """SCPI-99 vol. 1 ch. 6: a header keyword is written with its short form in capitals
    (FREQuency, CW), at most 12 characters long; common commands are '*' + 3 letters
    (IEEE 488.2 §10)."""
    for text in load_profile(f"scpi-{role}").commands.values():
        for cmd in text.split(";"):
            header = cmd.strip().lstrip(":").split(" ")[0].rstrip("?")
            if header.startswith("*"):
                assert re.fullmatch(r"\*[A-Z]{3}", header), header
                continue
            for kw in header.split(":"):
                kw = re.sub(r"\{\w+\}|\d+$", "", kw)
                assert re.fullmatch(r"[A-Z]{2,4}[a-z]*", kw) and len(kw) <= 12, (text, kw)


def test_render_formats_numbers_in_base_units():
    prof = load_profile("scpi-generator")
    assert prof.render("set_frequency", output=1, frequency_hz=1e-3) == "SOURce1:FREQuency:CW 0.001"
    assert (
        prof.render("set_amplitude", output=2, amplitude=2.5e-5)
        == "SOURce2:VOLTage:LEVel:IMMediate:AMPLitude 2.5E-5"
    )


def _write(tmp_path: Path, text: str, name: str = "p.toml") -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize(
    ("old", "new", "field", "words"),
    [
        ('set_function = "', 'set_shape = "', "commands.set_shape", "unknown operation"),
        (
            'output_off = "OUTPut{output}:STATe OFF"\n',
            "",
            "commands.output_off",
            "required operation missing",
        ),
        ("{frequency_hz}", "{freq}", "commands.set_frequency", "placeholder {freq}"),
        ("{frequency_hz}", "{frequency_hz:.3f}", "commands.set_frequency", "format"),
        ("{frequency_hz}", "{frequency_hz", "commands.set_frequency", ""),
        ("outputs = 1", "outputs = 1\nchannels = 2", "settings.channels", "unknown setting"),
        (
            'amplitude_unit = "vpp"',
            'amplitude_unit = "dbu"',
            "settings.amplitude_unit",
            "must be one of",
        ),
        (
            'amplitude_unit = "vpp"',
            'amplitude_unit = "dbm"',
            "settings.calibrated_load",
            "dBm needs a finite load",
        ),
        (
            'calibrated_load = "high_z"',
            "calibrated_load = -50",
            "settings.calibrated_load",
            "high_z",
        ),
        ('role = "generator"', 'role = "oscillator"', "profile.role", "unknown role"),
        ("output_ohm = 50", "", "settings.output_ohm", "required setting missing"),
        ("[commands]", "[command]", "command", "unknown section"),
    ],
)
def test_profile_errors_name_file_field_and_fix(tmp_path, old, new, field, words):
    assert old in GEN
    p = _write(tmp_path, GEN.replace(old, new, 1))
    with pytest.raises(ProfileError) as ei:
        load_profile(p)
    e = ei.value
    assert e.path == str(p)
    assert e.location is not None and e.location.startswith(field)
    assert words in e.reason
    assert e.hint or "line" in (e.location or "")


def test_profile_error_gives_line_number(tmp_path):
    p = _write(tmp_path, GEN.replace("{frequency_hz}", "{freq}"))
    line = next(i for i, t in enumerate(p.read_text().splitlines(), 1) if "{freq}" in t)
    with pytest.raises(ProfileError, match=rf"line {line}\)"):
        load_profile(p)


def test_malformed_toml_and_missing_profile(tmp_path):
    p = _write(tmp_path, GEN.replace('name = "scpi-generator"', "name = scpi-generator"))
    with pytest.raises(ProfileError, match="TOML syntax"):
        load_profile(p)
    with pytest.raises(ProfileError, match="no profile of that name"):
        load_profile("no-such-profile")
    with pytest.raises(ProfileError, match="expected 'scope'"):
        load_profile("scpi-generator", role="scope")


def test_scope_bits_must_fit_codes(tmp_path):
    text = (
        (FIXTURE_PROFILES / "scpi-scope.toml").read_text().replace("adc_bits = 8", "adc_bits = 12")
    )
    with pytest.raises(ProfileError, match="do not fit int8"):
        load_profile(_write(tmp_path, text))
    load_profile(_write(tmp_path, text.replace('"int8"', '"int16"'), "q.toml"))


# --- station files -----------------------------------------------------------------------------

STATION = (REPO / "fixtures" / "station-sim.toml").read_text()


def test_example_station_loads():
    st = load_station(REPO / "fixtures" / "station-sim.toml")
    assert set(st.instruments) == set(ROLES)
    assert st.visa_library == "@py" and st.timeout_ms == 5000
    assert st.instruments["scope"].profile.role == "scope"
    assert st.instruments["generator"].expect_idn == "stageproof-sim,SIG-1"


@pytest.mark.parametrize(
    "resource",
    [
        "TCPIP::127.0.0.1::5025::SOCKET",
        "TCPIP0::10.0.0.2::inst0::INSTR",
        "TCPIP::bench-gen::INSTR",
        "TCPIP::10.0.0.3::hislip0::INSTR",
        "USB0::0x1234::0x5678::SN123::INSTR",
        "ASRL/dev/ttyUSB0::INSTR",
        "ASRL1::INSTR",
        "GPIB0::12::INSTR",
        "GPIB::3::96::INSTR",
    ],
)
def test_visa_resource_forms_accepted(resource):
    """VISA resource-name forms (VPP-4.3, from memory for the clause): SOCKET, VXI-11
    INSTR, HiSLIP, USBTMC, serial, GPIB."""
    assert validate_resource(resource) == resource


@pytest.mark.parametrize(
    ("resource", "words"),
    [
        ("TCPIP::127.0.0.1::5025", "::SOCKET"),
        ("TCPIP::h::0::SOCKET", "port"),
        ("GPIB0::31::INSTR", "primary"),
        ("127.0.0.1:5025", "not a VISA"),
        ("", "VISA"),
    ],
)
def test_bad_resources(resource, words):
    with pytest.raises(StationFileError) as ei:
        validate_resource(resource, path="st.toml", location="instrument.scope.resource")
    assert words in str(ei.value) and "st.toml" in str(ei.value)


@pytest.mark.parametrize(
    ("old", "new", "field"),
    [
        ("56002::SOCKET", "56002", "instrument.scope.resource"),
        ('profile = "scpi-scope"', 'profile = "scpi-generator"', "instrument.scope.profile"),
        ("[instrument.dmm]", "[instrument.meter]", "instrument.meter"),
        ("retries = 1 ", "retries = -1 ", "station.retries"),
        ("timeout_ms = 5000", "timeout_ms = 5000\nspeed = 1", "station.speed"),
        ("56003::SOCKET", "56002::SOCKET", "instrument.switch.resource"),
    ],
)
def test_station_errors(tmp_path, old, new, field):
    assert old in STATION
    p = _write(tmp_path, STATION.replace(old, new, 1), "station.toml")
    with pytest.raises(StationFileError) as ei:
        load_station(p)
    assert ei.value.path == str(p)
    assert ei.value.location == field


def test_station_profile_by_relative_path(tmp_path):
    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "my-gen.toml").write_text(
        GEN.replace("output_ohm = 50", "output_ohm = 600")
    )
    p = _write(
        tmp_path,
        STATION.replace('profile = "scpi-generator"', 'profile = "profiles/my-gen.toml"'),
        "station.toml",
    )
    assert load_station(p).instruments["generator"].profile.settings["output_ohm"] == 600.0


# --- command text: one line per operation ------------------------------------------------------


@pytest.mark.parametrize(
    ("op", "text"),
    [
        # a second command smuggled behind a line feed: 5 Vpp past the level cap
        (
            "set_amplitude",
            r"SOURce{output}:VOLTage:LEVel:IMMediate:AMPLitude {amplitude}"
            r"\nSOURce{output}:VOLTage 5",
        ),
        # the output switched on while the harness believes it is off
        (
            "set_frequency",
            r"SOURce{output}:FREQuency:CW {frequency_hz}\rOUTPut{output}:STATe ON",
        ),
        ("output_off", r"OUTPut{output}:STATe OFF\u0000"),
        ("set_offset", r"SOURce{output}:VOLTage:LEVel:IMMediate:OFFSet {offset_v}\u007f"),
        ("set_function", r"SOURce{output}:FUNCtion:SHAPe\tSINusoid"),
        ("query_output", r"OUTPut{output}:STATe?\u0085"),
    ],
)
def test_control_characters_in_command_text_are_refused(tmp_path, op, text):
    """IEEE 488.2 §7.5: LF ends a program message, so a line break inside an operation's
    text would start a command the harness never checked.  Refused at load time, naming
    file, field and line; the same for every command-text field."""
    line_text = next(ln for ln in GEN.splitlines() if ln.startswith(f"{op} = "))
    p = _write(tmp_path, GEN.replace(line_text, f'{op} = "{text}"'))
    line = next(i for i, t in enumerate(p.read_text().splitlines(), 1) if t.startswith(f"{op} ="))
    with pytest.raises(ProfileError) as ei:
        load_profile(p)
    e = ei.value
    assert e.path == str(p)
    assert e.location == f"commands.{op} (line {line})"
    assert "control character" in e.reason
    assert e.hint


def test_control_character_in_trigger_source_template_is_refused(tmp_path):
    text = (FIXTURE_PROFILES / "scpi-scope.toml").read_text()
    old = 'trigger_input_source = "INTernal{input}"'
    assert old in text
    p = _write(tmp_path, text.replace(old, r'trigger_input_source = "INTernal{input}\n*RST"'))
    with pytest.raises(ProfileError, match="control character") as ei:
        load_profile(p)
    assert (ei.value.location or "").startswith("settings.trigger_input_source")


def test_multi_line_toml_string_is_refused(tmp_path):
    """A TOML multi-line string puts a real line feed in the text (TOML 1.0, "String")."""
    line_text = next(ln for ln in GEN.splitlines() if ln.startswith("set_amplitude = "))
    smuggled = 'set_amplitude = """SOURce{output}:VOLTage {amplitude}\nSOURce{output}:VOLTage 5"""'
    p = _write(tmp_path, GEN.replace(line_text, smuggled))
    with pytest.raises(ProfileError, match=r"commands\.set_amplitude \(line \d+\).*U\+000A"):
        load_profile(p)


@pytest.mark.parametrize(
    ("old", "new", "field"),
    [
        ("retries = 1 ", "retries = 1000000 ", "station.retries"),
        ("timeout_ms = 5000", "timeout_ms = 600000", "station.timeout_ms"),
    ],
)
def test_station_waits_are_bounded(tmp_path, old, new, field):
    """An unbounded retry count or timeout keeps a board driven while a lost instrument
    says nothing: both are capped, the error names file, field and the allowed range."""
    assert old in STATION
    p = _write(tmp_path, STATION.replace(old, new, 1), "station.toml")
    with pytest.raises(StationFileError) as ei:
        load_station(p)
    e = ei.value
    assert e.path == str(p) and e.location == field
    assert "above the maximum" in e.reason
    assert e.hint and re.search(r"\d+-\d+", e.hint)


def test_instrument_waits_are_bounded_too(tmp_path):
    text = STATION.replace('profile = "scpi-scope"', 'profile = "scpi-scope"\nretries = 50', 1)
    p = _write(tmp_path, text, "station.toml")
    with pytest.raises(StationFileError) as ei:
        load_station(p)
    assert ei.value.location == "instrument.scope.retries"
