"""Measurements of a simulated board made the way the sequencer makes them, in-process.

``harness.sim.physics.BoardSim`` gives the periodic steady state; an 8-bit scope record of
it (coherent plan, range chosen like the sequencer's, 80 % fill) is analysed with
``harness.measure.analyze_uniform``; the clipping threshold comes from
``harness.measure.next_search_level`` started at the model's prediction; DC test points and
the supply current from ``BoardSim.operating_point`` / ``supply_current_a`` with the
sequencer's common-practice read-back uncertainties.  The result is the mapping
``harness.diagnose.rank_faults`` takes.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from harness.diagnose.names import freq_quantity, key
from harness.errors import AnalysisError, StageproofError
from harness.measure import ClipCriterion, analyze_uniform, next_search_level, plan_coherent
from harness.model.board import Board
from harness.model.design import design_channel
from harness.run.bench_ops import choose_range
from harness.run.decisions import (
    amplitude_rel_u,
    gain_uncertainty_db,
    thd_uncertainty_percent,
    threshold_uncertainty_db,
)
from harness.sim.physics import BoardSim

RATES = (1e4, 2e4, 5e4, 1e5, 2e5, 5e5, 1e6)
LENGTHS = (1000, 2000, 4096, 5000, 8192)
RANGES = (0.04, 0.08, 0.2, 0.4, 0.8, 2, 4, 8, 20, 40, 80)
BITS = 8
NOISE_V = 200e-6  # scope input noise, rms (common practice for an 8-bit bench scope)
SIM_PARAMS = {"steps_per_period": 128}


def _record(
    sim: BoardSim, channel: str, level_vrms: float, f_hz: float, rng: np.random.Generator
) -> Any:
    board = sim.board
    plan = plan_coherent(f_hz, RATES, LENGTHS, min_cycles=5)
    src = board.conditions.source_ohm
    # the generator level is set for the DUT input: EMF through the source divider
    emf_vpk = level_vrms * math.sqrt(2.0)
    resp = sim.respond(channel, emf_vpk, plan.frequency_hz, source_ohm=src)
    t = np.arange(plan.n_samples) / plan.sample_rate_hz
    v_in, v_out = resp.evaluate(t)
    out = []
    for v in (v_in, v_out):
        v = v - np.mean(v) + rng.normal(0.0, NOISE_V, v.size)
        rng_vpp = choose_range(float(np.max(v) - np.min(v)), RANGES)
        lsb = rng_vpp / 2**BITS
        codes = np.clip(np.round(v / lsb), -(2 ** (BITS - 1)), 2 ** (BITS - 1) - 1)
        out.append((codes * lsb, (-rng_vpp / 2, rng_vpp / 2 - lsb)))
    (x, in_adc), (y, out_adc) = out
    return analyze_uniform(
        x,
        y,
        plan.sample_rate_hz,
        in_adc=in_adc,
        out_adc=out_adc,
        adc_bits=BITS,
        frequency_hz=plan.frequency_hz,
    )


def measure_board(
    board: Board,
    faults: tuple[str, ...] = (),
    *,
    channels: tuple[str, ...] | None = None,
    resolution_db: float = 0.5,
    max_steps: int = 6,
    seed: int = 1,
) -> dict[str, tuple[Any, float | None]]:
    """Measure ``channels`` (default all) of the board with ``faults`` injected."""
    sim = BoardSim(board, faults, params=SIM_PARAMS)
    rng = np.random.default_rng(seed)
    cond = board.conditions
    crit = ClipCriterion(
        kind=cond.clip_criterion,
        threshold_percent=cond.clip_thd_percent,
        db=cond.clip_compression_db,
    )
    out: dict[str, tuple[Any, float | None]] = {}
    for ch in board.channels:
        if channels is not None and ch.name not in channels:
            continue
        c = ch.name
        for k, v in sim.operating_point(c).items():
            out[key(c, k)] = (v, 2 * (0.0005 * abs(v) + 0.5e-3))
        try:
            nominal = _record(sim, c, cond.nominal_input_vrms, cond.frequency_hz, rng)
        except AnalysisError:  # no sine above the noise: a dead channel
            out[key(c, "gain_db")] = (-math.inf, None)
            continue
        if nominal.gain_db is None:
            raise AnalysisError(f"channel {c}: nominal record over range")
        u_in = amplitude_rel_u(nominal.floor.thdn_ratio, nominal.n_samples)
        u_out = amplitude_rel_u((nominal.thdn_percent or 0.0) / 100, nominal.n_samples)
        out[key(c, "gain_db")] = (nominal.gain_db, gain_uncertainty_db(u_in, u_out))
        out[key(c, "thd_percent")] = (
            nominal.thd_percent,
            thd_uncertainty_percent(nominal.thd_percent or 0.0, nominal.floor.thd_percent),
        )
        out[key(c, "thd_floor_percent")] = (nominal.floor.thd_percent, None)
        for f in cond.extra_frequencies_hz:
            try:
                a = _record(sim, c, cond.nominal_input_vrms, f, rng)
            except AnalysisError:
                continue
            if a.gain_db is not None:
                out[key(c, freq_quantity(f))] = (a.gain_db, gain_uncertainty_db(u_in, u_out))
        # clipping threshold search, started at the model's prediction, like the sequencer
        try:
            start = design_channel(board, c).thd_clip_input_vrms
        except StageproofError:  # a faulted board the model refuses: start from a guess
            start = cond.nominal_input_vrms * 4
        points = [nominal]
        step = None
        for _ in range(max_steps):
            pts = points[1:] or (
                [nominal] if (nominal.thd_percent or 0) >= crit.threshold_percent else []
            )
            step = (
                next_search_level(
                    pts,
                    crit,
                    start_vrms=min(start, cond.safe_input_vrms),
                    max_vrms=cond.safe_input_vrms,
                    resolution_db=resolution_db,
                    expand_db=3.0,
                )
                if pts
                else None
            )
            if step is not None and step.done:
                break
            level = step.level_vrms if step is not None else min(start, cond.safe_input_vrms)
            try:
                a = _record(sim, c, level, cond.frequency_hz, rng)
            except AnalysisError:
                break
            if a.gain_db is None or a.thd_percent is None:
                break
            points.append(a)
        th = step.threshold if step is not None else None
        if th is not None and th.bracketed and th.level_vrms is not None:
            u_db = threshold_uncertainty_db(0.0, u_in, fit_u_db=th.uncertainty_db or 0.0)
            out[key(c, "clip_input_vrms")] = (
                th.level_vrms,
                th.level_vrms * (10 ** (u_db / 20) - 1),
            )
            above = sorted(
                (p for p in points if p.input_vrms >= th.level_vrms * 0.999),
                key=lambda p: p.input_vrms,
            )
            if above:
                p = above[0]
                side = p.clip_side or ("negative" if p.clip.asymmetry > 0 else "positive")
                out[key(c, "clip_side")] = (side, None)
        elif th is not None and th.below_vrms is not None and th.above_vrms is None:
            out[key(c, "clip_above_vrms")] = (th.below_vrms, None)
        elif th is not None and th.above_vrms is not None:
            out[key(c, "clip_below_vrms")] = (th.above_vrms, None)
    i = sim.supply_current_a()
    out["supply_current_a"] = (i, 2 * (0.005 * abs(i) + 20e-6))
    return out
