"""From file names to a stored verdict: what ``stageproof run`` and ``stageproof demo`` share.

Order matters, for safety first and then for "nothing written half-way": every input file
is read and validated (serial number, board, station, fixture, roles), then the store is
opened (an unwritable path fails here, before any instrument is touched), then the station
is locked and connected with every source put in its safe state (a station left driving a
board by a crashed process is switched off before anything slow happens), then the limits
are computed, and only then is a run begun in the store.
"""

from __future__ import annotations

import unicodedata
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from harness.errors import ValueParseError
from harness.instruments.config import StationConfig
from harness.io.board import load_board
from harness.io.fixture import FixtureConfig, check_station, load_fixture
from harness.model.board import Board
from harness.model.limits import BoardLimits
from harness.run.progress import Progress
from harness.run.sequence import RunOptions, RunResult, run_board

if TYPE_CHECKING:
    import pyvisa

#: Longest serial number accepted (fits every label printer and database column).
MAX_SERIAL = 64


def validate_serial(serial: str) -> str:
    """A serial number: one printable word (no spaces, no control characters), at most
    64 characters."""
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
        if ch.isspace():
            # A space splits the serial in shell commands, CSV columns and labels alike,
            # and "SN 1" and "SN  1" would be two boards: refused, never quietly changed.
            raise ValueParseError(
                s,
                f"serial number has a space (U+{ord(ch):04X}) inside",
                hint="serial numbers are one word: write it as printed, with - or _ "
                "where the label has a gap",
            )
        if not ch.isprintable() or unicodedata.category(ch).startswith("C"):
            raise ValueParseError(
                s.encode("unicode_escape").decode(),
                f"serial number has a control character (U+{ord(ch):04X})",
                hint="retype it; scanners sometimes send control codes",
            )
    return s


@dataclass(frozen=True)
class Prepared:
    """Validated inputs of a run."""

    board: Board
    #: None until computed when :func:`prepare` deferred them (see :func:`ensure_limits`)
    limits: BoardLimits | None
    station: StationConfig
    fixture: FixtureConfig
    board_file: str
    station_file: str

    @property
    def computed_limits(self) -> BoardLimits:
        """The limits, once computed (:func:`ensure_limits`)."""
        assert self.limits is not None, "ensure_limits() first"
        return self.limits


def ensure_limits(prep: Prepared) -> Prepared:
    """``prep`` with its limits computed (when :func:`prepare` deferred them)."""
    if prep.limits is not None:
        return prep
    from dataclasses import replace

    from harness.model import compute_limits

    return replace(prep, limits=compute_limits(prep.board))


def prepare(
    board_file: str | Path,
    fixture_file: str | Path,
    station_file: str | Path,
    *,
    limits: BoardLimits | None = None,
    defer_limits: bool = False,
) -> Prepared:
    """Read and cross-check board, limits, station and fixture; touches no instrument.
    ``defer_limits`` leaves the limits (a second of Monte Carlo) to :func:`ensure_limits`,
    so a command can make the station safe first."""
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
    if limits is None:
        check_limits_memory(board, board.policy.samples, "board file limits.samples")
    lim = limits if limits is not None or defer_limits else compute_limits(board)
    return Prepared(board, lim, station, fixture, str(board_file), str(station_file))


def execute(
    prep: Prepared,
    serial: str,
    db: str | Path,
    *,
    options: RunOptions | None = None,
    progress: Progress | None = None,
    rm: pyvisa.ResourceManager | None = None,
) -> RunResult:
    """Open the store, lock and connect the station (every source safe first), compute
    the limits if deferred, recover aborted runs, run the board."""
    from harness.run.safety import safe_station
    from harness.store import open_store

    serial = validate_serial(serial)
    opts = options or RunOptions()
    with (
        open_store(db) as store,
        safe_station(prep.station, rm=rm, relays=prep.fixture.relays) as instruments,
    ):
        prep = ensure_limits(prep)
        store.recover_aborted()
        if not opts.station_name:
            from dataclasses import replace

            opts = replace(opts, station_name=prep.station.name or "")
        return run_board(
            instruments,
            prep.board,
            prep.computed_limits,
            prep.fixture,
            serial,
            store,
            options=opts,
            progress=progress,
            board_file=prep.board_file,
            station_file=prep.station_file,
        )


def _size(n: float) -> str:
    for unit, scale in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6)):
        if n >= scale:
            return f"{n / scale:.3g} {unit}"
    return f"{n / 1e3:.3g} kB"


def check_limits_memory(
    board: Board, samples: int, field: str = "--samples", budget: int | None = None
) -> None:
    """Refuse a Monte Carlo whose estimated peak memory (harness.model.limits_memory_bytes)
    is over the budget, with the largest sample count that fits."""
    from harness.errors import MemoryBudgetError
    from harness.io.memory import memory_budget_bytes
    from harness.model.limits import limits_memory_bytes

    avail = memory_budget_bytes() if budget is None else budget
    need = limits_memory_bytes(board, samples)
    if need <= avail:
        return
    fixed = limits_memory_bytes(board, 0)
    per = max(limits_memory_bytes(board, 1) - fixed, 1)
    fits = max((avail - fixed) // per // 1000 * 1000, 0)
    raise MemoryBudgetError(
        field,
        f"{samples} Monte Carlo boards need about {_size(need)} of memory, "
        f"{_size(avail)} may be used here",
        needed=need,
        available=avail,
        hint=f"use {fits} boards or fewer (20000 is the usual)",
    )
