"""Board report content: header, every measurement, records or the lack of them."""

from __future__ import annotations

import re

import numpy as np
import pytest

from harness.errors import ReportError
from harness.report import load_board_report, write_board_report
from harness.report.board import channel_plots
from harness.report.spectrum import spectrum_view
from harness.store import open_store
from tests.support.builders import FS_HZ, N, clipped_sine


def test_header_and_measurements_on_the_page(db_path, tmp_path) -> None:
    path, report = write_board_report(db_path, tmp_path / "b.html", serial="SN0001")
    text = path.read_text()
    run = report.run
    for field in (
        run.serial,
        run.part_number,
        run.board_name,
        run.board_digest,
        run.limits_digest,
        run.station,
        run.operator,
        run.software_version,
        "worst-case corners",
        "STAGEPROOF-SIM,GEN,0001,0.1",
        run.started_at,
        run.ended_at,
        "0 (first test)",
        run.settle_note,
    ):
        assert field in text, field
    with open_store(db_path, readonly=True) as store:
        stored = store.measurements(run.run_id)
    # every measurement has a row with its name, decision word and uncertainty
    rows = re.findall(r"<tr><td>([a-z_]+)</td>", text)
    assert sorted(rows) == sorted(m.name for m in stored)
    assert text.count("✓ pass") == len(stored)
    assert "U (k=2)" in text
    assert "✓ PASS" in text  # verdict: symbol + word, not colour alone
    # 2 channels × (gain and THD vs level, spectrum, clip waveform, gain vs frequency)
    assert text.count("<svg") == 10
    assert "kept no raw records" not in text
    assert "http://" not in text.replace("http://www.w3.org/2000/svg", "")  # self-contained
    assert "@media print" in text


def test_failing_board_without_records_says_so(db_path, tmp_path) -> None:
    path, report = write_board_report(db_path, tmp_path / "b.html", serial="SN0002")
    text = path.read_text()
    assert report.run.verdict == "FAIL" and not report.records_kept
    assert "✗ FAIL" in text and "Needs attention" in text
    assert "this run kept no raw records" in text
    assert text.count("✗ fail") >= 2  # the gain of each channel, in the attention list


def test_by_run_id_and_history(tmp_path) -> None:
    from tests.support.builders import add_run

    db = tmp_path / "h.db"
    with open_store(db) as s:
        first = add_run(s, "SN9", verdict="FAIL", gain_db=18.0, records=False, sweep=False)
        second = add_run(s, "SN9", records=False, sweep=False)
    with open_store(db, readonly=True) as s:
        newest = load_board_report(s, serial="SN9")
        old = load_board_report(s, run_id=first)
    assert newest.run.run_id == second and newest.run.retest == 1
    assert old.run.run_id == first
    assert [r.run_id for r in newest.history] == [first, second]


def test_unknown_serial_and_run(db_path) -> None:
    with open_store(db_path, readonly=True) as s:
        with pytest.raises(ReportError, match="no run of serial 'NOPE'"):
            load_board_report(s, serial="NOPE")
        with pytest.raises(ReportError, match="no run 999"):
            load_board_report(s, run_id=999)


def test_spectrum_levels_match_construction() -> None:
    """A coherent record (41 cycles in 4096 samples, gcd 1: Maxim/ADI application note 1040)
    with HD2 = 0.1 % shows the 2nd harmonic at 20·log10(0.001) = −60 dBc and THD 0.1 %
    (THD_F definition, IEC 61000-2-2 use); the rectangular window is chosen."""
    y = clipped_sine(1.0)
    sv = spectrum_view(y, FS_HZ, max_points=10_000)
    assert sv.window == "rectangular" and sv.n_samples == N
    f0 = 41 * FS_HZ / N
    assert sv.fundamental_hz == pytest.approx(f0, rel=1e-9)
    level = dict(zip(np.round(sv.frequency_hz, 6), sv.level_dbc, strict=True))
    assert level[round(f0, 6)] == pytest.approx(0.0, abs=1e-9)
    assert level[round(2 * f0, 6)] == pytest.approx(-60.0, abs=1e-6)
    assert sv.thd_percent == pytest.approx(0.1, rel=1e-6)


def test_decimated_spectrum_keeps_the_harmonics() -> None:
    sv = spectrum_view(clipped_sine(1.0), FS_HZ, max_points=200)
    assert sv.frequency_hz.size <= 200
    assert np.sort(sv.level_dbc)[-2] == pytest.approx(-60.0, abs=1e-6)


def test_clip_waveform_plot_shows_the_clipped_output(db_path) -> None:
    with open_store(db_path, readonly=True) as s:
        report = load_board_report(s, serial="SN0001")
    plots = channel_plots(report.channels[0])
    wave = plots[3]
    assert "'clip 1'" in wave.title  # the search record nearest the 0.8 V rms threshold
    # the frequency sweep is drawn against frequency, not mixed into the level plots
    assert len(plots[0].series[0].x) == 12
    assert plots[4].title.endswith("gain against frequency")
    assert plots[4].series[0].x == (20.0, 1000.0, 20000.0)
    out = np.array(wave.series[0].y)
    ideal = np.array(wave.series[1].y)
    # the clipped output falls short of the scaled input on its clipped peak
    assert out.max() < 0.9 * ideal.max()
    assert abs(out.min() - ideal.min()) < 0.1 * abs(ideal.min())
