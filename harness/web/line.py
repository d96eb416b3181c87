"""What the line page shows, computed from the store for one window and filter.

Windows: ``shift`` (since the latest shift start on the serving machine's clock, by default
06:00 / 14:00 / 22:00 local time, a common three-shift pattern), ``today`` (since local
midnight) or ``range`` (bare dates, each a whole UTC day, as every stored time and every
date filter of the command line is UTC).  Yields follow the summary
report's rules (:mod:`harness.report.summary`): a board counts when it has a finished test
in the window; first pass is its first finished test ever (up to the window's end),
final its last.  Cp/Cpk use each board's first finished test in the window; below the
minimum count the index is not shown and the flag says "too few boards".
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from typing import Any

from harness.errors import ReportError, ValueParseError
from harness.outcomes import ALWAYS_ACCEPTED, sql_list
from harness.report.stats import CPK_THRESHOLD, Capability, Yield
from harness.report.summary import _MEAS_COLUMNS, _RUN_COLUMNS, summarise
from harness.store import RunFilter, SQLStore, parse_when, utc_now
from harness.store.frame import frame_of

#: Shift starts (local time) when none are given.
DEFAULT_SHIFTS = (time(6), time(14), time(22))
WINDOWS = ("shift", "today", "range")
LATEST = 25
FAILING = 15


@dataclass(frozen=True)
class LineQuery:
    """One request of the page: window, optional dates, optional station and part."""

    window: str = "shift"
    since: str | None = None
    until: str | None = None
    station: str | None = None
    part: str | None = None


@dataclass(frozen=True)
class Window:
    name: str
    since: str  # store time text (UTC)
    until: str | None
    label: str


def parse_shifts(text: str) -> tuple[time, ...]:
    """``"06:00,14:00,22:00"`` -> shift start times; a one-line error otherwise."""
    out = []
    for part in text.split(","):
        try:
            out.append(time.fromisoformat(part.strip()))
        except ValueError:
            raise ValueParseError(
                part.strip(), "not a time of day", hint="write shift starts as HH:MM,HH:MM"
            ) from None
    if not out:
        raise ValueParseError(text, "no shift start", hint="e.g. 06:00,14:00,22:00")
    return tuple(sorted(out))


def resolve_window(
    q: LineQuery, *, now: datetime | None = None, shifts: tuple[time, ...] = DEFAULT_SHIFTS
) -> Window:
    """The window's bounds in the store's UTC text; a bad window raises ValueParseError."""
    local_now = (now or datetime.now()).astimezone()
    if q.window == "today":
        start = datetime.combine(local_now.date(), time(0)).astimezone()
        return Window("today", parse_when(start), None, f"today since {start:%H:%M}")
    if q.window == "shift":
        starts = [
            datetime.combine(local_now.date() + timedelta(days=d), s).astimezone()
            for d in (-1, 0)
            for s in shifts
        ]
        start = max(s for s in starts if s <= local_now)
        return Window("shift", parse_when(start), None, f"this shift, since {start:%a %H:%M}")
    if q.window == "range":
        if not q.since:
            raise ValueParseError("", "a date range needs a start date", hint="give since=")
        for d in (q.since, q.until):
            if d is not None and (len(d) != 10 or not _is_date(d)):
                raise ValueParseError(d, "not a date", hint="write YYYY-MM-DD")
        since = parse_when(q.since)
        until = parse_when(q.until, end_of_day=True) if q.until else None
        if until is not None and until <= since:
            raise ValueParseError(q.until or "", "ends before it starts", hint="swap the dates")
        label = f"{q.since} to {q.until}" if q.until else f"since {q.since}"
        return Window("range", since, until, label)
    raise ValueParseError(q.window, "unknown window", hint=f"choose {', '.join(WINDOWS)}")


def _is_date(text: str) -> bool:
    try:
        date.fromisoformat(text)
    except ValueError:
        return False
    return True


def _num(x: float | None) -> float | None:
    """A number for strict JSON: NaN and infinities become null."""
    if x is None or not math.isfinite(x):
        return None
    return float(x)


def _yield(y: Yield) -> dict[str, Any]:
    return {
        "boards": y.serials,
        "first_pass": _num(y.first_pass),
        "first_pass_count": y.first_pass_count,
        "final": _num(y.final),
        "final_count": y.final_count,
        "retested": y.retested,
    }


def cpk_flag(cap: Capability) -> str:
    """The flag shown beside Cpk: "too few boards", "no limit", "low" or "ok"."""
    if not cap.enough:
        return "too few boards"
    if cap.cpk is None:
        return "no limit" if cap.low is None and cap.high is None else "no spread"
    return "low" if cap.cpk < CPK_THRESHOLD else "ok"


def line_status(store: SQLStore, q: LineQuery, window: Window) -> dict[str, Any]:
    """Everything the page shows for ``q``, as strict-JSON-ready data."""
    since, until = window.since, window.until
    base = RunFilter(until=until, station=q.station, board=q.part)
    runs = frame_of(store, "runs", columns=(*_RUN_COLUMNS, "station"), where=base)
    started = runs["started_at"]
    lo = datetime.fromisoformat(since)
    in_window = runs[started >= lo]
    window_filter = RunFilter(since=since, until=until, station=q.station, board=q.part)
    ms = None

    def measurements() -> Any:
        nonlocal ms
        if ms is None:
            ms = frame_of(store, "measurements", columns=_MEAS_COLUMNS, where=window_filter)
        return ms

    def summary_of(frame: Any) -> Any:
        try:
            return summarise(frame, measurements, since=since, until=until)
        except ReportError:
            return None  # nothing finished in the window for this group

    parts = []
    for pn in sorted(in_window["part_number"].unique()):
        s = summary_of(runs[runs["part_number"] == pn])
        if s is None:
            continue
        names = in_window.loc[in_window["part_number"] == pn, "board_name"]
        parts.append(
            {
                "part_number": str(pn),
                "board_name": str(names.iloc[-1]) if len(names) else "",
                **_yield(s.overall),
                "measurements": [
                    {
                        "measurement": m.label,
                        "unit": m.unit,
                        "n": m.capability.n,
                        "cpk": _num(m.capability.cpk) if m.capability.enough else None,
                        "flag": cpk_flag(m.capability),
                        "not_pass": m.not_pass,
                    }
                    for m in s.measurements
                ],
            }
        )
    stations = []
    for st in sorted(in_window["station"].unique()):
        s = summary_of(runs[runs["station"] == st])
        n_runs = int((in_window["station"] == st).sum())
        row = {"station": str(st), "runs": n_runs}
        row.update(_yield(s.overall) if s is not None else _yield(Yield(0, 0, 0, 0)))
        stations.append(row)
    failing = _failing(store, window_filter)
    latest = store.list_runs(
        since=since, until=until, station=q.station, board=q.part, limit=LATEST
    )
    return {
        "window": {"name": window.name, "since": since, "until": until, "label": window.label},
        "filter": {"station": q.station, "part": q.part},
        "generated_at": utc_now(),
        "runs_in_window": len(in_window),
        "stations": stations,
        "parts": parts,
        "failing": failing,
        "latest": [
            {
                "run_id": r.run_id,
                "serial": r.serial,
                "part_number": r.part_number,
                "station": r.station,
                "status": r.status,
                "verdict": r.verdict,
                "retest": r.retest,
                "started_at": r.started_at,
                "report": f"/board/{r.run_id}",
            }
            for r in latest
        ],
        "choices": {
            "stations": sorted({str(x) for x in in_window["station"]}),
            "parts": sorted({str(x) for x in in_window["part_number"]}),
        },
    }


def _failing(store: SQLStore, where: RunFilter) -> list[dict[str, Any]]:
    """Measurements of the window that did not pass, ranked by how often (one query)."""
    conds, params = where.where("r.")
    conds.append(f"lower(m.decision) NOT IN {sql_list(ALWAYS_ACCEPTED)}")
    sql = (
        "SELECT r.part_number, m.channel, m.name, count(*) AS failures, "
        "count(DISTINCT r.serial) AS boards FROM measurements AS m "
        "JOIN runs AS r ON r.run_id = m.run_id WHERE "
        + " AND ".join(conds)
        + " GROUP BY r.part_number, m.channel, m.name "
        "ORDER BY failures DESC, r.part_number, m.channel, m.name LIMIT ?"
    )
    _, rows = store.query(sql, [*params, FAILING], "ranking failing measurements")
    return [
        {
            "part_number": pn,
            "measurement": f"{ch}.{name}" if ch else name,
            "failures": int(n),
            "boards": int(b),
        }
        for pn, ch, name, n, b in rows
    ]
