"""The seams where a tester could lose track of the board, attacked from outside.

Every case runs the real ``stageproof`` command in subprocesses against one SimBench
started by the test (real SCPI over 127.0.0.1), and judges by the simulated instruments'
own state and logs — never by what the harness says about itself:

- kill-then-restart: ``run`` killed with SIGKILL during the clipping search leaves the
  generator on and the supply on; the next command (``line``, then ``run``) finds them on
  and switches every source off before its first word to the scope;
- two runs, one station: the second process is refused in one line naming the first, which
  completes undisturbed;
- profile injection: a line feed in a profile's command text is refused at load time, a
  second command chained with ``;`` is caught by the amplitude read-back before the output
  is on, and a level the profile multiplies behind the harness's back is caught by the
  input probe at the first acquisition above the safe level;
- output-off ignored: a profile whose ``output_off`` does nothing is caught by the read-back;
  the run is stored as aborted with the generator's state "unknown", never "off", and the
  next command refuses to start on a station it cannot switch off.
"""

from __future__ import annotations

import os
import re
import signal
import sqlite3
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from harness.io.board import load_board
from tests.reliability.rig import REPO, LiveRun, safe_vpp, started_bench, write_rig

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

GEN_PROFILE = (REPO / "fixtures" / "instruments" / "scpi-generator.toml").read_text()
_STEP = re.compile(r"^> (?P<step>\w+):")


def _env(tmp: Path) -> dict[str, str]:
    return {
        **os.environ,
        "PYTHONUNBUFFERED": "1",
        "COLUMNS": "200",
        "NO_COLOR": "1",
        "TERM": "dumb",
        "STAGEPROOF_LOCK_DIR": str(tmp / "locks"),
    }


@dataclass(frozen=True)
class Rig:
    """The reliability rig's board and fixture files, a database and the commands' env."""

    files: Any
    board: Any
    db: Path
    env: dict[str, str]


@pytest.fixture()
def rig(tmp_path: Path) -> Rig:
    files = write_rig(tmp_path)
    return Rig(files, load_board(files.board), tmp_path / "r.db", _env(tmp_path))


def _cmd(
    verb: str, station: Path, files: Any, db: Path, *extra: str, settle: str = "0"
) -> list[str]:
    return [
        sys.executable,
        "-m",
        "harness.cli.main",
        verb,
        "--station",
        str(station),
        "--fixture",
        str(files.fixture),
        "--board",
        str(files.board),
        "--db",
        str(db),
        "--settle-wait",
        settle,
        *extra,
    ]


def _sources(bench: Any) -> tuple[bool, bool, bool]:
    """(generator on, any supply output on, any relay closed): the instruments' own state."""
    return (
        bench.generator.output_on,
        any(o.on for o in bench.supply.outputs.values()),
        bool(bench.switch.closed),
    )


def _spy_first(device: Any, bench: Any, role: str) -> list[tuple[bool, bool, bool]]:
    """The sources' state when ``device`` receives the first command of its next client
    (its server calls ``process`` for every line; a killed client's last lines, still in
    the server's buffer, are not counted)."""
    seen: list[tuple[bool, bool, bool]] = []
    process = device.process
    server = bench.servers[role]
    before = server.connections_served

    def spy(line: Any) -> Any:
        if not seen and server.connections_served > before:
            seen.append(_sources(bench))
        return process(line)

    device.process = spy
    return seen


def _wait_step(run: LiveRun, step: str, timeout_s: float = 60) -> None:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end and run.proc.poll() is None:
        if any((m := _STEP.match(ln)) and m.group("step") == step for ln in run.printed()):
            return
        time.sleep(0.005)
    raise AssertionError(f"never reached step {step}: {run.printed()[-5:]}")


def _runs(db: Path) -> dict[str, tuple[str, str | None]]:
    conn = sqlite3.connect(db, timeout=10)
    try:
        return {s: (st, r) for s, st, r in conn.execute("SELECT serial, status, reason FROM runs")}
    finally:
        conn.close()


def _kill_in_clip_search(bench: Any, station: Path, files: Any, db: Path, env: dict) -> None:
    run = LiveRun(_cmd("run", station, files, db, "--serial", f"SN-KILL-{time.time_ns()}"), env)
    _wait_step(run, "clip")
    time.sleep(0.05)
    run.proc.send_signal(signal.SIGKILL)
    rc, _ = run.finish(30)
    assert rc == -signal.SIGKILL
    time.sleep(0.2)  # the servers finish what the dead client had sent
    # what a power cut or the OOM killer leaves: the board still driven and powered
    gen_on, supply_on, _ = _sources(bench)
    assert gen_on and supply_on, "the kill did not land with the sources on"
    assert bench.generator.amplitude_vpp > 0


def test_kill_then_restart_switches_sources_off_first(tmp_path: Path, rig: Rig) -> None:
    board, db, env, files = rig.board, rig.db, rig.env, rig.files
    with started_bench(board, tmp_path, timeout_ms=2000) as (bench, station):
        # 1. killed mid clipping search; the next `line` must not wait at a prompt with the
        #    board driven: every source is off before its first scope command and before
        #    it asks for anything.
        _kill_in_clip_search(bench, station, files, db, env)
        first_scope = _spy_first(bench.scope, bench, "scope")
        line = LiveRun(_cmd("line", station, files, db, "--operator", "Ann"), env, stdin=-1)
        end = time.monotonic() + 60
        while time.monotonic() < end and not any(
            "Scan or type a serial" in ln for ln in line.printed()
        ):
            assert line.proc.poll() is None, line.finish(5)
            time.sleep(0.01)
        at_prompt = _sources(bench)
        assert line.proc.stdin is not None
        line.proc.stdin.close()  # end of input: the session ends with its summary
        rc, err = line.finish(60)
        assert rc == 0, err
        assert first_scope == [(False, False, False)]
        assert at_prompt == (False, False, False)

        # 2. killed again; the next `run` switches off before its first scope command (and
        #    so before the limits, which come after the connect) and completes.
        _kill_in_clip_search(bench, station, files, db, env)
        first_scope = _spy_first(bench.scope, bench, "scope")
        t0 = time.monotonic()
        nxt = LiveRun(_cmd("run", station, files, db, "--serial", "SN-NEXT"), env)
        while time.monotonic() - t0 < 30 and bench.generator.output_on:
            time.sleep(0.002)
        off_after_s = time.monotonic() - t0
        rc, err = nxt.finish(120)
        assert rc in (0, 1), err
        assert first_scope == [(False, False, False)]
        assert _sources(bench) == (False, False, False)
        assert bench.max_commanded_vpp() <= safe_vpp(board) * (1 + 1e-9)
    runs = _runs(db)
    assert runs["SN-NEXT"][0] == "complete"
    killed = [s for s in runs if s.startswith("SN-KILL")]
    assert len(killed) == 2 and all(runs[s][0] == "aborted" for s in killed)
    print(f"\nsources off {off_after_s:.2f} s after the next run was launched")


def test_two_runs_one_station(tmp_path: Path, rig: Rig) -> None:
    board, db, env, files = rig.board, rig.db, rig.env, rig.files
    with started_bench(board, tmp_path, timeout_ms=2000) as (bench, station):
        # the first run waits 0.5 s after each level change: busy for seconds, certainly
        # still holding the station while the second one starts
        first = LiveRun(_cmd("run", station, files, db, "--serial", "SN-FIRST", settle="0.5"), env)
        _wait_step(first, "supply")
        levels_before = len(bench.generator_log)
        second = LiveRun(_cmd("run", station, files, db, "--serial", "SN-SECOND"), env)
        rc2, err2 = second.finish(60)
        lines = [ln for ln in err2.splitlines() if ln.strip()]
        assert rc2 == 2, err2
        assert len(lines) == 1, err2
        assert "station busy" in lines[0] and f"pid {first.proc.pid}" in lines[0]
        assert "running `stageproof run --station" in lines[0] and "since" in lines[0]
        assert first.proc.poll() is None, "the first run ended before the second was refused"
        rc1, err1 = first.finish(120)
        assert rc1 in (0, 1), err1
        # the second process never reached an instrument: every generator event after it
        # started belongs to the first run, which ended with the output off
        assert len(bench.generator_log) >= levels_before
        assert not bench.generator.output_on
    runs = _runs(db)
    assert runs["SN-FIRST"][0] == "complete"
    assert "SN-SECOND" not in runs


def _station_with(bench: Any, folder: Path, profile_text: str) -> Path:
    prof = folder / "my-generator.toml"
    prof.write_text(profile_text)
    text = bench.station_text(profiles={"generator": str(prof)})
    text = re.sub(r"(?m)^timeout_ms = \d+", "timeout_ms = 2000", text)
    st = folder / "station-custom.toml"
    st.write_text(text)
    return st


def _run_with_profile(
    bench: Any, rig: Rig, tmp_path: Path, profile_text: str, serial: str, timeout_s: float = 120
) -> tuple[int, str]:
    """``stageproof run`` on the bench with ``profile_text`` as its generator profile:
    (exit status, stderr)."""
    st = _station_with(bench, tmp_path, profile_text)
    return LiveRun(_cmd("run", st, rig.files, rig.db, "--serial", serial), rig.env).finish(
        timeout_s
    )


def _with_command(op: str, text: str) -> str:
    line = next(ln for ln in GEN_PROFILE.splitlines() if ln.startswith(f"{op} = "))
    return GEN_PROFILE.replace(line, f'{op} = "{text}"')


@pytest.mark.parametrize(
    ("op", "text"),
    [
        (
            "set_amplitude",
            r"SOURce{output}:VOLTage:LEVel:IMMediate:AMPLitude {amplitude}"
            r"\nSOURce{output}:VOLTage 5",
        ),
        ("set_frequency", r"SOURce{output}:FREQuency:CW {frequency_hz}\nOUTPut{output}:STATe ON"),
    ],
)
def test_profile_injection_by_line_feed_refused_at_load(
    tmp_path: Path, rig: Rig, op: str, text: str
) -> None:
    board = rig.board
    with started_bench(board, tmp_path) as (bench, _station):
        rc, err = _run_with_profile(bench, rig, tmp_path, _with_command(op, text), "SN-INJ", 60)
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert rc == 2 and len(lines) == 1, err
        assert "my-generator.toml" in lines[0] and f"commands.{op} (line " in lines[0]
        assert "control character" in lines[0]
        assert bench.generator.log[-1].what in ("output", "reset")  # nothing was set
        assert bench.max_commanded_vpp() <= safe_vpp(board)


def test_profile_injection_by_chained_command_caught_by_read_back(tmp_path: Path, rig: Rig) -> None:
    """No control character, a second command after ``;`` (SCPI-99 vol. 1 §6.2.1: message
    units separated by semicolons): the generator reports 5 Vpp, the harness stops before
    the output is ever on, so the board never sees it."""
    board = rig.board
    smuggled = _with_command(
        "set_amplitude",
        "SOURce{output}:VOLTage:LEVel:IMMediate:AMPLitude {amplitude};:SOURce{output}:VOLTage 5",
    )
    with started_bench(board, tmp_path) as (bench, _station):
        rc, err = _run_with_profile(bench, rig, tmp_path, smuggled, "SN-CHAIN", 60)
        assert rc == 2, err
        assert "reports" in err and "safe input level" in err
        assert bench.max_commanded_vpp() == pytest.approx(5.0)  # the smuggled setting
        assert bench.max_commanded_vpp(while_on=True) <= safe_vpp(board)  # never while on
        assert not bench.generator.output_on
    assert _runs(rig.db)["SN-CHAIN"][0] == "aborted"


def test_level_multiplied_behind_the_harness_caught_by_the_input_probe(
    tmp_path: Path, rig: Rig
) -> None:
    """A profile that scales every setting a hundredfold (``{amplitude}E2``) and cannot read the
    amplitude back: the level measured on the input probe stops the run at the first
    acquisition above the safe level, and the output is switched off at once."""
    board = rig.board
    text = _with_command(
        "set_amplitude", "SOURce{output}:VOLTage:LEVel:IMMediate:AMPLitude {amplitude}E2"
    )
    text = re.sub(r"(?m)^query_amplitude = .*\n", "", text)
    with started_bench(board, tmp_path) as (bench, _station):
        rc, err = _run_with_profile(bench, rig, tmp_path, text, "SN-X10", 120)
        assert rc == 2, err
        assert "input probe" in err and "safe input level" in err
        assert not bench.generator.output_on
        # from the first level above the safe level while on to the output off: one
        # acquisition and its analysis, not a search's worth of steps
        limit = safe_vpp(board) * 1.05
        amp, on, t_over, t_off = 0.0, False, None, None
        for e in bench.generator_log:
            if e.what == "amplitude_vpp":
                amp = e.value
            elif e.what == "output":
                on = e.value > 0
                if t_over is not None and not on and t_off is None:
                    t_off = e.time_s
            if on and amp > limit and t_over is None:
                t_over = e.time_s
        assert t_over is not None and t_off is not None
        assert t_off - t_over < 2.0, t_off - t_over
    stored = _runs(rig.db)["SN-X10"]
    assert stored[0] == "aborted" and "input probe" in (stored[1] or "")


def test_output_off_ignored_is_unknown_never_off(tmp_path: Path, rig: Rig) -> None:
    """``output_off = "*WAI"`` (IEEE 488.2 §10.39: wait-to-continue, changes nothing): the
    read-back after the first switch-off in the run finds the output on."""
    board, env, files = rig.board, rig.env, rig.files
    db = tmp_path / "r.db"
    with started_bench(board, tmp_path) as (bench, _station):
        st = _station_with(bench, tmp_path, _with_command("output_off", "*WAI"))
        run = LiveRun(_cmd("run", st, files, db, "--serial", "SN-DEAF"), env)
        rc, err = run.finish(120)
        out = "\n".join(run.printed())
        assert rc == 2, err
        assert "not confirmed off" in err
        assert "state unknown" in out  # said on screen while it happened
        assert bench.generator.output_on  # the truth: still on
        stored = _runs(db)["SN-DEAF"]
        assert stored[0] == "aborted"
        assert "generator output state unknown" in (stored[1] or "")
        assert "off" not in re.sub(
            r"not confirmed off|switch(ed)? it off|output_off", "", stored[1]
        )
        # the next command will not start on a station it cannot switch off
        again = LiveRun(_cmd("run", st, files, db, "--serial", "SN-DEAF-2"), env)
        rc2, err2 = again.finish(60)
        assert rc2 == 2 and "not confirmed off after connecting" in err2, err2
        assert "SN-DEAF-2" not in _runs(db)
