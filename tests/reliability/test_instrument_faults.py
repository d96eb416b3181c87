"""Instrument faults at every step of the sequence: typed error or recovery, and always safe.

Every fault kind the simulated bench injects (harness.sim.faults.FAULT_KINDS: no reply,
connection dropped mid-reply, malformed block header, error queued, slow instrument, power
cycle) is armed on the instrument that step talks to, at the moment the step starts (the
sequence's own progress callback arms it, so the cell does not depend on command counts).
Runs are in-process (harness.run.sequence.run_board) over loopback against one SimBench,
with the station's timeout_ms = 300.  For every cell:

- the run either completes (the session's documented recovery: drain and re-identify after
  a timeout, reconnect and retry once after a lost connection) or raises RunAborted naming
  the step and the instrument role;
- the run is stored complete with a verdict, or aborted with that reason; never 'running';
- the simulated generator's output is off at the end (its own state);
- no level above the board's safe input level was ever commanded (the generator's log).
"""

from __future__ import annotations

import faulthandler
import time
from collections.abc import Iterator
from typing import Any

import pytest

from harness.errors import RunAborted
from harness.io.board import load_board
from harness.io.fixture import load_fixture
from harness.run.progress import NullProgress
from harness.run.sequence import RunOptions, run_board
from harness.sim.faults import FAULT_KINDS
from harness.store import open_store
from tests.reliability.rig import generator_off, safe_vpp, started_bench, write_rig

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

TIMEOUT_MS = 300
#: Off time of the injected power cycle: long enough to refuse the first reconnect, short
#: enough that the retry after the session's back-off may find it back.
POWER_OFF_S = 0.2
#: A cell that takes longer than this is a hang (the slowest legitimate one: timeouts,
#: resynchronisation and a reconnect, a few seconds).
CELL_LIMIT_S = 30.0

#: (cell name, step name the run layer reports, event that arms the fault, role,
#:  target for faults on a reply, target for faults on a command).  Targets are profile
#:  operation names or header mnemonics (harness.sim.faults syntax).
STEPS: tuple[tuple[str, str, str, str, str, str], ...] = (
    ("supply-on", "supply", "step:supply", "supply", "ERRor", "output"),
    ("quiescent", "supply", "step:supply", "supply", "measure_current", "measure_current"),
    ("dc-points", "dc", "step:dc", "dmm", "MEASure", "MEASure"),
    ("nominal-scope", "nominal", "step:nominal", "scope", "fetch", "fetch"),
    ("nominal-generator", "nominal", "step:nominal", "generator", "ERRor", "set_amplitude"),
    ("clip-scope", "clip", "step:clip", "scope", "fetch", "fetch"),
    ("clip-generator", "clip", "step:clip", "generator", "ERRor", "set_amplitude"),
    ("shutdown-generator", "shutdown", "row:clip_input", "generator", "ERRor", "output"),
    ("shutdown-supply", "shutdown", "row:clip_input", "supply", "ERRor", "output"),
)
KINDS = tuple(FAULT_KINDS)
_REPLY_KINDS = ("no_reply", "drop_mid_block", "bad_block_header")
#: README figure: faults injected (cells of the matrix).
CELLS = len(STEPS) * len(KINDS)


class _Arm(NullProgress):
    """Progress callback that arms one fault when the sequence reaches its step."""

    def __init__(self, bench: Any, event: str, role: str, kind: str, on: str) -> None:
        self.bench, self.event, self.role, self.kind, self.on = bench, event, role, kind, on
        self.armed_at: str | None = None

    def _arm(self, where: str) -> None:
        if self.armed_at is None:
            value = POWER_OFF_S if self.kind == "power_cycle" else None
            self.bench.inject(self.role, self.kind, on=self.on, count=1, value=value)
            self.armed_at = where

    def step(self, name: str, text: str) -> None:
        if self.event == f"step:{name}":
            self._arm(self.event)

    def measurement(self, row: Any) -> None:
        if self.event == f"row:{row.name}":
            self._arm(self.event)


@pytest.fixture(scope="module")
def rig(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    from harness.io.station import load_station
    from harness.model import compute_limits

    folder = tmp_path_factory.mktemp("faults")
    files = write_rig(folder)
    board = load_board(files.board)
    limits = compute_limits(board)
    fixture = load_fixture(files.fixture, board, scope_inputs=4)
    faulthandler.dump_traceback_later(CELLS * CELL_LIMIT_S, exit=True)  # hang guard
    try:
        with started_bench(board, folder, timeout_ms=TIMEOUT_MS) as (bench, station_file):
            yield {
                "board": board,
                "limits": limits,
                "fixture": fixture,
                "bench": bench,
                "station": load_station(station_file),
                "db": folder / "faults.db",
            }
    finally:
        faulthandler.cancel_dump_traceback_later()


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("cell", STEPS, ids=[s[0] for s in STEPS])
def test_fault_at_step(rig: dict[str, Any], cell: tuple[str, ...], kind: str) -> None:
    """One cell of the fault matrix (see the module doc for what must hold)."""
    from harness.instruments.bench import connect

    name, step, event, role, reply_target, command_target = cell
    bench = rig["bench"]
    board = rig["board"]
    bench.clear_faults()
    bench.wait_listening()
    on = reply_target if kind in _REPLY_KINDS else command_target
    arm = _Arm(bench, event, role, kind, on)
    serial = f"SN-{name}-{kind}"
    t0 = time.monotonic()
    error: RunAborted | None = None
    result = None
    with open_store(rig["db"]) as store:
        store.recover_aborted()
        with connect(rig["station"]) as inst:
            try:
                result = run_board(
                    inst,
                    board,
                    rig["limits"],
                    rig["fixture"],
                    serial,
                    store,
                    options=RunOptions(settle_wait_s=0.0),
                    progress=arm,
                )
            except RunAborted as exc:
                error = exc
        (stored,) = store.list_runs(serial=serial)
    elapsed = time.monotonic() - t0
    bench.clear_faults()
    bench.wait_listening()
    assert arm.armed_at is not None, (
        f"the sequence never reached {event}: {stored.status}, {stored.reason}"
    )
    assert elapsed < CELL_LIMIT_S
    assert generator_off(bench), "generator output left on"
    assert bench.max_commanded_vpp() <= safe_vpp(board) * (1 + 1e-9)
    if error is not None:
        assert error.step == step, f"abort names step {error.step!r}, the fault hit {step!r}"
        assert f"role={role}" in str(error), str(error)
        assert stored.status == "aborted"
        assert stored.reason and f"role={role}" in stored.reason
    else:
        assert result is not None and result.status == "complete"
        assert stored.status == "complete" and stored.verdict in ("PASS", "FAIL")
