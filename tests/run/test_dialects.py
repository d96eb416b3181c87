"""The same simulated board through both simulated dialects: the SCPI-99 digitiser and
generator, and the benchtop scope (V/div, s/div with instrument-chosen timing, preamble,
unsigned codes, chunked reads, polled run state) with its dBm generator.  Only the profiles
differ; the harness code is the same.

Checks: gain agrees within 0.05 dB and the clipping threshold within the two runs'
combined stated expanded uncertainty (GUM, JCGM 100:2008 §5.1: independent uncertainties
add in quadrature); a faulty board fails on the benchtop dialect as on the default one
(common practice: an open emitter bypass lowers the stage gain toward R_C/R_E'); bad
input found only at run time (a read-back far from the request, a status poll that
never ends) stops the run with one typed line, the generator off and the run stored as
aborted.
"""

from __future__ import annotations

import math
import re

import pytest

from harness.cli.main import main
from harness.instruments.bench import connect
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.run.sequence import RunOptions, run_board
from harness.store import open_store
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, REPO, ends_off, measurement, sim_bench

pytestmark = pytest.mark.wire

FAST = RunOptions(settle_wait_s=0.0, extra_frequencies=False)


def _run(board, limits, tmp_path, dialect, faults=()):
    with sim_bench(board, tmp_path, faults, dialect=dialect) as (bench, station_file):
        fixture = load_fixture(FIXTURE_FILE, board, scope_inputs=4)
        with open_store(tmp_path / "r.db") as store, connect(load_station(station_file)) as inst:
            res = run_board(inst, board, limits, fixture, "SN-D", store, options=FAST)
        ident = inst.identities["scope"].model
        log = bench.generator_log
    return res, ident, log


@pytest.fixture(scope="module")
def both(board, limits, tmp_path_factory):
    return {d: _run(board, limits, tmp_path_factory.mktemp(d), d) for d in ("default", "benchtop")}


def test_same_board_same_gain_and_threshold_on_both_dialects(both):
    (dres, dmodel, dlog), (bres, bmodel, blog) = both["default"], both["benchtop"]
    assert (dmodel, bmodel) == ("DIG-4", "BTS-4")
    assert dres.verdict == bres.verdict == "PASS"
    for ch in ("A", "B"):
        g0, g1 = measurement(dres, ch, "gain").value, measurement(bres, ch, "gain").value
        assert abs(g0 - g1) <= 0.05, (ch, g0, g1)
        c0, c1 = measurement(dres, ch, "clip_input"), measurement(bres, ch, "clip_input")
        u = math.hypot(c0.uncertainty, c1.uncertainty)
        assert abs(c0.value - c1.value) <= u, (ch, c0.value, c1.value, u)
    assert ends_off(dlog) and ends_off(blog)


def test_faulty_board_fails_on_the_benchtop_dialect(board, limits, tmp_path):
    res, _, log = _run(board, limits, tmp_path, "benchtop", faults=("C102:open",))
    assert res.verdict == "FAIL"
    gain = measurement(res, "A", "gain")
    assert gain.decision == "fail" and gain.value < gain.low
    assert measurement(res, "B", "gain").decision == "pass"
    assert ends_off(log)


def _cli(station, db, *extra):
    return [
        "run", "--station", str(station), "--fixture", str(FIXTURE_FILE),
        "--board", str(BOARD_FILE), "--serial", "SN-BT", "--db", str(db),
        "--settle-wait", "0", *extra,
    ]  # fmt: skip


def test_cli_run_on_benchtop_with_trace_after_the_subcommand(board, tmp_path, capsys):
    with sim_bench(board, tmp_path, dialect="benchtop") as (_bench, station):
        code = main(_cli(station, tmp_path / "r.db", "-v"))
    err = capsys.readouterr().err
    assert code == 0
    # every command and reply with its time, as a technician writing a profile needs
    assert re.search(r"scope\s+>> RUN:STATe\?  << DONE  \(\d+\.\d ms\)", err)
    assert re.search(r"generator >> TONE:FREQuency\?  << [\d.]+  \(\d+\.\d ms\)", err)
    assert re.search(r"scope\s+>> DUMP2:DATA\? 1,5000  << <block of 5000 bytes>", err)


def _patched_station(station, tmp_path, role, src, *edits):
    text = (REPO / "fixtures" / "instruments" / f"{src}.toml").read_text()
    for old, new in edits:
        assert old in text
        text = text.replace(old, new)
    prof = tmp_path / f"{src}-edited.toml"
    prof.write_text(text)
    st = station.read_text()
    st = st.replace(f'profile = "{src}"', f'profile = "{prof}"')
    station.write_text(st)


@pytest.mark.parametrize(
    ("role", "src", "edits", "words"),
    [
        (
            "generator",
            "benchtop-generator",
            # the profile says 600 ohm but its load command always sends 50
            [
                ("calibrated_load = 50", "calibrated_load = 600"),
                ('set_load = "TERMinal:LOAD {load}"', 'set_load = "TERMinal:LOAD 50"'),
            ],
            "load: sent 600.0, instrument reports 50.0",
        ),
        (
            "scope",
            "benchtop-scope",
            [
                ('done_reply = "DONE"', 'done_reply = "FINISHED"'),
                ("acquire_margin_s = 2.0", "acquire_margin_s = 0.2"),
            ],
            "never 'FINISHED'",
        ),
    ],
)
def test_run_time_bad_profile_is_one_line_generator_off_run_aborted(
    board, tmp_path, capsys, role, src, edits, words
):
    db = tmp_path / "r.db"
    with sim_bench(board, tmp_path, dialect="benchtop") as (bench, station):
        _patched_station(station, tmp_path, role, src, *edits)
        code = main(_cli(station, db))
        log = bench.generator_log
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("stageproof: error:") and words in err[0]
    assert f"role={role}" in err[0]
    assert ends_off(log)
    with open_store(db) as store:
        (run,) = store.list_runs()
        assert run.status == "aborted" and words in (run.reason or "")
        names = {m.name for m in store.measurements(run.run_id)}
    assert "gain" not in names  # nothing measured at the failed step was stored


# --- line, characterisation and diagnosis on the benchtop dialect ----------------------------


def test_line_on_benchtop(board, tmp_path):
    """The production loop with the benchtop profiles: a good board, a faulty one."""
    import subprocess
    import sys

    from tests.cli.test_line_cli import _env

    for faults, serial, verdict in (((), "SN-L1", "PASS"), (("C102:open",), "SN-L2", "FAIL")):
        with sim_bench(board, tmp_path, faults, dialect="benchtop") as (_bench, station):
            proc = subprocess.run(
                [
                    sys.executable,
                    "-m",
                    "harness.cli.main",
                    "line",
                    "--station",
                    str(station),
                    "--fixture",
                    str(FIXTURE_FILE),
                    "--board",
                    str(BOARD_FILE),
                    "--db",
                    str(tmp_path / "line.db"),
                    "--settle-wait",
                    "0",
                    "--no-extra-frequencies",
                ],
                input=f"Ada\n{serial}\nquit\n",
                capture_output=True,
                text=True,
                encoding="utf-8",
                timeout=240,
                cwd=REPO,
                env=_env(),
            )
        assert f"VERDICT {serial}: {verdict}" in proc.stdout, proc.stdout + proc.stderr


def test_characterize_on_benchtop(board, limits, tmp_path, capsys):
    """Level and frequency sweeps through instrument-chosen timing: the measured low
    corner lies in the model's band and the threshold passes."""
    db = tmp_path / "c.db"
    with sim_bench(board, tmp_path, dialect="benchtop") as (_bench, station):
        rc = main(
            [
                "characterize", "--station", str(station), "--fixture", str(FIXTURE_FILE),
                "--board", str(BOARD_FILE), "--serial", "PROTO-BT", "--db", str(db),
                "-o", str(tmp_path / "c.html"), "--settle-wait", "0", "--per-decade", "3",
            ]
        )  # fmt: skip
    cap = capsys.readouterr()
    assert rc == 0, cap.out + cap.err
    corner = limits.channels["A"].low_corner_hz
    with open_store(db) as store:
        (run,) = store.list_runs()
        ms = {m.name: m for m in store.measurements(run.run_id) if m.channel == "A"}
    assert run.status == "complete"
    assert corner.low <= ms["low_corner"].value <= corner.high
    assert ms["clip_input"].decision == "pass"


def test_diagnosis_on_benchtop_ranks_the_open_capacitor(board, limits, tmp_path):
    from harness.report import write_board_report

    with sim_bench(board, tmp_path, ("C102:open",), dialect="benchtop") as (_b, station_file):
        fixture = load_fixture(FIXTURE_FILE, board, scope_inputs=4)
        with open_store(tmp_path / "r.db") as store, connect(load_station(station_file)) as inst:
            res = run_board(
                inst, board, limits, fixture, "SN-DX", store, options=FAST,
                board_file=str(BOARD_FILE),
            )  # fmt: skip
    assert res.verdict == "FAIL"
    _, report = write_board_report(tmp_path / "r.db", tmp_path / "r.html", serial="SN-DX")
    top = [c.ref for c in report.diagnosis.candidates if c.kind != "none"][:3]
    assert "C102" in top, top
