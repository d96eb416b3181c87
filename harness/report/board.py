"""Per-board report: one run of one serial, as a repair technician needs it.

For each channel: gain and THD against input level from the stored sweep, with the limits
shaded and the clipping threshold marked; the output spectrum at nominal level and the
waveform at the clipping point from the stored raw records (or a plain statement that the
run kept none); every measurement with its limits, expanded uncertainty and decision; and
the run header that says which board file, limits, bench and software judged the board.
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from harness import __version__
from harness.errors import AnalysisError, ReportError, StoreError
from harness.quantities import CLIP_INPUT, GAIN, THD, Quantity
from harness.report import html as h
from harness.report.plot import PALETTE, Band, Plot, Rule, Series, render_svg
from harness.report.spectrum import spectrum_view, waveform_window
from harness.store import MeasurementRow, RecordRow, ResultStore, RunRow, SweepPointRow

#: Sweeps that are not against input level (drawn apart, against frequency).
FREQUENCY_SWEEPS = ("frequency",)
#: Raw-record labels: the nominal record is labelled "nominal" (a repeat to check settling
#: is "nominal (settling check)"); clipping-search records start with "clip".
NOMINAL_LABEL = "nominal"
CLIP_PREFIX = "clip"
#: Array names tried, in order, for the channel output and the input of a raw record.
OUTPUT_ARRAYS = ("output", "out", "y_out", "y")
INPUT_ARRAYS = ("input", "in", "x_in", "x")


@dataclass(frozen=True)
class ChannelData:
    name: str
    measurements: tuple[MeasurementRow, ...]
    sweep: tuple[SweepPointRow, ...]
    records: tuple[RecordRow, ...]


@dataclass(frozen=True)
class BoardReport:
    """Everything the page shows, read from the store in one go."""

    run: RunRow
    history: tuple[RunRow, ...]  # every run of this serial and part number, oldest first
    board_measurements: tuple[MeasurementRow, ...]  # channel "" (board-level, e.g. supply)
    channels: tuple[ChannelData, ...]
    #: ranked likely faults of a failed board (harness.diagnose.Diagnosis), or why there are
    #: none (text); None when no diagnosis was asked for
    diagnosis: Any = None

    @property
    def records_kept(self) -> bool:
        return any(c.records for c in self.channels)


def load_board_report(
    store: ResultStore, *, serial: str | None = None, run_id: int | None = None
) -> BoardReport:
    """Read one run (``run_id``, or the newest run of ``serial``) with its history."""
    if (serial is None) == (run_id is None):
        raise ReportError("--serial/--run", "give exactly one of a serial number or a run id")
    if run_id is not None:
        try:
            run = store.get_run(run_id)
        except StoreError as exc:
            if not str(exc).startswith("no run"):
                raise
            raise ReportError(
                "--run",
                f"there is no run {run_id} in this results database",
                hint="list the runs with `stageproof results --db PATH` to find the id",
            ) from None
    else:
        assert serial is not None
        runs = store.list_runs(serial=serial)
        if not runs:
            raise ReportError(
                "--serial",
                f"no run of serial {serial!r} in this results database",
                hint="check the serial number (exact, case-sensitive) or the --db path",
            )
        run = runs[0]  # newest first
    history = sorted(
        (r for r in store.list_runs(serial=run.serial) if r.part_number == run.part_number),
        key=lambda r: (r.started_at, r.run_id),
    )
    ms = store.measurements(run.run_id)
    sweeps = store.sweep_points(run.run_id)
    records = store.records(run.run_id)
    names: list[str] = []
    for channel in (
        *(m.channel for m in ms),
        *(p.channel for p in sweeps),
        *(r.channel for r in records),
    ):
        if channel and channel not in names:
            names.append(channel)
    channels = tuple(
        ChannelData(
            name,
            tuple(m for m in ms if m.channel == name),
            tuple(p for p in sweeps if p.channel == name),
            tuple(r for r in records if r.channel == name),
        )
        for name in names
    )
    return BoardReport(run, tuple(history), tuple(m for m in ms if not m.channel), channels)


def attach_diagnosis(store: ResultStore, report: BoardReport, top: int = 3) -> BoardReport:
    """The report with the run's likely faulty components ranked (or the reason there is no
    ranking: the board file moved, the run holds nothing to diagnose from)."""
    from harness.diagnose import diagnose_run
    from harness.errors import StageproofError
    from harness.io.board import load_stored_board

    run = report.run
    try:
        board = load_stored_board(run.board_text, run.board_file, validate=False)
        result: Any = diagnose_run(store, run.run_id, board, top=top)
    except StageproofError as exc:
        result = f"no fault diagnosis: {exc}"
    return dataclasses.replace(report, diagnosis=result)


def _cell(value: Any) -> str:
    """A number formatted, or a category (a clipping side) as text."""
    if value is None or isinstance(value, int | float):
        return h.num(value)
    return h.e(str(value))


def diagnosis_section(diagnosis: Any) -> str:
    """Top candidates with the evidence for each, for a repair technician."""
    if diagnosis is None:
        return ""
    parts = ["<h2>Likely faulty components</h2>"]
    if isinstance(diagnosis, str):
        parts.append(f'<p class="note">{h.e(diagnosis)}</p>')
        return "".join(parts)
    for w in diagnosis.warnings:
        parts.append(f'<p class="note">{h.e(w)}</p>')
    cands = [c for c in diagnosis.candidates if c.kind != "none"][:3]
    if not cands:
        parts.append(
            '<p class="note">No single component fault explains the measurements '
            "better than a good board.</p>"
        )
        return "".join(parts)
    rows = [
        (
            str(i),
            h.e(c.ref),
            h.e(c.spec),
            h.e(f"{100 * c.probability:.0f} %"),
            h.e(", ".join(c.explained) or "-"),
            h.e(", ".join(c.contradicts) or "-"),
        )
        for i, c in enumerate(cands, start=1)
    ]
    parts.append(h.table(("rank", "component", "fault", "share", "explains", "contradicts"), rows))
    for i, c in enumerate(cands, start=1):
        ev = [
            (h.e(e.name), _cell(e.measured), _cell(e.predicted), _cell(e.sigma)) for e in c.evidence
        ]
        parts.append(f"<h3>{i}. {h.e(c.spec)}: evidence</h3>")
        parts.append(h.table(("measurement", "measured", "predicted", "σ"), ev, numeric=(1, 2, 3)))
    parts.append(
        '<p class="muted">Single-fault hypotheses scored against the stage model '
        "(χ² over the measurements with their uncertainties and the good-board spread, plus "
        "a prior); the share is each one's weight among all hypotheses scored.</p>"
    )
    return "".join(parts)


# --- finding things -------------------------------------------------------------------------


def find_measurement(ms: Sequence[MeasurementRow], wanted: Quantity) -> MeasurementRow | None:
    """The channel's stored measurement of ``wanted`` (by its registry name), if any."""
    return next((m for m in ms if m.name == wanted.name), None)


def nominal_record(records: Sequence[RecordRow]) -> RecordRow | None:
    """The record labelled "nominal", else the first whose label starts with it."""
    exact = [r for r in records if r.label.lower() == NOMINAL_LABEL]
    loose = [r for r in records if r.label.lower().startswith(NOMINAL_LABEL)]
    found = exact or loose
    return found[0] if found else None


def clip_record(records: Sequence[RecordRow], threshold_vrms: float | None) -> RecordRow | None:
    """The clipping-search record whose input level is nearest the threshold (in dB); the
    highest-level one when no threshold was found."""
    cands = []
    for r in records:
        if not r.label.lower().startswith(CLIP_PREFIX):
            continue
        x = _array(r, INPUT_ARRAYS)
        rms = float(np.std(x)) if x is not None and x.size else float("nan")
        cands.append((rms, r))
    cands = [(v, r) for v, r in cands if math.isfinite(v) and v > 0] or cands
    if not cands:
        return None
    if threshold_vrms is None or threshold_vrms <= 0:
        return max(cands, key=lambda c: c[0])[1]
    return min(
        cands, key=lambda c: abs(math.log10(c[0] / threshold_vrms)) if c[0] > 0 else math.inf
    )[1]


def _array(rec: RecordRow, names: Sequence[str]) -> np.ndarray | None:
    for n in names:
        if n in rec.arrays:
            return rec.arrays[n]
    return None


# --- plots ----------------------------------------------------------------------------------


def criterion(m: MeasurementRow | None) -> str | None:
    """The clipping criterion the sequencer stored with the threshold (detail "criterion")."""
    if m is None or not m.detail_json:
        return None
    try:
        doc = json.loads(m.detail_json)
    except json.JSONDecodeError:
        return None
    value = doc.get("criterion") if isinstance(doc, dict) else None
    return str(value) if value is not None else None


def _clip_rules(clip: MeasurementRow | None) -> tuple[Rule, ...]:
    if clip is None:
        return ()
    rules = []
    if clip.value is not None:
        crit = criterion(clip)
        label = f"clipping threshold {h.num(clip.value)} {clip.unit}".strip()
        rules.append(
            Rule(
                clip.value,
                label + (f" ({crit})" if crit else ""),
                axis="x",
                colour=PALETTE[1],
                dash="",
            )
        )
    for lim, word in ((clip.low, "min"), (clip.high, "max")):
        if lim is not None:
            rules.append(Rule(lim, f"clipping limit ({word})", axis="x", colour=PALETTE[3]))
    return tuple(rules)


def _sweep_series(
    points: Sequence[SweepPointRow], attr: str, label: str, positive_only: bool = False
) -> tuple[Series, ...]:
    out: list[Series] = []
    sweeps = list(dict.fromkeys(p.sweep for p in points))
    for i, sweep in enumerate(sweeps):
        pts = sorted((p for p in points if p.sweep == sweep), key=lambda p: p.level_vrms)
        pairs = [(p.level_vrms, getattr(p, attr)) for p in pts if getattr(p, attr) is not None]
        if positive_only:
            pairs = [(x, y) for x, y in pairs if y > 0]
        if not pairs:
            continue
        name = label if len(sweeps) == 1 else f"{label} ({sweep})"
        out.append(
            Series(tuple(x for x, _ in pairs), tuple(y for _, y in pairs), name, style=2 * i)
        )
        clipped = [
            (p.level_vrms, getattr(p, attr))
            for p in pts
            if p.clipped
            and getattr(p, attr) is not None
            and (not positive_only or getattr(p, attr) > 0)
        ]
        if clipped:
            out.append(
                Series(
                    tuple(x for x, _ in clipped),
                    tuple(y for _, y in clipped),
                    "clipped point",
                    line=False,
                    style=1,
                )
            )
    return tuple(out)


def channel_plots(ch: ChannelData) -> list[Plot]:
    """The plots of a channel, in page order: gain and THD against level, spectrum,
    clipping-point waveform, and gain against frequency when a frequency sweep was run."""
    level_points = [p for p in ch.sweep if p.sweep not in FREQUENCY_SWEEPS]
    gain = find_measurement(ch.measurements, GAIN)
    thd = find_measurement(ch.measurements, THD)
    clip = find_measurement(ch.measurements, CLIP_INPUT)
    rules = _clip_rules(clip)
    no_sweep = "no sweep points stored for this channel"
    gain_bands: tuple[Band, ...] = ()
    if gain is not None and (gain.low is not None or gain.high is not None):
        gain_bands = (Band(gain.low, gain.high, "gain within limits"),)
    plots = [
        Plot(
            f"{ch.name}: gain against input level",
            "input level (Vrms)",
            "gain (dB)",
            series=_sweep_series(level_points, GAIN.sweep_field(), GAIN.label),
            bands=gain_bands,
            rules=rules,
            x_log=True,
            note=no_sweep,
        ),
    ]
    thd_bands: tuple[Band, ...] = ()
    if thd is not None and thd.high is not None:
        thd_bands = (Band(thd.low, thd.high, "THD within limit"),)
    thd_series = _sweep_series(level_points, THD.sweep_field(), "THD", positive_only=True)
    thdn = _sweep_series(level_points, "thdn_percent", "THD+N", positive_only=True)
    thd_series += tuple(
        Series(s.x, s.y, s.label, style=5) for s in thdn if s.label.startswith("THD+N")
    )
    plots.append(
        Plot(
            f"{ch.name}: THD against input level",
            "input level (Vrms)",
            "THD (%)",
            series=thd_series,
            bands=thd_bands,
            rules=rules,
            x_log=True,
            y_log=True,
            note=no_sweep,
        )
    )
    plots.append(_spectrum_plot(ch))
    plots.append(_clip_record_plot(ch, clip))
    freq = _frequency_plot(ch, gain)
    if freq is not None:
        plots.append(freq)
    return plots


#: Least span of the gain-against-frequency axis (dB): a flat channel's few hundredths of a
#: dB must not fill the plot and look like a steep response.
MIN_GAIN_SPAN_DB = 2.0


def _frequency_plot(ch: ChannelData, gain: MeasurementRow | None = None) -> Plot | None:
    """Gain at the extra frequencies and at the test frequency (the limits hold there), on
    an axis at least :data:`MIN_GAIN_SPAN_DB` tall."""
    pairs = []
    for p in ch.sweep:
        if p.sweep not in FREQUENCY_SWEEPS or p.gain_db is None or not p.extra_json:
            continue
        try:
            f = json.loads(p.extra_json).get("frequency_hz")
        except (json.JSONDecodeError, AttributeError):
            continue
        if isinstance(f, (int, float)) and f > 0:
            pairs.append((float(f), p.gain_db))
    if not pairs:
        return None
    series: list[Series] = []
    test = _test_point(gain)
    if test is not None:
        pairs.append(test)
    pairs.sort()
    series.append(Series(tuple(x for x, _ in pairs), tuple(y for _, y in pairs), "gain"))
    if test is not None:
        series.append(
            Series((test[0],), (test[1],), f"test frequency {test[0]:.4g} Hz", line=False)
        )
    ys = [y for _, y in pairs]
    mid, half = (max(ys) + min(ys)) / 2, max((max(ys) - min(ys)) / 2 * 1.1, MIN_GAIN_SPAN_DB / 2)
    return Plot(
        f"{ch.name}: gain against frequency",
        "frequency (Hz)",
        "gain (dB)",
        series=tuple(series),
        x_log=True,
        y_range=(mid - half, mid + half),
    )


def _test_point(gain: MeasurementRow | None) -> tuple[float, float] | None:
    """(frequency, gain) of the run's gain measurement at the test frequency."""
    if gain is None or gain.value is None or not gain.detail_json:
        return None
    try:
        doc = json.loads(gain.detail_json)
    except json.JSONDecodeError:
        return None
    rec = doc.get("record") if isinstance(doc, dict) else None
    f = rec.get("frequency_hz") if isinstance(rec, dict) else None
    if isinstance(f, int | float) and f > 0:
        return float(f), float(gain.value)
    return None


def _no_record(title: str, ch: ChannelData, what: str) -> Plot:
    if ch.records:
        note = f"no {what} record among the raw records kept for this channel"
    else:
        note = "this run kept no raw records (records are stored only on request)"
    return Plot(title, "", "", note=note)


def _spectrum_plot(ch: ChannelData) -> Plot:
    title = f"{ch.name}: output spectrum at nominal level"
    rec = nominal_record(ch.records)
    if rec is None:
        return _no_record(title, ch, "nominal-level")
    y = _array(rec, OUTPUT_ARRAYS)
    if y is None:
        return Plot(title, "", "", note=f"record {rec.label!r} holds no output array")
    try:
        sv = spectrum_view(y, rec.sample_rate_hz)
    except AnalysisError as exc:
        return Plot(title, "", "", note=f"record {rec.label!r} cannot be analysed: {exc}")
    f_hi = min(sv.sample_rate_hz / 2, 11.5 * sv.fundamental_hz)
    keep = sv.frequency_hz <= f_hi
    lo_db = max(float(np.min(sv.level_dbc[keep])) if keep.any() else -160.0, -160.0)
    thd_text = ""
    if sv.thd_percent is not None:
        thd_text = f"; raw record THD {h.num(sv.thd_percent)} % (scope's own harmonics included)"
        thd = find_measurement(ch.measurements, THD)
        if (
            thd is not None
            and thd.value is not None
            and thd_record(thd).get("scope_harmonics_removed")
        ):
            thd_text += f"; table THD {h.num(thd.value)} % has the scope's own harmonics removed"
    return Plot(
        title,
        "frequency (Hz)",
        "level (dB re fundamental)",
        series=(
            Series(
                tuple(sv.frequency_hz[keep]),
                tuple(sv.level_dbc[keep]),
                f"output, {sv.window} window{thd_text}",
                markers=False,
            ),
        ),
        x_range=(0.0, f_hi),
        y_range=(math.floor(lo_db / 10) * 10, 5.0),
        meta={"fundamental_hz": f"{sv.fundamental_hz:.6g}"},
    )


def _clip_record_plot(ch: ChannelData, clip: MeasurementRow | None) -> Plot:
    title = f"{ch.name}: waveform at the clipping point"
    rec = clip_record(ch.records, clip.value if clip is not None else None)
    if rec is None:
        return _no_record(title, ch, "clipping-point")
    y = _array(rec, OUTPUT_ARRAYS)
    x = _array(rec, INPUT_ARRAYS)
    if y is None:
        return Plot(title, "", "", note=f"record {rec.label!r} holds no output array")
    arrays = {"output": y} if x is None else {"input": x, "output": y}
    t_ms, cut, _ = waveform_window(rec.sample_rate_hz, arrays)
    series = [Series(tuple(t_ms), tuple(cut["output"]), "output (V)", markers=False, style=0)]
    if x is not None:
        xi, yo = cut["input"] - cut["input"].mean(), cut["output"] - cut["output"].mean()
        denom = float(np.dot(xi, xi))
        if denom > 0:
            k = float(np.dot(xi, yo)) / denom  # least-squares scale, sign = polarity
            series.append(
                Series(
                    tuple(t_ms),
                    tuple(cut["input"] * k + cut["output"].mean()),
                    f"input × {k:.3g} (ideal output)",
                    markers=False,
                    style=1,
                )
            )
    level = float(np.std(x)) if x is not None else None
    at = f" (record {rec.label!r}, input {h.num(level)} V rms)" if level else ""
    return Plot(title + at, "time (ms)", "voltage (V)", series=tuple(series))


# --- page -----------------------------------------------------------------------------------


def thd_record(m: MeasurementRow | None) -> dict:
    """What a THD measurement's detail says about it: ``scope_harmonics_removed``,
    ``thd_raw_percent`` (empty when the run stored neither)."""
    if m is None or not m.detail_json:
        return {}
    try:
        doc = json.loads(m.detail_json)
    except json.JSONDecodeError:
        return {}
    if not isinstance(doc, dict):
        return {}
    if "scope_harmonics_removed" not in doc and isinstance(doc.get("record"), dict):
        doc = doc["record"]
    return doc if "scope_harmonics_removed" in doc else {}


def thd_note(m: MeasurementRow) -> str:
    """What a THD value is: with the scope's own harmonics removed (and the raw record's
    value beside it) or as recorded.  Empty for other measurements."""
    if m.name != THD.name:
        return ""
    rec = thd_record(m)
    if not rec:
        return ""
    if rec.get("scope_harmonics_removed"):
        raw = rec.get("thd_raw_percent")
        tail = f"; raw record {h.num(raw)} %" if isinstance(raw, int | float) else ""
        return f"scope's own harmonics removed{tail}"
    return "raw record (scope's own harmonics included)"


def _detail(text: str | None) -> str:
    if not text:
        return ""
    try:
        doc = json.loads(text)
    except json.JSONDecodeError:
        return h.e(text[:200])
    if isinstance(doc, dict):
        parts = [f"{k}={v}" for k, v in doc.items() if not isinstance(v, (list, dict))]
        out = "; ".join(parts)
    else:
        out = json.dumps(doc)
    return h.e(out if len(out) <= 200 else out[:197] + "...")


def measurement_table(ms: Sequence[MeasurementRow]) -> str:
    rows = [
        (
            h.e(m.name),
            h.num(m.value),
            h.e(m.unit),
            h.num(m.low),
            h.num(m.high),
            h.num(m.uncertainty),
            h.badge(m.decision),
            h.e(m.step),
            "; ".join(x for x in (h.e(thd_note(m)), _detail(m.detail_json)) if x),
        )
        for m in ms
    ]
    return h.table(
        (
            "measurement",
            "value",
            "unit",
            "low limit",
            "high limit",
            "U (k=2)",
            "decision",
            "step",
            "detail",
        ),
        rows,
        numeric=(1, 3, 4, 5),
    )


def _provenance(run: RunRow) -> str:
    if not run.limits_provenance:
        return "—"
    try:
        doc = json.loads(run.limits_provenance)
    except json.JSONDecodeError:
        return h.e(run.limits_provenance)
    if isinstance(doc, dict):
        return h.e(", ".join(f"{k}: {v}" for k, v in doc.items()))
    return h.e(json.dumps(doc))


def header_table(run: RunRow) -> str:
    instruments = (
        "<br>".join(
            f"{h.e(role)}: <span class=mono>{h.e(idn)}</span>"
            for role, idn in sorted(run.instruments.items())
        )
        or "—"
    )
    return h.kv_table(
        [
            ("serial number", f"<strong>{h.e(run.serial)}</strong>"),
            ("part number", h.e(run.part_number)),
            ("board", h.e(run.board_name)),
            ("board file", f"<span class=mono>{h.e(run.board_file)}</span>"),
            ("board file hash", f"<span class=mono>{h.e(run.board_digest)}</span>"),
            ("limits digest", f"<span class=mono>{h.e(run.limits_digest)}</span>"),
            ("limits provenance", _provenance(run)),
            ("station", h.e(run.station)),
            ("fixture", h.e(run.fixture)),
            ("operator", h.e(run.operator)),
            ("instruments", instruments),
            ("software version", h.e(run.software_version)),
            ("settling", h.e(run.settle_note or "not stated")),
            ("started", h.e(run.started_at)),
            ("ended", h.e(run.ended_at)),
            ("status", h.e(run.status)),
            ("verdict", h.badge(run.verdict)),
            ("retest number", f"{run.retest} ({'first test' if run.retest == 0 else 'retest'})"),
            ("reason", h.e(run.reason)),
            ("run id", str(run.run_id)),
        ]
    )


def _history_table(report: BoardReport) -> str:
    rows = [
        (
            str(r.run_id) + (" ◀ this report" if r.run_id == report.run.run_id else ""),
            h.e(r.started_at),
            h.e(r.status),
            h.badge(r.verdict),
            str(r.retest),
            h.e(r.station),
            h.e(r.operator),
            h.e(r.reason),
        )
        for r in report.history
    ]
    return h.table(
        ("run", "started", "status", "verdict", "retest", "station", "operator", "reason"),
        rows,
        numeric=(4,),
    )


_ATTENTION = ("fail", "conditional fail", "conditional pass", "not resolvable")


def board_plots(report: BoardReport) -> dict[str, list[Plot]]:
    return {ch.name: channel_plots(ch) for ch in report.channels}


def render_board_html(report: BoardReport, plots: dict[str, list[Plot]] | None = None) -> str:
    """The self-contained HTML page of a board report."""
    plots = plots if plots is not None else board_plots(report)
    run = report.run
    parts = [
        f"<h1>Board test report: serial {h.e(run.serial)}</h1>",
        f"<p>{h.badge(run.verdict, big=True)} &nbsp; {h.e(run.part_number)} · "
        f"{h.e(run.board_name)} · run {run.run_id} · {h.e(run.status)}"
        f"{' · retest ' + str(run.retest) if run.retest else ' · first test'}</p>",
    ]
    every = [*report.board_measurements, *(m for c in report.channels for m in c.measurements)]
    attention = [m for m in every if m.decision.lower() in _ATTENTION]
    if attention:
        rows = [
            (
                h.e(m.channel or "board"),
                h.e(m.name),
                h.num(m.value),
                h.e(m.unit),
                h.num(m.low),
                h.num(m.high),
                h.badge(m.decision),
            )
            for m in attention
        ]
        parts.append("<h2>Needs attention</h2>")
        parts.append(
            h.table(
                ("channel", "measurement", "value", "unit", "low", "high", "decision"),
                rows,
                numeric=(2, 4, 5),
            )
        )
    elif run.status != "complete":
        parts.append(
            f'<p class="note">The run is {h.e(run.status)}: '
            "it has no complete set of measurements.</p>"
        )
    parts.append(diagnosis_section(report.diagnosis))
    parts.append("<h2>Run</h2>")
    parts.append(header_table(run))
    if len(report.history) > 1:
        parts.append("<h2>Test history of this serial</h2>")
        parts.append(_history_table(report))
    if report.board_measurements:
        parts.append('<section class="channel"><h2>Board</h2>')
        parts.append(measurement_table(report.board_measurements))
        parts.append("</section>")
    if not report.records_kept:
        parts.append(
            '<p class="note">This run kept no raw records, so the spectrum at nominal level '
            "and the waveform at the clipping point cannot be shown (records are kept only "
            "when the run asks for them).</p>"
        )
    for ch in report.channels:
        parts.append(f'<section class="channel"><h2>Channel {h.e(ch.name)}</h2>')
        parts.append('<div class="plots">')
        for p in plots.get(ch.name, []):
            parts.append(f"<figure>{render_svg(p)}</figure>")
        parts.append("</div><h3>Measurements</h3>")
        parts.append(
            measurement_table(ch.measurements)
            if ch.measurements
            else '<p class="note">no measurements stored for this channel</p>'
        )
        parts.append("</section>")
    if not report.channels:
        parts.append('<p class="note">No channel data stored for this run.</p>')
    parts.append(
        '<p class="muted">Decisions follow the guarded acceptance rule of ILAC-G8:09/2019 '
        "§4.2: U is the expanded uncertainty (k = 2); “conditional” means the value lies "
        "within U of a limit.  Shaded areas on the plots are the acceptable ranges.</p>"
    )
    footer = f"stageproof {h.e(__version__)} · board report · run {run.run_id}"
    return h.page(f"Board report {run.serial} (run {run.run_id})", "".join(parts), footer=footer)
