"""Lot / date-range summary: yield, distributions and process capability.

Population rules (stated on the page too):

* A serial belongs to the summary when it has a finished test (status 'complete', verdict
  PASS or FAIL) started inside the range.  Aborted runs judged nothing and are only counted.
* First-pass yield: share of those serials whose *first* finished test ever passed (a serial
  first tested before the range keeps that first result).  Final yield: share whose last
  finished test up to the end of the range passed.
* Distributions and Cp/Cpk use one value per serial: the measurement from the serial's first
  finished test inside the range, so retests after repair neither double-count a board nor
  hide the process as built.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from harness import __version__
from harness.errors import ReportError, ValueParseError
from harness.outcomes import ALWAYS_ACCEPTED, look
from harness.report import html as h
from harness.report.plot import PALETTE, Bars, Plot, Rule, histogram, render_svg
from harness.report.stats import (
    CPK_MIN_BOARDS,
    CPK_THRESHOLD,
    Capability,
    Yield,
    capability,
    yields,
)
from harness.store import RunFilter, open_store, parse_when
from harness.store.frame import frame_of


@dataclass(frozen=True)
class MeasurementSummary:
    channel: str
    name: str
    unit: str
    values: np.ndarray
    capability: Capability
    limit_sets: int  # distinct (low, high) pairs seen; > 1 means the limits changed
    not_pass: int  # rows whose decision was anything but pass/info
    missing: int  # rows with no value (not measurable)

    @property
    def label(self) -> str:
        return f"{self.channel}.{self.name}" if self.channel else self.name


@dataclass(frozen=True)
class SummaryReport:
    db: str
    since: str | None
    until: str | None
    board: str | None
    runs_in_range: int
    status_counts: dict[str, int]
    overall: Yield
    per_part: dict[str, Yield]
    measurements: tuple[MeasurementSummary, ...]
    first_started: str
    last_started: str


@dataclass(frozen=True)
class Window:
    """A validated date range, as UTC timestamps (None = open)."""

    since: pd.Timestamp | None
    until: pd.Timestamp | None
    until_exclusive: bool


def date_window(since: str | None, until: str | None) -> Window:
    """Parse ``--since``/``--until`` the way the store does (bare date = whole UTC day)."""

    def parse(value: str | None, option: str, end: bool) -> pd.Timestamp | None:
        if value is None:
            return None
        try:
            return pd.Timestamp(parse_when(value, end_of_day=end))
        except ValueParseError as exc:
            raise ReportError(option, f"{value!r} is not a date", hint=exc.hint) from None

    s = parse(since, "--since", False)
    u = parse(until, "--until", True)
    bare = until is not None and len(until.strip()) == 10
    if s is not None and u is not None and (u < s or (bare and u == s)):
        raise ReportError(
            "--since/--until",
            f"empty date range: {since} is after {until}",
            hint="give --since before --until",
        )
    return Window(s, u, bare)


def in_window(started: pd.Series, w: Window, *, lower: bool = True) -> pd.Series:
    keep = pd.Series(True, index=started.index)
    if lower and w.since is not None:
        keep &= started >= w.since
    if w.until is not None:
        keep &= (started < w.until) if w.until_exclusive else (started <= w.until)
    return keep


_RUN_COLUMNS = ("run_id", "serial", "part_number", "board_name", "status", "verdict", "started_at")
_MEAS_COLUMNS = (
    "run_id",
    "channel",
    "name",
    "unit",
    "value",
    "low",
    "high",
    "decision",
    "measured_at",
)


def _limit_value(series: pd.Series) -> float | None:
    v = series.iloc[-1]
    return None if pd.isna(v) else float(v)


def load_summary(
    db: str | Path,
    *,
    since: str | None = None,
    until: str | None = None,
    board: str | None = None,
    station: str | None = None,
) -> SummaryReport:
    """Read the runs and measurements of a results database and summarise a range.

    The filters go into SQL: runs up to ``until`` of the board (earlier ones too, for a
    serial's first test ever) and only the measurement columns the summary uses, of runs
    started inside the range."""
    window = date_window(since, until)  # a bad date fails before the database is read
    with open_store(db, readonly=True) as store:
        runs = frame_of(
            store,
            "runs",
            columns=_RUN_COLUMNS,
            where=RunFilter(until=until, board=board, station=station),
        )
        if board is not None and runs.empty:  # say "no such board", not "no runs then"
            runs = frame_of(store, "runs", columns=_RUN_COLUMNS, where=RunFilter(board=board))
        return summarise(
            runs,
            lambda: frame_of(
                store,
                "measurements",
                columns=_MEAS_COLUMNS,
                where=RunFilter(since=since, until=until, board=board, station=station),
            ),
            since=since,
            until=until,
            board=board,
            db=store.location,
            window=window,
        )


def summarise(
    runs: pd.DataFrame,
    measurements: Callable[[], pd.DataFrame],
    *,
    since: str | None = None,
    until: str | None = None,
    board: str | None = None,
    db: str = "",
    window: Window | None = None,
) -> SummaryReport:
    """The summary of frames shaped like ``load_frame``'s "runs" and "measurements".

    ``measurements`` is called only once the range is known to hold runs."""
    window = window or date_window(since, until)
    runs = runs[list(_RUN_COLUMNS)]
    if board is not None:
        runs = runs[(runs["part_number"] == board) | (runs["board_name"] == board)]
        if runs.empty:
            raise ReportError(
                "--board",
                f"no run of board {board!r} in this results database",
                hint="give a part number or board name as stored",
            )
    scope = runs[in_window(runs["started_at"], window, lower=False)]
    in_range = scope[in_window(scope["started_at"], window)]
    if in_range.empty:
        span = f"from {since or 'the start'} to {until or 'now'}"
        raise ReportError(
            "--since/--until",
            f"no runs {span}" + (f" for board {board}" if board else ""),
            hint="widen the date range (dates are YYYY-MM-DD, UTC)",
        )
    done = in_range[(in_range["status"] == "complete") & in_range["verdict"].notna()]
    keys = done[["part_number", "serial"]].drop_duplicates()
    population = scope.merge(keys, on=["part_number", "serial"])
    overall = yields(population)
    per_part = {str(pn): yields(g) for pn, g in population.groupby("part_number")}
    first_in_range = done.sort_values(["started_at", "run_id"], kind="stable").drop_duplicates(
        ["part_number", "serial"], keep="first"
    )
    ms = measurements()[list(_MEAS_COLUMNS)]  # fewer columns: every take below is cheaper
    ms = ms[ms["run_id"].isin(first_in_range["run_id"])].sort_values("measured_at", kind="stable")
    summaries = []
    for (channel, name, unit), g in ms.groupby(["channel", "name", "unit"], sort=True):
        values = g["value"].to_numpy(dtype=float)
        finite = values[np.isfinite(values)]
        limit_sets = len(g[["low", "high"]].drop_duplicates())  # NaN (no limit) equals NaN
        low, high = _limit_value(g["low"]), _limit_value(g["high"])
        dec = g["decision"].str.lower()
        summaries.append(
            MeasurementSummary(
                str(channel),
                str(name),
                str(unit),
                finite,
                capability(finite, low, high),
                limit_sets,
                int((~dec.isin(ALWAYS_ACCEPTED)).sum()),
                int(values.size - finite.size),
            )
        )
    counts = in_range["status"].value_counts()
    return SummaryReport(
        db=db,
        since=since,
        until=until,
        board=board,
        runs_in_range=len(in_range),
        status_counts={str(k): int(v) for k, v in counts.items()},
        overall=overall,
        per_part=per_part,
        measurements=tuple(summaries),
        first_started=str(in_range["started_at"].min()),
        last_started=str(in_range["started_at"].max()),
    )


def histogram_plot(m: MeasurementSummary) -> Plot:
    cap = m.capability
    edges, counts = histogram(m.values, include=[v for v in (cap.low, cap.high) if v is not None])
    rules = []
    if cap.low is not None:
        rules.append(Rule(cap.low, f"LSL {h.num(cap.low)}", axis="x", colour=PALETTE[1]))
    if cap.high is not None:
        rules.append(
            Rule(cap.high, f"USL {h.num(cap.high)}", axis="x", colour=PALETTE[1], dash="2 3")
        )
    if cap.n:
        rules.append(
            Rule(cap.mean, f"mean {h.num(cap.mean)}", axis="x", colour=PALETTE[7], dash="")
        )
    unit = f" ({m.unit})" if m.unit else ""
    return Plot(
        f"{m.label}: n = {cap.n}",
        f"{m.name}{unit}",
        "boards",
        bars=Bars(edges, counts, "boards per bin") if counts else None,
        rules=tuple(rules),
        note="no values",
    )


def _pct(x: float) -> str:
    return "—" if math.isnan(x) else f"{100 * x:.1f} %"


def _yield_row(label: str, y: Yield) -> tuple[str, ...]:
    return (
        h.e(label),
        str(y.serials),
        f"{_pct(y.first_pass)} ({y.first_pass_count})",
        f"{_pct(y.final)} ({y.final_count})",
        str(y.retested),
    )


def _index(x: float | None) -> str:
    """Capability indices to three decimals, so a value just under 1.33 never reads 1.33."""
    return "—" if x is None else f"{x:.3f}"


def _cpk_cell(cap: Capability) -> str:
    if cap.cpk is not None and not cap.enough:
        return f'<span class="muted">too few boards (n = {cap.n})</span>'
    if cap.cpk is None:
        return "—"
    if cap.flagged:
        low = look("fail")
        return f'<span class="badge {low.css_class}">{low.symbol} {_index(cap.cpk)} LOW</span>'
    ok = look("pass")
    return f'<span class="badge {ok.css_class}">{ok.symbol} {_index(cap.cpk)}</span>'


def _cap_note(m: MeasurementSummary) -> str:
    cap = m.capability
    notes = []
    if cap.low is None and cap.high is None:
        notes.append("no limits")
    elif cap.low is None or cap.high is None:
        notes.append("one-sided: Cpk = " + ("Cpu" if cap.low is None else "Cpl"))
    if cap.n < 2:
        notes.append("too few values")
    elif not cap.enough:
        notes.append(f"too few boards for Cp/Cpk (n = {cap.n}, fewer than {CPK_MIN_BOARDS})")
    elif not cap.sigma > 0:
        notes.append("no spread")
    if m.limit_sets > 1:
        notes.append(f"limits changed in range ({m.limit_sets} sets; latest used)")
    if m.missing:
        notes.append(f"{m.missing} not measurable")
    return h.e("; ".join(notes))


def render_summary_html(s: SummaryReport, plots: list[Plot] | None = None) -> str:
    plots = plots if plots is not None else [histogram_plot(m) for m in s.measurements]
    scope = ", ".join(
        filter(
            None,
            [
                f"board {s.board}" if s.board else "all boards",
                f"since {s.since}" if s.since else None,
                f"until {s.until}" if s.until else None,
            ],
        )
    )
    status = ", ".join(f"{n} {k}" for k, n in sorted(s.status_counts.items()))
    flagged = [m for m in s.measurements if m.capability.flagged]
    parts = [
        "<h1>Production summary</h1>",
        f"<p>{h.e(scope)} · {s.runs_in_range} runs ({h.e(status)}) · first run "
        f"{h.e(s.first_started)} · last run {h.e(s.last_started)}</p>",
        "<h2>Yield</h2>",
        h.table(
            ("population", "serials", "first-pass yield", "final yield", "retested"),
            [_yield_row("all", s.overall)]
            + (
                [_yield_row(pn, y) for pn, y in sorted(s.per_part.items())]
                if len(s.per_part) > 1
                else []
            ),
            numeric=(1, 2, 3, 4),
        ),
        '<p class="muted">First-pass: share of serials whose first finished test passed. '
        "Final: share whose last finished test (up to the end of the range) passed. "
        "Aborted runs are not tests.</p>",
        "<h2>Process capability</h2>",
    ]
    if flagged:
        parts.append(
            f'<p class="flag">✗ {len(flagged)} measurement(s) with Cpk under '
            f"{CPK_THRESHOLD}: {h.e(', '.join(m.label for m in flagged))}</p>"
        )
    else:
        parts.append(f"<p>✓ no measurement with Cpk under {CPK_THRESHOLD}.</p>")
    rows = []
    for m in s.measurements:
        c = m.capability
        rows.append(
            (
                h.e(m.channel or "board"),
                h.e(m.name),
                h.e(m.unit),
                str(c.n),
                h.num(c.mean),
                h.num(c.sigma),
                h.num(c.low),
                h.num(c.high),
                _index(c.cp) if c.enough else "—",
                _cpk_cell(c),
                str(m.not_pass),
                _cap_note(m),
            )
        )
    parts.append(
        h.table(
            (
                "channel",
                "measurement",
                "unit",
                "n",
                "mean",
                "s",
                "LSL",
                "USL",
                "Cp",
                "Cpk",
                "not pass",
                "notes",
            ),
            rows,
            numeric=(3, 4, 5, 6, 7, 8, 10),
        )
    )
    parts.append(
        '<p class="muted">Cp = (USL − LSL)/(6s), Cpk = min(USL − mean, mean − LSL)/(3s), with '
        "s the sample standard deviation; with one limit, Cpk is that side's index "
        "(NIST/SEMATECH e-Handbook of Statistical Methods, §6.1.6). "
        f"Cpk under {CPK_THRESHOLD} is flagged (common practice). Cp and Cpk are shown only "
        f"from {CPK_MIN_BOARDS} boards on (fewer: too few boards; common practice, after the "
        "control-chart guidance of the NIST/SEMATECH e-Handbook, ch. 6). One value per serial: its "
        "first finished test in the range. The indices assume a stable, roughly normal "
        "process; read them with the histograms.</p>"
    )
    parts.append('<h2>Distributions</h2><div class="plots">')
    parts.extend(f"<figure>{render_svg(p)}</figure>" for p in plots)
    parts.append("</div>")
    footer = f"stageproof {h.e(__version__)} · summary of {h.e(s.db)}"
    return h.page("Production summary", "".join(parts), footer=footer)
