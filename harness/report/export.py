"""Export runs, measurements and sweep points as CSV or Parquet, through pandas.

One file per table (``runs``, ``measurements``, ``sweeps``) in the output folder, with the
columns of :func:`harness.store.load_frame`.  CSV timestamps are ISO 8601 in UTC; Parquet
keeps the pandas types (timestamps with time zone, float64, int64, bool) and needs pyarrow,
the ``parquet`` extra.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from harness.errors import ReportError
from harness.report.summary import date_window
from harness.store import load_frame

FORMATS: tuple[str, ...] = ("csv", "parquet")
TABLES: tuple[str, ...] = ("runs", "measurements", "sweeps")


def _require_pyarrow() -> None:
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        raise ReportError(
            "--format parquet",
            "Parquet export needs pyarrow, which is not installed",
            hint="pip install 'stageproof[parquet]' (or use --format csv)",
        ) from None


def _iso_times(df: pd.DataFrame) -> pd.DataFrame:
    """UTC timestamps as ISO 8601 text with a "+00:00" offset (NaT stays empty)."""
    out = df.copy()
    for col in out.columns:
        if isinstance(out[col].dtype, pd.DatetimeTZDtype):
            utc = out[col].dt.tz_convert("UTC")
            out[col] = (utc.dt.strftime("%Y-%m-%dT%H:%M:%S.%f") + "+00:00").where(utc.notna())
    return out


def export_tables(
    db: str | Path,
    folder: str | Path,
    fmt: str,
    *,
    since: str | None = None,
    until: str | None = None,
    board: str | None = None,
) -> list[Path]:
    """Write each table to ``folder/<table>.<fmt>``; return the paths written."""
    if fmt not in FORMATS:
        raise ReportError("--format", f"unknown format {fmt!r}", hint="choose csv or parquet")
    if fmt == "parquet":
        _require_pyarrow()
    out = Path(folder)
    if out.exists() and not out.is_dir():
        raise ReportError(
            "-o", f"{out} is a file, not a folder", hint="give a folder for the exported tables"
        )
    date_window(since, until)  # a bad or empty range fails before the database is read
    frames: dict[str, pd.DataFrame] = {
        table: load_frame(db, table, since=since, until=until, board=board) for table in TABLES
    }
    if board is not None and frames["runs"].empty:
        raise ReportError(
            "--board",
            f"no run of board {board!r} in this results database",
            hint="give a part number or board name as stored",
        )
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ReportError(
            "-o",
            f"cannot create folder {out}: {exc.strerror}",
            hint="choose a folder you can write",
        ) from None
    written = []
    for table, df in frames.items():
        path = out / f"{table}.{fmt}"
        try:
            if fmt == "csv":
                _iso_times(df).to_csv(path, index=False)
            else:
                df.to_parquet(path, index=False, engine="pyarrow")
        except OSError as exc:
            raise ReportError(
                "-o",
                f"cannot write {path}: {exc.strerror or exc}",
                hint="check the folder's permissions and free space",
            ) from None
        written.append(path)
    return written
