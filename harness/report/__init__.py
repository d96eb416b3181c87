"""Reports from the results store: per-board HTML, lot/date-range summary, table exports.

A layer above the store: it reads through :mod:`harness.store` and uses harness.measure's
pure analysis for spectra; it never talks to instruments, the simulator or the sequencer.
Pages are single self-contained HTML files (inline CSS and SVG, no fetches).

* :func:`write_board_report` (``stageproof report board``)
* :func:`write_summary_report` (``stageproof report summary``)
* :func:`export_tables` (``stageproof report export``)
"""

from __future__ import annotations

from pathlib import Path

from harness.errors import ReportError
from harness.report.board import (
    BoardReport,
    attach_diagnosis,
    board_plots,
    load_board_report,
    render_board_html,
)
from harness.report.export import FORMATS, TABLES, export_tables
from harness.report.plot import Band, Bars, Plot, Rule, Series, render_svg
from harness.report.stats import CPK_THRESHOLD, Capability, Yield, capability, yields
from harness.report.summary import SummaryReport, load_summary, render_summary_html
from harness.store import ResultStore, open_store


def _write(path: str | Path, text: str) -> Path:
    out = Path(path)
    if out.is_dir():
        raise ReportError("-o", f"{out} is a folder", hint="give a file name ending in .html")
    if not out.parent.is_dir():
        raise ReportError(
            "-o",
            f"folder {out.parent} does not exist",
            hint=f"create it (mkdir -p {out.parent}) or choose another -o",
        )
    try:
        out.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise ReportError(
            "-o",
            f"cannot write {out}: {exc.strerror or exc}",
            hint="check the folder's permissions and free space",
        ) from None
    return out


def write_board_report(
    db: str | Path,
    out: str | Path,
    *,
    serial: str | None = None,
    run_id: int | None = None,
    png_dir: str | Path | None = None,
) -> tuple[Path, BoardReport]:
    """Write the board report of a run (or of a serial's newest run) to ``out``; a failed
    board's report carries the ranked likely faulty components (``harness.diagnose``)."""
    with open_store(db, readonly=True) as store:
        report = board_report_of(store, serial=serial, run_id=run_id)
    plots = board_plots(report)
    if png_dir is not None:
        from harness.report.png import write_pngs

        write_pngs([p for ps in plots.values() for p in ps], png_dir)
    return _write(out, render_board_html(report, plots)), report


def board_report_of(
    store: ResultStore, *, serial: str | None = None, run_id: int | None = None
) -> BoardReport:
    """A run's board report from an open store, with the diagnosis of a failed board."""
    report = load_board_report(store, serial=serial, run_id=run_id)
    if report.run.verdict == "FAIL" or report.run.status == "aborted":
        report = attach_diagnosis(store, report)
    return report


def write_summary_report(
    db: str | Path,
    out: str | Path,
    *,
    since: str | None = None,
    until: str | None = None,
    board: str | None = None,
    png_dir: str | Path | None = None,
) -> tuple[Path, SummaryReport]:
    """Write the summary of the runs in a date range (and of one board) to ``out``."""
    summary = load_summary(db, since=since, until=until, board=board)
    if png_dir is not None:
        from harness.report.png import write_pngs
        from harness.report.summary import histogram_plot

        write_pngs([histogram_plot(m) for m in summary.measurements], png_dir)
    return _write(out, render_summary_html(summary)), summary


__all__ = [
    "CPK_THRESHOLD",
    "FORMATS",
    "TABLES",
    "Band",
    "Bars",
    "BoardReport",
    "Capability",
    "Plot",
    "Rule",
    "Series",
    "SummaryReport",
    "Yield",
    "board_plots",
    "board_report_of",
    "capability",
    "export_tables",
    "load_board_report",
    "load_summary",
    "render_board_html",
    "render_summary_html",
    "render_svg",
    "write_board_report",
    "write_summary_report",
    "yields",
]
