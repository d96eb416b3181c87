"""``stageproof line`` driven through its stdin, as a barcode scanner or a keyboard would.

The loop runs in a child process (``python -m harness.cli.main line ...``) against a
SimBench started by the test.  External facts checked: a USB barcode scanner in keyboard
mode ends each code with Enter and may send CR LF (common practice); an ASCII BEL (0x07) is
a C0 control character (ISO/IEC 6429 / Unicode category Cc) and must not pass; Ctrl-C is
SIGINT (POSIX signal.h).  Yield = passed / tested (common practice).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time

import pytest

from harness.store import RunHeader, open_store
from tests.support.bench import BOARD_FILE, REPO, connections
from tests.support.line import line_bench

pytestmark = pytest.mark.wire

FAST = ["--settle-wait", "0", "--max-points", "1000", "--no-extra-frequencies"]
LONG = "X" * 100
BEL = "\x07"


@pytest.fixture(scope="module")
def bench(board, tmp_path_factory):
    """One simulated bench per module: (bench, station file, fixture file)."""
    with line_bench(board, tmp_path_factory.mktemp("line")) as b:
        yield b


def _cmd(station, fixture, db, *extra):
    return [
        sys.executable,
        "-m",
        "harness.cli.main",
        "line",
        "--station",
        str(station),
        "--fixture",
        str(fixture),
        "--board",
        str(BOARD_FILE),
        "--db",
        str(db),
        *FAST,
        *extra,
    ]


def _env():
    env = dict(os.environ, PYTHONIOENCODING="utf-8", COLUMNS="100", TERM="dumb")
    env.pop("NO_COLOR", None)
    return env


def _seed_store(db, serial, board):
    """A run of ``serial`` already in the store (an earlier shift)."""
    with open_store(db) as store:
        rid = store.begin_run(
            RunHeader(
                serial=serial,
                part_number=board.part_number,
                board_name=board.name,
                board_file=str(BOARD_FILE),
                board_digest=board.digest,
                limits_json="{}",
                limits_digest="earlier",
                station="s",
                fixture="f",
                operator="earlier shift",
            )
        )
        store.finish_run(rid, "complete", "FAIL", "earlier shift")


def test_ten_boards_with_retests_duplicates_and_bad_scans(bench, board, tmp_path):
    b, station, fixture = bench
    db = tmp_path / "line.db"
    _seed_store(db, "SN-007", board)
    before = connections(b)
    lines = [
        "Ada",  # operator, asked once
        *[f"SN-00{i}" for i in range(1, 7)],  # six boards
        "SN-003",
        "y",  # tested in this session: asked, yes
        "SN-007",
        "y",  # tested in an earlier shift: asked, yes
        "SN-005",
        "n",  # asked, no: not tested again
        "",  # empty line: prompt again
        f"BAD{BEL}SN",  # control character: refused
        LONG,  # two labels read at once: refused
        "  SN-008\r",  # CR LF from the scanner, padded
        "SN-009",
        "SN-010",
        "SN-003",
        "y",  # second retest
        "quit",
    ]
    t0 = time.perf_counter()
    proc = subprocess.run(
        _cmd(station, fixture, db),
        input="\n".join(lines) + "\n",
        capture_output=True,
        text=True,
        encoding="utf-8",
        timeout=240,
        cwd=REPO,
        env=_env(),
    )
    out = proc.stdout
    print(f"{time.perf_counter() - t0:.1f} s")
    assert proc.returncode == 0, proc.stderr + out[-3000:]
    # header once, with the digest of the limits computed once for the session
    assert out.count("limits digest") == 1
    assert out.count("operator> ") == 1
    # refusals with a message; neither reached the store
    assert "control character (U+0007)" in out
    assert "longer than 64 characters" in out
    assert out.count("serial number refused") == 2
    assert "already tested once (in this session)" in out
    assert "already tested once (in the results store)" in out
    assert "SN-005 not tested again" in out
    assert "RETEST #1" in out and "RETEST #2" in out
    # big block letters as well as the plain word
    assert "██████" in out

    with open_store(db) as store:
        runs = store.list_runs(limit=None)
        mine = [r for r in runs if r.operator == "Ada"]
        assert len(mine) == 12
        assert {r.serial for r in mine} == {f"SN-00{i}" for i in range(1, 10)} | {"SN-010"}
        assert all(r.status == "complete" and r.verdict in ("PASS", "FAIL") for r in mine)
        assert sorted(r.retest for r in mine if r.serial == "SN-003") == [0, 1, 2]
        assert [r.retest for r in mine if r.serial == "SN-007"] == [1]
        assert len([r for r in mine if r.serial == "SN-005"]) == 1
        assert not any(BEL in r.serial or "X" * 65 in r.serial for r in runs)
        # the verdict shown for each run is the stored one
        for r in mine:
            tag = f"RETEST #{r.retest}" if r.retest else "first test"
            assert f"VERDICT {r.serial}: {r.verdict} ({tag})" in out
        latest = {}
        for r in sorted(mine, key=lambda r: r.run_id):
            latest[r.serial] = r.verdict
    passed = sum(v == "PASS" for v in latest.values())
    y = f"{100 * passed / 10:.1f} %"
    assert (
        f"SUMMARY boards=10 pass={passed} fail={10 - passed} yield={y} runs=12 retests=3 "
        "aborted=0 refused=2" in out
    )
    # the instruments were connected once for the whole session
    after = connections(b)
    assert {k: after[k] - before[k] for k in after} == {k: 1 for k in after}


def test_end_of_input_ends_cleanly(bench, tmp_path):
    """EOF (the scanner unplugged, a script ending) after one board: exit 0, summary."""
    _, station, fixture = bench
    db = tmp_path / "eof.db"
    proc = subprocess.run(
        _cmd(station, fixture, db, "--operator", "Bo"),
        input="SN-E1\n",
        capture_output=True,
        text=True,
        encoding="utf-8",
        timeout=120,
        cwd=REPO,
        env=_env(),
    )
    assert proc.returncode == 0, proc.stderr
    assert "operator> " not in proc.stdout
    assert "ended by end of input" in proc.stdout
    assert "SUMMARY boards=1 " in proc.stdout
    with open_store(db) as store:
        assert [r.serial for r in store.list_runs()] == ["SN-E1"]


class _Reader(threading.Thread):
    def __init__(self, stream):
        super().__init__(daemon=True)
        self.stream = stream
        self.text = ""
        self.lock = threading.Lock()

    def run(self):
        while True:
            ch = self.stream.read(1)
            if not ch:
                return
            with self.lock:
                self.text += ch

    def wait_for(self, what, count=1, timeout_s=60.0):
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            with self.lock:
                if self.text.count(what) >= count:
                    return
            time.sleep(0.02)
        raise AssertionError(f"{what!r} x{count} not seen; output so far:\n{self.text}")


def stop(proc, reader) -> str:
    """End the child if it still runs, join the reader, close the pipes; its stderr."""
    if proc.poll() is None:
        proc.kill()
        proc.wait(timeout=10)
    reader.join(timeout=5)
    err = proc.stderr.read()
    for stream in (proc.stdin, proc.stdout, proc.stderr):
        if stream is not None:
            stream.close()
    return err


def test_ctrl_c_during_a_board_then_at_the_prompt(bench, tmp_path):
    """SIGINT while a board is under test aborts that board (stored aborted, generator off)
    and returns to the prompt; SIGINT at the prompt ends with the summary and status 0."""
    b, station, fixture = bench
    db = tmp_path / "int.db"
    proc = subprocess.Popen(
        _cmd(station, fixture, db, "--operator", "Cy"),
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        encoding="utf-8",
        cwd=REPO,
        env=_env(),
    )
    reader = _Reader(proc.stdout)
    reader.start()
    try:
        reader.wait_for("serial> ")
        proc.stdin.write("SN-C1\n")
        proc.stdin.flush()
        reader.wait_for("nominal: ")  # the board is under test now
        proc.send_signal(signal.SIGINT)
        reader.wait_for("board aborted")
        reader.wait_for("serial> ", count=2)  # back at the prompt
        proc.send_signal(signal.SIGINT)
        rc = proc.wait(timeout=60)
    finally:
        err = stop(proc, reader)
    assert rc == 0, err
    assert "VERDICT SN-C1: ABORTED" in reader.text
    assert "ended by Ctrl-C" in reader.text
    assert "aborted=1" in reader.text
    with open_store(db) as store:
        (run,) = store.list_runs()
        assert run.status == "aborted" and "Ctrl-C" in (run.reason or "")
    outs = [e for e in b.generator_log if e.what in ("output", "reset")]
    assert outs and (outs[-1].what == "reset" or outs[-1].value == 0.0)
