"""Errors of the testing commands end in one line and exit status 2 — never a traceback,
never status 1 (which a script reads as FAIL) nor 130: Ctrl-C during a run and during
start-up, a deeply nested TOML file, a connect timeout from the VISA backend, and
``sim serve`` told to write its files where it cannot.

Ctrl-C is SIGINT (POSIX signal.h); Python turns it into KeyboardInterrupt in the main
thread (Python library reference, ``signal``: "KeyboardInterrupt ... default handler").
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time

import pytest

from harness.cli.main import main
from harness.store import open_store
from tests.instruments.test_connect_timeout import full_backlog
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, REPO, sim_bench
from tests.support.streams import LineCollector

pytestmark = pytest.mark.wire


def _env() -> dict[str, str]:
    return dict(os.environ, PYTHONPATH=str(REPO), COLUMNS="120", PYTHONIOENCODING="utf-8")


def _run_cmd(station, db, serial: str) -> list[str]:
    return [
        sys.executable,
        "-m",
        "harness.cli.main",
        "run",
        "--station",
        str(station),
        "--fixture",
        str(FIXTURE_FILE),
        "--board",
        str(BOARD_FILE),
        "--serial",
        serial,
        "--db",
        str(db),
        "--settle-wait",
        "0",
    ]


def _interrupt(cmd: list[str], when: str, delay_s: float = 0.0) -> tuple[int, str, str]:
    proc = subprocess.Popen(
        cmd,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        encoding="utf-8",
        env=_env(),
    )
    reader = LineCollector(proc.stdout)
    reader.start()
    try:
        reader.wait_for(when)
        time.sleep(delay_s)
        proc.send_signal(signal.SIGINT)
        rc = proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)
        reader.join(timeout=5)
        err = proc.stderr.read()
        proc.stdout.close()
        proc.stderr.close()
    return rc, reader.text, err


def test_ctrl_c_during_a_run(board, tmp_path):
    """Exit 2 with what ``line`` says: sources switched off, the run stored as aborted;
    and the generator's last command is indeed output off."""
    db = tmp_path / "int.db"
    with sim_bench(board, tmp_path) as (bench, station):
        rc, _out, err = _interrupt(_run_cmd(station, db, "SN-INT-1"), "> nominal")
        outs = [e for e in bench.generator_log if e.what in ("output", "reset")]
    assert rc == 2, err
    assert err.startswith("stageproof: error:") and err.count("\n") == 1, err
    with open_store(db) as store:
        (run,) = store.list_runs()
    assert run.status == "aborted"
    assert f"generator and supply switched off, run {run.run_id} stored as aborted" in err
    assert outs and (outs[-1].what == "reset" or outs[-1].value == 0.0)


def test_ctrl_c_while_connecting(board, tmp_path):
    """Ctrl-C while the station is still connecting (a scope that never accepts)."""
    db = tmp_path / "start.db"
    with sim_bench(board, tmp_path, timeout_ms=8000) as (_bench, station), full_backlog() as port:
        text = station.read_text()
        text = re.sub(
            r'(\[instrument\.scope\]\nresource = ")[^"]+',
            rf"\g<1>TCPIP::127.0.0.1::{port}::SOCKET",
            text,
        )
        station.write_text(text)
        rc, _out, err = _interrupt(_run_cmd(station, db, "SN-INT-2"), "serial SN-INT-2", 1.0)
    assert rc == 2, err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    assert "Ctrl-C" in err and "nothing stored" in err, err


def test_connect_timeout_one_line(board, tmp_path, capsys):
    with sim_bench(board, tmp_path, timeout_ms=300) as (_bench, station), full_backlog() as port:
        text = station.read_text()
        station.write_text(
            re.sub(
                r'(\[instrument\.generator\]\nresource = ")[^"]+',
                rf"\g<1>TCPIP::127.0.0.1::{port}::SOCKET",
                text,
            )
        )
        code = main(_run_cmd(station, tmp_path / "r.db", "SN-TMO-1")[3:])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert f"127.0.0.1::{port}" in err and "no connection within" in err, err


@pytest.mark.parametrize("kind", ["array", "table"])
def test_deeply_nested_toml_one_line(tmp_path, capsys, kind):
    """tomllib recurses once per nesting level (CPython Lib/tomllib/_parser.py), so a few
    hundred levels overflow Python's default recursion limit of 1000
    (``sys.getrecursionlimit``)."""
    n = 2000
    value = "[" * n + "]" * n if kind == "array" else "{a = " * n + "1" + "}" * n
    bad = tmp_path / "deep.toml"
    bad.write_text(BOARD_FILE.read_text() + f"\n[extra]\nx = {value}\n")
    code = main(["limits", str(bad)])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert str(bad) in err and "nested too deeply" in err, err


def test_nesting_just_past_the_limit_named(tmp_path, capsys):
    from harness.io.toml import MAX_DEPTH

    bad = tmp_path / "deep.toml"
    levels = MAX_DEPTH + 1
    bad.write_text(f"x = {'[' * levels}1{']' * levels}\n")
    code = main(["limits", str(bad)])
    err = capsys.readouterr().err
    assert code == 2 and f"nested more than {MAX_DEPTH} levels" in err, err


@pytest.mark.parametrize("where", ["missing", "folder"])
def test_sim_serve_station_out_unwritable(tmp_path, capsys, where):
    out = tmp_path / "no" / "station.toml" if where == "missing" else tmp_path
    code = main(["sim", "serve", str(BOARD_FILE), "--station-out", str(out)])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    assert "--station-out" in err and str(out) in err, err
