"""``stageproof run`` from the command line: exit codes, JSON, and bad input that must fail
with one clear line (exit 2) before anything is written half-way."""

from __future__ import annotations

import json
import re
import time

import pytest

from harness.cli.main import main
from harness.store import open_store
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, free_port, sim_bench

pytestmark = pytest.mark.wire


@pytest.fixture(scope="module")
def bench(board, tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cli")
    with sim_bench(board, tmp, timeout_ms=800) as (b, station):
        yield b, station


def _args(station, db, *extra, fixture=FIXTURE_FILE, serial="SN-CLI-1"):
    return [
        "run",
        "--station",
        str(station),
        "--fixture",
        str(fixture),
        "--board",
        str(BOARD_FILE),
        "--serial",
        serial,
        "--db",
        str(db),
        *extra,
    ]


def _runs(db) -> int:
    if not db.exists():
        return 0
    with open_store(db) as store:
        return len(store.list_runs())


def test_good_run_json_exit_0(bench, tmp_path, capsys):
    _, station = bench
    db = tmp_path / "r.db"
    code = main(_args(station, db, "--json", "--settle-wait", "0", "--operator", "ana"))
    out = json.loads(capsys.readouterr().out)
    assert code == 0 and out["verdict"] == "PASS"
    names = {(m["channel"], m["name"]) for m in out["measurements"]}
    assert ("A", "gain") in names and ("B", "clip_input") in names
    gain = next(m for m in out["measurements"] if m["name"] == "gain")
    assert gain["low"] < gain["value"] < gain["high"] and gain["uncertainty"] > 0
    with open_store(db) as store:
        run = store.list_runs()[0]
        assert run.status == "complete" and run.operator == "ana"
        assert "waited 0 s" in run.settle_note
        assert set(run.instruments) >= {"generator", "scope"}
    # second test of the same serial is retest 1
    assert main(_args(station, db, "--json", "--settle-wait", "0")) == 0
    assert json.loads(capsys.readouterr().out)["retest"] == 1


def _bad(capsys, argv) -> str:
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("stageproof: error:") and err.count("\n") == 1, err
    return err


def test_unreachable_instrument_names_resource(bench, tmp_path, capsys):
    _, station = bench
    text = station.read_text()
    port = free_port()
    bad = re.sub(
        r'(\[instrument\.generator\]\nresource = ")[^"]+',
        rf"\g<1>TCPIP::127.0.0.1::{port}::SOCKET",
        text,
    )
    st = tmp_path / "st.toml"
    st.write_text(bad)
    db = tmp_path / "r.db"
    t0 = time.monotonic()
    err = _bad(capsys, _args(st, db))
    assert f"TCPIP::127.0.0.1::{port}::SOCKET" in err
    assert time.monotonic() - t0 < 10.0  # timeout 0.8 s, one retry
    assert _runs(db) == 0


def test_wrong_instrument_at_resource(bench, tmp_path, capsys):
    b, station = bench
    text = station.read_text()
    gen, scope = b.resources["generator"], b.resources["scope"]
    swapped = text.replace(gen, "@@G@@").replace(scope, gen).replace("@@G@@", scope)
    st = tmp_path / "st.toml"
    st.write_text(swapped)
    db = tmp_path / "r.db"
    err = _bad(capsys, _args(st, db))
    assert "IDN" in err or "identity" in err.lower() or "expect" in err.lower()
    assert _runs(db) == 0


def test_fixture_with_nonexistent_channel(bench, tmp_path, capsys):
    _, station = bench
    fx = tmp_path / "fx.toml"
    fx.write_text(
        FIXTURE_FILE.read_text().replace(
            'board_channel = "B"\ninput_scope', 'board_channel = "Z"\ninput_scope', 1
        )
    )
    db = tmp_path / "r.db"
    err = _bad(capsys, _args(station, db, fixture=fx))
    assert "channel[1].board_channel" in err and "'Z'" in err
    assert not db.exists()


def test_station_missing_needed_role(bench, tmp_path, capsys):
    _, station = bench
    text = station.read_text()
    cut = re.sub(r"\[instrument\.dmm\]\n(?:[^\[]*\n)", "", text)
    assert "instrument.dmm" not in cut
    st = tmp_path / "st.toml"
    st.write_text(cut)
    db = tmp_path / "r.db"
    err = _bad(capsys, _args(st, db))
    assert "instrument.dmm" in err and "test points" in err
    assert not db.exists()


def test_unwritable_database(bench, tmp_path, capsys):
    b, station = bench
    blocker = tmp_path / "file.txt"
    blocker.write_text("not a folder")
    before = len(b.generator_log)
    _bad(capsys, _args(station, blocker / "sub" / "r.db"))
    assert len(b.generator_log) == before  # no instrument was touched


@pytest.mark.parametrize("serial", ["SN\x07BELL", "x" * 65, "  ", "SN\n2"])
def test_bad_serial_rejected_first(bench, tmp_path, capsys, serial):
    b, station = bench
    before = len(b.generator_log)
    db = tmp_path / "r.db"
    _bad(capsys, _args(station, db, serial=serial))
    assert not db.exists() and len(b.generator_log) == before
