"""Results as a pandas DataFrame in one call, for analysis outside the bench.

Timestamps come back as ``datetime64[ns, UTC]``, numbers as float64 (NULL -> NaN), run
ids and retest numbers as int64, ``clipped`` as bool.  The limits document itself stays
out of the frames (it can be tens of kilobytes per run); ``get_run`` returns it.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from harness.errors import StoreError
from harness.store.sqlite import SQLiteStore

if TYPE_CHECKING:  # pandas is imported on use: station processes that only write skip it
    import pandas as pd

_RUN_FIELDS = (
    "r.serial, r.part_number, r.board_name, r.status, r.verdict, r.retest, r.started_at, "
    "r.ended_at, r.station, r.fixture, r.operator, r.software_version"
)

_QUERIES: dict[str, str] = {
    "runs": (
        "SELECT run_id, serial, part_number, board_name, board_file, board_digest, "
        "limits_digest, limits_provenance, station, fixture, operator, instruments_json, "
        "software_version, settle_note, status, verdict, reason, retest, started_at, ended_at, "
        "heartbeat_at, host, pid FROM runs ORDER BY run_id"
    ),
    "measurements": (
        f"SELECT m.id AS measurement_id, m.run_id, {_RUN_FIELDS}, m.channel, m.name, m.value, "
        "m.unit, m.low, m.high, m.uncertainty, m.decision, m.step, m.measured_at, "
        "m.detail_json FROM measurements AS m JOIN runs AS r ON r.run_id = m.run_id "
        "ORDER BY m.id"
    ),
    "sweeps": (
        f"SELECT s.id AS point_id, s.run_id, {_RUN_FIELDS}, s.channel, s.sweep, s.level_vrms, "
        "s.gain_db, s.thd_percent, s.thdn_percent, s.clipped, s.clip_side, s.extra_json, "
        "s.measured_at FROM sweep_points AS s JOIN runs AS r ON r.run_id = s.run_id "
        "ORDER BY s.id"
    ),
}

#: What ``load_frame`` can load.
FRAMES: tuple[str, ...] = tuple(_QUERIES)

_TIMES = ("started_at", "ended_at", "heartbeat_at", "measured_at")
_FLOATS = (
    "value",
    "low",
    "high",
    "uncertainty",
    "level_vrms",
    "gain_db",
    "thd_percent",
    "thdn_percent",
)
_INTS = ("run_id", "measurement_id", "point_id", "retest", "pid")


def load_frame(path: str | Path, what: str = "measurements") -> pd.DataFrame:
    """Load ``"measurements"`` (joined with their run's serial, status, verdict,
    started_at...), ``"runs"`` or ``"sweeps"`` from a results database, read-only."""
    import pandas as pd

    if what not in _QUERIES:
        raise StoreError(f"load_frame what={what!r}: choose one of {', '.join(FRAMES)}")
    with SQLiteStore(path, readonly=True) as store, store._read(f"loading {what}") as conn:
        frame = pd.read_sql_query(_QUERIES[what], conn)
    for col in frame.columns:
        try:
            if col in _TIMES:
                frame[col] = pd.to_datetime(frame[col], utc=True, format="ISO8601")
            elif col in _FLOATS:
                frame[col] = frame[col].astype("float64")
            elif col in _INTS:
                frame[col] = frame[col].astype("int64")
            elif col == "clipped":
                frame[col] = frame[col].astype(bool)
        except (TypeError, ValueError, OverflowError) as exc:
            raise _damaged(path, frame, col, exc) from None
    return frame


def _damaged(path: str | Path, frame: pd.DataFrame, col: str, exc: Exception) -> StoreError:
    """A column holding what stageproof never writes there (a row edited by hand): the
    first such row named, so it can be found."""
    import pandas as pd

    kind = "time" if col in _TIMES else "number" if col in _FLOATS + _INTS else "flag"
    values = frame[col]
    if kind == "time":
        parsed = pd.to_datetime(values, utc=True, format="ISO8601", errors="coerce")
    else:
        parsed = pd.to_numeric(values, errors="coerce")
    bad = values[parsed.isna() & values.notna()]
    if col in _INTS:
        bad = values[values.isna() | parsed.isna()] if bad.empty else bad
    where = ""
    if not bad.empty and "run_id" in frame.columns:
        where = f"run {frame['run_id'][bad.index[0]]}: "
    shown = repr(bad.iloc[0]) if not bad.empty else str(exc)
    return StoreError(
        f"results database {path}: {where}column {col} holds {shown}, not a {kind}",
        hint="the row was changed outside stageproof: restore the database from a backup, "
        "or delete that run",
    )
