"""Process capability against the NIST/SEMATECH e-Handbook of Statistical Methods, §6.1.6.

Definitions used (from the handbook's "process capability" section; section number from
memory): Cp = (USL − LSL)/(6σ), Cpk = min(USL − μ, μ − LSL)/(3σ), and for a one-sided
specification Cpu = (USL − μ)/(3σ) or Cpl = (μ − LSL)/(3σ); μ and σ are estimated by the
sample mean and the sample standard deviation s (divisor n − 1).
"""

from __future__ import annotations

import json
import math

import pytest

from harness.cli.main import main
from harness.report import capability, load_summary, render_summary_html
from harness.report.stats import CPK_MIN_BOARDS, CPK_THRESHOLD
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
    assert not c.flagged  # five boards are too few to flag (fewer than CPK_MIN_BOARDS)
    # thirty: Cpu = 0.5/(3·√(0.6/29)) = 1.1587 < 1.33, flagged
    many = capability(DATA * 6, None, 10.5)
    assert many.cpk == pytest.approx(0.5 / (3 * math.sqrt(0.6 / 29)), rel=1e-8)
    assert many.flagged


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
    # five boards: the indices are computed but not shown (fewer than 25 boards)
    assert not gain.capability.enough and not gain.capability.flagged
    page = render_summary_html(s)
    assert "too few boards (n = 5)" in page and "2.108" not in page


def _strict(text: str):
    """json.loads refusing NaN/Infinity (RFC 8259 §6)."""

    def refuse(name: str):
        raise AssertionError(f"{name} in JSON")

    return json.loads(text, parse_constant=refuse)


def test_three_near_identical_boards_show_too_few_boards(tmp_path, capsys) -> None:
    """Three boards a hair apart give s ≈ 1e-13 dB and Cpk ≈ 1e12: not a capability.
    Below 25 boards (common practice, the control-chart guidance of the NIST/SEMATECH
    e-Handbook of Statistical Methods, ch. 6) the page, the CLI and the JSON say
    "too few boards" and state n; nothing is flagged."""
    assert CPK_MIN_BOARDS == 25
    db = tmp_path / "few.db"
    with open_store(db) as store:
        for i in range(3):
            add_run(store, f"F{i}", gain_db=20.0 + i * 1e-13, records=False, sweep=False)
    s = load_summary(db)
    gain = next(m for m in s.measurements if m.channel == "left" and m.name == "gain")
    assert gain.capability.n == 3 and gain.capability.cpk > 1e9  # the absurd raw figure
    page = render_summary_html(s)
    assert "too few boards (n = 3)" in page
    assert f"{gain.capability.cpk:.3f}" not in page
    out = tmp_path / "few.html"
    code = main(["report", "summary", "--db", str(db), "-o", str(out)])
    line = capsys.readouterr().out
    assert code == 0 and "too few boards for Cpk (n < 25" in line
    assert "0 measurement(s) with Cpk under 1.33" in line
    code = main(["report", "summary", "--db", str(db), "-o", str(out), "--json"])
    doc = _strict(capsys.readouterr().out)
    assert code == 0
    g = next(m for m in doc["measurements"] if m["channel"] == "left" and m["name"] == "gain")
    assert g["n"] == 3 and g["cpk"] is None and g["cp"] is None and g["flagged"] is False
    assert g["note"] == "too few boards (n = 3, Cpk needs 25)"


def test_thirty_boards_show_cpk_against_hand_computation(tmp_path, capsys) -> None:
    """DATA six times over (30 boards, +10 dB): mean 20.0; the squared deviations sum to
    6 × 0.1 = 0.6, so s = √(0.6/29); limits 19..21 dB give Cp = Cpk = 2/(6s) = 1/(3s)
    (NIST/SEMATECH e-Handbook §6.1.6 definitions) = 2.317399..., shown and in the JSON."""
    db = tmp_path / "many.db"
    with open_store(db) as store:
        for i, g in enumerate(DATA * 6):
            add_run(store, f"M{i}", gain_db=g + 10.0, records=False, sweep=False)
    expected = 1.0 / (3.0 * math.sqrt(0.6 / 29))
    s = load_summary(db)
    gain = next(m for m in s.measurements if m.channel == "left" and m.name == "gain")
    assert gain.capability.enough and gain.capability.n == 30
    assert gain.capability.cpk == pytest.approx(expected, rel=1e-8)
    assert f"✓ {expected:.3f}</span>" in render_summary_html(s)
    out = tmp_path / "many.html"
    assert main(["report", "summary", "--db", str(db), "-o", str(out), "--json"]) == 0
    doc = _strict(capsys.readouterr().out)
    g = next(m for m in doc["measurements"] if m["channel"] == "left" and m["name"] == "gain")
    assert g["cpk"] == pytest.approx(expected, rel=1e-8) and g["note"] is None
