"""Guarded decision rule (ILAC-G8:09/2019 §4.2) and the uncertainty budgets."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from harness.run.decisions import (
    STRICT,
    DecisionPolicy,
    amplitude_rel_u,
    conformance_probability,
    decide,
    gain_uncertainty_db,
    threshold_uncertainty_db,
    verdict,
)


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        (10.0, "pass"),  # centre
        (10.8, "pass"),  # exactly U inside the upper limit: acceptance interval is closed
        (10.9, "conditional pass"),  # inside, within U
        (11.0, "conditional pass"),  # on the tolerance limit
        (11.1, "conditional fail"),  # outside, within U
        (11.2, "conditional fail"),
        (11.3, "fail"),  # outside by more than U
        (9.05, "conditional pass"),
        (8.85, "conditional fail"),
        (8.75, "fail"),
        (float("nan"), "fail"),
    ],
)
def test_four_outcomes(value, expected):
    """ILAC-G8:09/2019 §4.2.3 non-binary statement with guard band w = U: the tolerance
    interval [9, 11], U = 0.2; acceptance zone [9.2, 10.8]."""
    assert decide(value, 9.0, 11.0, 0.2) == expected


def test_one_sided_and_no_limit():
    """A THD limit is one-sided (high only); no limit at all is information."""
    assert decide(0.5, None, 1.0, 0.1) == "pass"
    assert decide(0.95, None, 1.0, 0.1) == "conditional pass"
    assert decide(-100.0, None, 1.0, 0.1) == "pass"
    assert decide(3.0, None, None, 0.1) == "info"


def test_zero_uncertainty_is_simple_acceptance():
    """ILAC-G8:09/2019 §4.2.1: w = 0 is simple acceptance, a binary rule."""
    assert decide(11.0, 9.0, 11.0, 0.0) == "pass"
    assert decide(11.0001, 9.0, 11.0, 0.0) == "fail"


@given(
    value=st.floats(-100, 100),
    u=st.floats(0, 5),
    low=st.floats(-50, 0),
    width=st.floats(0, 50),
)
def test_outcome_matches_guarded_zones(value, u, low, width):
    """The four zones of ILAC-G8 §4.2 partition the axis: inside [TL+U, TU-U] pass,
    inside [TL, TU] conditional pass, inside [TL-U, TU+U] conditional fail, else fail."""
    high = low + width
    out = decide(value, low, high, u)
    inside = low <= value <= high
    assert (out in ("pass", "conditional pass")) == inside
    if out == "pass":
        assert low + u <= value <= high - u
    if out == "fail":
        assert value < low - u or value > high + u


def test_policy_default_is_strict():
    """Production default: both conditional outcomes and unresolvable limits fail."""
    assert verdict(["pass", "info"]) == "PASS"
    for o in ("conditional pass", "conditional fail", "not resolvable", "fail"):
        assert verdict(["pass", o]) == "FAIL"
        assert not STRICT.accepts(o)
    lenient = DecisionPolicy(accept_conditional_pass=True)
    assert verdict(["pass", "conditional pass"], lenient) == "PASS"
    assert verdict(["pass", "conditional fail"], lenient) == "FAIL"
    assert verdict([]) == "FAIL"  # nothing measured proves nothing


def test_conformance_probability_worked_example():
    """JCGM 106:2012 §7.3 formula, example value computed with scipy.stats.norm: upper limit 1.0 %,
    y = 0.92 %, u = 0.05 % -> p_c = 94.5 %."""
    assert conformance_probability(0.92, None, 1.0, 0.05) == pytest.approx(0.9452, abs=5e-4)


def test_amplitude_uncertainty_matches_monte_carlo():
    """IEEE Std 1241-2010 §4.1.4.3: a least-squares sine amplitude in white noise of rms
    sigma has standard deviation sigma*sqrt(2/N); checked here with numpy lstsq."""
    import numpy as np

    rng = np.random.default_rng(3)
    n, a, sigma = 1000, 1.0, 0.05
    t = np.arange(n) / n
    basis = np.column_stack([np.cos(2 * np.pi * 7 * t), np.sin(2 * np.pi * 7 * t), np.ones(n)])
    amps = []
    for _ in range(400):
        y = a * np.cos(2 * np.pi * 7 * t) + rng.normal(0, sigma, n)
        c, *_ = np.linalg.lstsq(basis, y, rcond=None)
        amps.append(math.hypot(c[0], c[1]))
    ratio = sigma / (a / math.sqrt(2))  # residual rms over fundamental rms
    assert np.std(amps) == pytest.approx(amplitude_rel_u(ratio, n) * a, rel=0.15)


def test_budgets_grow_with_their_terms():
    """Quadrature combination (GUM, JCGM 100:2008 §5.1): each term can only add."""
    base = gain_uncertainty_db(0.0, 0.0)
    assert base > 0  # the input-matching term alone
    assert gain_uncertainty_db(0.01, 0.0) > base
    narrow = threshold_uncertainty_db(0.05, 0.0)
    assert threshold_uncertainty_db(0.2, 0.0) > narrow
    assert threshold_uncertainty_db(0.05, 0.0, settled=False) >= narrow
    with pytest.raises(ValueError):
        decide(1.0, 0.0, 2.0, float("nan"))
