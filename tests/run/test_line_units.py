"""The loop's input handling, verdict drawing and recovery, without a bench.

External facts: a barcode scanner in keyboard mode ends a code with CR, LF or CR LF
(common practice); U+001B (ESC) and U+0007 (BEL) are C0 control characters (ISO/IEC 6429,
Unicode category Cc); yield = passed / tested (common practice).
"""

from __future__ import annotations

import io

import pytest

from harness.cli.cmd_line import TerminalUI, big_word, read_line
from harness.errors import ConnectionLost, RunAborted
from harness.instruments.config import StationConfig
from harness.run import line as line_mod
from harness.run.line import BoardOutcome, ProductionLine, SessionSummary, clean_scan
from harness.run.runner import Prepared


def test_over_long_line_is_drained_not_split():
    """A 10 000-character line is refused as one; the next serial is read intact."""
    s = io.StringIO("A" * 10_000 + "\nSN-2\n")
    first = read_line(s, limit=4096)
    assert first is not None and len(first) > 64
    assert read_line(s) == "SN-2"
    assert read_line(s) is None


@pytest.mark.parametrize(
    ("raw", "expected"),
    [("SN-1\r\n", "SN-1"), ("  SN-1 \r", "SN-1"), ("]C1SN-1#", "SN-1"), ("SN-1#", "SN-1")],
)
def test_clean_scan(raw, expected):
    assert clean_scan(raw, prefix="]C1", suffix="#") == expected


def test_control_characters_survive_cleaning_to_be_refused():
    assert "\x1b" in clean_scan("SN\x1b[A-1\n")


def test_big_word_is_drawn_in_block_letters():
    """PASS and FAIL differ in every row pattern a monochrome reader sees; 7 rows."""
    p, f = big_word("PASS", "#"), big_word("FAIL", "#")
    assert len(p) == len(f) == 7
    assert p != f and all(set(r) <= {"#", " "} for r in p + f)
    assert len({len(r) for r in p}) == 1
    with pytest.raises(ValueError):
        big_word("OK")


def test_verdict_panel_on_a_monochrome_terminal():
    from rich.console import Console

    buf = io.StringIO()
    ui = TerminalUI(
        Console(file=buf, no_color=True, width=100, force_terminal=False, legacy_windows=False),
        io.StringIO(),
    )
    ui.verdict(BoardOutcome("SN-9", "FAIL", 2, 17, None, ("A gain (fail)",)), None)
    text = buf.getvalue()
    assert "\x1b[" not in text  # no colour codes at all
    assert "RETEST #2" in text and "VERDICT SN-9: FAIL" in text
    for row in big_word("FAIL", ui.ink):
        assert row.rstrip() in text


def test_summary_yield_counts_latest_verdict_per_board():
    s = SessionSummary(
        outcomes=[
            BoardOutcome("A", "FAIL", 0, 1),
            BoardOutcome("A", "PASS", 1, 2),
            BoardOutcome("B", "PASS", 0, 3),
            BoardOutcome("C", "ABORTED", 0, 4),
        ]
    )
    assert (s.boards, s.passed, s.failed, s.runs, s.retests, s.aborted) == (2, 2, 0, 4, 1, 1)
    assert s.yield_percent == 100.0 and s.first_pass_percent == 50.0


class _ScriptUI:
    def __init__(self, lines, answers):
        self.lines, self.answers, self.messages = list(lines), list(answers), []

    def header(self, info):
        self.info = info

    def read_serial(self):
        return self.lines.pop(0) if self.lines else None

    def ask(self, question, *, default):
        return self.answers.pop(0) if self.answers else default

    def message(self, text, kind="info"):
        self.messages.append((kind, text))

    def testing(self, serial, retest):
        pass

    def verdict(self, outcome, result):
        pass

    def summary(self, summary):
        pass

    def progress(self):
        return None


class _Store:
    def __init__(self):
        self.runs = []

    def __enter__(self):
        return self

    def __exit__(self, *a):
        pass

    def recover_aborted(self):
        return []

    def retest_count(self, serial, part):
        return 0

    def list_runs(self, **kw):
        return []


class _Inst:
    def __init__(self):
        self.identities = {}
        self.closing_states = None

    def close(self):
        pass


def test_lost_instrument_asks_and_reconnects(monkeypatch, board):
    """A board aborted by a lost instrument: the operator says yes, the station is
    reconnected and the next board is tested; saying no ends with an error."""
    calls = {"connect": 0, "run": 0}

    def fake_run_board(*a, **kw):
        calls["run"] += 1
        if calls["run"] == 1:
            raise RunAborted("scope gone", step="nominal") from ConnectionLost("reset")
        raise RunAborted("scope gone again", step="nominal") from ConnectionLost("reset")

    def fake_connect(station):
        calls["connect"] += 1
        return _Inst()

    monkeypatch.setattr(line_mod, "run_board", fake_run_board)
    prep = Prepared(
        board,
        type("L", (), {"digest": "d", "provenance": None})(),
        StationConfig(name="", instruments={}),  # nothing to lock
        type("F", (), {"name": "f", "path": "f.toml"})(),
        "b.toml",
        "s.toml",
    )
    ui = _ScriptUI(["SN-1", "SN-2"], [True, False])
    summary = ProductionLine(
        prep, "x.db", ui, operator="op", connect=fake_connect, open_store=lambda db: _Store()
    ).run()
    assert calls == {"connect": 2, "run": 2}
    assert summary.reconnects == 1 and summary.aborted == 2
    assert summary.error and summary.ended_by == "instrument failure"
    assert any(k == "error" and "instrument failure" in t for k, t in ui.messages)
