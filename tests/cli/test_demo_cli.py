"""``stageproof demo`` end to end: its closing lines name commands that work on the demo's
own database, and a command pointed at no database says where the demo wrote its one."""

from __future__ import annotations

import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

from harness.cli.cmd_demo import DEMO_BOARDS, DEMO_DB
from harness.cli.main import main
from tests.support.bench import REPO

pytestmark = pytest.mark.wire


def stageproof(*argv: str, cwd: Path, timeout: float = 180) -> subprocess.CompletedProcess:
    """The command as a user runs it: a process of its own, in ``cwd``."""
    env = dict(os.environ, PYTHONPATH=str(REPO), COLUMNS="200")
    return subprocess.run(
        [sys.executable, "-m", "harness.cli.main", *argv],
        cwd=cwd,
        env=env,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """One demo into a database whose name has a space (so the quoting is exercised)."""
    cwd = tmp_path_factory.mktemp("demo")
    proc = stageproof("demo", "--db", "my demo.db", cwd=cwd)
    assert proc.returncode == 0, proc.stderr
    return cwd, proc.stdout


def test_demo_prints_follow_up_commands_with_its_db(demo_run):
    _cwd, out = demo_run
    commands = [
        shlex.split(line.strip())
        for line in out.splitlines()
        if line.strip().startswith("stageproof ") and " --db " in line
    ]
    kinds = {c[1] for c in commands}
    assert {"results", "report", "diagnose"} <= kinds, out
    for argv in commands:
        assert argv[argv.index("--db") + 1] == "my demo.db", argv
        assert any(d.serial in argv for d in DEMO_BOARDS) or argv[1] in ("results", "report")


def test_follow_up_commands_run(demo_run, monkeypatch, capsys):
    """Each printed command, run as printed in the demo's folder, finds the results."""
    cwd, out = demo_run
    monkeypatch.chdir(cwd)
    lines = [
        ln.strip()
        for ln in out.splitlines()
        if ln.strip().startswith("stageproof ") and " --db " in ln
    ]
    assert lines
    for line in lines:
        code = main(shlex.split(line)[1:])
        err = capsys.readouterr().err
        assert code == 0, (line, err)


def test_no_database_hint_names_demo_file(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    code = main(["results"])
    err = capsys.readouterr().err
    assert code == 2 and "no results database" in err
    assert f"--db {DEMO_DB}" in err, err


def test_measurement_lines_read_in_words(demo_run):
    """The progress lines: the clipping side as a half-cycle, one-sided limits as ``≤``,
    a threshold the criterion never reached as above the board's safe level."""
    from harness.cli.cmd_demo import DEMO_BOARD
    from harness.io.board import load_board
    from harness.io.packaged import packaged

    _cwd, out = demo_run
    safe = load_board(packaged("limits", DEMO_BOARD)).conditions.safe_input_vrms
    assert re.search(r"clip_side = (positive|negative) half-cycle", out), out
    assert not re.search(r"clip_side = [-+]?\d", out), out
    assert re.search(r"thd = \S+ % ≤ \d", out), out
    assert "-inf" not in out and "+inf" not in out
    # DEMO-0002's channel A (bypass capacitor open) never reaches 1 % THD below the safe level
    assert f"clip_input = > {safe:g} V rms (safe level)" in out, out
    assert "clip_input = - V rms" not in out


def test_results_run_shows_side_as_word(demo_run, monkeypatch, capsys):
    cwd, _out = demo_run
    monkeypatch.chdir(cwd)
    assert main(["results", "--db", "my demo.db", "--run", "1"]) == 0
    out = capsys.readouterr().out
    assert re.search(r"clip_side\s*│\s*(positive|negative) half-cycle", out), out
