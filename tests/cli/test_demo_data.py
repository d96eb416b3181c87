"""The demo's shipped board and fixture load together, and its fault specifications name
parts of the demo board, so an installed copy runs the same demo."""

from __future__ import annotations

from harness.cli.cmd_demo import DEMO_BOARD, DEMO_BOARDS, DEMO_FIXTURE
from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.io.packaged import packaged


def test_demo_faults_name_board_parts():
    from harness.sim.physics import parse_fault

    board = load_board(packaged("limits", DEMO_BOARD))
    load_fixture(packaged("fixtures", DEMO_FIXTURE), board, scope_inputs=4)
    faults = [f for d in DEMO_BOARDS for f in d.faults]
    assert len(faults) == 2
    for text in faults:
        parse_fault(text, board)  # raises for a designator the board does not have
