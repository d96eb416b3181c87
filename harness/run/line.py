"""The production loop: one operator, one station, board after board.

Everything that costs time or can fail is done once, before the first board: the board,
station and fixture are read and cross-checked, the station is locked for the session and
connected with every source put in its safe state (before anything else), the limits are
computed (their digest is shown in the header, so a line can prove every board of a shift
was judged against the same limits), the store is opened and recovered.  Then, per board:
read a serial number (typed, or a barcode scanner acting as a keyboard), refuse bad input
before it reaches an instrument or the store, ask before testing a serial again, run the
sequence, show the verdict, wait for the next board.

The terminal belongs to the caller: this module talks to the operator only through a
:class:`LineUI` (the CLI draws it with rich; tests script it).

Interrupts: Ctrl-C while waiting for a serial ends the session with its summary.  Ctrl-C
while a board is under test aborts that board only: the sequence switches the generator
and supply off and stores the run as aborted, the station is reconnected (a query cut short
may have left its reply in a connection) and the loop returns to the serial prompt (a
second Ctrl-C there ends the session).  A lost instrument aborts the board the same way; the
operator is then asked whether to reconnect and go on or to end.
"""

from __future__ import annotations

import contextlib
import logging
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any, Literal, Protocol

from harness.errors import InstrumentError, RunAborted, StageproofError, StoreError, ValueParseError
from harness.outcomes import LineResult
from harness.run.progress import Progress
from harness.run.runner import Prepared, ensure_limits, validate_serial
from harness.run.safety import Terminated, unsafe_text
from harness.run.sequence import RunOptions, RunResult, run_board

log = logging.getLogger("harness.run.line")

#: Words that end the session when typed at the serial prompt (case-insensitive).
QUIT_WORDS: frozenset[str] = frozenset({"quit", "exit"})


@dataclass(frozen=True)
class LineHeader:
    """What the operator sees once, at the top of the session."""

    board_name: str
    part_number: str
    revision: str
    board_file: str
    station: str
    fixture: str
    operator: str
    db: str
    limits_digest: str
    limits_method: str
    instruments: dict[str, str]


@dataclass(frozen=True)
class BoardOutcome:
    """One board tested in this session (aborted runs included)."""

    serial: str
    outcome: LineResult
    retest: int
    run_id: int | None
    reason: str | None = None
    failing: tuple[str, ...] = ()


@dataclass
class SessionSummary:
    """The session's tally; ``yield_percent`` is boards whose latest verdict in the
    session is PASS over boards with a verdict, ``first_pass_percent`` counts only each
    board's first run in the session."""

    outcomes: list[BoardOutcome] = field(default_factory=list)
    refused: int = 0
    ended_by: str = ""
    error: str | None = None
    reconnects: int = 0

    @property
    def runs(self) -> int:
        return len(self.outcomes)

    @property
    def aborted(self) -> int:
        return sum(o.outcome == "ABORTED" for o in self.outcomes)

    @property
    def retests(self) -> int:
        return sum(o.retest > 0 for o in self.outcomes)

    def _latest(self) -> dict[str, BoardOutcome]:
        last: dict[str, BoardOutcome] = {}
        for o in self.outcomes:
            if o.outcome != "ABORTED":
                last[o.serial] = o
        return last

    @property
    def boards(self) -> int:
        return len(self._latest())

    @property
    def passed(self) -> int:
        return sum(o.outcome == "PASS" for o in self._latest().values())

    @property
    def failed(self) -> int:
        return sum(o.outcome == "FAIL" for o in self._latest().values())

    @property
    def yield_percent(self) -> float | None:
        return 100.0 * self.passed / self.boards if self.boards else None

    @property
    def first_pass_percent(self) -> float | None:
        first: dict[str, BoardOutcome] = {}
        for o in self.outcomes:
            if o.outcome != "ABORTED":
                first.setdefault(o.serial, o)
        if not first:
            return None
        return 100.0 * sum(o.outcome == "PASS" for o in first.values()) / len(first)

    def tested_times(self, serial: str) -> int:
        return sum(o.serial == serial for o in self.outcomes)


class LineUI(Protocol):
    """The operator's side of the loop.  ``read_serial`` returns None at end of input and
    may raise KeyboardInterrupt; ``ask`` returns ``default`` at end of input."""

    def header(self, info: LineHeader) -> None: ...

    def read_serial(self) -> str | None: ...

    def ask(self, question: str, *, default: bool) -> bool: ...

    def message(self, text: str, kind: Literal["info", "warning", "error"] = "info") -> None: ...

    def testing(self, serial: str, retest: int) -> None: ...

    def verdict(self, outcome: BoardOutcome, result: RunResult | None) -> None: ...

    def summary(self, summary: SessionSummary) -> None: ...

    def progress(self) -> Progress | None: ...


def clean_scan(raw: str, *, prefix: str = "", suffix: str = "") -> str:
    """A scanned or typed line without its line ending and the scanner's configured
    prefix/suffix.  Control characters are left in, for :func:`validate_serial` to refuse
    with a message (silently dropping them could turn two labels into one serial)."""
    text = raw.rstrip("\r\n").strip(" \t")
    if prefix and text.startswith(prefix):
        text = text[len(prefix) :]
    if suffix and text.endswith(suffix):
        text = text[: -len(suffix)]
    return text.strip(" \t")


def _instrument_failure(exc: BaseException) -> bool:
    """A board aborted because an instrument stopped answering (reconnect may help)."""
    if isinstance(exc, InstrumentError):
        return True
    return isinstance(exc, RunAborted) and isinstance(exc.__cause__, InstrumentError)


def _identity_text(identity: Any) -> str:
    fields = [getattr(identity, k, "") for k in ("maker", "model", "serial", "firmware")]
    return ",".join(str(f) for f in fields) if any(fields) else str(identity)


class ProductionLine:
    """The loop over boards; :meth:`run` returns the summary when the session ends.

    ``connect`` opens the station (:func:`harness.run.safety.connect_safe` by default:
    every source safe first; tests pass their own); ``open_store`` likewise.  The station
    lock is held for the whole session; ``instruments`` hands over a station the caller
    already connected (and whose lock it holds), for the first board."""

    def __init__(
        self,
        prep: Prepared,
        db: str,
        ui: LineUI,
        *,
        operator: str,
        options: RunOptions | None = None,
        scanner_prefix: str = "",
        scanner_suffix: str = "",
        connect: Callable[[Any], Any] | None = None,
        open_store: Callable[[str], Any] | None = None,
        instruments: Any = None,
    ) -> None:
        from harness.run.safety import connect_safe
        from harness.store import open_store as open_results

        self.prep = prep
        self.db = db
        self.ui = ui
        self.operator = operator
        base = options or RunOptions()
        self.options = replace(
            base,
            operator=operator,
            station_name=base.station_name or getattr(prep.station, "name", "") or "",
        )
        self.prefix = scanner_prefix
        self.suffix = scanner_suffix
        self._connect = connect or connect_safe
        self._open_store = open_store or open_results
        self.summary = SessionSummary()
        self._handed = instruments
        self.instruments: Any = None
        self.store: Any = None

    # --- session ------------------------------------------------------------------------
    def header(self) -> LineHeader:
        b = self.prep.board
        prov = getattr(self.prep.limits, "provenance", None)
        method = ""
        if prov is not None:
            method = f"{prov.method}, {prov.samples} samples, coverage {prov.coverage:g}"
        ids = getattr(self.instruments, "identities", {}) or {}
        return LineHeader(
            board_name=b.name,
            part_number=b.part_number,
            revision=b.revision,
            board_file=self.prep.board_file,
            station=self.options.station_name or self.prep.station_file,
            fixture=f"{self.prep.fixture.name} ({self.prep.fixture.path})",
            operator=self.operator,
            db=str(self.db),
            limits_digest=str(self.prep.limits.digest),
            limits_method=method,
            instruments={r: _identity_text(i) for r, i in ids.items()},
        )

    def run(self) -> SessionSummary:
        """Lock and connect once (sources safe first), open the store, loop until quit /
        EOF / Ctrl-C / a fatal error; every source is made safe again at the end."""
        from harness.run.station_lock import station_lock

        with contextlib.ExitStack() as stack:
            if self._handed is not None:
                self.instruments, self._handed = self._handed, None
            else:
                stack.enter_context(station_lock(self.prep.station))
            stack.callback(self._close_instruments)  # runs before the lock is released
            if self.instruments is None:
                self.instruments = self._connect(self.prep.station)
            self.prep = ensure_limits(self.prep)
            store = stack.enter_context(self._open_store(self.db))
            self.store = store
            recovered = store.recover_aborted()
            self.ui.header(self.header())
            if recovered:
                self.ui.message(
                    f"{len(recovered)} run(s) left 'running' by a process that is gone "
                    "were marked aborted",
                    "warning",
                )
            self._loop()
        self.ui.summary(self.summary)
        return self.summary

    def _close_instruments(self) -> None:
        """Every source safe and the sessions closed; a source that does not read back off
        is said on screen (quit, end of input and every reconnect pass here)."""
        if self.instruments is not None:
            try:
                self.instruments.close()
            except BaseException as exc:  # never hide the session's own outcome
                log.error("closing the instruments failed: %s", exc)
            states = getattr(self.instruments, "closing_states", None)
            bad = unsafe_text(states) if isinstance(states, dict) else ""
            if bad:
                self.ui.message(
                    f"{bad} not confirmed off (read back): switch it off by hand", "error"
                )
            self.instruments = None

    def _loop(self) -> None:
        while True:
            try:
                raw = self.ui.read_serial()
            except KeyboardInterrupt:
                self.summary.ended_by = "Ctrl-C"
                return
            if raw is None:
                self.summary.ended_by = "end of input"
                return
            text = clean_scan(raw, prefix=self.prefix, suffix=self.suffix)
            if not text:
                continue
            if text.lower() in QUIT_WORDS:
                self.summary.ended_by = text.lower()
                return
            try:
                serial = validate_serial(text)
            except ValueParseError as exc:
                self.summary.refused += 1
                self.ui.message(f"serial number refused: {exc}", "error")
                continue
            try:
                go_on = self._board(serial)
            except KeyboardInterrupt:
                self.summary.ended_by = "Ctrl-C"
                return
            if not go_on:
                return

    # --- one board ----------------------------------------------------------------------
    def _board(self, serial: str) -> bool:
        """Test one board; False when the session must end."""
        part = self.prep.board.part_number
        try:
            before = int(self.store.retest_count(serial, part))
        except StoreError as exc:
            self.summary.error = str(exc)
            self.summary.ended_by = "store error"
            self.ui.message(f"results store failed: {exc}", "error")
            return False
        if before > 0:
            here = self.summary.tested_times(serial)
            where = (
                "in this session"
                if here == before
                else (f"{here} in this session" if here else "in the results store")
            )
            times = "once" if before == 1 else f"{before} times"
            if not self.ui.ask(
                f"{serial} already tested {times} ({where}) — test again?", default=False
            ):
                self.ui.message(f"{serial} not tested again", "info")
                return True
        self.ui.testing(serial, before)
        try:
            result = run_board(
                self.instruments,
                self.prep.board,
                self.prep.limits,
                self.prep.fixture,
                serial,
                self.store,
                options=self.options,
                progress=self.ui.progress(),
                board_file=self.prep.board_file,
                station_file=self.prep.station_file,
            )
        except KeyboardInterrupt:
            self._aborted(serial, before, "interrupted by the operator (Ctrl-C)")
            self.ui.message(
                "board aborted: generator and supply switched off, run stored as aborted; "
                "Ctrl-C again or type quit to end",
                "warning",
            )
            # A query cut short may have left its reply in a connection, where the next
            # board would read it as the answer to another query: start clean.
            self._close_instruments()
            try:
                self.instruments = self._connect(self.prep.station)
            except StageproofError as exc:
                return self._recover(exc)
            self.summary.reconnects += 1
            return True
        except Terminated as exc:
            self._aborted(serial, before, exc.reason)
            self.summary.ended_by = "SIGTERM"
            return False
        except StoreError as exc:
            self._aborted(serial, before, str(exc))
            self.summary.error = str(exc)
            self.summary.ended_by = "store error"
            self.ui.message(f"results store failed: {exc}", "error")
            return False
        except StageproofError as exc:
            self._aborted(serial, before, str(exc))
            if _instrument_failure(exc):
                return self._recover(exc)
            # A setup fault (safety refusal, fixture against limits): every board would
            # hit it again, so the session ends here.
            self.summary.error = str(exc)
            self.summary.ended_by = "error"
            self.ui.message(f"session ended: {exc}", "error")
            return False
        outcome = BoardOutcome(
            serial=serial,
            outcome="PASS" if result.verdict == "PASS" else "FAIL",
            retest=int(result.retest),
            run_id=result.run_id,
            reason=result.reason,
            failing=tuple(
                f"{m.channel + ' ' if m.channel else ''}{m.name} ({m.decision})"
                for m in result.failing()
                if not self.options.policy.accepts(m.decision)
            ),
        )
        self.summary.outcomes.append(outcome)
        self.ui.verdict(outcome, result)
        return True

    def _aborted(self, serial: str, retest: int, reason: str) -> None:
        run_id = None
        try:
            runs = self.store.list_runs(serial=serial, limit=1)
            if runs and runs[0].status == "aborted" and runs[0].retest == retest:
                run_id = runs[0].run_id
        except StageproofError:  # the summary still counts the board
            pass
        outcome = BoardOutcome(serial, "ABORTED", retest, run_id, reason)
        self.summary.outcomes.append(outcome)
        self.ui.verdict(outcome, None)

    def _recover(self, exc: BaseException) -> bool:
        """After a lost instrument: reconnect the station (asked), or end."""
        self.ui.message(f"instrument failure: {exc}", "error")
        while True:
            if not self.ui.ask("reconnect the instruments and continue?", default=False):
                self.summary.ended_by = "instrument failure"
                self.summary.error = str(exc)
                return False
            self._close_instruments()
            try:
                self.instruments = self._connect(self.prep.station)
            except StageproofError as again:
                self.ui.message(f"reconnect failed: {again}", "error")
                exc = again
                continue
            self.summary.reconnects += 1
            self.ui.message("instruments reconnected", "info")
            return True


def run_line(
    prep: Prepared,
    db: str,
    ui: LineUI,
    *,
    operator: str,
    options: RunOptions | None = None,
    scanner_prefix: str = "",
    scanner_suffix: str = "",
    connect: Callable[[Any], Any] | None = None,
    instruments: Any = None,
) -> SessionSummary:
    """Run a production session (see the module doc); returns its summary."""
    return ProductionLine(
        prep,
        db,
        ui,
        operator=operator,
        options=options,
        scanner_prefix=scanner_prefix,
        scanner_suffix=scanner_suffix,
        connect=connect,
        instruments=instruments,
    ).run()
