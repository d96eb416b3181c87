"""Test limits from component tolerances: a vectorised Monte Carlo plus worst-case corners.

``compute_limits`` draws ``policy.samples`` boards (numpy ``default_rng(policy.seed)``, each
parameter drawn as described in :mod:`harness.model.params`), runs the same model as the
nominal design on all of them at once, and takes the central interval holding
``policy.coverage`` of the workable boards as the limits (THD: the one-sided upper quantile).
Every figure carries its provenance, and :attr:`BoardLimits.digest` identifies a frozen set.

Worst case: the sign of each quantity's change with each parameter is found from one-at-a-time
extremes; the two corners that push every parameter the way that raises (lowers) the quantity
are then evaluated.  The report states whether the Monte Carlo interval covers them; usually it
does not, which is expected: all parts at their extremes at once is rarer than the coverage.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

import harness
from harness.model.board import Board, Channel
from harness.model.core import ChannelArrays, evaluate_channel
from harness.model.design import (
    ChannelDesign,
    criterion_text,
    design_channel,
    operating_point_arrays,
)
from harness.model.params import (
    ParamSpec,
    channel_parameters,
    corner_arrays,
    sample_arrays,
    supply_parameters,
)
from harness.quantities import CLIP_INPUT, GAIN, LOW_CORNER, SUPPLY_CURRENT, THD, dc_point

#: Large-signal resolution in the Monte Carlo (points per period; the most interpolation steps
#: of the criterion search inside its bracket; the width it closes the bracket to).
#: 32 points resolve harmonics 2..10 of the soft BJT nonlinearity exactly and place the 1 % THD
#: point of a hard clipper within 0.01 dB of the 256-point nominal solution (see tests).
MC_THD_POINTS = 32
MC_SEARCH_POINTS = 32
MC_SEARCH_ITERATIONS = 10
MC_SEARCH_TOL_DB = 0.02
#: Boards of the Monte Carlo whose THD-criterion clipping threshold is searched: every board
#: of a draw up to this many (the default 20,000 of the demo boards are all searched, in
#: about 0.8 s for the twin preamp on these 2-core machines with the compiled periodic
#: solve).  Beyond, the search runs on the first ``MC_SEARCH_SAMPLES`` draws only, to bound
#: its memory (some 1.7 kB a board): they are independent draws of the same distributions,
#: an unbiased subsample whose quantiles carry a sampling error well inside the model's own
#: 0.1 dB uncertainty that is added to the band anyway.  Stated in the provenance.
MC_SEARCH_SAMPLES = 50_000

#: The model's own uncertainty, per quantity: how far it may sit from the physics (ngspice's
#: Gummel-Poon transient, settled) on any workable common-emitter or CE-into-follower board,
#: as measured by tests/model/test_model_spice_random.py over boards drawn at random up to
#: twice the clipping threshold.  Bias in volts, gain and THD relative, clipping in dB.
MODEL_UNCERTAINTY = {"bias_v": 0.03, "gain_rel": 0.01, "thd_rel": 0.15, "clip_db": 0.1}
MODEL_UNCERTAINTY_SOURCE = (
    "model against ngspice (Gummel-Poon BJT, settled transient + fourier) on 30 random "
    "common-emitter and CE-into-follower boards up to twice the clipping threshold "
    "(tests/model/test_model_spice_random.py): bias within 30 mV, gain 1 %, THD 15 %, "
    "1 % THD crossing and 1 dB compression 0.1 dB; added to the Monte Carlo band of gain, "
    "clipping threshold, THD and operating point (supply current and low corner are not "
    "widened: the comparison does not measure them)"
)

DISTRIBUTIONS = (
    "resistors, capacitors, supply and load uniform within tolerance; transistor beta and "
    "V_CE(sat) uniform, I_S log-uniform between data-sheet min and max; op-amp headroom and "
    "quiescent current uniform between min and max"
)


def _r(x: float | None) -> float | None:
    """Round for the canonical JSON: 9 significant digits survive any platform's last-bit noise."""
    if x is None or not math.isfinite(x):
        return None if x is None else float(x)
    return float(f"{x:.9g}")


@dataclass(frozen=True)
class Limit:
    """A tested quantity's expected value and its acceptance band (``None``: no bound)."""

    name: str
    unit: str
    nominal: float
    low: float | None
    high: float | None

    def contains(self, x: float) -> bool:
        if not math.isfinite(x):
            return False
        return (self.low is None or x >= self.low) and (self.high is None or x <= self.high)

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "unit": self.unit,
            "nominal": _r(self.nominal),
            "low": _r(self.low),
            "high": _r(self.high),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Limit:
        return cls(d["name"], d["unit"], d["nominal"], d.get("low"), d.get("high"))


@dataclass(frozen=True)
class Provenance:
    """Where a set of limits came from, so a production line can freeze and trace them."""

    method: str
    samples: int
    coverage: float
    seed: int
    board_digest: str
    software_version: str
    distributions: str = DISTRIBUTIONS
    thd_points: int = MC_THD_POINTS
    criterion: str = ""
    worst_case: bool = True
    #: The model's own uncertainty added to the bands (empty: limits frozen before it was).
    model_uncertainty: dict[str, float] = field(default_factory=dict)
    model_uncertainty_source: str = ""
    #: Boards whose THD-criterion threshold was searched (0: every sample, limits frozen
    #: before the subsample).
    search_samples: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "samples": self.samples,
            "coverage": self.coverage,
            "seed": self.seed,
            "board_digest": self.board_digest,
            "software_version": self.software_version,
            "distributions": self.distributions,
            "thd_points": self.thd_points,
            "criterion": self.criterion,
            "worst_case": self.worst_case,
            "model_uncertainty": dict(self.model_uncertainty),
            "model_uncertainty_source": self.model_uncertainty_source,
            "search_samples": self.search_samples,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Provenance:
        return cls(**{k: d[k] for k in d})


@dataclass(frozen=True)
class WorstCase:
    """Extreme-corner values of one quantity and whether the Monte Carlo interval covers them."""

    low: float
    high: float
    covered: bool

    def to_dict(self) -> dict[str, Any]:
        return {"low": _r(self.low), "high": _r(self.high), "covered": self.covered}


@dataclass(frozen=True)
class ChannelLimits:
    """The limits of one channel.  ``clip_input_vrms`` is the input level where the board's
    criterion (THD reaching N %, or N dB compression) is met: what the test run measures;
    ``swing_clip_input_vrms`` is the swing-limited estimate from the stage bounds."""

    channel: str
    gain_db: Limit
    clip_input_vrms: Limit
    swing_clip_input_vrms: Limit
    thd_percent: Limit
    supply_current_a: Limit
    low_corner_hz: Limit
    operating_point: dict[str, Limit]
    phase_deg: float
    inverting: bool
    clip_stage: str
    clip_side: str
    clip_side_fraction: dict[str, float]
    clip_stage_fraction: dict[str, float]
    settle_time_s: float
    output_vrms_nominal: float
    workable_fraction: float
    worst_case: dict[str, WorstCase] = field(default_factory=dict)
    #: time for the output's DC level to settle (a DC shift only; harness.model.settling)
    dc_settle_time_s: float = 0.0
    #: wait after supply on (operating point within 0.5 % of the supply span)
    supply_settle_time_s: float = 0.0
    #: the nominal design's time constants: name -> {"kind": ..., "tau_s": ...}
    time_constants: dict[str, dict[str, Any]] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "channel": self.channel,
            "gain_db": self.gain_db.to_dict(),
            "clip_input_vrms": self.clip_input_vrms.to_dict(),
            "swing_clip_input_vrms": self.swing_clip_input_vrms.to_dict(),
            "thd_percent": self.thd_percent.to_dict(),
            "supply_current_a": self.supply_current_a.to_dict(),
            "low_corner_hz": self.low_corner_hz.to_dict(),
            "operating_point": {k: v.to_dict() for k, v in self.operating_point.items()},
            "phase_deg": self.phase_deg,
            "inverting": self.inverting,
            "clip_stage": self.clip_stage,
            "clip_side": self.clip_side,
            "clip_side_fraction": {k: _r(v) for k, v in self.clip_side_fraction.items()},
            "clip_stage_fraction": {k: _r(v) for k, v in self.clip_stage_fraction.items()},
            "settle_time_s": _r(self.settle_time_s),
            "output_vrms_nominal": _r(self.output_vrms_nominal),
            "workable_fraction": _r(self.workable_fraction),
            "worst_case": {k: v.to_dict() for k, v in self.worst_case.items()},
            "dc_settle_time_s": _r(self.dc_settle_time_s),
            "supply_settle_time_s": _r(self.supply_settle_time_s),
            "time_constants": {
                k: {"kind": v["kind"], "tau_s": _r(v["tau_s"])}
                for k, v in self.time_constants.items()
            },
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ChannelLimits:
        lim = {
            k: Limit.from_dict(d[k])
            for k in (
                "gain_db",
                "clip_input_vrms",
                "swing_clip_input_vrms",
                "thd_percent",
                "supply_current_a",
                "low_corner_hz",
            )
        }
        return cls(
            channel=d["channel"],
            **lim,
            operating_point={k: Limit.from_dict(v) for k, v in d["operating_point"].items()},
            phase_deg=d["phase_deg"],
            inverting=d["inverting"],
            clip_stage=d["clip_stage"],
            clip_side=d["clip_side"],
            clip_side_fraction=dict(d["clip_side_fraction"]),
            clip_stage_fraction=dict(d["clip_stage_fraction"]),
            settle_time_s=d["settle_time_s"],
            output_vrms_nominal=d["output_vrms_nominal"],
            workable_fraction=d["workable_fraction"],
            worst_case={
                k: WorstCase(v["low"], v["high"], v["covered"])
                for k, v in d.get("worst_case", {}).items()
            },
            dc_settle_time_s=d.get("dc_settle_time_s", 0.0),
            supply_settle_time_s=d.get("supply_settle_time_s", d["settle_time_s"]),
            time_constants={k: dict(v) for k, v in d.get("time_constants", {}).items()},
        )


@dataclass(frozen=True)
class BoardLimits:
    """Limits for every channel of a board, with their provenance."""

    board: str
    part_number: str
    revision: str
    channels: dict[str, ChannelLimits]
    supply_current_a: Limit
    provenance: Provenance

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready, rounded to 9 significant digits (see :attr:`digest`)."""
        return {
            "board": {
                "name": self.board,
                "part_number": self.part_number,
                "revision": self.revision,
            },
            "provenance": self.provenance.to_dict(),
            "supply_current_a": self.supply_current_a.to_dict(),
            "channels": {k: v.to_dict() for k, v in self.channels.items()},
        }

    @property
    def digest(self) -> str:
        """sha256 of the canonical JSON (sorted keys, no spaces): names a frozen limit set."""
        text = json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"), allow_nan=False)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> BoardLimits:
        """Rebuild frozen limits from :meth:`to_dict` output (the digest is preserved)."""
        return cls(
            board=d["board"]["name"],
            part_number=d["board"]["part_number"],
            revision=d["board"]["revision"],
            channels={k: ChannelLimits.from_dict(v) for k, v in d["channels"].items()},
            supply_current_a=Limit.from_dict(d["supply_current_a"]),
            provenance=Provenance.from_dict(d["provenance"]),
        )


# --- computing ---------------------------------------------------------------------------------


def _interval(x: np.ndarray, coverage: float) -> tuple[float, float]:
    x = x[np.isfinite(x)]
    if x.size == 0:
        return math.nan, math.nan
    lo, hi = np.quantile(x, [(1.0 - coverage) / 2.0, (1.0 + coverage) / 2.0])
    return float(lo), float(hi)


def _quantities(res: ChannelArrays) -> dict[str, np.ndarray]:
    """The limited quantities of a vectorised result, in the units the limits use."""
    with np.errstate(divide="ignore"):
        q = {
            "gain_db": 20.0 * np.log10(np.abs(res.gain)),
            "swing_clip_input_vrms": res.clip_input_vpk / math.sqrt(2.0),
            "supply_current_a": res.supply_current_a,
            "low_corner_hz": res.low_corner_hz,
        }
    if res.thd_percent is not None:
        q["thd_percent"] = res.thd_percent
    if res.thd_clip_input_vpk is not None:
        q["clip_input_vrms"] = res.thd_clip_input_vpk / math.sqrt(2.0)
    return q


def _evaluate(
    board: Board,
    ch: Channel,
    p: Mapping[str, np.ndarray],
    workers: int,
    search_samples: int | None = None,
) -> ChannelArrays:
    """Every quantity over all samples; the criterion threshold over the first
    ``search_samples`` of them (all when None or when there are no more), NaN beyond."""
    n = max((np.size(v) for v in p.values()), default=0)
    if search_samples is None or n <= search_samples:
        return evaluate_channel(
            board,
            ch,
            p,
            thd_points=MC_THD_POINTS,
            search_points=MC_SEARCH_POINTS,
            search_iterations=MC_SEARCH_ITERATIONS,
            workers=workers,
            search_tol_db=MC_SEARCH_TOL_DB,
        )
    res = evaluate_channel(
        board, ch, p, thd_points=MC_THD_POINTS, search_points=None, workers=workers
    )
    head = {k: (v[:search_samples] if np.size(v) == n else v) for k, v in p.items()}
    part = evaluate_channel(
        board,
        ch,
        head,
        thd_points=MC_THD_POINTS,
        search_points=MC_SEARCH_POINTS,
        search_iterations=MC_SEARCH_ITERATIONS,
        workers=workers,
        search_tol_db=MC_SEARCH_TOL_DB,
    )
    if part.thd_clip_input_vpk is not None:
        full = np.full(n, np.nan)
        full[:search_samples] = part.thd_clip_input_vpk
        res.thd_clip_input_vpk = full
    return res


def _worst_case(
    board: Board, ch: Channel, specs: tuple[ParamSpec, ...], workers: int
) -> dict[str, tuple[float, float]]:
    """Sensitivity-signed extreme corners (see module docstring): quantity -> (low, high)."""
    varied = [j for j, s in enumerate(specs) if s.low != s.high]
    n_p = len(specs)
    oat = np.zeros((2 * len(varied), n_p))
    for i, j in enumerate(varied):
        oat[2 * i, j], oat[2 * i + 1, j] = 1.0, -1.0
    res = _evaluate(board, ch, corner_arrays(specs, oat), workers)
    q_oat = _quantities(res)
    names = list(q_oat)
    corners = np.zeros((2 * len(names), n_p))
    for k, name in enumerate(names):
        v = q_oat[name]
        for i, j in enumerate(varied):
            d = v[2 * i] - v[2 * i + 1]
            sign = 0.0 if not np.isfinite(d) or d == 0 else math.copysign(1.0, d)
            corners[2 * k, j], corners[2 * k + 1, j] = sign, -sign
    res_c = _evaluate(board, ch, corner_arrays(specs, corners), workers)
    ok = res_c.workable
    q_c = _quantities(res_c)
    out: dict[str, tuple[float, float]] = {}
    for k, name in enumerate(names):
        both = np.array([q_c[name][2 * k], q_c[name][2 * k + 1]])
        both = np.where(ok[2 * k : 2 * k + 2], both, np.nan)
        out[name] = (
            float(np.nanmin(both)) if np.any(np.isfinite(both)) else math.nan,
            float(np.nanmax(both)) if np.any(np.isfinite(both)) else math.nan,
        )
    return out


def _channel_limits(
    board: Board,
    ch: Channel,
    design: ChannelDesign,
    res: ChannelArrays,
    coverage: float,
    worst: dict[str, tuple[float, float]] | None,
) -> ChannelLimits:
    ok = res.workable
    q = {k: v[ok] for k, v in _quantities(res).items()}

    u = MODEL_UNCERTAINTY

    def lim(
        key: str,
        name: str,
        unit: str,
        nominal: float,
        one_sided: bool = False,
        widen: tuple[float, float] = (0.0, 1.0),
    ) -> Limit:
        """Monte Carlo band of ``key``, then widened by the model's uncertainty: ``widen`` is
        (added, factor): low - added, high + added, or low / factor, high * factor."""
        add, fac = widen
        x = q[key]
        if one_sided:
            x = x[np.isfinite(x)]
            high = float(np.quantile(x, coverage)) if x.size else math.nan
            return Limit(name, unit, nominal, None, max(high, nominal) * fac + add)
        lo, hi = _interval(x, coverage)
        return Limit(
            name, unit, nominal, min(lo, nominal) / fac - add, max(hi, nominal) * fac + add
        )

    gain = lim(
        GAIN.limit_key(),
        GAIN.label,
        GAIN.unit,
        design.gain_db,
        widen=(20 * math.log10(1 + u["gain_rel"]), 1.0),
    )
    clip = lim(
        CLIP_INPUT.limit_key(),
        CLIP_INPUT.label,
        CLIP_INPUT.unit,
        design.thd_clip_input_vrms,
        widen=(0.0, 10 ** (u["clip_db"] / 20)),
    )
    swing = lim(
        "swing_clip_input_vrms", "swing-limited clipping threshold", "V rms", design.clip_input_vrms
    )
    thd = lim(
        THD.limit_key(),
        THD.label,
        THD.unit,
        design.thd_percent,
        one_sided=True,
        widen=(0.0, 1.0 + u["thd_rel"]),
    )
    spec = board.conditions.thd_limit_percent
    if spec is not None:  # the board's specification governs; the model's figure stays nominal
        thd = Limit(
            f"{THD.label} (board specification)", THD.unit, design.thd_percent, None, float(spec)
        )
    supply = lim(
        SUPPLY_CURRENT.limit_key(),
        SUPPLY_CURRENT.label,
        SUPPLY_CURRENT.unit,
        design.supply_current_a,
    )
    corner = lim(LOW_CORNER.limit_key(), LOW_CORNER.label, LOW_CORNER.unit, design.low_corner_hz)
    op_nominal = {}
    for s in design.stages:
        if s.vc_v is not None:
            op_nominal.update(
                {
                    f"{s.name}.collector_v": s.vc_v,
                    f"{s.name}.emitter_v": s.ve_v,
                    f"{s.name}.base_v": s.vb_v,
                }
            )
        else:
            op_nominal[f"{s.name}.output_v"] = s.output_v
    op = {}
    for key, arr in operating_point_arrays(ch, res).items():
        lo, hi = _interval(arr[ok], coverage)
        v_nom = op_nominal[key]
        assert v_nom is not None  # every BJT stage has all three voltages
        nom = float(v_nom)
        unit = dc_point(key).unit
        op[key] = Limit(key, unit, nom, min(lo, nom) - u["bias_v"], max(hi, nom) + u["bias_v"])
    pos = res.clip_positive[ok]
    stage_idx = res.clip_stage[ok]
    n_ok = max(int(ok.sum()), 1)
    wc: dict[str, WorstCase] = {}
    if worst is not None:
        by_key = {
            "gain_db": gain,
            "clip_input_vrms": clip,
            "thd_percent": thd,
            "supply_current_a": supply,
            "swing_clip_input_vrms": swing,
            "low_corner_hz": corner,
        }
        for key, (lo, hi) in worst.items():
            limit = by_key[key]
            covered = (limit.low is None or lo >= limit.low) and (
                limit.high is None or hi <= limit.high
            )
            wc[key] = WorstCase(lo, hi, bool(covered))
    settle = float(np.max(res.settle_time_s[ok])) if ok.any() else design.settle_time_s
    dc_settle = float(np.max(res.dc_settle_time_s[ok])) if ok.any() else design.dc_settle_time_s
    on_settle = (
        float(np.max(res.supply_settle_time_s[ok])) if ok.any() else design.supply_settle_time_s
    )
    return ChannelLimits(
        channel=ch.name,
        gain_db=gain,
        clip_input_vrms=clip,
        swing_clip_input_vrms=swing,
        thd_percent=thd,
        supply_current_a=supply,
        low_corner_hz=corner,
        operating_point=op,
        phase_deg=design.phase_deg,
        inverting=design.inverting,
        clip_stage=design.clip_stage,
        clip_side=design.clip_side,
        clip_side_fraction={
            "positive": float(pos.sum()) / n_ok,
            "negative": float((~pos).sum()) / n_ok,
        },
        clip_stage_fraction={
            st.name: float((stage_idx == j).sum()) / n_ok for j, st in enumerate(ch.stages)
        },
        settle_time_s=max(settle, design.settle_time_s),
        output_vrms_nominal=design.output_vrms_nominal,
        workable_fraction=float(ok.mean()),
        worst_case=wc,
        dc_settle_time_s=max(dc_settle, design.dc_settle_time_s),
        supply_settle_time_s=max(on_settle, design.supply_settle_time_s),
        time_constants={
            name: {"kind": kind, "tau_s": tau} for name, kind, tau in design.time_constants
        },
    )


#: Peak memory of the Monte Carlo per board drawn: a fixed part, a part per stage of the
#: longest channel (the channels are evaluated one after the other) and a part per board
#: searched for the criterion threshold (its brackets, last points and the periodic state it
#: restarts from).  Measured with tracemalloc on the demo boards (benchmarks/bench_memory.py,
#: tests/reliability/test_memory.py): 817 B per board for one-stage channels, 1267 B for
#: two-stage ones at 80,000 boards without the search, 2.5 kB per two-stage board with it at
#: 50,000; the figures here carry a margin of about a third, and a fixed part for the
#: worst-case corners and the nominal design.
MC_BYTES_PER_BOARD = 500
MC_BYTES_PER_BOARD_STAGE = 600
MC_BYTES_PER_SEARCHED_BOARD = 1700
MC_BYTES_FIXED = 20 << 20


def limits_memory_bytes(board: Board, samples: int) -> int:
    """Estimated peak memory of :func:`compute_limits` with ``samples`` boards (bytes)."""
    stages = max((len(ch.stages) for ch in board.channels), default=1)
    per_board = MC_BYTES_PER_BOARD + MC_BYTES_PER_BOARD_STAGE * stages
    searched = min(int(samples), MC_SEARCH_SAMPLES) * MC_BYTES_PER_SEARCHED_BOARD
    return MC_BYTES_FIXED + int(samples) * per_board + searched


def compute_limits(
    board: Board, *, samples: int | None = None, seed: int | None = None, workers: int = 2
) -> BoardLimits:
    """Limits for every channel of ``board`` (see the module docstring).

    ``samples`` and ``seed`` default to the board's ``[limits]`` policy.  Raises BoardFileError
    (file, channel, stage, field) when the nominal design cannot work.
    """
    pol = board.policy
    n = int(samples if samples is not None else pol.samples)
    if n < 10:
        raise ValueError("samples must be at least 10")
    sd = int(seed if seed is not None else pol.seed)
    designs = {ch.name: design_channel(board, ch.name) for ch in board.channels}
    rng = np.random.default_rng(sd)
    shared = sample_arrays(supply_parameters(board), rng, n)
    channels: dict[str, ChannelLimits] = {}
    total = np.zeros(n)
    all_ok = np.ones(n, dtype=bool)
    for ch in board.channels:
        specs = channel_parameters(board, ch)
        p = sample_arrays(specs, rng, n, shared=shared)
        res = _evaluate(board, ch, p, workers, MC_SEARCH_SAMPLES)
        worst = _worst_case(board, ch, specs, workers) if pol.worst_case else None
        channels[ch.name] = _channel_limits(board, ch, designs[ch.name], res, pol.coverage, worst)
        total += res.supply_current_a
        all_ok &= res.workable
    lo, hi = _interval(total[all_ok], pol.coverage)
    nom = sum(d.supply_current_a for d in designs.values())
    prov = Provenance(
        method=pol.method,
        samples=n,
        coverage=pol.coverage,
        seed=sd,
        board_digest=board.digest,
        software_version=harness.__version__,
        criterion=criterion_text(board),
        worst_case=pol.worst_case,
        model_uncertainty=dict(MODEL_UNCERTAINTY),
        model_uncertainty_source=MODEL_UNCERTAINTY_SOURCE,
        search_samples=min(n, MC_SEARCH_SAMPLES),
    )
    return BoardLimits(
        board=board.name,
        part_number=board.part_number,
        revision=board.revision,
        channels=channels,
        supply_current_a=Limit("board supply current", "A", nom, min(lo, nom), max(hi, nom)),
        provenance=prov,
    )
