"""Driver command tables, row by row: (call, expected SCPI text, reply, parsed value),
through real pyvisa-py to the fake instrument on 127.0.0.1."""

from __future__ import annotations

import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from harness.errors import InstrumentError, StationFileError
from harness.instruments.bench import connect
from harness.instruments.drivers import (
    Dmm,
    Generator,
    Scope,
    Supply,
    Switch,
    amplitude_setting,
    level_at_load,
)
from harness.instruments.scpi import encode_values
from harness.instruments.session import Session
from harness.io.profiles import load_profile
from harness.io.station import station_from_dict
from tests.instruments.fakeinst import FakeInstrument

REPO = Path(__file__).resolve().parents[2]
R2 = math.sqrt(2.0)


def _driver(cls, fake: FakeInstrument, rm, profile=None):
    prof = profile or load_profile(f"scpi-{cls.role}")
    s = Session(fake.resource, prof, rm=rm, timeout_ms=500)
    s.open()
    fake.clear_log()
    return cls(s)


Row = tuple[str, Callable[[Any], Any], list[str], dict[str, str], Any]

GENERATOR_ROWS: list[Row] = [
    (
        "sine",
        lambda g: g.configure_sine(1000.0),
        ["SOURce1:FUNCtion:SHAPe SINusoid", "SOURce1:FREQuency:CW 1000", "SOURce1:FREQuency:CW?"],
        {},
        1000.0,
    ),
    (
        "level 1 Vrms high-Z",
        lambda g: g.set_level(1.0),
        [
            "SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 2.82842712475",
            "SOURce1:VOLTage:LEVel:IMMediate:AMPLitude?",
        ],
        {},
        2 * R2,
    ),
    (
        "level 10 mVrms into 50",
        lambda g: g.set_level(0.01, load_ohm=50.0),
        [
            "SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 0.0565685424949",
            "SOURce1:VOLTage:LEVel:IMMediate:AMPLitude?",
        ],
        {},
        0.04 * R2,
    ),
    (
        "offset",
        lambda g: g.set_offset(0.5),
        ["SOURce1:VOLTage:LEVel:IMMediate:OFFSet 0.5"],
        {},
        None,
    ),
    ("on", lambda g: g.output(True), ["OUTPut1:STATe ON"], {}, None),
    ("off", lambda g: g.output(False), ["OUTPut1:STATe OFF"], {}, None),
    ("is on", lambda g: g.is_on(), ["OUTPut1:STATe?"], {"OUTPut1:STATe?": "1"}, True),
    ("is off", lambda g: g.is_on(), ["OUTPut1:STATe?"], {"OUTPut1:STATe?": "0"}, False),
    (
        "amplitude",
        lambda g: g.amplitude_setting(),
        ["SOURce1:VOLTage:LEVel:IMMediate:AMPLitude?"],
        {"SOURce1:VOLTage:LEVel:IMMediate:AMPLitude?": "+2.0000E+00"},
        2.0,
    ),
    (
        "safe off",
        lambda g: g.safe_off(),
        ["OUTPut1:STATe OFF", "OUTPut1:STATe?"],
        {"OUTPut1:STATe?": "0"},
        True,
    ),
    (
        "safe off fails",
        lambda g: g.safe_off(),
        ["OUTPut1:STATe OFF", "OUTPut1:STATe?"],
        {"OUTPut1:STATe?": "1"},
        False,
    ),
]

SUPPLY_ROWS: list[Row] = [
    (
        "configure",
        lambda p: p.configure(12.0, 0.03),
        [
            "SOURce1:VOLTage:LEVel:IMMediate:AMPLitude 12",
            "SOURce1:CURRent:LEVel:IMMediate:AMPLitude 0.03",
        ],
        {},
        None,
    ),
    ("on 2", lambda p: p.output(True, output=2), ["OUTPut2:STATe ON"], {}, None),
    (
        "current",
        lambda p: p.current_a(),
        ["MEASure1:CURRent:DC?"],
        {"MEASure1:CURRent:DC?": "1.234E-02"},
        0.01234,
    ),
    (
        "voltage",
        lambda p: p.voltage_v(),
        ["MEASure1:VOLTage:DC?"],
        {"MEASure1:VOLTage:DC?": "11.998"},
        11.998,
    ),
    (
        "tripped",
        lambda p: p.tripped(),
        ["SOURce1:CURRent:PROTection:TRIPped?"],
        {"SOURce1:CURRent:PROTection:TRIPped?": "1"},
        True,
    ),
    ("is on", lambda p: p.is_on(2), ["OUTPut2:STATe?"], {"OUTPut2:STATe?": "0"}, False),
    (
        "safe off",
        lambda p: p.safe_off(),
        ["OUTPut1:STATe OFF", "OUTPut1:STATe?", "OUTPut2:STATe OFF", "OUTPut2:STATe?"],
        {"OUTPut1:STATe?": "0", "OUTPut2:STATe?": "0"},
        True,
    ),
]

SWITCH_ROWS: list[Row] = [
    ("close", lambda w: w.close([101, 102]), ["ROUTe:CLOSe (@101,102)"], {}, None),
    ("open", lambda w: w.open([101]), ["ROUTe:OPEN (@101)"], {}, None),
    ("open all", lambda w: w.open_all(), ["ROUTe:OPEN:ALL"], {}, None),
    (
        "query",
        lambda w: w.is_closed([101, 102]),
        ["ROUTe:CLOSe? (@101,102)"],
        {"ROUTe:CLOSe? (@101,102)": "1,0"},
        [True, False],
    ),
]

DMM_ROWS: list[Row] = [
    (
        "auto",
        lambda d: d.dc_volts(),
        ["MEASure:VOLTage:DC? DEF"],
        {"MEASure:VOLTage:DC? DEF": "+6.14000E+00"},
        6.14,
    ),
    (
        "10 V",
        lambda d: d.dc_volts(10.0),
        ["MEASure:VOLTage:DC? 10"],
        {"MEASure:VOLTage:DC? 10": "1.08"},
        1.08,
    ),
]


@pytest.mark.parametrize(
    ("cls", "row"),
    [(Generator, r) for r in GENERATOR_ROWS]
    + [(Supply, r) for r in SUPPLY_ROWS]
    + [(Switch, r) for r in SWITCH_ROWS]
    + [(Dmm, r) for r in DMM_ROWS],
    ids=lambda x: x[0] if isinstance(x, tuple) else x.__name__,
)
def test_command_table(cls, row, fake, rm):
    """Default profiles' SCPI-99 text (scikit-rf-style table of operation, expected write,
    reply, parsed value); every setting is followed by a SYSTem:ERRor? check."""
    _name, call, expected, replies, value = row
    fake.replies.update(replies)
    drv = _driver(cls, fake, rm)
    got = call(drv)
    assert fake.sent() == expected
    if value is not None:
        assert got == pytest.approx(value, rel=1e-11) if isinstance(value, float) else got == value
    if not _name.startswith("safe off"):
        full = fake.sent(skip_common=False)
        for line in [x for x in expected if "?" not in x]:  # each setting: error check
            assert full[full.index(line) + 1] == "SYSTem:ERRor?", line
    drv.session.close()


# --- generator load arithmetic --------------------------------------------------------------


@pytest.mark.parametrize(
    ("vrms", "load", "cal", "unit", "setting"),
    [
        (1.0, math.inf, math.inf, "vrms", 1.0),
        (1.0, 50.0, math.inf, "vrms", 2.0),  # high-Z-calibrated into 50 ohm: half the EMF
        (1.0, 50.0, 50.0, "vrms", 1.0),  # 50-ohm-calibrated into 50 ohm: as set
        (1.0, math.inf, 50.0, "vrms", 0.5),  # 50-ohm-calibrated into high-Z: doubles
        (1.0, 600.0, 50.0, "vrms", 650.0 / 600.0 / 2.0),
        (1.0, 10e3, math.inf, "vpp", 2 * R2 * 10050.0 / 10e3),
        (0.5, math.inf, math.inf, "vpk", 0.5 * R2),
    ],
)
def test_generator_load_arithmetic(vrms, load, cal, unit, setting):
    """Voltage divider V_L = EMF·Z_L/(Z_L + R_out) (Ohm's law).  A generator calibrated for
    50 ohm puts out twice its set level into high impedance (common practice).  R_out 50."""
    s = amplitude_setting(vrms, load_ohm=load, unit=unit, calibrated_load_ohm=cal, output_ohm=50.0)
    assert s == pytest.approx(setting, rel=1e-12)
    assert level_at_load(
        s, load_ohm=load, unit=unit, calibrated_load_ohm=cal, output_ohm=50.0
    ) == pytest.approx(vrms, rel=1e-12)


@given(st.floats(1e-4, 10), st.floats(1.0, 1e7), st.sampled_from([50.0, 600.0, math.inf]))
def test_generator_level_round_trip(vrms, load, cal):
    s = amplitude_setting(vrms, load_ohm=load, unit="vpp", calibrated_load_ohm=cal, output_ohm=50.0)
    back = level_at_load(s, load_ohm=load, unit="vpp", calibrated_load_ohm=cal, output_ohm=50.0)
    assert back == pytest.approx(vrms, rel=1e-12)


def test_generator_refuses_level_above_its_limit(fake, rm):
    g = _driver(Generator, fake, rm)
    with pytest.raises(InstrumentError, match="above the generator"):
        g.set_level(8.0)  # 22.6 Vpp > 20 Vpp
    assert fake.sent() == []
    g.session.close()


# --- scope -------------------------------------------------------------------------------------


def _scope_profile(tmp_path: Path, fmt: str = "int8", probe_cmd: bool = True):
    text = (REPO / "fixtures/instruments/scpi-scope.toml").read_text()
    text = text.replace('data_format = "int8"', f'data_format = "{fmt}"')
    if not probe_cmd:
        text = text.replace('set_probe = "INPut{input}:ATTenuation {probe}"\n', "")
    p = tmp_path / "scope.toml"
    p.write_text(text)
    return load_profile(p)


def test_scope_configuration_table(fake, rm):
    sc = _driver(Scope, fake, rm)
    setup = sc.configure_input(
        2, range_vpp=1.5, offset_v=0.25, coupling="ac", probe=1.0, bandwidth_limit=True
    )
    assert setup.range_vpp == 2.0  # smallest offered range >= 1.5
    sc.configure_timebase(1e5, 8192)
    sc.configure_trigger(1, level_v=0.0)
    assert fake.sent() == [
        "INPut2:STATe ON",
        "INPut2:ATTenuation 1",
        "SENSe2:VOLTage:RANGe 2",
        "SENSe2:VOLTage:RANGe?",
        "SENSe2:VOLTage:OFFSet 0.25",
        "INPut2:COUPling AC",
        "INPut2:FILTer:LPASs:STATe ON",
        "SENSe:SWEep:TINTerval 1E-5",
        "SENSe:SWEep:POINts 8192",
        "SENSe:SWEep:TINTerval?",
        "SENSe:SWEep:POINts?",
        "TRIGger:SEQuence:SOURce INTernal1;:TRIGger:SEQuence:SLOPe POSitive;"
        ":TRIGger:SEQuence:LEVel 0",
    ]
    with pytest.raises(InstrumentError, match="not offered"):
        sc.configure_timebase(3e5, 8192)
    with pytest.raises(InstrumentError, match="does not exist"):
        sc.configure_input(5, range_vpp=1.0)
    sc.session.close()


@pytest.mark.parametrize(
    ("fmt", "probe_cmd", "probe"),
    [
        ("int8", True, 1.0),
        ("int16", True, 1.0),
        ("float32", True, 10.0),
        ("int8", False, 10.0),
        ("float32", False, 10.0),
    ],
)
def test_scope_acquire_scaling(tmp_path, fake, rm, fmt, probe_cmd, probe):
    """Profile scaling rule: volts = offset + code·range/2**bits for int codes, float32 as
    is; probe factor applied by the instrument when the profile has set_probe, otherwise by
    the driver.  Blocks are IEEE 488.2 §8.7.9 big-endian (BORDer NORMal)."""
    prof = _scope_profile(tmp_path, fmt, probe_cmd)
    sc = _driver(Scope, fake, rm, prof)
    n = 1000
    setup = sc.configure_input(1, range_vpp=2.0 * probe, offset_v=0.1 * probe, probe=probe)
    sc.configure_timebase(1e5, n)
    bits = 8
    codes = np.resize(np.array([-128, -1, 0, 1, 10, 127]), n)
    lsb_tip = 2.0 * probe / 2**bits
    want = 0.1 * probe + codes * lsb_tip
    if fmt == "float32":
        on_wire = want.astype(np.float32) / (1.0 if probe_cmd else probe)
        block = encode_values(on_wire, "float32")
        want = on_wire.astype(np.float64) * (1.0 if probe_cmd else probe)
    else:
        block = encode_values(codes, fmt)
    fake.replies["FETCh:ARRay:VOLTage? (@1)"] = block + b"\n"
    acq = sc.acquire([1])
    np.testing.assert_allclose(acq.volts[1], want, rtol=1e-12, atol=1e-12)
    lo, hi = acq.adc_limits[1]
    assert lo == pytest.approx(0.1 * probe - 1.0 * probe)
    assert hi == pytest.approx(0.1 * probe + 1.0 * probe - lsb_tip)
    assert acq.sample_rate_hz == 1e5 and acq.bits == 8 and acq.ranges_vpp == {1: setup.range_vpp}
    sent = fake.sent()
    fmt_cmd = {"int8": "INTeger,8", "int16": "INTeger,16", "float32": "REAL,32"}[fmt]
    assert f"FORMat:DATA {fmt_cmd};:FORMat:BORDer NORMal" in sent
    assert sent[-3:] == [
        "INITiate:CONTinuous OFF;:INITiate:IMMediate",
        "*OPC?",
        "FETCh:ARRay:VOLTage? (@1)",
    ]
    if not probe_cmd:
        assert "SENSe1:VOLTage:RANGe 2" in sent  # range at the scope input, not the tip
    sc.session.close()


# --- bench.connect -------------------------------------------------------------------------------


def _station(fakes: dict[str, FakeInstrument], **extra) -> dict:
    doc = {
        "station": {"name": "t", "timeout_ms": 500, "retries": 0},
        "instrument": {
            role: {
                "resource": f.resource,
                "profile": f"scpi-{role}",
                "expect_idn": "stageproof-test",
            }
            for role, f in fakes.items()
        },
    }
    doc["instrument"].update(extra)
    return doc


def test_connect_opens_every_role_and_closes(rm):
    fakes = {r: FakeInstrument().start() for r in ("generator", "scope", "dmm")}
    fakes["generator"].replies["OUTPut1:STATe?"] = "0"
    try:
        st = station_from_dict(_station(fakes))
        with connect(st, rm=rm) as ins:
            assert isinstance(ins.generator, Generator) and isinstance(ins.scope, Scope)
            assert isinstance(ins.dmm, Dmm) and ins.switch is None and ins.supply is None
            assert set(ins.identities) == {"generator", "scope", "dmm"}
        assert fakes["generator"].sent()[-2:] == ["OUTPut1:STATe OFF", "OUTPut1:STATe?"]
        assert not ins.generator.session.is_open
    finally:
        for f in fakes.values():
            f.stop()


def test_connect_needs_generator_and_scope(rm):
    with FakeInstrument() as f:
        st = station_from_dict(_station({"generator": f}))
        with pytest.raises(StationFileError, match="no scope"):
            connect(st, rm=rm)
