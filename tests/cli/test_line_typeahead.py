"""Input typed while a board is under test never becomes the next serial.

The loop runs in a child process whose stdin is the slave side of a real pseudo-terminal
(``os.openpty``), as an operator's keyboard or a USB barcode scanner in keyboard mode is;
the test types on the master side.  External facts: a terminal in canonical mode delivers
input a line at a time and ``tcflush(fd, TCIFLUSH)`` discards data received but not read
(POSIX termios, tcflush()); input that is not a terminal is a script written beforehand and
is taken in order (the scripted sessions of test_line_cli.py pipe every line at once).
"""

from __future__ import annotations

import os
import select
import subprocess
import sys

import pytest

from harness.cli.cmd_line import discard_typeahead
from harness.store import open_store
from tests.cli.test_line_cli import _env, _Reader, stop
from tests.support.bench import BOARD_FILE, REPO
from tests.support.line import line_bench

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="POSIX pseudo-terminals")


def test_discard_typeahead_empties_a_terminal_and_leaves_a_pipe():
    """Typed-ahead text on a pty is gone after the flush; a pipe keeps its lines."""
    master, slave = os.openpty()
    try:
        with open(slave, encoding="utf-8", closefd=False) as tty:
            os.write(master, b"SN-TYPED-AHEAD\n")
            assert select.select([slave], [], [], 2.0)[0], "the pty delivered nothing"
            assert discard_typeahead(tty) is True
            assert select.select([slave], [], [], 0.2)[0] == []
            os.write(master, b"SN-AFTER\n")
            assert tty.readline() == "SN-AFTER\n"
    finally:
        os.close(master)
        os.close(slave)
    r, w = os.pipe()
    with open(r, encoding="utf-8") as pipe_in:
        os.write(w, b"SN-1\nSN-2\n")
        os.close(w)
        assert discard_typeahead(pipe_in) is False
        assert pipe_in.readline() == "SN-1\n"
        assert pipe_in.readline() == "SN-2\n"


@pytest.fixture(scope="module")
def bench(board, tmp_path_factory):
    """One simulated bench for the module: (bench, station file, fixture file)."""
    with line_bench(board, tmp_path_factory.mktemp("typeahead")) as b:
        yield b


@pytest.mark.wire
def test_serial_typed_during_a_test_is_discarded(bench, tmp_path):
    """Scan SN-T1, then scan SN-T2 while SN-T1 is still under test: SN-T2 must not be
    tested (it would be the same physical board under a second serial); the prompt
    waits, and the next line typed after it is what counts."""
    _, station, fixture = bench
    db = tmp_path / "typeahead.db"
    cmd = [
        sys.executable, "-m", "harness.cli.main", "line",
        "--station", str(station), "--fixture", str(fixture), "--board", str(BOARD_FILE),
        "--db", str(db), "--operator", "Di",
        # waits after every level change keep the board under test for seconds
        "--settle-wait", "0.4", "--max-points", "1000", "--no-extra-frequencies",
    ]  # fmt: skip
    master, slave = os.openpty()
    proc = subprocess.Popen(
        cmd,
        stdin=slave,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        encoding="utf-8",
        cwd=REPO,
        env=_env(),
    )
    os.close(slave)
    reader = _Reader(proc.stdout)
    reader.start()
    try:
        reader.wait_for("serial> ")
        os.write(master, b"SN-T1\n")
        reader.wait_for("testing SN-T1")
        reader.wait_for("nominal: ")  # the board is under test now
        os.write(master, b"SN-T2\n")  # typed ahead (the next label scanned too early)
        with reader.lock:
            assert "VERDICT SN-T1" not in reader.text, "typed too late to prove anything"
        reader.wait_for("VERDICT SN-T1", timeout_s=120)
        reader.wait_for("serial> ", count=2)
        os.write(master, b"quit\n")
        rc = proc.wait(timeout=60)
    finally:
        err = stop(proc, reader)
        os.close(master)
    assert rc == 0, err
    assert "testing SN-T2" not in reader.text
    assert "ended by quit" in reader.text
    with open_store(db) as store:
        assert [r.serial for r in store.list_runs()] == ["SN-T1"]
