"""The rows the results store keeps: plain frozen dataclasses, no database in them.

The sequencer builds :class:`RunHeader`, :class:`MeasurementRow` and :class:`SweepPointRow`
and hands them to a :class:`~harness.store.protocol.ResultStore`; reading gives back
:class:`RunRow`, :class:`MeasurementRow`, :class:`SweepPointRow` and :class:`RecordRow`.
Validation happens here, at the edge, so a bad row never reaches SQL.

Timestamps are ISO 8601 text in UTC with microseconds (``2024-05-01T12:00:00.000000+00:00``):
fixed width, so text comparison in SQL orders them correctly.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field, fields
from datetime import UTC, date, datetime, timedelta
from typing import Any

import numpy as np

from harness import __version__, outcomes
from harness.errors import StoreError, ValueParseError
from harness.quantities import lookup

#: Run states.  'running' is set by begin_run; finish_run or recover_aborted end it.
STATUSES: tuple[str, ...] = ("running", "complete", "aborted")
#: Verdicts of a finished run; None while running or when aborted before a verdict.
VERDICTS: tuple[str, ...] = outcomes.VERDICTS


def utc_now() -> str:
    """The current time as the store writes it (UTC, microseconds, fixed width)."""
    return format_time(datetime.now(UTC))


def format_time(when: datetime) -> str:
    """Normalise a datetime to the store's text form; a naive datetime is local time."""
    return when.astimezone(UTC).isoformat(timespec="microseconds")


def parse_when(value: str | date | datetime, *, end_of_day: bool = False) -> str:
    """Turn a user's date or date-time into the store's UTC text form.

    Dates and times without a zone are UTC, the zone every stored stamp and every listing
    is in, so what the table shows can be typed back as a filter.  A bare date
    (``2024-05-01``) means 00:00 UTC; with ``end_of_day`` the following 00:00 UTC, so
    ``--until 2024-05-01`` includes that whole day.  A date-time with an offset
    (``2024-05-01T08:00+02:00``) is taken as written.
    """
    if isinstance(value, datetime):
        return format_time(value if value.tzinfo else value.replace(tzinfo=UTC))
    if isinstance(value, date):
        day = value
    else:
        text = str(value).strip()
        try:
            if len(text) == 10:
                day = date.fromisoformat(text)
            else:
                return parse_when(datetime.fromisoformat(text))
        except ValueError:
            raise ValueParseError(
                text,
                "not a date or date-time",
                hint="write YYYY-MM-DD or YYYY-MM-DDTHH:MM[:SS][+HH:MM] (UTC unless an "
                "offset is given)",
            ) from None
    start = datetime(day.year, day.month, day.day, tzinfo=UTC)
    if end_of_day:
        start += timedelta(days=1)
    return format_time(start)


def _text(value: Any, what: str, *, allow_empty: bool = False) -> str:
    if not isinstance(value, str):
        raise StoreError(f"{what} must be text, got {type(value).__name__}")
    if not allow_empty and not value.strip():
        raise StoreError(f"{what} is empty", hint=f"give a {what}")
    return value


def _json_text(value: str | None, what: str) -> str | None:
    """Check that a JSON column holds JSON, so load_frame and reports can trust it."""
    if value is None:
        return None
    if not isinstance(value, str):
        raise StoreError(
            f"{what} must be JSON text, got {type(value).__name__}", hint="pass json.dumps(...)"
        )
    try:
        json.loads(value)
    except json.JSONDecodeError as exc:
        raise StoreError(f"{what} is not valid JSON: {exc}") from None
    return value


def _number(value: Any, what: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise StoreError(f"{what} must be a number, got {type(value).__name__}")
    return float(value)


def _stamp(value: str | datetime | None) -> str:
    if value is None:
        return utc_now()
    if isinstance(value, datetime):
        return format_time(value)
    try:
        return format_time(datetime.fromisoformat(value))
    except (TypeError, ValueError):
        raise StoreError(
            f"timestamp {value!r} is not ISO 8601",
            hint="pass a datetime or datetime.isoformat() text",
        ) from None


@dataclass(frozen=True)
class RunHeader:
    """Everything known about a run before the first measurement.

    ``limits_json`` is the model's ``BoardLimits.to_dict()`` as JSON and ``limits_digest``
    its sha256; ``limits_provenance`` (JSON) defaults to the ``"provenance"`` member of the
    limits, so how the limits were computed stays next to the verdict.  ``instruments``
    maps station role to the instrument's ``*IDN?`` text.  ``settle_note`` says how
    settling after level steps was handled (waited N time constants, verified by repeat...).
    """

    serial: str
    part_number: str
    board_name: str
    board_file: str
    board_digest: str
    limits_json: str
    limits_digest: str
    station: str
    fixture: str
    operator: str
    instruments: dict[str, str] = field(default_factory=dict)
    software_version: str = __version__
    settle_note: str = ""
    limits_provenance: str | None = None
    #: The board file's text, so reports and diagnosis work from the store alone.
    board_text: str | None = None

    def __post_init__(self) -> None:
        _text(self.serial, "serial number")
        _text(self.part_number, "part number")
        for name in (
            "board_name",
            "board_file",
            "board_digest",
            "limits_digest",
            "station",
            "fixture",
            "operator",
            "software_version",
            "settle_note",
        ):
            _text(getattr(self, name), name.replace("_", " "), allow_empty=True)
        if self.board_text is not None:
            _text(self.board_text, "board text", allow_empty=True)
        _json_text(self.limits_json, "limits_json")
        _json_text(self.limits_provenance, "limits_provenance")
        if not isinstance(self.instruments, dict) or not all(
            isinstance(k, str) and isinstance(v, str) for k, v in self.instruments.items()
        ):
            raise StoreError("instruments must map role (text) to identity (text)")

    def provenance_json(self) -> str | None:
        """The provenance to store: given, or taken from the limits document."""
        if self.limits_provenance is not None:
            return self.limits_provenance
        doc = json.loads(self.limits_json)
        if isinstance(doc, dict) and "provenance" in doc:
            return json.dumps(doc["provenance"], sort_keys=True)
        return None


@dataclass(frozen=True)
class MeasurementRow:
    """One measured quantity with the limits it was judged against and the decision.

    ``value`` None (or NaN, which SQLite keeps as NULL) means not measurable; ``decision``
    is the decision rule's text ("pass", "conditional fail", "info"...), stored verbatim.
    ``measured_at`` defaults to now.  Nothing infinite is kept (JSON has no Infinity): an
    infinite limit is no limit (None), an infinite uncertainty is unknown (None) and an
    infinite value is no value, whose ``reason`` (in the detail) says so.
    """

    channel: str
    name: str
    value: float | None
    unit: str
    low: float | None
    high: float | None
    uncertainty: float | None
    decision: str
    step: str
    measured_at: str | datetime | None = None
    detail_json: str | None = None

    def __post_init__(self) -> None:
        _text(self.channel, "channel", allow_empty=True)
        _text(self.name, "measurement name")
        _text(self.unit, "unit", allow_empty=True)
        _text(self.decision, "decision")
        _text(self.step, "step", allow_empty=True)
        raw_value = _number(self.value, "value")
        for name in ("value", "low", "high", "uncertainty"):
            v = _number(getattr(self, name), name)
            if v is not None and not math.isfinite(v):
                v = None
            object.__setattr__(self, name, v)
        object.__setattr__(self, "measured_at", _stamp(self.measured_at))
        _json_text(self.detail_json, "detail_json")
        if raw_value is not None and math.isinf(raw_value) and self.reason is None:
            detail = json.loads(self.detail_json) if self.detail_json else {}
            if not isinstance(detail, dict):
                detail = {"detail": detail}
            detail["reason"] = f"reading not finite ({raw_value})"
            object.__setattr__(self, "detail_json", json.dumps(detail))

    @property
    def reason(self) -> str | None:
        """Why the value is missing (stored in the detail), e.g. ``"over-range: ..."``."""
        if not self.detail_json:
            return None
        try:
            detail = json.loads(self.detail_json)
        except json.JSONDecodeError:
            return None
        why = detail.get("reason") if isinstance(detail, dict) else None
        return why if isinstance(why, str) and why else None

    @property
    def reason_label(self) -> str | None:
        """The reason's first words, for a table cell: ``"over-range"``."""
        why = self.reason
        return why.split(":", 1)[0].strip() if why else None


def check_measurement(m: MeasurementRow) -> None:
    """Refuse a measurement the registry says is wrong, before it is written: a known
    quantity in another unit (a gain stored in V would read as dB in every report) or a
    decision that is not an outcome.  Rows read back are not checked, so an older store
    stays readable."""
    q = lookup(m.name)
    if q is not None and m.unit != q.unit:
        raise StoreError(
            f"measurement {m.name!r} is stored in {q.unit or 'no unit'!s}, not {m.unit!r}",
            hint=f"give {q.label} in {q.unit}" if q.unit else f"give {q.label} with no unit",
        )
    if m.decision not in outcomes.OUTCOMES:
        raise StoreError(
            f"measurement {m.name!r} has decision {m.decision!r}, which is not an outcome",
            hint="use one of: " + ", ".join(outcomes.OUTCOMES),
        )


@dataclass(frozen=True)
class SweepPointRow:
    """One point of a level sweep: the curve behind a clipping threshold."""

    channel: str
    sweep: str
    level_vrms: float
    gain_db: float | None
    thd_percent: float | None
    thdn_percent: float | None
    clipped: bool
    clip_side: str | None = None
    extra_json: str | None = None
    measured_at: str | datetime | None = None

    def __post_init__(self) -> None:
        _text(self.channel, "channel", allow_empty=True)
        _text(self.sweep, "sweep name")
        level = _number(self.level_vrms, "level_vrms")
        if level is None or not math.isfinite(level):
            raise StoreError(
                f"sweep point level_vrms must be a finite number, got {self.level_vrms!r}",
                hint="store the level that was measured (or commanded) at the DUT input",
            )
        for name in ("level_vrms", "gain_db", "thd_percent", "thdn_percent"):
            v = _number(getattr(self, name), name)
            if v is not None and not math.isfinite(v):
                v = None
            object.__setattr__(self, name, v)
        object.__setattr__(self, "clipped", bool(self.clipped))
        if self.clip_side is not None:
            _text(self.clip_side, "clip_side")
        _json_text(self.extra_json, "extra_json")
        object.__setattr__(self, "measured_at", _stamp(self.measured_at))


@dataclass(frozen=True)
class RunRow:
    """A run as stored.  ``retest`` is 0 on the first test of a serial + part number."""

    run_id: int
    serial: str
    part_number: str
    status: str
    verdict: str | None
    started_at: str
    ended_at: str | None
    retest: int
    reason: str | None
    operator: str
    station: str
    fixture: str
    board_name: str
    board_file: str
    board_digest: str
    limits_json: str
    limits_digest: str
    limits_provenance: str | None
    instruments: dict[str, str]
    software_version: str
    settle_note: str
    host: str
    pid: int
    heartbeat_at: str
    #: The board file as it was when the run began (None for runs stored before schema 2).
    board_text: str | None = None
    #: Unique across every database: what ``store copy`` recognises a run by.
    run_token: str = ""

    def summary(self) -> dict[str, Any]:
        """The columns a listing shows (no limits document, no owner details)."""
        return {
            "run_id": self.run_id,
            "serial": self.serial,
            "part_number": self.part_number,
            "status": self.status,
            "verdict": self.verdict,
            "retest": self.retest,
            "started_at": self.started_at,
            "ended_at": self.ended_at,
            "station": self.station,
            "fixture": self.fixture,
            "operator": self.operator,
            "software_version": self.software_version,
            "reason": self.reason,
        }


@dataclass(frozen=True)
class RecordRow:
    """A raw record kept on request: named arrays (e.g. ``input``, ``output``) in volts."""

    record_id: int
    run_id: int
    channel: str
    label: str
    sample_rate_hz: float
    captured_at: str
    arrays: dict[str, np.ndarray]


#: The stored columns of a measurement and of a sweep point, in table order: the one list
#: the SQL, the DataFrames and the CSV exports take theirs from.
MEASUREMENT_FIELDS: tuple[str, ...] = tuple(f.name for f in fields(MeasurementRow))
SWEEP_FIELDS: tuple[str, ...] = tuple(f.name for f in fields(SweepPointRow))
