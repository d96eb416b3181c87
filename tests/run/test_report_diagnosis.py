"""A failed board's report names the likely faulty part.

End to end on the simulated bench over pyvisa-py: a board with its emitter bypass capacitor
C102 open (common practice: the gain falls to about R_C/R_E' of the now-degenerated stage)
is run through the real sequence, stored, and its HTML board report is written; the report's
"Likely faulty components" section ranks C102 among the top three candidates.
"""

from __future__ import annotations

import re

import pytest

from harness.instruments.bench import connect
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.report import write_board_report
from harness.run.sequence import RunOptions, run_board
from harness.store import open_store
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, sim_bench

pytestmark = pytest.mark.wire


def test_failed_board_report_ranks_the_open_bypass_capacitor(board, limits, tmp_path) -> None:
    assert board.source == str(BOARD_FILE)
    with sim_bench(board, tmp_path, faults=("C102:open",)) as (_bench, station_file):
        fixture = load_fixture(FIXTURE_FILE, board, scope_inputs=4)
        with open_store(tmp_path / "r.db") as store, connect(load_station(station_file)) as inst:
            res = run_board(
                inst,
                board,
                limits,
                fixture,
                "SN-C102",
                store,
                options=RunOptions(settle_wait_s=0.0, extra_frequencies=False),
                board_file=str(BOARD_FILE),
            )
    assert res.verdict == "FAIL"
    out, report = write_board_report(tmp_path / "r.db", tmp_path / "r.html", serial="SN-C102")
    top = [c.ref for c in report.diagnosis.candidates if c.kind != "none"][:3]
    assert "C102" in top, top
    html = out.read_text()
    section = html[html.index("Likely faulty components") :]
    first_rows = re.sub(r"<[^>]+>", " ", section)[:600]
    assert "C102" in first_rows
