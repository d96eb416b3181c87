"""Units in board files are checked against the quantity each field holds.

Notation, as published: the SI (BIPM, The International System of Units, 9th edition 2019)
writes a value as number, one space, unit symbol ("4.7 kΩ"), a prefix symbol joined to its
unit symbol, and unit symbols case-sensitive ("Hz", "V"; clause numbers from memory:
§5.4.3 and §5.2); IEC 60062:2016 writes resistances with R K M G T as the decimal marker
(4K7, R47, 2M2) and capacitances with p n µ m (4n7, 2µ2).  Units of the quantities: Ω
resistance, F capacitance, V voltage, A current, Hz frequency (SI Brochure Table 4).
Errors follow the project's rule: file, field, line and the fix; the "file:line" convention
is common practice.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from harness.cli.main import main
from harness.errors import BoardFileError, ValueParseError
from harness.io.board import load_board
from harness.io.toml import TomlLines
from harness.values import parse_quantity, split_value_tolerance

DEMO = Path(__file__).resolve().parents[2] / "limits" / "demo-twin-preamp.toml"
RC = 'rc = { value = "4k7", ref = "R103" }'
C_IN = 'c_in = { value = "2u2", ref = "C101" }'
SUPPLY = 'positive_v = "12 2%"'


@pytest.mark.parametrize(
    ("text", "unit", "value"),
    [
        ("4.7 kΩ", "Ω", 4700.0),  # SI: number, space, prefixed unit symbol
        ("4.7kΩ", "Ω", 4700.0),
        ("4.7 k\u2126", "Ω", 4700.0),  # OHM SIGN, canonically the same as Greek omega
        ("4k7 ohm", "Ω", 4700.0),  # IEC 60062 code with the unit's name
        ("1kohm", "Ω", 1000.0),
        ("470R", "Ω", 470.0),
        ("R47", "Ω", 0.47),
        ("2M2", "Ω", 2.2e6),
        ("6.8uF", "F", 6.8e-6),
        ("2.2 µF", "F", 2.2e-6),
        ("4n7", "F", 4.7e-9),
        ("100 nF", "F", 1e-7),
        ("12 V", "V", 12.0),
        ("150mV", "V", 0.15),
        ("15 mA", "A", 0.015),
        ("1 kHz", "Hz", 1000.0),
        ("4_700", "Ω", 4700.0),  # digit grouping between digits only
    ],
)
def test_values_with_their_unit_are_read(text: str, unit: str, value: float) -> None:
    assert parse_quantity(text, unit) == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize(
    ("text", "unit", "says"),
    [
        ("6.8uF", "Ω", "unit F is a capacitance, where a resistance in Ω is expected"),
        ("1kohm", "F", "unit Ω is a resistance, where a capacitance in F is expected"),
        ("15mA", "V", "unit A is a current, where a voltage in V is expected"),
        ("1 kHz", "V", "unit Hz is a frequency"),
        ("12 V", "", "where a plain number (no unit) is expected"),
        ("6k8 5", "Ω", "space inside the value"),
        ("4 k7", "Ω", "space inside the value"),
        ("6.8u", "Ω", "would be 6.8µΩ"),  # micro-ohms: a capacitor's value on a resistor
        ("4k7", "F", "would be 4.7kF"),  # kilofarads: a resistor's value on a capacitor
        ("4R7", "F", "would be 4.7F"),  # R is IEC 60062's marker for resistances
        ("10uf", "F", "case-sensitive"),  # SI: the farad's symbol is F
        ("1hz", "Hz", "case-sensitive"),
        ("4k7kΩ", "Ω", "multiplier is written twice"),
    ],
)
def test_wrong_units_and_inner_spaces_are_refused(text: str, unit: str, says: str) -> None:
    with pytest.raises(ValueParseError) as info:
        parse_quantity(text, unit)
    assert says in str(info.value)
    assert info.value.hint


def test_a_value_with_unit_keeps_its_tolerance() -> None:
    assert split_value_tolerance("4.7 kΩ 1%") == ("4.7 kΩ", "1%")
    assert split_value_tolerance("4.7 kΩ") == ("4.7 kΩ", None)
    assert split_value_tolerance("4k7 1%") == ("4k7", "1%")


def _board(tmp_path: Path, old: str, new: str) -> Path:
    text = DEMO.read_text()
    assert old in text
    path = tmp_path / "board.toml"
    path.write_text(text.replace(old, new, 1))
    return path


def _line_of(path: Path, needle: str) -> int:
    return next(i for i, ln in enumerate(path.read_text().splitlines(), 1) if needle in ln)


@pytest.mark.parametrize(
    ("old", "new", "field", "says", "fix"),
    [
        (RC, 'rc = { value = "6.8uF", ref = "R103" }', "rc", "rc is a resistor", "6k8"),
        (C_IN, 'c_in = { value = "1kohm", ref = "C101" }', "c_in", "c_in is a capacitor", "2u2"),
        (SUPPLY, 'positive_v = "15mA"', "supply.positive_v", "positive_v is a voltage", "12 V"),
        (RC, 'rc = { value = "6k8 5", ref = "R103" }', "rc", "space inside the value", "6k8 5%"),
        (RC, 'rc = "6k8 5"', "rc", "not a tolerance ('5')", "1%"),
    ],
)
def test_board_file_names_file_field_line_and_fix(tmp_path, old, new, field, says, fix) -> None:
    """The issue's cases: each was read as a wrong number (6.8 µΩ, 1000 F, 0.015 V, 6850 Ω)."""
    path = _board(tmp_path, old, new)
    with pytest.raises(BoardFileError) as info:
        load_board(path)
    msg = str(info.value)
    line = _line_of(path, new)
    assert msg.startswith(f"board file {path}: ")
    assert re.search(rf"{re.escape(field)} \(line {line}\): ", msg), msg
    assert says in msg and "(fix: " in msg and fix in msg


def test_limits_command_refuses_a_wrong_unit_in_one_line(tmp_path, capsys) -> None:
    path = _board(tmp_path, C_IN, 'c_in = { value = "1kohm", ref = "C101" }')
    assert main(["limits", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "c_in (line " in err[0] and "Traceback" not in err[0]


def test_line_index_follows_arrays_of_tables() -> None:
    """Repeated keys in [[channel]] / [[channel.stage]] elements get their own lines (TOML
    v1.0.0: each [[...]] header starts a new element of the array)."""
    text = DEMO.read_text()
    lines = TomlLines(text)
    rows = text.splitlines()
    assert 'ref = "R103"' in rows[lines.line(("channel", 0, "stage", 0, "rc")) - 1]
    assert 'ref = "R203"' in rows[lines.line(("channel", 1, "stage", 0, "rc")) - 1]
    assert rows[lines.line(("supply", "positive_v")) - 1].startswith("positive_v")
