"""README and ``--help`` agree: every option of the testing and analysis commands is in the
README and has help of its own; ``report --help`` lists only what its kinds share; the
prompts and the fixture comment the simulated bench writes say what is true."""

from __future__ import annotations

import argparse
import io
import re
import tomllib

import pytest

from harness.cli.main import build_parser, main
from tests.support.bench import BOARD_FILE, REPO

README = (REPO / "README.md").read_text(encoding="utf-8")


def _commands() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


@pytest.mark.parametrize("command", ["line", "run", "characterize", "analyze"])
def test_every_option_documented_and_helped(command):
    parser = _commands()[command]
    for action in parser._actions:
        longs = [o for o in action.option_strings if o.startswith("--") and o != "--help"]
        for opt in longs:
            assert opt in README, f"{command} {opt} missing from README.md"
            assert action.help and action.help != argparse.SUPPRESS, f"{command} {opt}: no help"


def test_analyze_help_states_defaults():
    opts = {o: a for a in _commands()["analyze"]._actions for o in a.option_strings}
    assert "default" in opts["--adc-bits"].help
    assert opts["--method"].help and "default" in opts["--method"].help


def test_report_help_lists_only_shared_options(capsys):
    with pytest.raises(SystemExit):
        main(["report", "--help"])
    out = capsys.readouterr().out
    top = out.split("options:", 1)[1]
    assert "--db" in top
    for board_only in ("--serial", "--run", "--output", "--png"):
        assert board_only not in top, board_only
    with pytest.raises(SystemExit):
        main(["report", "board", "--help"])
    assert "--serial" in capsys.readouterr().out


def test_absolute_sqlite_url_documented_and_works(tmp_path):
    from harness.store import open_store

    assert "sqlite:////" in README
    path = tmp_path / "abs.db"
    with open_store(f"sqlite:///{path}") as store:  # "sqlite:///" + "/tmp/..." = four slashes
        assert store.list_runs() == []
    assert path.exists()


def test_fixture_comment_states_the_real_current_limit_factor():
    from harness.io.board import load_board
    from harness.sim.bench import SimBench

    bench = SimBench(load_board(BOARD_FILE))
    text = bench.fixture_text()
    limit = tomllib.loads(text)["supply"]["current_limit_a"]
    line = next(ln for ln in text.splitlines() if ln.startswith("current_limit_a"))
    m = re.search(r"# ([\d.]+)x the simulated quiescent current of ([\d.]+) mA", line)
    assert m, line
    i_q = float(bench.sim.supply_current_a())
    assert float(m[2]) == pytest.approx(i_q * 1e3, rel=5e-3)
    assert float(m[1]) == pytest.approx(limit / i_q, rel=0.05)


def test_line_prompts_say_what_they_want():
    from rich.console import Console

    from harness.cli.cmd_line import OPERATOR_PROMPT, SERIAL_PROMPT, TerminalUI

    out = io.StringIO()
    ui = TerminalUI(Console(file=out, width=120), io.StringIO("SN-1\n"))
    assert ui.read_serial() == "SN-1"
    assert SERIAL_PROMPT in out.getvalue()
    assert "serial" in SERIAL_PROMPT and "scan or type" in SERIAL_PROMPT
    assert "operator" in OPERATOR_PROMPT and "name" in OPERATOR_PROMPT
    assert SERIAL_PROMPT.strip() in README and OPERATOR_PROMPT.strip() in README
