"""From file names to a stored verdict: what ``stageproof run`` and ``stageproof demo`` share.

Order matters for "nothing written half-way": every input is read and validated (serial
number, board, limits, station, fixture, roles), then the store is opened (an unwritable
path fails here), then the instruments are connected (an unreachable or wrong instrument
fails here), and only then is a run begun in the store.
"""

from __future__ import annotations

import importlib.resources
import unicodedata
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.errors import ValueParseError
from harness.io.fixture import FixtureConfig, check_station, load_fixture
from harness.io.toml import load_board
from harness.model.board import Board
from harness.run.progress import Progress
from harness.run.sequence import RunOptions, RunResult, run_board

#: Longest serial number accepted (fits every label printer and database column).
MAX_SERIAL = 64


def validate_serial(serial: str) -> str:
    """A serial number: printable, no control characters, at most 64 characters."""
    s = serial.strip() if isinstance(serial, str) else ""
    if not s:
        raise ValueParseError(
            str(serial), "the serial number is empty", hint="give --serial as printed on the board"
        )
    if len(s) > MAX_SERIAL:
        raise ValueParseError(
            s[:20] + "...",
            f"serial number longer than {MAX_SERIAL} characters",
            hint="check the scanner did not read two labels",
        )
    for ch in s:
        if not ch.isprintable() or unicodedata.category(ch).startswith("C"):
            raise ValueParseError(
                s.encode("unicode_escape").decode(),
                f"serial number has a control character (U+{ord(ch):04X})",
                hint="retype it; scanners sometimes send control codes",
            )
    return s


def packaged(kind: str, name: str) -> Path:
    """A file shipped with the package (``harness/data/<kind>/<name>``), so the demo works
    from any folder of an installed copy."""
    ref = importlib.resources.files("harness") / "data" / kind / name
    return Path(str(ref))


@dataclass(frozen=True)
class Prepared:
    """Validated inputs of a run."""

    board: Board
    limits: Any
    station: Any
    fixture: FixtureConfig
    board_file: str
    station_file: str


def prepare(
    board_file: str | Path,
    fixture_file: str | Path,
    station_file: str | Path,
    *,
    limits: Any = None,
) -> Prepared:
    """Read and cross-check board, limits, station and fixture; touches no instrument."""
    from harness.io.station import load_station
    from harness.model import compute_limits

    board = load_board(board_file)
    station = load_station(station_file)
    scope_cfg = station.get("scope")
    inputs = None
    if scope_cfg is not None:
        inputs = int(scope_cfg.profile.settings.get("inputs", 0)) or None
    fixture = load_fixture(fixture_file, board, scope_inputs=inputs)
    check_station(fixture, station.instruments.keys(), station.path, scope_inputs=inputs)
    gen_cfg = station.get("generator")
    if gen_cfg is not None:
        outs = int(gen_cfg.profile.settings.get("outputs", 1))
        if not 1 <= fixture.generator_output <= outs:
            from harness.errors import FixtureFileError

            raise FixtureFileError(
                fixture.path,
                "generator.output",
                f"generator output {fixture.generator_output} does not exist "
                f"(the station's generator has {outs})",
                hint="use an output the generator has",
            )
    lim = limits if limits is not None else compute_limits(board)
    return Prepared(board, lim, station, fixture, str(board_file), str(station_file))


def execute(
    prep: Prepared,
    serial: str,
    db: str | Path,
    *,
    options: RunOptions | None = None,
    progress: Progress | None = None,
    rm: Any = None,
) -> RunResult:
    """Open the store (recovering aborted runs), connect the station, run the board."""
    from harness.instruments.bench import connect
    from harness.store import open_store

    serial = validate_serial(serial)
    opts = options or RunOptions()
    with open_store(db) as store:
        store.recover_aborted()
        instruments = connect(prep.station, rm=rm) if rm is not None else connect(prep.station)
        try:
            if not opts.station_name:
                from dataclasses import replace

                opts = replace(opts, station_name=getattr(prep.station, "name", "") or "")
            return run_board(
                instruments,
                prep.board,
                prep.limits,
                prep.fixture,
                serial,
                store,
                options=opts,
                progress=progress,
                board_file=prep.board_file,
                station_file=prep.station_file,
            )
        finally:
            instruments.close()
