"""Bad records and bad capture files: a typed error with a clear message, and exit status 2
with no traceback through the CLI (harness/cli/main.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from harness.cli.main import main
from harness.errors import AnalysisError, CaptureFileError
from harness.io.capture import read_capture, write_capture_csv
from harness.measure import analyze_record, fit_sine4, harmonic_analysis, transfer

FS, N, F = 100e3, 4096, 1000.37


def _record(n: int = N, f: float = F):
    t = np.arange(n) / FS
    x = 0.1 * np.sin(2 * np.pi * f * t)
    return t, x, -10 * x


def _bad_cases():
    t, x, y = _record()
    nan_y = y.copy()
    nan_y[100] = np.nan
    inf_x = x.copy()
    inf_x[7] = np.inf
    t_dec = t.copy()
    t_dec[50], t_dec[51] = t_dec[51], t_dec[50]
    t_gap = t.copy()
    t_gap[2000:] += 1 / FS
    short_t, short_x, short_y = _record(n=200)  # 200 samples at 100 kS/s: 2 cycles of 1 kHz
    return {
        "nan": ((t, x, nan_y), "NaN or infinite"),
        "inf": ((t, inf_x, y), "NaN or infinite"),
        "few cycles": ((short_t, short_x, short_y), "cycles"),
        "dc only": ((t, x, np.full(N, 0.7)), "constant"),
        "silent": ((t, np.zeros(N), np.zeros(N)), "constant"),
        "mismatched": ((t, x, y[:-5]), "mismatched record lengths"),
        "decreasing time": ((t_dec, x, y), "not increasing"),
        "non-uniform time": ((t_gap, x, y), "not uniform"),
        "noise only": (
            (t, x, np.random.default_rng(1).normal(0, 1e-3, N)),
            "no sine wave above the noise",
        ),
    }


@pytest.mark.parametrize("case", list(_bad_cases()))
def test_bad_records_raise_analysis_error(case):
    (t, x, y), msg = _bad_cases()[case]
    with pytest.raises(AnalysisError, match=msg):
        analyze_record(t, x, y)


def test_fundamental_outside_bandwidth():
    t, x, y = _record()
    with pytest.raises(AnalysisError, match="outside the record's bandwidth"):
        analyze_record(t, x, y, frequency_hz=60e3)
    with pytest.raises(AnalysisError, match="outside the analysis bandwidth"):
        harmonic_analysis(y, FS, F, bandwidth_hz=500.0)
    with pytest.raises(AnalysisError, match="outside the analysis bandwidth"):
        analyze_record(t, x, y, bandwidth_hz=500.0)


def test_other_entry_points_check_too():
    t, x, y = _record()
    with pytest.raises(AnalysisError, match="mismatched"):
        transfer(t, x, y[:100])
    with pytest.raises(AnalysisError, match="1-D"):
        fit_sine4(t, np.vstack([y, y]))
    with pytest.raises(AnalysisError, match="probe"):
        transfer(t, x, y, in_probe=0.0)
    with pytest.raises(AnalysisError, match="cycles"):
        harmonic_analysis(y[:300], FS, F)


@pytest.mark.parametrize("case", list(_bad_cases()))
def test_bad_records_through_cli_exit_2(case, tmp_path, capsys):
    (t, x, y), _ = _bad_cases()[case]
    path = tmp_path / "c.npz"
    np.savez(path, time_s=t, input_v=x, output_v=y)
    assert main(["analyze", str(path), "--json"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("stageproof: error:") and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1


def _write(tmp_path, text: str, name: str = "c.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_capture_file_errors_name_line_and_fix(tmp_path):
    body = "".join(f"{i * 1e-5},{0.1},{0.2}\n" for i in range(20))
    cases = [
        ("time,in,out\n" + body, "line 1", "lacks time_s"),
        ("time_s,input_v,output_v\n" + body + "1e-3,abc,0.1\n", "line 22, column input_v", "abc"),
        (
            "time_s,input_v,output_v\n" + body + "1e-3,nan,0.1\n",
            "line 22, column input_v",
            "finite",
        ),
        ("time_s,input_v,output_v\n" + body + "1e-3,0.1\n", "line 22", "fields"),
        ("", "", "empty"),
        ("time_s,input_v,output_v\n1,2,3\n", "", "only 1 samples"),
    ]
    for text, where, reason in cases:
        p = _write(tmp_path, text)
        with pytest.raises(CaptureFileError) as exc:
            read_capture(p)
        assert where in str(exc.value) and reason in str(exc.value), str(exc.value)
        assert str(p) in str(exc.value)
    with pytest.raises(CaptureFileError, match="no such file"):
        read_capture(tmp_path / "missing.csv")
    with pytest.raises(CaptureFileError, match="unknown capture format"):
        read_capture(_write(tmp_path, "x", "c.xlsx"))


def test_npz_errors(tmp_path):
    p = tmp_path / "a.npz"
    np.savez(p, time_s=np.arange(10.0), input_v=np.zeros(10))
    with pytest.raises(CaptureFileError, match=r"missing array.*output_v"):
        read_capture(p)
    np.savez(p, time_s=np.arange(10.0), input_v=np.zeros(10), output_v=np.zeros(9))
    with pytest.raises(CaptureFileError, match="different lengths"):
        read_capture(p)
    bad = tmp_path / "b.npz"
    bad.write_text("not a zip")
    with pytest.raises(CaptureFileError, match="not a readable"):
        read_capture(bad)


def test_cli_capture_error_exit_2(tmp_path, capsys):
    p = _write(tmp_path, "a,b\n1,2\n")
    assert main(["analyze", str(p)]) == 2
    err = capsys.readouterr().err
    assert "capture file" in err and "Traceback" not in err


def test_cli_json_and_table(tmp_path, capsys):
    """CSV round trip (written, then read back) and the JSON keys the issue lists."""
    t = np.arange(8192) / FS
    x = 0.2 * np.sin(2 * np.pi * F * t)
    y = np.maximum(-10 * x, -1.5 + x)  # inverting stage, saturating negative half-cycle
    p = tmp_path / "cap.csv"
    write_capture_csv(p, t, x, y)
    assert main(["analyze", str(p), "--json", "--adc-bits", "8", "--range-vpp", "8"]) == 0
    d = json.loads(capsys.readouterr().out)
    for key in ("frequency_hz", "gain_db", "phase_deg", "thd_percent", "thdn_percent"):
        assert isinstance(d[key], float)
    assert d["clipped"] is True and d["clip_side"] == "negative"
    assert d["frequency_hz"] == pytest.approx(F, rel=1e-7)
    assert abs(d["phase_deg"]) > 179.0
    np.savez(tmp_path / "cap.npz", time_s=t, input_v=x, output_v=-10 * x)
    assert main(["analyze", str(tmp_path / "cap.npz"), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["clipped"] is False and d["clip_side"] is None
    assert d["gain_db"] == pytest.approx(20.0, abs=1e-9)
    assert main(["analyze", str(p), "--k-max", "5", "--bandwidth", "20000"]) == 0
    out = capsys.readouterr().out
    assert "THD" in out and "negative half-cycle" in out


def test_cli_bad_option_values_exit_2(tmp_path, capsys):
    t, x, y = _record()
    p = tmp_path / "c.npz"
    np.savez(p, time_s=t, input_v=x, output_v=y)
    assert main(["analyze", str(p), "--in-adc", "oops"]) == 2
    assert main(["analyze", str(p), "--bandwidth", "100"]) == 2
    assert main(["analyze", str(p), "--k-max", "0"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.count("stageproof: error:") == 3
