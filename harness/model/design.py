"""The nominal design of a channel: the vectorised model run on size-one arrays.

``design_channel`` and ``operating_point`` are what the run layer and the reports use;
``validate_board`` is what a loader calls to refuse a board whose circuit cannot work.
Circuit problems are raised as :class:`~harness.errors.BoardFileError` naming the board
file, channel, stage and field (e.g. ``channel.A.stage[0](gain).rc``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np

from harness.errors import BoardFileError
from harness.model.board import Board, Channel, CommonEmitter, EmitterFollower, stage_parts
from harness.model.core import (
    THD_HARMONICS,
    ChainSolution,
    ChannelArrays,
    LargeSignalChain,
    _cos_weights,
    chain_waveform,
    evaluate_channel,
)
from harness.model.params import channel_parameters, nominal_arrays

#: Points per period of the large-signal solution for the nominal design (the Monte Carlo
#: uses fewer; 256 resolves harmonics 2..10 of a clipped wave with negligible aliasing).
NOMINAL_POINTS = 256
NOMINAL_SEARCH_ITERATIONS = 30
#: The nominal search stops once its bracket is this narrow (the secant inside it is far
#: closer still).
NOMINAL_SEARCH_TOL_DB = 1e-3


@dataclass(frozen=True)
class StageDesign:
    """One stage at rest and for small signals.  ``vc_v`` is None for op-amp stages."""

    name: str
    kind: str
    ic_a: float
    ib_a: float
    vb_v: float | None
    ve_v: float | None
    vc_v: float | None
    output_v: float
    gain: float
    input_ohm: float
    output_ohm: float
    swing_pos_v: float  # peak swing of this stage's output above its rest value
    swing_neg_v: float  # ... and below it
    supply_current_a: float


@dataclass(frozen=True)
class ChannelDesign:
    """A channel's nominal figures (SI units; gains are linear and signed unless ``_db``)."""

    channel: str
    gain: float
    gain_db: float
    inverting: bool
    input_ohm: float
    output_ohm: float
    stages: tuple[StageDesign, ...]
    clip_input_vrms: float  # swing-limited threshold referred to the input
    clip_stage: str
    clip_side: Literal["positive", "negative"]  # half-cycle of the channel OUTPUT
    thd_percent: float  # at the nominal level, large-signal solution
    thd_clip_input_vrms: float  # input level where the board's clip criterion is met
    clip_criterion: str
    output_vrms_nominal: float
    supply_current_a: float
    low_corner_hz: float
    settle_time_s: float  # wait after a level change: operating-point time constants
    dc_settle_time_s: float = 0.0  # the output's DC level (last C_out into the load)
    supply_settle_time_s: float = 0.0  # wait after supply on (see harness.model.settling)
    time_constants: tuple[tuple[str, str, float], ...] = ()  # (name, kind, tau_s)

    @property
    def phase_deg(self) -> float:
        return 180.0 if self.inverting else 0.0


def _arrays(
    board: Board, channel: Channel, params: Mapping[str, float] | None, *, search: bool = True
) -> ChannelArrays:
    p = nominal_arrays(channel_parameters(board, channel), params)
    return evaluate_channel(
        board,
        channel,
        p,
        thd_points=NOMINAL_POINTS,
        search_points=NOMINAL_POINTS if search else None,
        search_iterations=NOMINAL_SEARCH_ITERATIONS,
        search_tol_db=NOMINAL_SEARCH_TOL_DB,
    )


def _raise_first(board: Board, res: ChannelArrays) -> None:
    for prob in res.problems:
        if prob.mask[0]:
            raise BoardFileError(board.source, prob.location, prob.reason, hint=prob.hint)


def _channel(board: Board, channel_name: str) -> Channel:
    try:
        return board.channel(channel_name)
    except KeyError:
        names = ", ".join(c.name for c in board.channels)
        raise BoardFileError(
            board.source,
            f"channel.{channel_name}",
            "no such channel",
            hint=f"channels on this board: {names}",
        ) from None


def design_channel(
    board: Board, channel_name: str, params: Mapping[str, float] | None = None
) -> ChannelDesign:
    """Nominal design of one channel.  ``params`` overrides model parameters by key (see
    :func:`harness.model.params.channel_parameters`, e.g. ``{"gain.re": 0.0}``).

    Raises BoardFileError (file, ``channel.<c>.stage[i](<name>).<field>``) when a transistor is
    saturated or cut off at rest or the chain cannot drive its load at the nominal level.
    """
    ch = _channel(board, channel_name)
    res = _arrays(board, ch, params)
    _raise_first(board, res)
    return to_design(board, ch, res, 0)


def to_design(board: Board, ch: Channel, res: ChannelArrays, i: int) -> ChannelDesign:
    """Sample ``i`` of a vectorised result as a :class:`ChannelDesign`."""
    stages = []
    for st, s in zip(ch.stages, res.stages, strict=True):
        bjt = isinstance(st, CommonEmitter | EmitterFollower)
        stages.append(
            StageDesign(
                name=st.name,
                kind=st.kind,
                ic_a=float(s.ic_a[i]),
                ib_a=float(s.ib_a[i]),
                vb_v=float(s.vb_v[i]) if bjt else None,
                ve_v=float(s.ve_v[i]) if bjt else None,
                vc_v=float(s.vc_v[i]) if bjt else None,
                output_v=float(s.vout_dc_v[i]),
                gain=float(s.gain[i]),
                input_ohm=float(s.input_ohm[i]),
                output_ohm=float(s.output_ohm[i]),
                swing_pos_v=float(s.swing_pos_v[i]),
                swing_neg_v=float(s.swing_neg_v[i]),
                supply_current_a=float(s.supply_a[i]),
            )
        )
    gain = float(res.gain[i])
    thd = float(res.thd_percent[i]) if res.thd_percent is not None else math.nan
    thd_clip = (
        float(res.thd_clip_input_vpk[i]) / math.sqrt(2.0)
        if res.thd_clip_input_vpk is not None
        else math.nan
    )
    return ChannelDesign(
        channel=ch.name,
        gain=gain,
        gain_db=20.0 * math.log10(abs(gain)),
        inverting=res.inverting,
        input_ohm=float(res.input_ohm[i]),
        output_ohm=float(res.output_ohm[i]),
        stages=tuple(stages),
        clip_input_vrms=float(res.clip_input_vpk[i]) / math.sqrt(2.0),
        clip_stage=ch.stages[int(res.clip_stage[i])].name,
        clip_side="positive" if bool(res.clip_positive[i]) else "negative",
        thd_percent=thd,
        thd_clip_input_vrms=thd_clip,
        clip_criterion=criterion_text(board),
        output_vrms_nominal=abs(gain) * board.conditions.nominal_input_vrms,
        supply_current_a=float(res.supply_current_a[i]),
        low_corner_hz=float(res.low_corner_hz[i]),
        settle_time_s=float(res.settle_time_s[i]),
        dc_settle_time_s=float(res.dc_settle_time_s[i]),
        supply_settle_time_s=float(res.supply_settle_time_s[i]),
        time_constants=tuple((t.name, t.kind, float(t.tau_s[i])) for t in res.time_constants),
    )


def criterion_text(board: Board) -> str:
    c = board.conditions
    if c.clip_criterion == "compression":
        return f"{c.clip_compression_db:g} dB gain compression"
    return f"THD {c.clip_thd_percent:g} %"


def operating_point_arrays(ch: Channel, res: ChannelArrays) -> dict[str, np.ndarray]:
    """``"<stage>.<quantity>"`` -> volts at rest: collector_v, emitter_v, base_v (BJT stages),
    output_v (op-amp stages)."""
    out: dict[str, np.ndarray] = {}
    for st, s in zip(ch.stages, res.stages, strict=True):
        if isinstance(st, CommonEmitter | EmitterFollower):
            out[f"{st.name}.collector_v"] = s.vc_v
            out[f"{st.name}.emitter_v"] = s.ve_v
            out[f"{st.name}.base_v"] = s.vb_v
        else:
            out[f"{st.name}.output_v"] = s.vout_dc_v
    return out


def operating_point(
    board: Board, channel_name: str, params: Mapping[str, float] | None = None
) -> dict[str, float]:
    """DC voltages at rest, keyed ``"<stage>.<quantity>"`` (see :func:`operating_point_arrays`)."""
    ch = _channel(board, channel_name)
    res = _arrays(board, ch, params, search=False)
    _raise_first(board, res)
    return {k: float(v[0]) for k, v in operating_point_arrays(ch, res).items()}


def _drive(
    board: Board,
    channel_name: str,
    input_vrms: float,
    params: Mapping[str, float] | None,
    n_points: int,
) -> tuple[Channel, ChainSolution]:
    """The nominal chain solved for ``input_vrms`` of fundamental at the input connector: the
    EMF behind ``source_ohm`` is scaled until the input reads that level (the base current
    is not linear, so the source's drop is not either); three passes settle it to 1e-6."""
    ch = _channel(board, channel_name)
    res = _arrays(board, ch, params, search=False)
    _raise_first(board, res)
    p = nominal_arrays(channel_parameters(board, ch), params)
    chain = LargeSignalChain.from_arrays(res, ch, p)
    want = input_vrms * math.sqrt(2.0)
    emf = np.array([want * (1.0 + float(p["source_ohm"][0]) / float(res.input_ohm[0]))])
    _, basis = _cos_weights(n_points // 2, 1)
    for _ in range(4):
        sol = chain_waveform(chain, emf, n_points)
        got = float(np.abs(sol.inp @ basis[:, 1])[0])
        if want == 0 or got == 0 or abs(got / want - 1.0) < 1e-9:
            break
        emf = emf * (want / got)
    return ch, sol


def large_signal_harmonics(
    board: Board,
    channel_name: str,
    input_vrms: float,
    *,
    params: Mapping[str, float] | None = None,
    n_points: int = NOMINAL_POINTS,
) -> np.ndarray:
    """Harmonic amplitudes 0..10 (V peak) of the channel output for a sine of ``input_vrms``
    at its input connector, from the large-signal solution (index 1 is the fundamental)."""
    _, sol = _drive(board, channel_name, input_vrms, params, n_points)
    _, basis = _cos_weights(n_points // 2, THD_HARMONICS)
    h: np.ndarray = np.abs(sol.out @ basis)[0]
    return h


def large_signal_bias(
    board: Board,
    channel_name: str,
    input_vrms: float,
    *,
    params: Mapping[str, float] | None = None,
    n_points: int = NOMINAL_POINTS,
) -> dict[str, float]:
    """Mean node voltages under a sine of ``input_vrms``: the operating point as the coupling
    and bypass capacitors have recharged it (keys as :func:`operating_point`, BJT stages)."""
    ch, sol = _drive(board, channel_name, input_vrms, params, n_points)
    out: dict[str, float] = {}
    for st, (vb, ve, vc) in zip(ch.stages, sol.means, strict=True):
        if isinstance(st, CommonEmitter | EmitterFollower):
            out[f"{st.name}.base_v"] = float(vb[0])
            out[f"{st.name}.emitter_v"] = float(ve[0])
            out[f"{st.name}.collector_v"] = float(vc[0])
    return out


#: Longest wait after a level change the model may ask of a run.  The sequence waits the
#: settle time after every level step (about ten per board), so a minute already makes a
#: board take ten; a longer one means a capacitor whose value or unit is wrong (1000 F for
#: 1 kΩ), not a board to wait for.
MAX_SETTLE_S = 60.0


def check_settle_time(board: Board, ch: Channel, settle_s: float) -> None:
    """Refuse a derived wait over :data:`MAX_SETTLE_S` with a BoardFileError that names the
    channel and its largest capacitor (the usual culprit).  The run layer calls it before it
    waits the model's settle time (an operator's explicit wait is the operator's)."""
    if math.isfinite(settle_s) and settle_s <= MAX_SETTLE_S:
        return
    caps = [
        (part.nominal, f"stage {st.name} {name} = {part.nominal:g} F ({part.ref})")
        for st in ch.stages
        for name, part in stage_parts(st)
        if part.kind == "capacitor"
    ]
    largest = f"; largest capacitor: {max(caps)[1]}" if caps else ""
    raise BoardFileError(
        board.source,
        f"channel.{ch.name}",
        f"settling time {settle_s:.3g} s after a level change (5 × the longest coupling time "
        f"constant) is longer than the {MAX_SETTLE_S:g} s a run may wait{largest}",
        hint="check the capacitors' values and units (farads: 2u2, 100n)",
    )


def validate_board(board: Board) -> None:
    """Refuse a board whose circuit cannot work: raises BoardFileError naming the file and
    ``channel.<c>.stage[i](<name>).<field>`` (saturated or cut off at rest, cannot drive its load).
    Cheap enough for a loader to call: the criterion search is skipped."""
    for ch in board.channels:
        _raise_first(board, _arrays(board, ch, None, search=False))
