"""The channel's parameters as a flat table of named, toleranced numbers.

Every number the model uses is a :class:`ParamSpec` keyed ``"<stage>.<field>"`` (``gain.r1``,
``buffer.beta``) or board-wide (``supply.positive_v``, ``load_ohm``, ``source_ohm``, ``v_t``).
The model takes a mapping of these keys to numpy arrays of shape ``(samples,)``: the nominal
design is the same computation on arrays of size one.  Keeping the table flat lets the Monte
Carlo, the worst-case corners and the caller's what-if overrides (``params=``) share one path.

Distributions (why): resistors, capacitors and the supply are uniform within their tolerance
band, the common assumption when nothing is known of the maker's process (common practice:
a uniform band is the widest spread a tolerance allows short of a bimodal, selected-out lot).
Transistor beta, reverse beta, Early voltage and V_CE(sat) are uniform between the data-sheet
min and max; I_S spans a factor of several, so it is log-uniform (uniform in V_BE).  Op-amp
headroom and quiescent current are uniform between min and max.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.constants as const

from harness.model.board import (
    BETA_R_DEFAULT,
    Board,
    Channel,
    CommonEmitter,
    EmitterFollower,
    OpAmpInverting,
    OpAmpNonInverting,
    Part,
    Spread,
)

Distribution = Literal["uniform", "log_uniform", "fixed"]

#: Model temperature: 300 K, where kT/q = 25.85 mV (CODATA constants via scipy.constants).
TEMPERATURE_K = 300.0


def thermal_voltage(temperature_k: float = TEMPERATURE_K) -> float:
    """kT/q in volts (Boltzmann constant and elementary charge from scipy.constants)."""
    return float(const.k * temperature_k / const.e)


@dataclass(frozen=True)
class ParamSpec:
    """One model parameter: nominal value, the range it can take and how it is spread."""

    key: str
    nominal: float
    low: float
    high: float
    distribution: Distribution
    ref: str = ""

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Draw ``n`` values (one uniform draw per sample, so seeds stay reproducible)."""
        if self.distribution == "fixed" or self.low == self.high:
            return np.full(n, self.nominal)
        u = rng.random(n)
        if self.distribution == "log_uniform":
            lo, hi = math.log(self.low), math.log(self.high)
            return np.exp(lo + (hi - lo) * u)
        return self.low + (self.high - self.low) * u


def _part(key: str, part: Part) -> ParamSpec:
    return ParamSpec(key, part.nominal, part.low, part.high, "uniform", part.ref)


def _spread(key: str, s: Spread, dist: Distribution, ref: str) -> ParamSpec:
    return ParamSpec(key, s.typ, s.min, s.max, dist, ref)


def _fixed(key: str, value: float, ref: str = "") -> ParamSpec:
    return ParamSpec(key, value, value, value, "fixed", ref)


def supply_parameters(board: Board) -> tuple[ParamSpec, ...]:
    """The board-wide supply rails (shared by all channels in a Monte Carlo board)."""
    specs = [_part("supply.positive_v", board.supply.positive)]
    if board.supply.negative is not None:
        neg = board.supply.negative
        # a negative rail "-15 3%" spans -15*(1+plus) .. -15*(1-minus)
        specs.append(
            ParamSpec("supply.negative_v", neg.nominal, neg.high, neg.low, "uniform", neg.ref)
        )
    return tuple(specs)


def channel_parameters(board: Board, channel: Channel) -> tuple[ParamSpec, ...]:
    """Every parameter of one channel, supply first, in a fixed order (seed reproducibility)."""
    specs: list[ParamSpec] = list(supply_parameters(board))
    specs.append(_part("load_ohm", channel.load_ohm))
    specs.append(_fixed("source_ohm", board.conditions.source_ohm))
    specs.append(_fixed("v_t", thermal_voltage()))
    for st in channel.stages:
        n = st.name

        def opt(field: str, part: Part | None, key_prefix: str = n) -> None:
            if part is not None:
                specs.append(_part(f"{key_prefix}.{field}", part))

        if isinstance(st, CommonEmitter | EmitterFollower):
            t = st.transistor
            specs.append(_spread(f"{n}.beta", t.beta, "uniform", t.name))
            specs.append(_spread(f"{n}.is_a", t.is_a, "log_uniform", t.name))
            specs.append(_spread(f"{n}.vce_sat_v", t.vce_sat_v, "uniform", t.name))
            if t.beta_r is not None:
                specs.append(_spread(f"{n}.beta_r", t.beta_r, "uniform", t.name))
            else:
                specs.append(_fixed(f"{n}.beta_r", BETA_R_DEFAULT, t.name))
            if t.early_v is not None:
                specs.append(_spread(f"{n}.vaf_v", t.early_v, "uniform", t.name))
            elif t.vaf_v is not None:
                specs.append(_fixed(f"{n}.vaf_v", t.vaf_v, t.name))
        if isinstance(st, CommonEmitter):
            for field in ("r1", "r2", "rc", "re"):
                opt(field, getattr(st, field))
            opt("re_bypassed", st.re_bypassed)
            opt("c_e", st.c_e)
        elif isinstance(st, EmitterFollower):
            opt("re", st.re)
            opt("r1", st.r1)
            opt("r2", st.r2)
        elif isinstance(st, OpAmpInverting | OpAmpNonInverting):
            o = st.opamp
            specs.append(_spread(f"{n}.headroom_v", o.headroom_v, "uniform", o.name))
            specs.append(_spread(f"{n}.quiescent_a", o.quiescent_a, "uniform", o.name))
            specs.append(_fixed(f"{n}.open_loop_gain", o.open_loop_gain, o.name))
            specs.append(_fixed(f"{n}.output_current_a", o.output_current_a, o.name))
            opt("r_f", st.r_f)
            if isinstance(st, OpAmpInverting):
                opt("r_in", st.r_in)
            else:
                opt("r_g", st.r_g)
                opt("r_bias", st.r_bias)
                opt("c_g", st.c_g)
        opt("c_in", st.c_in)
        opt("c_out", st.c_out)
    return tuple(specs)


def nominal_arrays(
    specs: tuple[ParamSpec, ...], overrides: Mapping[str, float] | None = None
) -> dict[str, np.ndarray]:
    """Size-one arrays of the nominal values, with ``overrides`` applied (unknown keys refused)."""
    values = {s.key: np.array([s.nominal], dtype=float) for s in specs}
    for key, value in (overrides or {}).items():
        if key not in values:
            raise KeyError(f"unknown model parameter {key!r}; known: {', '.join(values)}")
        values[key] = np.atleast_1d(np.asarray(value, dtype=float))
    return values


def sample_arrays(
    specs: tuple[ParamSpec, ...],
    rng: np.random.Generator,
    n: int,
    shared: Mapping[str, np.ndarray] | None = None,
) -> dict[str, np.ndarray]:
    """Monte Carlo draws of shape ``(n,)``; keys in ``shared`` (the supply) are reused as given."""
    out: dict[str, np.ndarray] = {}
    for s in specs:
        if shared is not None and s.key in shared:
            out[s.key] = shared[s.key]
        else:
            out[s.key] = s.sample(rng, n)
    return out


def corner_arrays(specs: tuple[ParamSpec, ...], choice: np.ndarray) -> dict[str, np.ndarray]:
    """Parameter sets at extreme corners: ``choice[i, j]`` is -1 (low), 0 (nominal) or +1 (high)
    for sample ``i`` and parameter ``specs[j]``."""
    out: dict[str, np.ndarray] = {}
    for j, s in enumerate(specs):
        c = choice[:, j]
        out[s.key] = np.where(c > 0, s.high, np.where(c < 0, s.low, s.nominal)).astype(float)
    return out
