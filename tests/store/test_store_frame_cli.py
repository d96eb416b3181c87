"""load_frame and ``stageproof results``: output parsed back by independent readers
(Python's ``json`` and ``csv`` modules; CSV as in RFC 4180) and pandas dtypes."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pandas as pd
import pytest
from store_worker import header

from harness.cli.main import main
from harness.errors import StoreError
from harness.store import MeasurementRow, SweepPointRow, load_frame, open_store


@pytest.fixture
def db(tmp_path: Path) -> Path:
    """Three runs: SN-1 PASS, SN-2 FAIL (other board), SN-1 again, still running."""
    path = tmp_path / "r.db"
    with open_store(path) as store:
        a = store.begin_run(header("SN-1"))
        store.add_measurement(
            a, MeasurementRow("left", "gain_db", 20.01, "dB", 19.5, 20.5, 0.03, "pass", "gain")
        )
        store.add_measurement(
            a, MeasurementRow("left", "thd_percent", 0.2, "%", None, 1.0, 0.01, "pass", "thd")
        )
        store.add_sweep_point(
            a, SweepPointRow("left", "clip", 0.7, 19.8, 1.2, 1.3, True, "positive")
        )
        store.finish_run(a, "complete", "PASS")
        b = store.begin_run(header("SN-2", part_number="PN-200"))
        store.add_measurement(
            b, MeasurementRow("right", "gain_db", 18.0, "dB", 19.5, 20.5, 0.03, "fail", "gain")
        )
        store.finish_run(b, "complete", "FAIL")
        store.begin_run(header("SN-1"))
    return path


def test_load_frame_measurements_joined_with_runs(db: Path) -> None:
    df = load_frame(db)  # what="measurements" by default
    assert list(df.columns) == [
        "measurement_id",
        "run_id",
        "serial",
        "part_number",
        "board_name",
        "status",
        "verdict",
        "retest",
        "started_at",
        "ended_at",
        "station",
        "fixture",
        "operator",
        "software_version",
        "channel",
        "name",
        "value",
        "unit",
        "low",
        "high",
        "uncertainty",
        "decision",
        "step",
        "measured_at",
        "detail_json",
    ]
    assert len(df) == 3
    for col in ("value", "low", "high", "uncertainty"):
        assert df[col].dtype == "float64"
    for col in ("run_id", "retest", "measurement_id"):
        assert df[col].dtype == "int64"
    for col in ("started_at", "ended_at", "measured_at"):
        assert isinstance(df[col].dtype, pd.DatetimeTZDtype) and str(df[col].dt.tz) == "UTC"
    assert pd.api.types.is_string_dtype(df["serial"])
    assert df["low"].isna().tolist() == [False, True, False]  # NULL low -> NaN
    assert df.loc[df["decision"] == "fail", "serial"].tolist() == ["SN-2"]
    assert df.groupby("verdict")["value"].count().to_dict() == {"FAIL": 1, "PASS": 2}


def test_load_frame_runs_and_sweeps(db: Path) -> None:
    runs = load_frame(db, what="runs")
    assert len(runs) == 3
    assert runs["status"].tolist() == ["complete", "complete", "running"]
    assert runs["retest"].tolist() == [0, 0, 1]
    assert runs["ended_at"].isna().tolist() == [False, False, True]
    assert "limits_json" not in runs.columns and "limits_digest" in runs.columns
    assert json.loads(runs["instruments_json"][0])["generator"].startswith("stageproof-sim")
    sweeps = load_frame(db, what="sweeps")
    assert sweeps["clipped"].dtype == bool and sweeps["clipped"].tolist() == [True]
    assert sweeps["level_vrms"].dtype == "float64"


def test_load_frame_errors(tmp_path: Path, db: Path) -> None:
    with pytest.raises(StoreError, match="choose one of"):
        load_frame(db, what="points")
    missing = tmp_path / "none.db"
    with pytest.raises(StoreError, match="no results database"):
        load_frame(missing)
    assert not missing.exists()


def _results(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    status = main(["results", *args])
    out, err = capsys.readouterr()
    return status, out, err


def test_cli_json_and_filters(db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status, out, _ = _results(capsys, "--db", str(db), "--json")
    assert status == 0
    rows = json.loads(out)
    assert [(r["serial"], r["status"], r["verdict"], r["retest"]) for r in rows] == [
        ("SN-1", "running", None, 1),
        ("SN-2", "complete", "FAIL", 0),
        ("SN-1", "complete", "PASS", 0),
    ]
    assert (
        json.loads(_results(capsys, "--db", str(db), "--json", "--serial", "SN-2")[1])[0][
            "part_number"
        ]
        == "PN-200"
    )
    assert len(json.loads(_results(capsys, "--db", str(db), "--json", "--verdict", "fail")[1])) == 1
    assert (
        len(json.loads(_results(capsys, "--db", str(db), "--json", "--status", "running")[1])) == 1
    )
    assert len(json.loads(_results(capsys, "--db", str(db), "--json", "--board", "PN-100")[1])) == 2
    assert len(json.loads(_results(capsys, "--db", str(db), "--json", "--limit", "1")[1])) == 1
    assert json.loads(_results(capsys, "--db", str(db), "--json", "--since", "2999-01-01")[1]) == []
    assert json.loads(_results(capsys, "--db", str(db), "--json", "--until", "2000-01-01")[1]) == []


def test_cli_csv(db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status, out, _ = _results(capsys, "--db", str(db), "--csv")
    assert status == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    assert [r["serial"] for r in rows] == ["SN-1", "SN-2", "SN-1"]
    assert rows[0]["verdict"] == "" and rows[1]["verdict"] == "FAIL"
    assert rows[2]["retest"] == "0" and rows[0]["retest"] == "1"


def test_cli_one_run(db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status, out, _ = _results(capsys, "--db", str(db), "--run", "1", "--json")
    assert status == 0
    doc = json.loads(out)
    assert doc["run"]["serial"] == "SN-1" and doc["run"]["verdict"] == "PASS"
    assert doc["run"]["limits_provenance"] == {"method": "worst-case", "seed": 7}
    assert doc["run"]["limits"]["channels"]["left"]["gain_db"] == [19.0, 20.0, 21.0]
    assert [(m["name"], m["low"], m["high"], m["decision"]) for m in doc["measurements"]] == [
        ("gain_db", 19.5, 20.5, "pass"),
        ("thd_percent", None, 1.0, "pass"),
    ]
    assert doc["sweep_points"][0]["clip_side"] == "positive"

    status, out, _ = _results(capsys, "--db", str(db), "--run", "2", "--csv")
    rows = list(csv.DictReader(io.StringIO(out)))
    assert (rows[0]["name"], float(rows[0]["value"]), rows[0]["decision"]) == (
        "gain_db",
        18.0,
        "fail",
    )

    status, out, _ = _results(capsys, "--db", str(db), "--run", "2")
    assert status == 0 and "SN-2" in out and "fail" in out and "settling" in out


def test_cli_table(db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    status, out, _ = _results(capsys, "--db", str(db))
    assert status == 0 and "SN-1" in out and "PASS" in out and "running" in out
    status, out, _ = _results(capsys, "--db", str(db), "--serial", "SN-none")
    assert status == 0 and "match" in out


def test_cli_errors(tmp_path: Path, db: Path, capsys: pytest.CaptureFixture[str]) -> None:
    missing = tmp_path / "nothing.db"
    status, _, err = _results(capsys, "--db", str(missing))
    assert status == 2 and str(missing) in err and "fix:" in err
    assert not missing.exists()
    status, _, err = _results(capsys, "--db", str(db), "--run", "99")
    assert status == 2 and "no run 99" in err
    for bad in (
        ["--since", "yesterday"],
        ["--until", "2024-13-40"],
        ["--limit", "0"],
        ["--verdict", "maybe"],
        ["--json", "--csv"],
    ):
        with pytest.raises(SystemExit) as exc:
            main(["results", "--db", str(db), *bad])
        assert exc.value.code == 2
        assert capsys.readouterr().err
