"""A wait derived from the board file is bounded: a wrong capacitor value must not make a
run wait for days with the supply on.

c_in = 1000 (a plain number: 1000 F, meant as 1 kΩ or 1000 nF) gives a coupling time
constant C·R of about 1e7 s (τ = RC, circuit theory, common practice), and the sequence
waits 5·τ after every level change and once after the supply comes on.
"""

from __future__ import annotations

import pytest

from harness.errors import BoardFileError
from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.model import compute_limits
from harness.model.design import MAX_SETTLE_S
from harness.run.bench_ops import settle_time_s
from tests.support.bench import BOARD_FILE, FIXTURE_FILE

C_IN = 'c_in = { value = "2u2", ref = "C101" }'


def test_a_derived_wait_beyond_the_bound_is_refused(tmp_path) -> None:
    text = BOARD_FILE.read_text()
    assert C_IN in text
    path = tmp_path / "board.toml"
    path.write_text(text.replace(C_IN, 'c_in = { value = "1000", ref = "C101" }', 1))
    board = load_board(path)
    limits = compute_limits(board, samples=200)
    assert limits.channels["A"].settle_time_s > 1e6  # what the run would have waited
    fixture = load_fixture(FIXTURE_FILE, board)
    with pytest.raises(BoardFileError) as info:
        settle_time_s(limits, fixture, None, board)
    msg = str(info.value)
    assert msg.startswith(f"board file {path}: channel.A: ")
    assert f"longer than the {MAX_SETTLE_S:g} s a run may wait" in msg
    assert "c_in = 1000 F (C101)" in msg and "(fix: " in msg
    # the operator's own wait is the operator's choice
    assert settle_time_s(limits, fixture, 0.5, board) == 0.5


def test_the_demo_board_waits_well_inside_the_bound() -> None:
    board = load_board(BOARD_FILE)
    limits = compute_limits(board, samples=200)
    wait = settle_time_s(limits, load_fixture(FIXTURE_FILE, board), None, board)
    assert 0 < wait < MAX_SETTLE_S
