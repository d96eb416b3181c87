"""SimBench's station and fixture files, the default profiles' commands, fault syntax and
the ``stageproof sim serve`` command.

Outside references: the profiles in fixtures/instruments (the commands the drivers send),
the example files fixtures/station-sim.toml and fixtures/fixture-twin-preamp.toml (their
format and relay numbering), read back with the project's own loaders.
"""

from __future__ import annotations

import os
import re
import signal
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from harness.errors import FaultSpecError
from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.io.profiles import load_profile
from harness.io.station import load_station
from harness.io.toml import read_toml
from harness.sim.bench import ROLES, SimBench
from harness.sim.faults import InstrumentFault, parse_instrument_fault

REPO = Path(__file__).resolve().parents[2]
TWIN = REPO / "limits" / "demo-twin-preamp.toml"
OPAMP = REPO / "limits" / "demo-opamp-line.toml"
FIXTURE = REPO / "fixtures" / "fixture-twin-preamp.toml"

#: Plausible values for every placeholder of the default profiles.
VALUES = {
    "output": 1,
    "frequency_hz": 1000,
    "amplitude": 0.2,
    "offset_v": 0,
    "input": 2,
    "range_vpp": 4,
    "coupling": "AC",
    "state": "OFF",
    "probe": 10,
    "interval_s": 1e-5,
    "points": 4096,
    "source": "INTernal1",
    "level_v": 0,
    "format": "INTeger,8",
    "channels": "101,102",
    "range_v": 10,
    "voltage_v": 12,
    "current_a": 0.05,
}


@pytest.mark.parametrize("role", ROLES)
def test_every_default_profile_command_is_accepted(role: str) -> None:
    """Each operation of fixtures/instruments/scpi-<role>.toml runs without an error."""
    profile = load_profile(f"scpi-{role}")
    bench = SimBench(load_board(TWIN))
    dev = bench.devices[role]
    for op in profile.commands:
        if op == "single":
            dev.handle(b"SENS:SWE:POIN 1000")
        if op == "fetch":
            dev.handle(b"INP2 ON;:INIT")
        text = profile.render(op, **VALUES)
        dev.handle(text.encode())
        assert dev.handle(b"SYST:ERR?") == b'0,"No error"\n', (op, text)


@pytest.mark.parametrize("role", ["generator", "scope"])
def test_every_benchtop_profile_command_is_accepted(role: str) -> None:
    """Each operation of fixtures/instruments/benchtop-<role>.toml runs on the benchtop
    dialect's instrument without an error."""
    profile = load_profile(f"benchtop-{role}")
    dev = SimBench(load_board(TWIN), dialect="benchtop").devices[role]
    values = {
        **VALUES,
        "load": 50,
        "amplitude": -10,
        "scale_v_div": 0.2,
        "position_div": 0,
        "time_s_div": 1e-3,
        "points": 10000,
        "source": "VIEW1",
        "format": "BYTE",
        "start": 1,
        "stop": 5000,
        "count": 5000,
    }
    for op in profile.commands:
        if op == "fetch":
            dev.handle(b"VIEW2:ENABle ON;:RUN:SINGle")
        text = profile.render(op, **values)
        dev.handle(text.encode())
        assert dev.handle(b"SYST:ERR?") == b'0,"No error"\n', (op, text)


def test_benchtop_station_names_its_profiles(tmp_path: Path) -> None:
    with SimBench(load_board(TWIN), dialect="benchtop") as bench:
        station = load_station(bench.write_station(tmp_path / "st.toml"))
    assert station.instruments["scope"].profile.name == "benchtop-scope"
    assert station.instruments["generator"].profile.name == "benchtop-generator"
    assert station.instruments["dmm"].profile.name == "scpi-dmm"


def test_unknown_dialect_is_a_typed_error() -> None:
    with pytest.raises(FaultSpecError, match="benchtop"):
        SimBench(load_board(TWIN), dialect="vintage")


@pytest.mark.parametrize("path", [TWIN, OPAMP])
def test_station_and_fixture_files_load_and_match_the_servers(tmp_path: Path, path) -> None:
    board = load_board(path)
    with SimBench(board) as bench:
        station = load_station(bench.write_station(tmp_path / "station.toml"))
        fixture = load_fixture(bench.write_fixture(tmp_path / "fixture.toml"), board)
        for role in ROLES:
            cfg = station.get(role)
            assert cfg is not None and cfg.resource == bench.resources[role]
            assert re.fullmatch(r"TCPIP::127\.0\.0\.1::\d+::SOCKET", cfg.resource)
            assert cfg.expect_idn == ",".join(bench.devices[role].IDN)
    assert [c.output_scope for c in fixture.channels] == list(range(2, len(board.channels) + 2))
    assert {c.input_scope for c in fixture.channels} == {1}
    if board.supply.negative is not None:
        assert fixture.supply.negative_output == 2


def test_relay_numbering_matches_the_example_fixture(tmp_path: Path) -> None:
    """fixtures/fixture-twin-preamp.toml: 101/102 = A gain collector/emitter, 201/202 = B."""
    example, _ = read_toml(REPO / "fixtures" / "fixture-twin-preamp.toml")
    bench = SimBench(load_board(TWIN))
    ours = {(p.channel, p.stage, p.quantity): p.relay for p in bench.world.points}
    for tp in example["test_point"]:
        assert ours[(tp["board_channel"], tp["stage"], tp["quantity"])] == tp["route"][0]


@pytest.mark.parametrize(
    ("text", "fault"),
    [
        ("scope:no_reply@fetch", InstrumentFault("scope", "no_reply", on="fetch")),
        ("scope:no_reply@FETCh,count=1", InstrumentFault("scope", "no_reply", on="FETCh", count=1)),
        (
            "generator:queue_error=-222@set_amplitude",
            InstrumentFault("generator", "queue_error", on="set_amplitude", value=-222),
        ),
        (
            "supply:power_cycle=0.3,after=20",
            InstrumentFault("supply", "power_cycle", after=20, value=0.3),
        ),
        ("dmm:slow=0.5", InstrumentFault("dmm", "slow", value=0.5)),
    ],
)
def test_instrument_fault_syntax_round_trips(text: str, fault: InstrumentFault) -> None:
    assert parse_instrument_fault(text) == fault
    assert parse_instrument_fault(fault.spec) == fault


@pytest.mark.parametrize(
    "text",
    [
        "scope:explode",
        "oven:no_reply",
        "scope:no_reply=3",
        "scope:slow=abc",
        "scope:no_reply,count=0",
        "scope:no_reply,times=2",
        "scope",
    ],
)
def test_bad_instrument_faults_are_typed_errors(text: str) -> None:
    with pytest.raises(FaultSpecError):
        parse_instrument_fault(text)


def test_bench_sorts_component_and_instrument_faults() -> None:
    bench = SimBench(load_board(TWIN), faults=["R104:drift=1.3", "scope:no_reply@fetch"])
    assert [f.spec for f in bench.faults] == ["R104:drift=1.3"]
    assert [a.fault.spec for a in bench.scope.faults] == ["scope:no_reply@fetch"]
    with pytest.raises(FaultSpecError):
        SimBench(load_board(TWIN), faults=["R999:drift=1.3"])


def test_cli_serve_prints_resources_writes_files_and_stops_on_sigterm(tmp_path: Path) -> None:
    station, fixture = tmp_path / "st.toml", tmp_path / "fx.toml"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "harness.cli.main",
            "sim",
            "serve",
            str(TWIN),
            "--station-out",
            str(station),
            "--fixture-out",
            str(fixture),
            "--fault",
            "scope:no_reply@fetch,count=1",
            "--fault",
            "R104:drift=1.2",
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=REPO,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    try:
        lines = []
        assert proc.stdout is not None
        for line in proc.stdout:
            lines.append(line)
            if line.startswith("serving"):
                break
        out = "".join(lines)
        ports = [int(p) for p in re.findall(r"TCPIP::127\.0\.0\.1::(\d+)::SOCKET", out)]
        assert len(ports) == 5
        assert "R104:drift=1.2" in out and "scope:no_reply@fetch,count=1" in out
        with socket.create_connection(("127.0.0.1", ports[0]), timeout=3) as s:
            s.sendall(b"*IDN?\n")
            assert s.recv(100).startswith(b"stageproof-sim,SIG-1")
        assert load_station(station).get("scope").resource.endswith(f"::{ports[1]}::SOCKET")
        load_fixture(fixture, load_board(TWIN))
    finally:
        proc.send_signal(signal.SIGTERM)
        rest, err = proc.communicate(timeout=10)
    assert proc.returncode == 0, err
    assert "stopped" in rest


def test_cli_bad_fault_is_one_line_exit_2(tmp_path: Path) -> None:
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "harness.cli.main",
            "sim",
            "serve",
            str(TWIN),
            "--station-out",
            str(tmp_path / "s.toml"),
            "--fixture-out",
            str(tmp_path / "f.toml"),
            "--fault",
            "scope:explode",
        ],
        capture_output=True,
        text=True,
        cwd=REPO,
        timeout=60,
        check=False,
    )
    assert proc.returncode == 2
    assert proc.stderr.startswith("stageproof: error:") and "Traceback" not in proc.stderr


def test_a_four_channel_board_gets_a_five_input_scope_profile(tmp_path: Path) -> None:
    """Four channels and the common input need five scope inputs: the station names a
    profile written beside it, the shipped default with only its name and inputs changed."""
    from tests.support.boards import four_channel_board_text

    path = tmp_path / "four.toml"
    path.write_text(four_channel_board_text())
    board = load_board(path)
    with SimBench(board) as bench:
        station = load_station(bench.write_station(tmp_path / "station.toml"))
        load_fixture(bench.write_fixture(tmp_path / "fixture.toml"), board, scope_inputs=5)
    scope = station.get("scope").profile
    default = load_profile("scpi-scope")
    assert Path(scope.path) == (tmp_path / "scpi-scope-5.toml").resolve()
    assert scope.name == "scpi-scope-5"
    assert scope.settings["inputs"] == 5
    assert {k: v for k, v in scope.settings.items() if k != "inputs"} == {
        k: v for k, v in default.settings.items() if k != "inputs"
    }
    assert dict(scope.commands) == dict(default.commands)


@pytest.mark.parametrize(("faults", "status"), [((), 0), (("C102:open",), 1)])
def test_cli_serve_benchtop_then_run_on_the_files_it_writes(tmp_path: Path, faults, status):
    """``sim serve --dialect benchtop`` and ``run`` on the station file it writes: a good
    board passes (exit 0), one with an open emitter bypass fails (exit 1).  The run uses the
    repository's fixture: the written one also routes the buffer collectors (at the 12 V
    rail), which the simulated DMM's default range reads as an overload on either dialect."""
    from harness.cli.main import main

    station, fixture = tmp_path / "st.toml", tmp_path / "fx.toml"
    argv = [sys.executable, "-m", "harness.cli.main", "sim", "serve", str(TWIN), "--dialect",
            "benchtop", "--station-out", str(station), "--fixture-out", str(fixture)]  # fmt: skip
    for f in faults:
        argv += ["--fault", f]
    proc = subprocess.Popen(
        argv,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=REPO,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
    )
    try:
        assert proc.stdout is not None
        head = ""
        for line in proc.stdout:
            head += line
            if line.startswith("serving"):
                break
        assert "benchtop dialect" in head
        assert 'profile = "benchtop-scope"' in station.read_text()
        load_fixture(fixture, load_board(TWIN))
        code = main(
            ["run", "--station", str(station), "--fixture", str(FIXTURE), "--board", str(TWIN),
             "--serial", "SN-SERVE", "--db", str(tmp_path / "r.db"), "--settle-wait", "0"]
        )  # fmt: skip
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.communicate(timeout=10)
    assert code == status
