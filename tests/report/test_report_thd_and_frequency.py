"""The board report labels each THD for what it is, and draws gain against frequency with
the test frequency on a sensible axis; ``analyze`` can remove the scope's own harmonics
the way a test run does.

A run against the simulated bench (whose scope has a small static nonlinearity of its own)
keeps its raw records, so the report's spectrum is the record as captured (the scope's
harmonics included), while the stored THD has them removed."""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.cli.main import main
from harness.report.board import MIN_GAIN_SPAN_DB, channel_plots, load_board_report, thd_note
from harness.run.runner import execute, prepare
from harness.run.sequence import RunOptions
from harness.store import open_store
from tests.support.bench import BOARD_FILE, FIXTURE_FILE, sim_bench

pytestmark = pytest.mark.wire


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    from harness.io.board import load_board

    tmp = tmp_path_factory.mktemp("thd")
    board = load_board(BOARD_FILE)
    db = tmp / "r.db"
    with sim_bench(board, tmp) as (_bench, station):
        prep = prepare(BOARD_FILE, FIXTURE_FILE, station)
        opts = RunOptions(operator="t", keep_records=True, settle_wait_s=0.0)
        execute(prep, "SN-THD-1", db, options=opts)
    with open_store(db, readonly=True) as store:
        return load_board_report(store, serial="SN-THD-1")


def _thd(ch):
    return next(m for m in ch.measurements if m.name == "thd")


def test_spectrum_legend_and_table_label_both_thd_values(report):
    ch = report.channels[0]
    thd = _thd(ch)
    note = thd_note(thd)
    assert note.startswith("scope's own harmonics removed; raw record "), note
    raw_table = float(note.rsplit(" ", 2)[-2])
    spectrum = channel_plots(ch)[2]
    label = spectrum.series[0].label
    assert "raw record THD" in label and "scope's own harmonics included" in label, label
    assert "has the scope's own harmonics removed" in label, label
    raw_legend = float(label.split("raw record THD ")[1].split(" %")[0])
    # one raw value, whether the legend computes it from the record or the run stored it
    assert raw_legend == pytest.approx(raw_table, rel=0.05)
    assert f"table THD {thd.value:.4g}" in label or "table THD" in label
    assert raw_table != pytest.approx(thd.value, rel=1e-3)  # two different quantities


def test_gain_against_frequency_has_the_test_frequency_and_a_span(report):
    ch = report.channels[0]
    freq = channel_plots(ch)[4]
    test = [s for s in freq.series if s.label.startswith("test frequency")]
    assert test, [s.label for s in freq.series]
    f0 = test[0].x[0]
    assert 500 < f0 < 2000  # the board's test frequency, 1 kHz
    assert f0 in freq.series[0].x and len(freq.series[0].x) == 3
    lo, hi = freq.y_range
    assert hi - lo >= MIN_GAIN_SPAN_DB
    assert all(lo <= y <= hi for y in freq.series[0].y)


def _capture(tmp_path, hd2_board: float, inl: float, fill: float = 0.8):
    """A coherent capture through an ADC with a static second-order integral
    nonlinearity (IEEE Std 1241-2010, 4.1.6: INL as the deviation of the transfer
    function), both channels at the same fraction of full scale.

    Coherent: f = J·fs/N with gcd(J, N) = 1 (IEEE Std 1241-2010, 4.1.4.5), here
    J = 41, N = 4096, fs = 100 kS/s.  An odd J keeps every harmonic in its own bin."""
    fs, n, j = 100e3, 4096, 41
    f = j * fs / n
    t = np.arange(n) / fs
    fsr = 1.0  # ±1 V range
    w = 2 * np.pi * f * t
    x_true = fill * np.cos(w)
    y_true = fill * (np.cos(w) + hd2_board * np.cos(2 * w))

    def adc(v):
        return v + inl * (v**2 - np.mean(v**2))  # second-order INL, no offset

    path = tmp_path / "cap.csv"
    rows = np.column_stack([t, adc(x_true), adc(y_true)])
    np.savetxt(path, rows, delimiter=",", header="time_s,input_v,output_v", comments="")
    return path, fsr


def test_analyze_removes_the_scope_harmonics_when_asked(tmp_path, capsys):
    """The board adds 0.2 % HD2; the ADC's own INL adds HD2 to both records.  Raw THD sees
    both; with the option, the board's 0.2 % comes back (the INL's share is estimated from
    the input record at the same fill, as the test run does)."""
    import json

    path, fsr = _capture(tmp_path, hd2_board=0.002, inl=0.01)
    base = ["analyze", str(path), f"--in-adc=-{fsr},{fsr}", f"--out-adc=-{fsr},{fsr}"]
    assert main([*base, "--json"]) == 0
    raw = json.loads(capsys.readouterr().out)
    assert main([*base, "--json", "--remove-scope-harmonics"]) == 0
    fixed = json.loads(capsys.readouterr().out)
    assert fixed["scope_harmonics_removed"] is True and raw["scope_harmonics_removed"] is False
    assert fixed["thd_raw_percent"] == pytest.approx(raw["thd_percent"])
    assert fixed["thd_percent"] == pytest.approx(0.2, rel=0.05)
    assert not math.isclose(raw["thd_percent"], 0.2, rel_tol=0.2)
    assert main([*base, "--remove-scope-harmonics"]) == 0
    assert "scope's own harmonics removed" in capsys.readouterr().out


def test_analyze_remove_needs_adc_limits(tmp_path, capsys):
    path, _fsr = _capture(tmp_path, hd2_board=0.002, inl=0.01)
    assert main(["analyze", str(path), "--remove-scope-harmonics"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "ADC limits" in err, err
