"""harness.values against the published component-marking standards."""

from __future__ import annotations

import math

import pytest

from harness.errors import ValueParseError
from harness.values import (
    E12,
    E24,
    e96,
    format_si,
    nearest_preferred,
    parse_quantity,
    parse_tolerance,
    split_value_tolerance,
)


@pytest.mark.parametrize(
    ("text", "value"),
    [
        ("R47", 0.47),
        ("4R7", 4.7),
        ("470R", 470.0),
        ("4K7", 4700.0),
        ("47K3", 47300.0),
        ("2M2", 2.2e6),
        ("4M7", 4.7e6),
        ("4n7", 4.7e-9),
        ("100n", 1e-7),
        ("4u7", 4.7e-6),
        ("10k", 1e4),
        ("4.7k", 4700.0),
        ("1e3", 1000.0),
        (" 22 ", 22.0),
        ("4k7 ohm", 4700.0),
    ],
)
def test_rkm_codes_iec60062(text: str, value: float) -> None:
    """IEC 60062:2016 RKM code: the letter is the multiplier and the decimal point
    (R47 = 0.47 ohm, 4K7 = 4.7 kohm, 2M2 = 2.2 Mohm; p/n/u for capacitors)."""
    assert parse_quantity(text) == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize(
    ("text", "tol"),
    [
        ("F", (0.01, 0.01)),
        ("G", (0.02, 0.02)),
        ("J", (0.05, 0.05)),
        ("K", (0.10, 0.10)),
        ("M", (0.20, 0.20)),
        ("1%", (0.01, 0.01)),
        ("±5%", (0.05, 0.05)),
        ("+80%/-20%", (0.20, 0.80)),
    ],
)
def test_tolerance_letters_iec60062(text: str, tol: tuple[float, float]) -> None:
    """IEC 60062:2016 tolerance letters: F ±1 %, G ±2 %, J ±5 %, K ±10 %, M ±20 %."""
    assert parse_tolerance(text) == pytest.approx(tol)


def test_value_with_tolerance_letter() -> None:
    """IEC 60062:2016: 4K7J is 4.7 kohm ±5 %."""
    value, tol = split_value_tolerance("4K7J")
    assert parse_quantity(value) == 4700.0
    assert parse_tolerance(tol) == (0.05, 0.05)


def test_e12_e24_iec60063() -> None:
    """IEC 60063:2015 E12 and E24 series (the published tables, not a formula: E24 departs from
    round(10^(i/24)) at several values)."""
    assert E12 == (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2)
    assert E24 == (
        1.0,
        1.1,
        1.2,
        1.3,
        1.5,
        1.6,
        1.8,
        2.0,
        2.2,
        2.4,
        2.7,
        3.0,
        3.3,
        3.6,
        3.9,
        4.3,
        4.7,
        5.1,
        5.6,
        6.2,
        6.8,
        7.5,
        8.2,
        9.1,
    )
    departs = [v for i, v in enumerate(E24) if round(10 ** (i / 24), 1) != v]
    assert departs == [2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2]


def test_e96_and_nearest_preferred() -> None:
    """IEC 60063:2015 E96 starts 1.00 1.02 1.05 1.07 1.10 and ends 9.53 9.76.  Nearest E24
    value on a log scale: 4.9k lies ln(4.9/4.7) = 0.042 from 4.7k and ln(5.1/4.9) = 0.040 from
    5.1k, so 5.1k."""
    series = e96()
    assert series[:5] == (1.0, 1.02, 1.05, 1.07, 1.1)
    assert series[-2:] == (9.53, 9.76)
    assert nearest_preferred(4900.0) == 5100.0
    assert nearest_preferred(4700.0 * 1.01) == 4700.0
    assert nearest_preferred(0.0118, E12) == pytest.approx(0.012)
    assert math.isclose(float(format_si(4700.0)[:-1]), 4.7)


@pytest.mark.parametrize("text", ["abc", "", "4k7k", "1..2", "-", "k"])
def test_unparseable_values_raise(text: str) -> None:
    """A value that is no number, SI-prefixed number or IEC 60062 code is refused with a typed
    error that says how to write it."""
    with pytest.raises(ValueParseError) as info:
        parse_quantity(text)
    assert info.value.hint or "empty" in str(info.value)


@pytest.mark.parametrize("text", ["100%", "150%", "+100%/-20%", "-5%", "five"])
def test_bad_tolerances_raise(text: str) -> None:
    """Tolerances of 100 % or more (the part could be absent) and malformed ones are refused."""
    with pytest.raises(ValueParseError):
        parse_tolerance(text)
