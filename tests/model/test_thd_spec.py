"""A board's specified THD ceiling replaces the model's figure as the THD limit.

An op-amp stage well below clipping is near-ideal in the model (its THD is a rounding
residue), so a limit taken from the model would sit under any bench's measurement floor;
the board file's ``thd_limit_percent`` states the specification instead.  The model's
prediction is kept as the nominal value.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from harness.errors import BoardFileError
from harness.io.board import load_board
from harness.model import compute_limits

LIMITS = Path(__file__).resolve().parents[2] / "limits"


def test_specified_ceiling_is_the_limit() -> None:
    board = load_board(LIMITS / "demo-opamp-line.toml")
    assert board.conditions.thd_limit_percent == pytest.approx(0.1)
    lim = compute_limits(board, samples=200)
    for ch in lim.channels.values():
        assert ch.thd_percent.high == pytest.approx(0.1)
        assert ch.thd_percent.low is None
        assert ch.thd_percent.nominal < 0.01  # the model's near-ideal figure, kept as nominal


def test_without_a_ceiling_the_model_sets_the_limit() -> None:
    board = load_board(LIMITS / "demo-twin-preamp.toml")
    assert board.conditions.thd_limit_percent is None
    lim = compute_limits(board, samples=500)
    thd = lim.channels["A"].thd_percent
    assert thd.high >= thd.nominal > 0.01


def test_ceiling_of_100_percent_is_refused(tmp_path: Path) -> None:
    text = (LIMITS / "demo-opamp-line.toml").read_text()
    text = text.replace("thd_limit_percent = 0.1", "thd_limit_percent = 150")
    path = tmp_path / "b.toml"
    path.write_text(text)
    with pytest.raises(BoardFileError, match=r"conditions\.thd_limit_percent"):
        load_board(path)
