"""``stageproof report``: the three kinds, exports read back, bad input -> message + exit 2."""

from __future__ import annotations

import builtins
from datetime import date, timedelta

import pandas as pd
import pytest

from harness.cli.main import main
from harness.store import load_frame


def _run(argv: list[str], capsys) -> tuple[int, str, str]:
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_board_summary_and_shorthand(db_path, tmp_path, capsys) -> None:
    code, out, _ = _run(
        [
            "report",
            "board",
            "--db",
            str(db_path),
            "--serial",
            "SN0001",
            "-o",
            str(tmp_path / "b.html"),
        ],
        capsys,
    )
    assert code == 0 and "SN0001" in out and (tmp_path / "b.html").exists()
    code, out, _ = _run(
        ["report", "--db", str(db_path), "--run", "2", "-o", str(tmp_path / "r2.html")], capsys
    )
    assert code == 0 and "run 2 (FAIL)" in out
    code, out, _ = _run(
        ["report", "summary", "--db", str(db_path), "-o", str(tmp_path / "s.html")], capsys
    )
    assert code == 0 and "first-pass yield 50.0 %" in out
    assert "Process capability" in (tmp_path / "s.html").read_text()


def test_default_board_output_name(db_path, tmp_path, capsys, monkeypatch) -> None:
    monkeypatch.chdir(tmp_path)
    code, _, _ = _run(["report", "board", "--db", str(db_path), "--serial", "SN0001"], capsys)
    assert code == 0 and (tmp_path / "report-SN0001-run1.html").exists()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["board", "--serial", "NOPE"], "--serial: no run of serial 'NOPE'"),
        (["board", "--run", "42"], "--run: there is no run 42"),
        (["summary", "--since", "2024-13-45"], "--since: '2024-13-45' is not a date"),
        (["summary", "--until", "yesterday"], "--until: 'yesterday' is not a date"),
        (["summary", "--since", "2024-05-02", "--until", "2024-05-01"], "empty date range"),
        (["summary", "--since", (date.today() + timedelta(days=2)).isoformat()], "no runs from"),
        (["summary", "--board", "XX-1"], "no run of board 'XX-1'"),
        (["export", "--format", "csv", "--since", "01/02/2024"], "is not a date"),
    ],
)
def test_bad_input_exit_2(db_path, tmp_path, capsys, args, message) -> None:
    argv = ["report", args[0], "--db", str(db_path), *args[1:]]
    if args[0] == "export":
        argv += ["-o", str(tmp_path / "x")]
    else:
        argv += ["-o", str(tmp_path / "x.html")]
    code, _, err = _run(argv, capsys)
    assert code == 2
    assert message in err
    assert err.startswith("stageproof: error:") and "Traceback" not in err
    assert "(fix:" in err  # every message says how to fix it


def test_missing_database(tmp_path, capsys) -> None:
    code, _, err = _run(["report", "summary", "--db", str(tmp_path / "none.db")], capsys)
    assert code == 2 and "no results database" in err


def test_export_csv_and_parquet_read_back(db_path, tmp_path, capsys) -> None:
    """Every table written is read back (pandas.read_csv / pandas.read_parquet) equal to
    what harness.store.load_frame gives."""
    for fmt in ("csv", "parquet"):
        out = tmp_path / fmt
        code, text, _ = _run(
            ["report", "export", "--db", str(db_path), "--format", fmt, "-o", str(out)], capsys
        )
        assert code == 0
        for table in ("runs", "measurements", "sweeps"):
            ref = load_frame(db_path, table)
            path = out / f"{table}.{fmt}"
            assert str(path) in text
            back = pd.read_csv(path) if fmt == "csv" else pd.read_parquet(path)
            assert list(back.columns) == list(ref.columns)
            assert len(back) == len(ref)
            if fmt == "parquet":
                pd.testing.assert_frame_equal(back, ref.reset_index(drop=True))
            else:
                assert back["run_id"].tolist() == ref["run_id"].tolist()
                pd.testing.assert_series_equal(
                    pd.to_datetime(back["started_at"], utc=True, format="ISO8601"),
                    ref["started_at"].reset_index(drop=True),
                    check_dtype=False,
                )
                if "value" in ref:
                    assert back["value"].tolist() == pytest.approx(ref["value"].tolist())


def _without(monkeypatch, module: str) -> None:
    """Make ``module`` (and its submodules) fail to import, as on a machine without it."""
    real_import = builtins.__import__

    def refuse(name, *a, **k):
        if name == module or name.startswith(module + "."):
            raise ImportError(f"No module named {module!r}")
        return real_import(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", refuse)


def test_parquet_without_pyarrow_is_a_clear_error(db_path, tmp_path, capsys, monkeypatch) -> None:
    _without(monkeypatch, "pyarrow")
    code, _, err = _run(
        [
            "report",
            "export",
            "--db",
            str(db_path),
            "--format",
            "parquet",
            "-o",
            str(tmp_path / "p"),
        ],
        capsys,
    )
    assert code == 2
    assert "Parquet export needs pyarrow" in err and "stageproof[parquet]" in err
    assert not (tmp_path / "p").exists()


def test_png_option_without_matplotlib(db_path, tmp_path, capsys, monkeypatch) -> None:
    """--png needs matplotlib: without it, a clear message and exit 2, no half-written files."""
    _without(monkeypatch, "matplotlib")
    code, _, err = _run(
        [
            "report",
            "board",
            "--db",
            str(db_path),
            "--serial",
            "SN0001",
            "-o",
            str(tmp_path / "b.html"),
            "--png",
            str(tmp_path / "png"),
        ],
        capsys,
    )
    assert code == 2 and "PNG plots need matplotlib" in err
    assert "HTML report has its plots inline as SVG" in err
    assert not (tmp_path / "b.html").exists()


def test_png_option_with_matplotlib(db_path, tmp_path, capsys) -> None:
    pytest.importorskip("matplotlib", reason="matplotlib not installed (optional)")
    code, _, _ = _run(
        [
            "report",
            "board",
            "--db",
            str(db_path),
            "--serial",
            "SN0001",
            "-o",
            str(tmp_path / "b.html"),
            "--png",
            str(tmp_path / "png"),
        ],
        capsys,
    )
    assert code == 0
    pngs = sorted((tmp_path / "png").glob("*.png"))
    assert len(pngs) == 10 and all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in pngs)


def test_report_without_target_is_usage_error(db_path, capsys) -> None:
    code, out, err = _run(["report", "--db", str(db_path)], capsys)
    assert code == 2 and out == ""
    assert "give --serial SN or --run ID" in err


def test_hostile_text_is_escaped(tmp_path) -> None:
    """Text from the store (serial, operator, measurement detail) is HTML-escaped."""
    from harness.report import write_board_report
    from harness.store import open_store
    from tests.support.builders import add_run

    db = tmp_path / "x.db"
    with open_store(db) as s:
        add_run(s, "<script>alert(1)</script>&", records=False, sweep=False)
    path, _ = write_board_report(db, tmp_path / "x.html", run_id=1)
    text = path.read_text()
    assert "<script>alert(1)" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;&amp;" in text
