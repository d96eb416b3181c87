"""Fuzzing the board-file loader: whatever a hand-edited file holds, only the project's own
typed errors may escape (never KeyError, TypeError, a hang or a partial object).

Method: property-based testing (hypothesis) over mutations of the demo boards — delete a
field, replace a value with text, numbers, lists, tables or TOML-like junk — plus raw bytes
through the TOML reader.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.errors import BoardFileError, StageproofError
from harness.io.board import board_from_dict, load_board
from harness.model.board import Board

LIMITS = Path(__file__).resolve().parents[2] / "limits"
DEMOS = sorted(LIMITS.glob("demo-*.toml"))
#: Generated cases per target, stated in the README's reliability section.
FUZZ_CASES = 400

junk_values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**12), max_value=10**12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(
        [
            "4k7",
            "R47",
            "0",
            "-1k",
            "1e400",
            "10%",
            "150%",
            "k",
            "4k7 J",
            "1k ±",
            "npn",
            "pnp",
            "common_emitter",
            "warp_drive",
            "",
            " ",
            "+80%/-20%",
        ]
    ),
    st.lists(st.integers(), max_size=3),
    st.dictionaries(
        st.sampled_from(["value", "tol", "ref", "min", "typ", "max", "x"]),
        st.one_of(st.text(max_size=5), st.floats(), st.integers()),
        max_size=3,
    ),
)


def _paths(doc: Any, prefix: tuple = ()) -> list[tuple]:
    out = [prefix] if prefix else []
    if isinstance(doc, dict):
        for k, v in doc.items():
            out += _paths(v, (*prefix, k))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            out += _paths(v, (*prefix, i))
    return out


def _mutate(doc: dict, path: tuple, value: Any, delete: bool) -> dict:
    doc = copy.deepcopy(doc)
    node: Any = doc
    for key in path[:-1]:
        node = node[key]
    if delete:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return doc


@pytest.mark.reliability
@pytest.mark.parametrize("board_path", DEMOS, ids=lambda p: p.name)
@settings(max_examples=FUZZ_CASES, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_mutated_board_gives_only_typed_errors(board_path: Path, data: st.DataObject) -> None:
    doc = tomllib.loads(board_path.read_text())
    paths = _paths(doc)
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(paths))
        delete = data.draw(st.booleans())
        try:
            doc = _mutate(doc, path, data.draw(junk_values), delete)
        except (KeyError, IndexError, TypeError):
            break  # an earlier mutation removed this path's parent
        paths = _paths(doc) or [("board",)]
    try:
        board = board_from_dict(doc, str(board_path))
    except StageproofError as exc:
        assert str(exc)  # every error says something
        assert isinstance(exc, ValueError)
        return
    assert isinstance(board, Board)


@pytest.mark.reliability
@settings(max_examples=FUZZ_CASES, deadline=None)
@given(raw=st.binary(max_size=300))
def test_random_bytes_as_board_file(tmp_path_factory: pytest.TempPathFactory, raw: bytes) -> None:
    path = tmp_path_factory.mktemp("fuzz") / "board.toml"
    path.write_bytes(raw)
    with pytest.raises(BoardFileError) as info:
        load_board(path)
    assert str(path) in str(info.value)
