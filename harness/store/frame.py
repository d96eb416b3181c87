"""Results as a pandas DataFrame in one call, for analysis outside the bench.

Timestamps come back as ``datetime64[ns, UTC]``, numbers as float64 (NULL -> NaN), run
ids and retest numbers as int64, ``clipped`` as bool.  The limits document and the board
text stay out of the frames (tens of kilobytes per run); ``get_run`` returns them.

Filters (dates, board, station, serial) go into the SQL, so a narrow question reads only
the rows it needs; ``columns`` narrows what is read further.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

from harness.errors import StoreError
from harness.store.protocol import When
from harness.store.rows import MEASUREMENT_FIELDS, SWEEP_FIELDS
from harness.store.sql import RunFilter

if TYPE_CHECKING:  # pandas is imported on use: station processes that only write skip it
    import pandas as pd

    from harness.store.sql import SQLStore

#: A run's own fields that every frame and listing carries, in their display order.
RUN_FIELDS = (
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
)

#: frame -> (table, the columns the frame may hold; run columns come from the joined run)
_TABLES: dict[str, tuple[str, tuple[str, ...]]] = {
    "runs": (
        "runs",
        (
            "run_id",
            "serial",
            "part_number",
            "board_name",
            "board_file",
            "board_digest",
            "limits_digest",
            "limits_provenance",
            "station",
            "fixture",
            "operator",
            "instruments_json",
            "software_version",
            "settle_note",
            "status",
            "verdict",
            "reason",
            "retest",
            "started_at",
            "ended_at",
            "heartbeat_at",
            "host",
            "pid",
        ),
    ),
    "measurements": (
        "measurements",
        (
            "measurement_id",
            "run_id",
            *RUN_FIELDS,
            *MEASUREMENT_FIELDS,
        ),
    ),
    "sweeps": (
        "sweep_points",
        (
            "point_id",
            "run_id",
            *RUN_FIELDS,
            *SWEEP_FIELDS,
        ),
    ),
}

#: What ``load_frame`` can load.
FRAMES: tuple[str, ...] = tuple(_TABLES)

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
_RUN_SET = {"run_id", *RUN_FIELDS, *_TABLES["runs"][1]}


def frame_sql(what: str, columns: Sequence[str] | None, where: RunFilter) -> tuple[str, list]:
    """The one SELECT of a frame: fixed column names only, every value a parameter."""
    if what not in _TABLES:
        raise StoreError(f"load_frame what={what!r}: choose one of {', '.join(FRAMES)}")
    table, known = _TABLES[what]
    cols = list(known if columns is None else columns)
    unknown = [c for c in cols if c not in known]
    if unknown:
        raise StoreError(
            f"load_frame {what}: no column {unknown[0]!r}", hint=f"choose from {', '.join(known)}"
        )
    conds, params = where.where("r.")
    if what == "runs":
        select = ", ".join(f"r.{c}" for c in cols)
        sql = f"SELECT {select} FROM runs AS r"
        order = "r.run_id"
    else:
        own_id = "measurement_id" if what == "measurements" else "point_id"
        parts = []
        for c in cols:
            if c == own_id:
                parts.append(f"t.id AS {own_id}")
            elif c in _RUN_SET and c != "run_id":
                parts.append(f"r.{c}")
            else:
                parts.append(f"t.{c}")
        sql = f"SELECT {', '.join(parts)} FROM {table} AS t JOIN runs AS r ON r.run_id = t.run_id"
        order = "t.id"
    if conds:
        sql += " WHERE " + " AND ".join(conds)
    return sql + f" ORDER BY {order}", params


def frame_of(
    store: SQLStore,
    what: str = "measurements",
    *,
    columns: Sequence[str] | None = None,
    where: RunFilter | None = None,
) -> pd.DataFrame:
    """A frame from an open store (see :func:`load_frame`)."""
    import pandas as pd

    sql, params = frame_sql(what, columns, where or RunFilter())
    names, rows = store.query(sql, params, f"loading {what}")
    frame = pd.DataFrame.from_records(rows, columns=names)
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
            raise _damaged(store.location, frame, col, exc) from None
    return frame


def load_frame(
    path_or_url: str | Path,
    what: str = "measurements",
    *,
    since: When | None = None,
    until: When | None = None,
    board: str | None = None,
    station: str | None = None,
    serial: str | None = None,
    columns: Sequence[str] | None = None,
) -> pd.DataFrame:
    """Load ``"measurements"`` (joined with their run's serial, status, verdict,
    started_at...), ``"runs"`` or ``"sweeps"`` from a results database, read-only.

    The filters select runs (``since``/``until`` on the run's start, inclusive, a bare
    date the whole UTC day; ``board`` the part number or board name) and are applied in
    SQL."""
    from harness.store import open_store

    where = RunFilter(serial=serial, since=since, until=until, board=board, station=station)
    if what not in _TABLES:
        raise StoreError(f"load_frame what={what!r}: choose one of {', '.join(FRAMES)}")
    with open_store(path_or_url, readonly=True) as store:
        return frame_of(store, what, columns=columns, where=where)


def _damaged(location: str, frame: pd.DataFrame, col: str, exc: Exception) -> StoreError:
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
        f"results database {location}: {where}column {col} holds {shown}, not a {kind}",
        hint="the row was changed outside stageproof: restore the database from a backup, "
        "or delete that run",
    )
