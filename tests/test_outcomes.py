"""Decision outcomes and their display (harness.outcomes).

External checks: the colours against the contrast rule of WCAG 2.1 SC 1.4.3 (AA: at least
4.5:1 for text, with the relative luminance and contrast ratio as WCAG 2.1 defines them),
and SC 1.4.1 (colour is not the only visual means: every outcome has its own word and
symbol).
"""

from __future__ import annotations

import itertools

import pytest

from harness.outcomes import (
    ALWAYS_ACCEPTED,
    CONSOLE_BANNERS,
    CONSOLE_STYLES,
    CSS_COLOURS,
    LOOKS,
    OUTCOMES,
    UNKNOWN,
    VERDICTS,
    look,
)
from harness.report.html import CSS, badge
from harness.run.decisions import STRICT, DecisionPolicy, decide


def _luminance(hex_colour: str) -> float:
    """Relative luminance, WCAG 2.1 definition (sRGB channels linearised)."""

    def lin(c: int) -> float:
        s = c / 255.0
        return s / 12.92 if s <= 0.04045 else ((s + 0.055) / 1.055) ** 2.4

    r, g, b = (int(hex_colour[i : i + 2], 16) for i in (1, 3, 5))
    return 0.2126 * lin(r) + 0.7152 * lin(g) + 0.0722 * lin(b)


@pytest.mark.parametrize("tone", sorted(CSS_COLOURS))
def test_page_colours_read_on_white(tone: str) -> None:
    ratio = (1.0 + 0.05) / (_luminance(CSS_COLOURS[tone]) + 0.05)
    assert ratio >= 4.5, f"{tone}: contrast {ratio:.2f}:1 on white"


def test_contrast_formula_matches_wcag_worked_values() -> None:
    """Black on white is 21:1 and white on white 1:1 (WCAG 2.1, contrast ratio note)."""
    assert (1.05 / (_luminance("#000000") + 0.05)) == pytest.approx(21.0)
    assert _luminance("#ffffff") == pytest.approx(1.0)


def test_every_outcome_and_verdict_has_its_own_word_and_symbol() -> None:
    words = [*OUTCOMES, *VERDICTS]
    for w in words:
        assert look(w) is not UNKNOWN
        assert look(w).tone in CSS_COLOURS and look(w).tone in CONSOLE_STYLES
        assert look(w).console_banner in CONSOLE_BANNERS.values()
    for a, b in itertools.combinations(OUTCOMES, 2):
        assert (look(a).word, look(a).symbol) != (look(b).word, look(b).symbol)
    assert look("PASS").symbol != look("FAIL").symbol


@pytest.mark.parametrize(
    ("value", "u"),
    [(v / 4, u / 4) for v in range(-8, 13) for u in range(0, 4)],
)
def test_the_decision_rule_only_gives_registered_outcomes(value: float, u: float) -> None:
    assert decide(value, 0.0, 2.0, u) in OUTCOMES
    assert decide(value, None, None, u) in OUTCOMES


def test_the_strict_policy_accepts_exactly_the_always_accepted() -> None:
    assert {o for o in OUTCOMES if STRICT.accepts(o)} == set(ALWAYS_ACCEPTED)
    lenient = DecisionPolicy(True, True, True)
    assert {o for o in OUTCOMES if not lenient.accepts(o)} == {"fail"}


@pytest.mark.parametrize("word", [*OUTCOMES, *VERDICTS, "PaSs", None, "something else"])
def test_the_report_badge_shows_the_registered_look(word: str | None) -> None:
    shown = look(word)
    html = badge(word)
    assert shown.css_class in html
    assert f".badge.{shown.css_class}" in CSS
    if word is not None:
        assert f"{shown.symbol} {word}" in html


def test_unknown_words_fall_back_without_claiming_a_decision() -> None:
    assert look("maybe") is UNKNOWN
    assert UNKNOWN.tone == "neutral"
    assert set(LOOKS) == {*OUTCOMES, *VERDICTS, "ABORTED"}
