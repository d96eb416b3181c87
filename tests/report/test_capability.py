"""Process capability against the NIST/SEMATECH e-Handbook of Statistical Methods, §6.1.6.

Definitions used (from the handbook's "process capability" section; section number from
memory): Cp = (USL − LSL)/(6σ), Cpk = min(USL − μ, μ − LSL)/(3σ), and for a one-sided
specification Cpu = (USL − μ)/(3σ) or Cpl = (μ − LSL)/(3σ); μ and σ are estimated by the
sample mean and the sample standard deviation s (divisor n − 1).
"""

from __future__ import annotations

import math

import pytest

from harness.report import capability, load_summary, render_summary_html
from harness.report.stats import CPK_THRESHOLD
from harness.store import open_store
from tests.support.builders import add_run

DATA = (9.8, 10.0, 10.2, 10.1, 9.9)


def test_two_sided_against_hand_computation() -> None:
    """Hand computation, data 9.8, 10.0, 10.2, 10.1, 9.9 with LSL 9.0, USL 11.5:

    mean = 50.0 / 5 = 10.0; deviations −0.2, 0, 0.2, 0.1, −0.1; squares sum 0.10;
    s² = 0.10 / (5 − 1) = 0.025, s = 0.158113883;
    Cp  = (11.5 − 9.0) / (6 · 0.158113883) = 2.5 / 0.948683298 = 2.635231383;
    Cpu = (11.5 − 10.0) / (3 · 0.158113883) = 1.5 / 0.474341649 = 3.162277660;
    Cpl = (10.0 − 9.0) / 0.474341649 = 2.108185107;  Cpk = min(Cpu, Cpl) = 2.108185107.
    """
    c = capability(DATA, 9.0, 11.5)
    assert c.n == 5
    assert c.mean == pytest.approx(10.0, abs=1e-12)
    assert c.sigma == pytest.approx(0.158113883, rel=1e-8)
    assert c.cp == pytest.approx(2.635231383, rel=1e-8)
    assert c.cpu == pytest.approx(3.162277660, rel=1e-8)
    assert c.cpl == pytest.approx(2.108185107, rel=1e-8)
    assert c.cpk == pytest.approx(2.108185107, rel=1e-8)
    assert not c.flagged


def test_one_sided_upper_limit_and_flag() -> None:
    """Only USL 10.5 (a THD-like limit): Cp undefined; Cpk = Cpu = (10.5 − 10.0)/(3 · 0.158113883)
    = 0.5 / 0.474341649 = 1.054092553, under the common-practice threshold 1.33, so flagged."""
    c = capability(DATA, None, 10.5)
    assert c.cp is None and c.cpl is None
    assert c.cpk == pytest.approx(1.054092553, rel=1e-8)
    assert c.cpk == c.cpu
    assert CPK_THRESHOLD == 1.33
    assert c.flagged


def test_one_sided_lower_limit() -> None:
    """Only LSL 9.5: Cpk = Cpl = (10.0 − 9.5)/0.474341649 = 1.054092553."""
    c = capability(DATA, 9.5, None)
    assert c.cp is None and c.cpu is None
    assert c.cpk == pytest.approx(1.054092553, rel=1e-8)


def test_undefined_cases_are_none_not_numbers() -> None:
    """No spread, one value, no limits: the indices are undefined, never inf or a guess;
    missing values (None/NaN: not measurable) are not counted."""
    assert capability([1.0, 1.0, 1.0], 0.0, 2.0).cp is None
    one = capability([1.0], 0.0, 2.0)
    assert one.n == 1 and one.cpk is None and math.isnan(one.sigma)
    assert capability(DATA, None, None).cpk is None
    c = capability([*DATA, None, math.nan], 9.0, 11.5)
    assert c.n == 5 and c.cpk == pytest.approx(2.108185107, rel=1e-8)


def test_summary_computes_the_same_from_a_store(tmp_path) -> None:
    """Five serials whose gain is the hand-computed data set plus 10 dB (limits 19..21 dB):
    mean 20.0, s 0.158113883, Cp = 2/(6s) = 2.108185107, Cpk = min(1, 1)/(3s) = 2.108185107.
    A retest of one serial with a wild value must not enter (one value per serial)."""
    db = tmp_path / "cap.db"
    with open_store(db) as store:
        for i, g in enumerate(DATA):
            add_run(store, f"SN{i}", gain_db=g + 10.0, records=False, sweep=False)
        add_run(store, "SN0", gain_db=25.0, verdict="FAIL", records=False, sweep=False)
    s = load_summary(db)
    gain = next(m for m in s.measurements if m.channel == "left" and m.name == "gain")
    assert gain.capability.n == 5
    assert gain.capability.cp == pytest.approx(2.108185107, rel=1e-8)
    assert gain.capability.cpk == pytest.approx(2.108185107, rel=1e-8)
    page = render_summary_html(s)
    assert "✓ 2.108</span>" in page and "2.108</td>" in page  # Cpk badge and Cp cell
