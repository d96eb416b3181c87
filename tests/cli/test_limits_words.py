"""``stageproof limits`` in words: the clipping side it names is the Monte Carlo majority,
a near-even split is called a coin toss, and the corner columns say what they hold.

An op-amp stage on equal ±rails swings equally both ways, so which half-cycle clips first
is decided by part tolerances alone: close to half the boards each way (common practice).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from harness.cli.cmd_limits import side_text
from harness.cli.main import main

REPO = Path(__file__).resolve().parents[2]
TWIN = str(REPO / "limits" / "demo-twin-preamp.toml")
OPAMP = str(REPO / "limits" / "demo-opamp-line.toml")


def _limits(capsys, board: str, *extra: str) -> str:
    assert main(["limits", board, "--samples", "2000", *extra]) == 0
    return capsys.readouterr().out


def test_majority_side_named_with_its_share(capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")
    doc = json.loads(_limits(capsys, TWIN, "--json"))
    out = " ".join(_limits(capsys, TWIN).split())
    for ch in doc["channels"].values():
        frac = ch["clip_side_fraction"]
        major = max(frac, key=frac.get)
        assert frac[major] > 0.9  # the bias point decides it on this board
        assert f"{major} half-cycle of the output on {frac[major]:.1%} of boards" in out, out


def test_even_split_called_a_coin_toss(capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")
    doc = json.loads(_limits(capsys, OPAMP, "--json"))
    out = " ".join(_limits(capsys, OPAMP).split())
    for ch in doc["channels"].values():
        assert abs(ch["clip_side_fraction"]["positive"] - 0.5) < 0.1
    assert out.count("a coin toss") == len(doc["channels"]), out
    # never a side named first with the other side's majority in brackets behind it
    assert not re.search(r"(positive|negative) half-cycle of the output \(positive", out)


@pytest.mark.parametrize(
    ("pos", "nominal", "expected"),
    [
        (0.497, "positive", "coin toss"),
        (0.30, "positive", "negative half-cycle of the output on 70.0% of boards"),
        (0.997, "positive", "positive half-cycle of the output on 99.7% of boards"),
    ],
)
def test_side_text(pos, nominal, expected):
    assert expected in side_text({"positive": pos, "negative": 1 - pos}, nominal)


def test_corner_columns_labelled_for_what_they_are(capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")
    out = _limits(capsys, TWIN)
    assert "corner pushed low" in out and "corner pushed high" in out
    assert "not a worst-case bracket" in " ".join(out.split())
    assert not re.search(r"corner low\s", out)
