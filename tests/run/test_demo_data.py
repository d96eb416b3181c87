"""The demo's packaged copies (harness/data) match the repository's files, and its fault
specifications name parts of the demo board, so an installed copy runs the same demo."""

from __future__ import annotations

import pytest

from harness.cli.cmd_demo import DEMO_BOARD, DEMO_BOARDS, DEMO_FIXTURE
from harness.io.fixture import load_fixture
from harness.io.toml import load_board
from harness.run.runner import packaged
from tests.support.bench import REPO


@pytest.mark.parametrize(
    ("kind", "name", "source"),
    [
        ("limits", DEMO_BOARD, REPO / "limits" / DEMO_BOARD),
        ("limits", "demo-opamp-line.toml", REPO / "limits" / "demo-opamp-line.toml"),
        ("fixtures", DEMO_FIXTURE, REPO / "fixtures" / DEMO_FIXTURE),
    ],
)
def test_packaged_copy_matches(kind, name, source):
    assert packaged(kind, name).read_bytes() == source.read_bytes()


def test_demo_faults_name_board_parts():
    from harness.sim.physics import parse_fault

    board = load_board(packaged("limits", DEMO_BOARD))
    load_fixture(packaged("fixtures", DEMO_FIXTURE), board, scope_inputs=4)
    faults = [f for d in DEMO_BOARDS for f in d.faults]
    assert len(faults) == 2
    for text in faults:
        parse_fault(text, board)  # raises for a designator the board does not have
