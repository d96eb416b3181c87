"""The clipping side as a decided measurement.

Which half-cycle clips first follows from the bias point (common practice: an inverting
stage's negative output half-cycle clips on saturation, its positive half on cutoff), so a
board that clips on the other side from the one the model gives almost every good board has a
bias fault; where the model's own boards are split, the side is only recorded.
"""

from __future__ import annotations

from types import SimpleNamespace

from harness.run.sequence import _side_decision


def _limits(side: str, fraction: float) -> SimpleNamespace:
    other = "negative" if side == "positive" else "positive"
    return SimpleNamespace(clip_side=side, clip_side_fraction={side: fraction, other: 1 - fraction})


def test_expected_side_passes() -> None:
    assert _side_decision("positive", _limits("positive", 0.9985)) == "pass"


def test_other_side_fails_when_the_model_is_sure() -> None:
    assert _side_decision("negative", _limits("positive", 0.9985)) == "fail"


def test_other_side_is_only_recorded_when_the_model_is_split() -> None:
    # symmetric op-amp rails: either side is a good board
    assert _side_decision("negative", _limits("positive", 0.52)) == "info"


def test_no_side_or_no_expectation_is_recorded() -> None:
    assert _side_decision(None, _limits("positive", 1.0)) == "info"
    assert _side_decision("positive", SimpleNamespace(clip_side=None)) == "info"
