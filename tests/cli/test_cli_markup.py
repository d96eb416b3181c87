"""User text that looks like console markup is printed as written, by every command.

rich's console markup reads ``[...]`` as a style tag and ``[/]`` as "close the last one";
a closing tag with nothing open raises ``rich.errors.MarkupError`` (rich documentation,
"Console Markup").  A serial number, board name or operator name holding such text must
neither crash a command nor restyle the screen: it is shown character for character.
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from harness.cli.main import main
from harness.io.board import load_board
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, REPO, sim_bench

pytestmark = pytest.mark.wire

NAME = "Twin preamp [/] [bold red]demo[/bold red]"
SERIAL = "SN[/]7[red]"


def _stageproof(*argv: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO), COLUMNS="120", PYTHONIOENCODING="utf-8")
    return subprocess.run(
        [sys.executable, "-m", "harness.cli.main", *argv],
        input=stdin,
        capture_output=True,
        text=True,
        encoding="utf-8",
        timeout=300,
        env=env,
    )


@pytest.fixture(scope="module")
def marked(tmp_path_factory):
    """A board file whose name is markup-like, a bench for it, and one run of it stored
    by ``stageproof run`` (whose output is kept)."""
    tmp = tmp_path_factory.mktemp("markup")
    board_file = tmp / "board.toml"
    text = BOARD_FILE.read_text(encoding="utf-8")
    board_file.write_text(
        text.replace('name = "Twin discrete preamp, demo"', f'name = "{NAME}"', 1),
        encoding="utf-8",
    )
    board = load_board(board_file)
    assert board.name == NAME
    db = tmp / "r.db"
    with sim_bench(board, tmp, timeout_ms=2000) as (_bench, station):
        files = ["--station", str(station), "--fixture", str(FIXTURE_FILE)]
        files += ["--board", str(board_file), "--db", str(db)]
        run = _stageproof("run", *files, "--serial", SERIAL, "--settle-wait", "0")
        yield board_file, files, db, run


def _flat(text: str) -> str:
    return " ".join(text.split())


def test_run_prints_markup_like_names_as_written(marked):
    *_, run = marked
    assert run.returncode in (0, 1), run.stderr
    assert NAME in run.stdout and SERIAL in run.stdout, run.stdout[-2000:]


@pytest.mark.parametrize(
    "argv",
    [
        ["results"],
        ["results", "--run", "1"],
        ["diagnose", SERIAL],
    ],
)
def test_stored_names_print_as_written(marked, capsys, monkeypatch, argv):
    board_file, _files, db, _run = marked
    monkeypatch.setenv("COLUMNS", "250")
    extra = ["--board", str(board_file)] if argv[0] == "diagnose" else []
    code = main([*argv, "--db", str(db), *extra])
    out, err = capsys.readouterr()
    assert code == 0, err
    assert SERIAL in _flat(out), out


def test_limits_prints_board_name_as_written(marked, capsys):
    board_file, *_ = marked
    assert main(["limits", str(board_file), "--samples", "200"]) == 0
    assert NAME in capsys.readouterr().out


def test_line_session_survives_markup_like_input(marked):
    """Operator and serial typed with markup-like text: the session tests the board and
    ends normally; both are shown as typed."""
    _board_file, files, _db, _run = marked
    proc = _stageproof(
        "line",
        *files,
        "--settle-wait",
        "0",
        "--no-extra-frequencies",
        stdin="Ada[/]\nSN[/]8\nquit\n",
    )
    assert proc.returncode == 0, proc.stderr + proc.stdout[-3000:]
    assert "VERDICT SN[/]8:" in proc.stdout
    assert "Ada[/]" in proc.stdout and NAME in proc.stdout
