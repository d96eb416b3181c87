"""Diagnosis of a stored run: read its measurements, check the board file, rank the faults.

This is the part the report package and ``stageproof diagnose`` call; the ranking itself
(:mod:`harness.diagnose.rank`) takes plain measurements and does no I/O.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from harness.diagnose.names import channel_modes, from_rows
from harness.diagnose.rank import Candidate, Evidence, rank_faults
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


#: An oscillation above this frequency is a parasitic one (a follower or output stage
#: driving a capacitive load, a missing base stopper); below MOTORBOATING_HZ it is
#: "motorboating", feedback through a poorly decoupled supply (common practice).
PARASITIC_HZ = 20e3
MOTORBOATING_HZ = 20.0


def signal_candidates(board: Board, modes: Mapping[str, Mapping[str, Any]]) -> list[Candidate]:
    """Candidates for channel modes no component fault of the stage model produces: an
    oscillation (one candidate per stage, the likelier stages first) and mains hum coupled
    into the input.  Their text replays on the simulated bench (``A.buffer:oscillate=…``)."""
    out: list[Candidate] = []
    for ch_name, mode in modes.items():
        ev = mode.get("evidence") or {}
        try:
            channel = board.channel(ch_name)
        except KeyError:
            continue
        gain = 10 ** (float(ev.get("expected_gain_db") or 0.0) / 20)
        seen = [Evidence(f"{ch_name}.condition", mode.get("text", mode.get("mode")), None, None)]
        if mode.get("mode") == "oscillating" and ev.get("frequency_hz"):
            f = float(ev["frequency_hz"])
            level = float(ev.get("level_vpk") or 0.0)
            stages = list(channel.stages)
            if f >= PARASITIC_HZ:  # the output end first: followers, then the rest
                order = sorted(
                    range(len(stages)), key=lambda i: (stages[i].kind != "emitter_follower", -i)
                )
                stages = [stages[i] for i in order]
            weights = [0.5**k for k in range(len(stages))]
            total = sum(weights)
            for st, w in zip(stages, weights, strict=True):
                out.append(
                    _signal(
                        f"{ch_name}.{st.name}",
                        "oscillate",
                        f,
                        f"{f:.6g},{level:.3g}",
                        0.9 * w / total,
                        seen,
                        ch_name,
                        st.name,
                    )
                )
        elif mode.get("mode") == "hum" and ev.get("frequency_hz"):
            f = float(ev["frequency_hz"])
            at_input = float(ev.get("level_vrms") or 0.0) * 2**0.5 / max(gain, 1e-12)
            out.append(_signal(ch_name, "hum", f, f"{f:g},{at_input:.3g}", 0.9, seen, ch_name))
    return out


def _signal(
    ref: str,
    kind: str,
    f: float,
    detail: str,
    probability: float,
    seen: list[Evidence],
    channel: str,
    stage: str = "",
) -> Candidate:
    """A candidate the stage model did not score: the channel's mode is its evidence."""
    return Candidate(
        ref=ref,
        kind=kind,
        fitted_value=f,
        score=0.0,
        explained=[f"{channel}.condition"],
        evidence=seen,
        detail=detail,
        channel=channel,
        stage=stage,
        probability=probability,
    )


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
    modes = channel_modes(rows)
    # a channel in a failure mode does not agree with a good board, whatever its rows say
    screened[:] = [c for c in screened if c not in modes]
    signal = signal_candidates(board, modes)
    if signal:
        # what the stage model cannot predict comes first; the component ranking keeps its
        # order behind, its probabilities shared with them
        total = sum(c.probability for c in signal)
        if total > 0.9:  # several channels in such a mode: they share 90 %
            signal = [replace(c, probability=c.probability * 0.9 / total) for c in signal]
            total = 0.9
        share = 1.0 - total
        cands = signal + [replace(c, probability=c.probability * share) for c in cands]
        if top:
            cands = cands[:top]
    return Diagnosis(
        run_id=run_id,
        serial=run.serial,
        board_name=board.name,
        candidates=cands,
        measurements=meas,
        warnings=warnings,
        screened_out=screened,
    )
