"""Fixture files: loading, validation against the board, roles the station must have."""

from __future__ import annotations

from pathlib import Path

import pytest

from harness.errors import FixtureFileError, StationFileError
from harness.io.board import load_board
from harness.io.fixture import check_station, load_fixture

REPO = Path(__file__).resolve().parents[2]
BOARD = REPO / "limits" / "demo-twin-preamp.toml"
FIXTURE = REPO / "fixtures" / "fixture-twin-preamp.toml"


@pytest.fixture(scope="module")
def board():
    return load_board(BOARD)


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "fx.toml"
    p.write_text(text)
    return p


def _edited(tmp_path: Path, old: str, new: str) -> Path:
    text = FIXTURE.read_text()
    assert old in text, old
    return _write(tmp_path, text.replace(old, new, 1))


def test_example_fixture_loads(board):
    fx = load_fixture(FIXTURE, board)
    assert [c.board_channel for c in fx.channels] == ["A", "B"]
    assert fx.connection("B").output_scope == 3
    assert [t.key for t in fx.test_points] == ["gain.collector_v", "gain.emitter_v"] * 2
    assert fx.supply is not None and fx.supply.current_limit_a == pytest.approx(0.03)
    assert fx.required_roles() == ("generator", "scope", "supply", "switch", "dmm")
    assert len(fx.digest) == 64
    # A and B share the input probe and have distinct outputs: one acquisition sees both.
    assert [[c.board_channel for c in g] for g in fx.groups()] == [["A", "B"]]


@pytest.mark.parametrize(
    ("old", "new", "field", "words"),
    [
        (
            'board_channel = "B"\ninput_scope',
            'board_channel = "C"\ninput_scope',
            "channel[1].board_channel",
            "no channel 'C'",
        ),
        (
            'stage = "gain"\nquantity = "collector_v"      #',
            'stage = "driver"\nquantity = "collector_v"      #',
            "test_point[0].stage",
            "no stage",
        ),
        (
            'quantity = "emitter_v"\nroute = [102]',
            'quantity = "output_v"\nroute = [102]',
            "test_point[1].quantity",
            "not a quantity",
        ),
        ("voltage_v = 12.0", "voltage_v = 15.0", "supply.voltage_v", "outside the board"),
        (
            "current_limit_a = 0.03",
            "current_limit_a = -1",
            "supply.current_limit_a",
            "out of range",
        ),
        ("output_scope = 2", "output_scope = 1", "channel[0].output_scope", "same scope input"),
        ("output_scope = 3", "output_scope = 1", "channel[1].output_scope", "same scope input"),
        ('board = "AB-DP2"', 'board = "AB-XX9"', "fixture.board", "AB-XX9"),
        ("route = [101]", "route = [101, 101]", "test_point[0].route", "twice"),
        ("route = [101]", 'route = ["x"]', "test_point[0].route[0]", "whole number"),
        ("input_probe = 1.0", "input_probe = 0", "channel[0].input_probe", "probe factor"),
        ("output_probe = 1.0", "output_prob = 1.0", "channel[0].output_prob", "unknown field"),
    ],
)
def test_bad_fixture_names_field(tmp_path, board, old, new, field, words):
    with pytest.raises(FixtureFileError) as info:
        load_fixture(_edited(tmp_path, old, new), board)
    err = info.value
    assert err.location == field
    assert words in str(err)
    assert str(tmp_path / "fx.toml") in str(err)


def test_scope_input_out_of_range(tmp_path, board):
    p = _edited(tmp_path, "output_scope = 3", "output_scope = 5")
    with pytest.raises(FixtureFileError) as info:
        load_fixture(p, board, scope_inputs=4)
    assert info.value.location == "channel[1].output_scope"
    fx = load_fixture(p, board)  # without the scope's size the loader accepts it ...
    with pytest.raises(FixtureFileError, match=r"inputs 1\.\.4"):
        check_station(
            fx, ["generator", "scope", "supply", "switch", "dmm"], "st.toml", scope_inputs=4
        )  # ... and the station check catches it


def test_missing_file_and_syntax(tmp_path, board):
    with pytest.raises(FixtureFileError, match="file not found"):
        load_fixture(tmp_path / "nope.toml", board)
    with pytest.raises(FixtureFileError, match="TOML syntax"):
        load_fixture(_write(tmp_path, "[fixture\nname = 1"), board)


@pytest.mark.parametrize(
    ("drop", "role"),
    [("dmm", "dmm"), ("switch", "switch"), ("supply", "supply"), ("scope", "scope")],
)
def test_station_missing_role(board, drop, role):
    fx = load_fixture(FIXTURE, board)
    roles = {"generator", "scope", "supply", "switch", "dmm"} - {drop}
    with pytest.raises(StationFileError) as info:
        check_station(fx, roles, "st.toml")
    assert info.value.location == f"instrument.{role}"


def test_minimal_fixture_needs_only_generator_and_scope(tmp_path, board):
    text = """
[fixture]
name = "bare"
[[channel]]
board_channel = "A"
input_scope = 1
output_scope = 2
[[channel]]
board_channel = "B"
input_scope = 1
output_scope = 2
route = [7]
"""
    fx = load_fixture(_write(tmp_path, text), board)
    assert fx.required_roles() == ("generator", "scope", "switch")
    check_station(fx, ["generator", "scope", "switch"], "st.toml")
    # Both outputs on scope input 2: they cannot be recorded in the same acquisition.
    assert [[c.board_channel for c in g] for g in fx.groups()] == [["A"], ["B"]]
