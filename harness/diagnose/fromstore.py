"""Diagnosis of a stored run: read its measurements, check the board file, rank the faults.

This is the part the report package and ``stageproof diagnose`` call; the ranking itself
(:mod:`harness.diagnose.rank`) takes plain measurements and does no I/O.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from harness.diagnose.names import from_rows
from harness.diagnose.rank import Candidate, rank_faults
from harness.errors import AnalysisError
from harness.model.board import Board


@dataclass(frozen=True)
class Diagnosis:
    """Ranked candidates for one run, with what the ranking was based on."""

    run_id: int | None
    serial: str
    board_name: str
    candidates: list[Candidate]
    measurements: Mapping[str, tuple[Any, float | None]]
    warnings: list[str] = field(default_factory=list)
    screened_out: list[str] = field(default_factory=list)

    @property
    def best(self) -> Candidate | None:
        return self.candidates[0] if self.candidates else None

    def top(self, n: int) -> list[Candidate]:
        return self.candidates[:n]

    def to_dict(self, top: int | None = None) -> dict[str, Any]:
        cands = self.candidates[:top] if top else self.candidates
        return {
            "run_id": self.run_id,
            "serial": self.serial,
            "board": self.board_name,
            "warnings": list(self.warnings),
            "channels_screened_out": list(self.screened_out),
            "measurements": {
                k: {"value": v, "uncertainty": u} for k, (v, u) in sorted(self.measurements.items())
            },
            "candidates": [c.to_dict() for c in cands],
        }


def diagnose_run(
    store: Any,
    run_id: int,
    board: Board,
    *,
    top: int | None = None,
    spreads: Mapping[str, Mapping[str, float]] | None = None,
) -> Diagnosis:
    """Rank single faults for stored run ``run_id`` of ``board``.

    Warns (in ``Diagnosis.warnings``) when the run was made with another board file (digest
    mismatch) or did not complete; raises AnalysisError when the run holds no measurement
    the diagnosis can use.
    """
    run = store.get_run(run_id)
    warnings: list[str] = []
    if board.digest and run.board_digest and board.digest != run.board_digest:
        warnings.append(
            f"board file {board.source} (sha256 {board.digest[:12]}) is not the "
            f"one run {run_id} was tested against (sha256 {run.board_digest[:12]},"
            f" {run.board_file}); candidates may be wrong"
        )
    if run.status != "complete":
        warnings.append(
            f"run {run_id} is {run.status}"
            + (f" ({run.reason})" if run.reason else "")
            + ": diagnosing from the measurements it holds"
        )
    elif run.verdict == "PASS":
        warnings.append(f"run {run_id} passed: the board may have no fault")
    rows = store.measurements(run_id)
    meas = from_rows(rows)
    known = {c.name for c in board.channels}
    foreign = sorted({k.split(".", 1)[0] for k in meas if "." in k} - known)
    if foreign:
        warnings.append(
            f"measurements of channel(s) {', '.join(foreign)} are not on this board; ignored"
        )
        meas = {k: v for k, v in meas.items() if k.split(".", 1)[0] not in foreign or "." not in k}
    if not meas:
        raise AnalysisError(
            f"run {run_id} holds no measurement the diagnosis can use",
            hint="diagnose a run that reached the DC or nominal-level step",
        )
    screened: list[str] = []
    cands = rank_faults(board, meas, top=top, spreads=spreads, screened_out=screened)
    return Diagnosis(
        run_id=run_id,
        serial=run.serial,
        board_name=board.name,
        candidates=cands,
        measurements=meas,
        warnings=warnings,
        screened_out=screened,
    )
