"""First-pass and final yield on a small constructed store.

Definitions (common practice): first-pass yield = share of units that pass their first
test; final yield = share of units that pass their last test (after repair and retest).
"""

from __future__ import annotations

import pandas as pd
import pytest

from harness.report import load_summary
from harness.report.summary import summarise
from harness.store import open_store
from tests.support.builders import add_run


@pytest.fixture
def lot_db(tmp_path):
    """Six serials of AB-100 and one of another board:

    A pass; B fail then pass (repaired); C fail, fail; D pass, pass (re-verified);
    E aborted (no verdict) then pass; F pass.  Z (part CD-200) fail.
    """
    db = tmp_path / "lot.db"
    with open_store(db) as s:
        kw = {"records": False, "sweep": False}
        add_run(s, "A", **kw)
        add_run(s, "B", verdict="FAIL", **kw)
        add_run(s, "C", verdict="FAIL", **kw)
        add_run(s, "D", **kw)
        add_run(s, "E", status="aborted", **kw)
        add_run(s, "F", **kw)
        add_run(s, "B", **kw)
        add_run(s, "C", verdict="FAIL", **kw)
        add_run(s, "D", **kw)
        add_run(s, "E", **kw)
        add_run(s, "Z", verdict="FAIL", part_number="CD-200", **kw)
    return db


def test_first_pass_and_final_with_retests(lot_db) -> None:
    """AB-100: first tests pass for A, D, E (its first *finished* test), F: 4/6 = 66.7 %;
    last tests pass for A, B, D, E, F: 5/6 = 83.3 %; B, C, D have two finished tests."""
    s = load_summary(lot_db, board="AB-100")
    y = s.overall
    assert y.serials == 6
    assert y.first_pass_count == 4 and y.first_pass == pytest.approx(4 / 6)
    assert y.final_count == 5 and y.final == pytest.approx(5 / 6)
    assert y.retested == 3  # B, C, D have two finished tests; E's abort is no test
    assert s.status_counts == {"complete": 9, "aborted": 1}


def test_all_boards_and_per_part(lot_db) -> None:
    """All boards: 7 serials, first-pass 4/7, final 5/7; per part number separately."""
    s = load_summary(lot_db)
    assert (s.overall.serials, s.overall.first_pass_count, s.overall.final_count) == (7, 4, 5)
    assert s.per_part["CD-200"].serials == 1 and s.per_part["CD-200"].final_count == 0
    assert s.per_part["AB-100"].final_count == 5


def test_yield_shown_on_the_page(lot_db, tmp_path) -> None:
    from harness.report import write_summary_report

    path, _ = write_summary_report(lot_db, tmp_path / "s.html", board="AB-100")
    text = path.read_text()
    assert "66.7 % (4)" in text and "83.3 % (5)" in text


def _runs(rows: list[tuple[int, str, str, str | None, str]]) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "run_id": [r[0] for r in rows],
            "serial": [r[1] for r in rows],
            "part_number": "AB-100",
            "board_name": "demo",
            "status": [r[2] for r in rows],
            "verdict": [r[3] for r in rows],
            "started_at": pd.to_datetime([r[4] for r in rows], utc=True),
        }
    )


def _no_measurements() -> pd.DataFrame:
    return pd.DataFrame(
        columns=[
            "run_id",
            "channel",
            "name",
            "unit",
            "value",
            "low",
            "high",
            "decision",
            "measured_at",
        ]
    )


def test_date_range_keeps_a_serials_first_result() -> None:
    """X failed on 30 April and passed on 2 May; Y passed on 1 May; Z failed on 3 May.
    Summary of 1-2 May: population X, Y (serials with a finished test in the range);
    first-pass: X's first test ever failed, Y passed -> 1/2; final: both pass -> 2/2.
    Summary of 1 May only: Y alone (X has no test that day) -> 1/1 and 1/1."""
    runs = _runs(
        [
            (1, "X", "complete", "FAIL", "2024-04-30T10:00:00Z"),
            (2, "Y", "complete", "PASS", "2024-05-01T10:00:00Z"),
            (3, "X", "complete", "PASS", "2024-05-02T10:00:00Z"),
            (4, "Z", "complete", "FAIL", "2024-05-03T10:00:00Z"),
        ]
    )
    s = summarise(runs, _no_measurements, since="2024-05-01T00:00Z", until="2024-05-02T23:59Z")
    y = s.overall
    assert (y.serials, y.first_pass_count, y.final_count) == (2, 1, 2)
    assert s.runs_in_range == 2
    one = summarise(runs, _no_measurements, since="2024-05-01T00:00Z", until="2024-05-01T23:59Z")
    assert (one.overall.serials, one.overall.first_pass_count) == (1, 1)
