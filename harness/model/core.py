"""The vectorised stage physics: one set of formulas for the nominal design and the Monte Carlo.

Every function takes parameter arrays of shape ``(samples,)`` (see :mod:`harness.model.params`)
and returns arrays of the same shape; the nominal design is the case ``samples == 1``.  Nothing
here reads files or prints.

What is modelled (midband, coupling and bypass capacitors as shorts for the signal):

* DC bias of each BJT stage with base current: Thevenin divider ``V_TH, R_TH``;
  ``V_BE = V_T ln(1 + I_C/I_S)`` solved together with
  ``I_B = (V_TH - V_BE)/(R_TH + (beta+1) R_E)`` by Newton's method.  A DC-coupled follower's
  base is the previous collector, and its base current is drawn through that collector resistor.
* Small-signal hybrid-pi gains, each stage loaded by the next stage's input impedance and the
  last by the board load; op-amp stages with finite open-loop gain.
* Output swing of each stage in both directions (saturation, cutoff, rails, current limit).
* The periodic steady state of the chain (:mod:`harness.model.periodic`: Ebers-Moll with both
  junctions and the Early effect, so saturation is soft; the coupling and bypass capacitors'
  DC balance, so the bias shifts under drive; the generator's EMF behind ``source_ohm``;
  op-amp rails as hard limits), giving THD and the input level where the board's criterion
  is met.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from harness.model.board import (
    BETA_R_DEFAULT,
    Board,
    Channel,
    CommonEmitter,
    EmitterFollower,
    OpAmpInverting,
    OpAmpNonInverting,
)
from harness.model.periodic import PeriodicState, solve_periodic
from harness.model.settling import (
    TimeConstant,
    settle_times,
    supply_settle_time,
    time_constants,
)

Arrays = Mapping[str, np.ndarray]

#: Below this quiescent collector current a transistor counts as cut off at rest.
CUTOFF_A = 1e-6
#: Harmonics summed into THD (2..10, the same span ngspice's ``fourier`` and the analyser use).
THD_HARMONICS = 10
#: Input impedance assumed for an op-amp input with no bias resistor (CMOS/JFET class).
OPAMP_INPUT_OHM = 1e12


def parallel(*rs: np.ndarray | float) -> np.ndarray:
    """Parallel combination; an infinite resistance drops out, a zero one shorts."""
    with np.errstate(divide="ignore"):
        g = sum(np.where(np.asarray(r) == 0, np.inf, 1.0 / np.asarray(r, dtype=float)) for r in rs)
        return np.asarray(1.0 / g, dtype=float)


def solve_junction(
    v_src: np.ndarray, k_ohm: np.ndarray, i_s: np.ndarray, v_t: np.ndarray, iterations: int = 60
) -> np.ndarray:
    """Solve ``v + k·I_S·(exp(v/V_T) - 1) = v_src`` for the junction voltage ``v``.

    This is the bias loop of every BJT stage: ``k`` is the effective resistance the collector
    current sees in the base-emitter loop.  The left side is convex and increasing, so Newton
    started to the right of the root (at the V_BE that would carry the largest possible current
    ``v_src/k``) falls monotonically onto it.
    """
    i_max = np.maximum(v_src, 0.0) / k_ohm
    v = v_t * np.log1p(i_max / i_s)
    for _ in range(iterations):
        ex = np.exp(np.minimum(v / v_t, 700.0))
        f = v + k_ohm * i_s * (ex - 1.0) - v_src
        step = f / (1.0 + k_ohm * i_s * ex / v_t)
        v = v - step
        if np.all(np.abs(step) < 1e-13):
            break
    out: np.ndarray = v
    return out


# --- results -----------------------------------------------------------------------------------


@dataclass
class StageArrays:
    """One stage's bias, small-signal and swing figures, each an array over samples."""

    index: int
    name: str
    kind: str
    inverting: bool
    ic_a: np.ndarray
    ib_a: np.ndarray
    ie_a: np.ndarray
    vb_v: np.ndarray
    ve_v: np.ndarray
    vc_v: np.ndarray
    vout_dc_v: np.ndarray
    supply_a: np.ndarray
    r_next: np.ndarray = field(default_factory=lambda: np.zeros(1))
    gain: np.ndarray = field(default_factory=lambda: np.zeros(1))
    input_ohm: np.ndarray = field(default_factory=lambda: np.zeros(1))
    output_ohm: np.ndarray = field(default_factory=lambda: np.zeros(1))
    swing_pos_v: np.ndarray = field(default_factory=lambda: np.zeros(1))
    swing_neg_v: np.ndarray = field(default_factory=lambda: np.zeros(1))
    # large-signal coefficients
    r_ac: np.ndarray = field(default_factory=lambda: np.zeros(1))
    r_e_ac: np.ndarray = field(default_factory=lambda: np.zeros(1))
    vce_v: np.ndarray = field(default_factory=lambda: np.zeros(1))
    vce_sat_v: np.ndarray = field(default_factory=lambda: np.zeros(1))
    beta: np.ndarray = field(default_factory=lambda: np.zeros(1))


@dataclass
class Problem:
    """A reason the circuit cannot work, with the samples it applies to."""

    location: str
    reason: str
    hint: str
    mask: np.ndarray


@dataclass
class ChannelArrays:
    """A channel's figures over samples (see :func:`evaluate_channel`)."""

    channel: str
    n: int
    stages: list[StageArrays]
    v_t: np.ndarray
    gain: np.ndarray = field(default_factory=lambda: np.zeros(1))
    gain_midband: np.ndarray = field(default_factory=lambda: np.zeros(1))
    input_ohm: np.ndarray = field(default_factory=lambda: np.zeros(1))
    output_ohm: np.ndarray = field(default_factory=lambda: np.zeros(1))
    clip_input_vpk: np.ndarray = field(default_factory=lambda: np.zeros(1))
    clip_stage: np.ndarray = field(default_factory=lambda: np.zeros(1, int))
    clip_positive: np.ndarray = field(default_factory=lambda: np.zeros(1, bool))
    supply_current_a: np.ndarray = field(default_factory=lambda: np.zeros(1))
    low_corner_hz: np.ndarray = field(default_factory=lambda: np.zeros(1))
    settle_time_s: np.ndarray = field(default_factory=lambda: np.zeros(1))
    dc_settle_time_s: np.ndarray = field(default_factory=lambda: np.zeros(1))
    supply_settle_time_s: np.ndarray = field(default_factory=lambda: np.zeros(1))
    time_constants: list[TimeConstant] = field(default_factory=list)
    thd_percent: np.ndarray | None = None
    thd_clip_input_vpk: np.ndarray | None = None
    problems: list[Problem] = field(default_factory=list)

    @property
    def inverting(self) -> bool:
        return sum(s.inverting for s in self.stages) % 2 == 1

    @property
    def workable(self) -> np.ndarray:
        """Samples whose bias and drive are sound (no :class:`Problem` applies)."""
        ok = np.ones(self.n, dtype=bool)
        for p in self.problems:
            ok &= ~p.mask
        return ok


def _b(x: np.ndarray, n: int) -> np.ndarray:
    a = np.asarray(x, dtype=float)
    return a if a.shape == (n,) else np.broadcast_to(a, (n,)).copy()


# --- DC ----------------------------------------------------------------------------------------


def _stage_getter(p: Arrays, n: int, nm: str) -> Callable[..., np.ndarray]:
    """Reader of stage ``nm``'s parameters as ``(n,)`` arrays: ``g(key, default=None, _nm=nm)``.

    A missing key without a default raises :class:`KeyError`; ``_nm`` reads another stage's.
    """

    def g(key: str, default: float | None = None, _nm: str = nm) -> np.ndarray:
        k = f"{_nm}.{key}"
        if k in p:
            return _b(p[k], n)
        if default is None:
            raise KeyError(k)
        return np.full(n, default)

    return g


def _bias_point(
    v_src: np.ndarray,
    r_src: np.ndarray,
    re_dc: np.ndarray,
    beta: np.ndarray,
    i_s: np.ndarray,
    v_t: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Quiescent ``(I_C, I_B, I_E, V_E, V_B)`` of a BJT whose base is fed from ``v_src, r_src``.

    One solve for the divider-biased stage and the follower (divider or DC-coupled collector),
    so both carry the base current the same way.
    """
    k = r_src / beta + re_dc * (beta + 1.0) / beta
    vbe = solve_junction(v_src, k, i_s, v_t)
    ic = i_s * np.expm1(vbe / v_t)
    ib = ic / beta
    ie = ic + ib
    ve = ie * re_dc
    vb = ve + vbe
    return ic, ib, ie, ve, vb


def _rest_region(s: StageArrays) -> tuple[np.ndarray, np.ndarray]:
    """Masks of the samples cut off and saturated at rest (a cut-off one is not saturated too)."""
    cut = s.ic_a < CUTOFF_A
    sat = (s.vce_v <= s.vce_sat_v) & ~cut
    return cut, sat


def _flag(
    problems: list[Problem],
    mask: np.ndarray,
    location: str,
    reason: str,
    hint: str,
    **figures: np.ndarray,
) -> None:
    """Record a problem if any sample is in ``mask``; ``reason`` quotes the first such sample.

    ``reason`` is a format string whose fields are the ``figures`` arrays, each read at that
    sample, so one message serves the nominal design and every Monte Carlo sample alike.
    """
    if np.any(mask):
        at = {name: float(arr[mask][0]) for name, arr in figures.items()}
        problems.append(Problem(location, reason.format(**at), hint, mask))


def _early_factors(ch: Channel, p: Arrays, stages: list[StageArrays], n: int) -> list[np.ndarray]:
    """Gummel-Poon's 1/q_b = 1 + V_CB/V_AF of each BJT stage at its bias (1 for op-amps)."""
    out = []
    for st, s in zip(ch.stages, stages, strict=True):
        if isinstance(st, CommonEmitter | EmitterFollower):
            out.append(1.0 + (s.vc_v - s.vb_v) * _stage_getter(p, n, st.name)("inv_vaf_v", 0.0))
        else:
            out.append(np.ones(n))
    return out


def _with_inverse_early(p: Arrays, n: int) -> dict[str, np.ndarray]:
    """The parameters plus ``<stage>.inv_vaf_v`` (0 where no Early voltage is given)."""
    out = dict(p)
    for k, v in p.items():
        if k.endswith(".vaf_v"):
            out[k[: -len("vaf_v")] + "inv_vaf_v"] = 1.0 / _b(v, n)
    return out


def _dc(
    board: Board,
    ch: Channel,
    p: Arrays,
    n: int,
    problems: list[Problem],
    early: list[np.ndarray] | None = None,
) -> list[StageArrays]:
    """Bias of every stage.  ``early`` (per stage, from :func:`_early_factors` of a previous
    pass) scales I_S and beta by 1 + V_CB/V_AF: the Early effect on the transport current."""
    vcc = _b(p["supply.positive_v"], n)
    v_t = _b(p["v_t"], n)
    r_load = _b(p["load_ohm"], n)
    zero = np.zeros(n)
    out: list[StageArrays] = []
    last = len(ch.stages) - 1
    for j, st in enumerate(ch.stages):
        nm = st.name
        loc = f"channel.{ch.name}.stage[{j}]({nm})"

        g = _stage_getter(p, n, nm)

        # a load without c_out on the last stage carries DC too
        dc_load = j == last and st.c_out is None
        if isinstance(st, CommonEmitter | EmitterFollower):
            beta, i_s = g("beta"), g("is_a")
            if early is not None:
                beta, i_s = beta * early[j], i_s * early[j]
            if (
                j == 0
                and st.c_in is None
                and not (isinstance(st, EmitterFollower) and st.dc_coupled)
            ):
                problems.append(
                    Problem(
                        f"{loc}.c_in",
                        "no input coupling capacitor: the source would short the base bias",
                        "add c_in",
                        np.ones(n, bool),
                    )
                )
            elif (
                j > 0
                and st.c_in is None
                and ch.stages[j - 1].c_out is None
                and not (isinstance(st, EmitterFollower) and st.dc_coupled)
            ):
                problems.append(
                    Problem(
                        f"{loc}.c_in",
                        "no coupling capacitor from the previous "
                        "stage: its DC level would upset this stage's bias",
                        "add c_in here or c_out on the previous stage",
                        np.ones(n, bool),
                    )
                )
        if isinstance(st, CommonEmitter):
            r1, r2, rc, re = g("r1"), g("r2"), g("rc"), g("re")
            re_dc = re + g("re_bypassed", 0.0)
            v_th = vcc * r2 / (r1 + r2)
            r_th = r1 * r2 / (r1 + r2)
            ic, ib, ie, ve, vb = _bias_point(v_th, r_th, re_dc, beta, i_s, v_t)
            if dc_load:
                vcc_eff, rc_eff = vcc * r_load / (rc + r_load), parallel(rc, r_load)
            else:
                vcc_eff, rc_eff = vcc, rc
            vc = vcc_eff - ic * rc_eff
            i_r1 = (vcc - vb) / r1
            s = StageArrays(
                j,
                nm,
                st.kind,
                True,
                ic,
                ib,
                ie,
                vb,
                ve,
                vc,
                vc,
                supply_a=i_r1 + (vcc - vc) / rc,
                beta=beta,
            )
            s.vce_sat_v = g("vce_sat_v")
            s.r_ac = rc_eff  # Thevenin resistance of the collector node (DC)
            s.r_e_ac = vcc_eff  # stash: Thevenin voltage, read by a DC-coupled follower
        elif isinstance(st, EmitterFollower):
            re = g("re")
            re_dc = parallel(re, r_load) if dc_load else re
            if st.dc_coupled:
                prev = out[-1]
                v_open = prev.r_e_ac - prev.ic_a * prev.r_ac
                r_src = prev.r_ac
            else:
                r1, r2 = g("r1"), g("r2")
                v_open = vcc * r2 / (r1 + r2)
                r_src = r1 * r2 / (r1 + r2)
            ic, ib, ie, ve, vb = _bias_point(v_open, r_src, re_dc, beta, i_s, v_t)
            if st.dc_coupled:
                prev = out[-1]
                prev.vc_v = vb
                prev.vout_dc_v = vb
                # the collector resistor now carries I_C1 + I_B2: recompute that stage's share
                rc_prev = g("rc", _nm=prev.name)
                i_r1_prev = (vcc - prev.vb_v) / g("r1", _nm=prev.name)
                prev.supply_a = i_r1_prev + (vcc - vb) / rc_prev
                supply = ic
            else:
                supply = (vcc - vb) / g("r1") + ic
            s = StageArrays(
                j,
                nm,
                st.kind,
                False,
                ic,
                ib,
                ie,
                vb,
                ve,
                vcc.copy(),
                ve,
                supply_a=supply,
                beta=beta,
            )
            s.vce_sat_v = g("vce_sat_v")
        else:
            vee = _b(p.get("supply.negative_v", zero), n)
            head = g("headroom_v")
            s = StageArrays(
                j,
                nm,
                st.kind,
                st.inverting,
                zero,
                zero,
                zero,
                zero,
                zero,
                zero,
                zero.copy(),
                supply_a=g("quiescent_a"),
            )
            if np.any(vcc - head <= 0) or np.any(-vee - head <= 0):
                problems.append(
                    Problem(
                        f"{loc}.opamp",
                        "the op-amp's headroom leaves no output swing on these rails",
                        "use a rail-to-rail op-amp or higher supply rails",
                        (vcc - head <= 0) | (-vee - head <= 0),
                    )
                )
            if (
                j > 0
                and st.c_in is None
                and ch.stages[j - 1].c_out is None
                and isinstance(ch.stages[j - 1], CommonEmitter | EmitterFollower)
            ):
                problems.append(
                    Problem(
                        f"{loc}.c_in",
                        "no coupling capacitor from the BJT "
                        "stage before: its DC level would be amplified",
                        "add c_in",
                        np.ones(n, bool),
                    )
                )
        out.append(s)

    # active-region checks at rest (after the followers have loaded the collectors)
    for j, (st, s) in enumerate(zip(ch.stages, out, strict=True)):
        loc = f"channel.{ch.name}.stage[{j}]({st.name})"
        if isinstance(st, CommonEmitter):
            s.vce_v = s.vc_v - s.ve_v
            cut, sat = _rest_region(s)
            _flag(
                problems,
                cut,
                f"{loc}.r2",
                "transistor cut off at rest: the divider r1/r2 leaves I_C = {ic:.3g} A",
                "raise r2 or lower r1",
                ic=s.ic_a,
            )
            _flag(
                problems,
                sat,
                f"{loc}.rc",
                "transistor saturated at rest: V_CE = {vce:.3g} V is at or below "
                "V_CE(sat) = {vce_sat:.3g} V",
                "lower rc or the emitter resistance, or raise r1",
                vce=s.vce_v,
                vce_sat=s.vce_sat_v,
            )
        elif isinstance(st, EmitterFollower):
            s.vce_v = vcc - s.ve_v
            cut, sat = _rest_region(s)
            _flag(
                problems,
                cut,
                f"{loc}.re",
                "follower cut off at rest: I_E = {ie:.3g} A",
                "check the bias of its base",
                ie=s.ie_a,
            )
            _flag(
                problems,
                sat,
                f"{loc}.re",
                "follower saturated at rest: its emitter sits at {ve:.3g} V, within "
                "V_CE(sat) of the supply",
                "lower its base voltage",
                ve=s.ve_v,
            )
    return out


# --- small signal ------------------------------------------------------------------------------


def _degenerated_ce(
    g_m: np.ndarray, r_pi: np.ndarray, r_o: np.ndarray, r_e: np.ndarray, r_l: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Gain v_c/v_b, base input resistance and transistor output resistance of a CE stage
    with emitter resistance ``r_e``, output resistance ``r_o`` (Early effect) and collector
    load ``r_l``: the hybrid-pi nodal equations at collector and emitter solved exactly.
    Emitter degeneration raises the output resistance to r_o + (r_e || r_pi)(1 + g_m r_o)
    (Sedra & Smith, *Microelectronic Circuits*, BJT chapter, from memory), so r_o in parallel
    with the load would understate a degenerated stage's gain."""
    with np.errstate(divide="ignore", invalid="ignore"):
        g_o = np.where(np.isfinite(r_o), 1.0 / r_o, 0.0)
        a11, a12, b1 = 1.0 / r_l + g_o, -(g_m + g_o), -g_m
        a21 = -g_o * r_e  # the emitter equation times r_e: r_e = 0 stays finite
        a22 = 1.0 + r_e * (1.0 / r_pi + g_m + g_o)
        b2 = r_e * (1.0 / r_pi + g_m)
        det = a11 * a22 - a12 * a21
        v_c = (b1 * a22 - a12 * b2) / det
        v_e = (a11 * b2 - a21 * b1) / det
        r_par = r_e * r_pi / (r_e + r_pi)
        r_out = np.where(np.isfinite(r_o), r_o + r_par * (1.0 + g_m * r_o), np.inf)
    return v_c, r_pi / (1.0 - v_e), r_out


def _small_signal(ch: Channel, p: Arrays, stages: list[StageArrays], n: int) -> None:
    v_t = _b(p["v_t"], n)
    r_next = _b(p["load_ohm"], n)
    # backward: each stage's load is the next stage's input impedance
    for st, s in zip(reversed(ch.stages), reversed(stages), strict=True):
        nm = st.name

        g = _stage_getter(p, n, nm)

        s.r_next = r_next
        if isinstance(st, CommonEmitter):
            r_pi = s.beta * v_t / s.ic_a
            vaf = g("vaf_v", np.inf)
            r_o = (vaf + s.vc_v - s.vb_v) / s.ic_a
            rc = g("rc")
            r_ac = parallel(rc, r_next, r_o)
            re = g("re")
            s.gain, z_base, r_out_q = _degenerated_ce(
                s.ic_a / v_t, r_pi, r_o, re, parallel(rc, r_next)
            )
            r1, r2 = g("r1"), g("r2")
            s.input_ohm = parallel(r1, r2, z_base)
            s.output_ohm = parallel(rc, r_out_q)
            s.r_ac = r_ac
            s.r_e_ac = re
        elif isinstance(st, EmitterFollower):
            r_pi = s.beta * v_t / s.ic_a
            vaf = g("vaf_v", np.inf)
            r_o = (vaf + s.vc_v - s.vb_v) / s.ic_a
            r_e_ac = parallel(g("re"), r_next, r_o)
            z_base = r_pi + (s.beta + 1.0) * r_e_ac
            s.gain = (s.beta + 1.0) * r_e_ac / z_base
            s.input_ohm = z_base if st.dc_coupled else parallel(g("r1"), g("r2"), z_base)
            s.r_ac = r_e_ac
            s.r_e_ac = r_e_ac
        elif isinstance(st, OpAmpInverting):
            a0 = g("open_loop_gain")
            ideal = g("r_f") / g("r_in")
            s.gain = -ideal / (1.0 + (1.0 + ideal) / a0)
            s.input_ohm = g("r_in") + g("r_f") / (1.0 + a0)
            s.output_ohm = np.zeros(n)
            s.r_ac = parallel(r_next, g("r_f"))
        elif isinstance(st, OpAmpNonInverting):
            a0 = g("open_loop_gain")
            noise_gain = 1.0 + g("r_f") / g("r_g")
            s.gain = noise_gain / (1.0 + noise_gain / a0)
            s.input_ohm = g("r_bias") if st.r_bias is not None else np.full(n, OPAMP_INPUT_OHM)
            s.output_ohm = np.zeros(n)
            s.r_ac = parallel(r_next, g("r_f") + g("r_g"))
        r_next = s.input_ohm
    # forward: output impedances that depend on the source (followers)
    r_src = _b(p["source_ohm"], n)
    for st, s in zip(ch.stages, stages, strict=True):
        if isinstance(st, EmitterFollower):
            r_pi = s.beta * v_t / s.ic_a
            r_b = (
                r_src
                if st.dc_coupled
                else parallel(r_src, _b(p[f"{st.name}.r1"], n), _b(p[f"{st.name}.r2"], n))
            )
            s.output_ohm = parallel(_b(p[f"{st.name}.re"], n), (r_pi + r_b) / (s.beta + 1.0))
        r_src = s.output_ohm


# --- swing -------------------------------------------------------------------------------------


def _swing(ch: Channel, p: Arrays, stages: list[StageArrays], n: int) -> None:
    vcc = _b(p["supply.positive_v"], n)
    vee = _b(p.get("supply.negative_v", np.zeros(n)), n)
    for st, s in zip(ch.stages, stages, strict=True):
        if isinstance(st, CommonEmitter):
            # cutoff: collector rises by I_CQ·R_ac; saturation: the emitter rises with the drive
            r_e_eff = s.r_e_ac * (s.beta + 1.0) / s.beta
            s.swing_pos_v = s.ic_a * s.r_ac
            s.swing_neg_v = np.maximum(s.vce_v - s.vce_sat_v, 0.0) * s.r_ac / (s.r_ac + r_e_eff)
        elif isinstance(st, EmitterFollower):
            s.swing_pos_v = np.maximum(s.vce_v - s.vce_sat_v, 0.0)
            s.swing_neg_v = s.ie_a * s.r_e_ac
        else:
            head = _b(p[f"{st.name}.headroom_v"], n)
            i_lim = _b(p[f"{st.name}.output_current_a"], n) * s.r_ac
            s.swing_pos_v = np.maximum(np.minimum(vcc - head, i_lim), 0.0)
            s.swing_neg_v = np.maximum(np.minimum(-vee - head, i_lim), 0.0)


# --- frequency response at the low end ---------------------------------------------------------


def _low_end(
    ch: Channel, p: Arrays, stages: list[StageArrays], n: int, f_test: float
) -> tuple[np.ndarray, np.ndarray]:
    """Low-frequency factor |H(f_test)| and the -3 dB low corner (time constants, and which
    of them the test waits for: :mod:`harness.model.settling`).

    Each coupling capacitor is a first-order high-pass with the resistance it sees; an emitter
    bypass and an op-amp C_G are shelves (pole and zero).  The product is evaluated exactly and
    its -3 dB point found by bisection on log f.
    """
    v_t = _b(p["v_t"], n)
    highpass: list[np.ndarray] = []  # pole frequencies of pure high-passes
    shelves: list[tuple[np.ndarray, np.ndarray]] = []  # (zero, pole) frequencies
    r_src = _b(p["source_ohm"], n)
    two_pi = 2.0 * np.pi
    for st, s in zip(ch.stages, stages, strict=True):
        nm = st.name
        if st.c_in is not None:
            c = _b(p[f"{nm}.c_in"], n)
            r = r_src + s.input_ohm
            highpass.append(1.0 / (two_pi * c * r))
        if isinstance(st, CommonEmitter) and st.c_e is not None and st.re_bypassed is not None:
            c = _b(p[f"{nm}.c_e"], n)
            r_byp = _b(p[f"{nm}.re_bypassed"], n)
            r_b = parallel(r_src, _b(p[f"{nm}.r1"], n), _b(p[f"{nm}.r2"], n))
            r_look = _b(p[f"{nm}.re"], n) + (s.beta * v_t / s.ic_a + r_b) / (s.beta + 1.0)
            r_seen = parallel(r_byp, r_look)
            shelves.append((1.0 / (two_pi * c * r_byp), 1.0 / (two_pi * c * r_seen)))
        if isinstance(st, OpAmpNonInverting) and st.c_g is not None:
            c = _b(p[f"{nm}.c_g"], n)
            r_g, r_f = _b(p[f"{nm}.r_g"], n), _b(p[f"{nm}.r_f"], n)
            shelves.append((1.0 / (two_pi * c * (r_g + r_f)), 1.0 / (two_pi * c * r_g)))
        if st.c_out is not None:
            c = _b(p[f"{nm}.c_out"], n)
            r = s.output_ohm + s.r_next
            highpass.append(1.0 / (two_pi * c * r))
        r_src = s.output_ohm

    hp2 = [fp * fp for fp in highpass]
    sh2 = [(fz * fz, fp * fp) for fz, fp in shelves]

    def mag2(f: np.ndarray) -> np.ndarray:
        f2 = f * f
        h = np.ones_like(f)
        for q in hp2:
            h *= f2 / (f2 + q)
        for qz, qp in sh2:
            h *= (qz + f2) / (qp + f2)
        return h

    factor = np.sqrt(mag2(np.full(n, f_test)))
    # the corner lies between 1 mHz and 100 kHz; 32 halvings of that log span: 3e-8 relative
    lo, hi = np.full(n, np.log(1e-3)), np.full(n, np.log(1e5))
    for _ in range(32):
        mid = 0.5 * (lo + hi)
        below = mag2(np.exp(mid)) < 0.5
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    corner = np.exp(0.5 * (lo + hi)) if (highpass or shelves) else np.zeros(n)
    return factor, corner


# --- large signal ------------------------------------------------------------------------------

#: Rows per block in the large-signal solution: small blocks keep the Newton temporaries in
#: cache (about 3x faster than whole-array passes for 100,000 boards).
BLOCK_ROWS = 2048
_BJT = ("common_emitter", "emitter_follower")


@dataclass
class LargeSignalChain:
    """Per-stage coefficients of the large-signal chain, each an array over samples.

    BJT stages: the coefficients of :data:`harness.model.periodic.STAGE_KEYS` but ``r_b`` (that
    depends on the source driving the stage), plus ``r_bias`` (the bias network's AC
    resistance at the base; infinite for a DC-coupled follower), ``r_out`` (the resistance
    behind the stage's output current, the next stage's Thevenin source resistance),
    ``v_open`` (the open collector's DC source, for a DC-coupled follower behind it), the rest
    bias ``vbe0 vbc0 ib0 ic0`` and ``out_rest`` (the output node at rest).  Op-amp stages:
    ``gain``, ``lo``, ``hi`` (output swing about rest) and ``z_in``.  ``dc_in[j]``: stage j's
    base is the previous collector; ``dc_out``: the last stage drives the load without C_out.
    """

    kinds: tuple[str, ...]
    coef: tuple[dict[str, np.ndarray], ...]
    dc_in: tuple[bool, ...]
    dc_out: bool
    r_source: np.ndarray

    @classmethod
    def from_arrays(cls, arrays: ChannelArrays, channel: Channel, p: Arrays) -> LargeSignalChain:
        n = arrays.n
        q = _with_inverse_early(p, n)
        vcc = _b(p["supply.positive_v"], n)
        r_load = _b(p["load_ohm"], n)
        last = len(channel.stages) - 1
        dc_out = channel.stages[-1].c_out is None
        coef: list[dict[str, np.ndarray]] = []
        dc_in: list[bool] = []
        for j, (st, s) in enumerate(zip(channel.stages, arrays.stages, strict=True)):
            g = _stage_getter(q, n, st.name)
            dc_load = j == last and dc_out
            follower_next = (
                j < last
                and isinstance(channel.stages[j + 1], EmitterFollower)
                and channel.stages[j + 1].dc_coupled  # type: ignore[union-attr]
            )
            dc_in.append(isinstance(st, EmitterFollower) and st.dc_coupled)
            if isinstance(st, CommonEmitter | EmitterFollower):
                c = {
                    "is_a": g("is_a"),
                    "beta_f": g("beta"),
                    "beta_r": g("beta_r", BETA_R_DEFAULT),
                    "inv_vaf": g("inv_vaf_v", 0.0),
                    "v_t": arrays.v_t,
                    "vbe0": s.vb_v - s.ve_v,
                    # a board saturated at rest (refused anyway) must not start Newton at
                    # an overflowing collector junction
                    "vbc0": np.minimum(s.vb_v - s.vc_v, 0.4),
                    "ib0": s.ib_a,
                    "ic0": s.ic_a,
                }
                if isinstance(st, CommonEmitter) or not st.dc_coupled:
                    r1, r2 = g("r1"), g("r2")
                    c.update(v_th=vcc * r2 / (r1 + r2), r_th=parallel(r1, r2))
                    c["r_bias"] = c["r_th"]
                else:
                    c.update(v_th=np.zeros(n), r_th=np.zeros(n), r_bias=np.full(n, np.inf))
            if isinstance(st, CommonEmitter):
                rc = g("rc")
                c.update(k_e=g("re_bypassed", 0.0), r_e=g("re"), r_out=rc, v_open=vcc)
                if dc_load:
                    c.update(v_cc=vcc * r_load / (rc + r_load), r_cdc=parallel(rc, r_load))
                else:
                    c.update(v_cc=vcc.copy(), r_cdc=rc)
                if follower_next:  # its rest base current through rc
                    c["v_cc"] = c["v_cc"] - rc * arrays.stages[j + 1].ib_a
                c.update(r_cac=parallel(rc, s.r_next), out_rest=s.vc_v)
            elif isinstance(st, EmitterFollower):
                re = g("re")
                re_dc = parallel(re, r_load) if dc_load else re
                r_e = parallel(re, s.r_next)
                c.update(k_e=re_dc - r_e, r_e=r_e, r_out=re, v_open=vcc)
                c.update(v_cc=vcc, r_cdc=np.zeros(n), r_cac=np.zeros(n), out_rest=s.ve_v)
            elif not isinstance(st, CommonEmitter):
                c = {"gain": s.gain, "lo": -s.swing_neg_v, "hi": s.swing_pos_v}
                c["z_in"] = s.input_ohm
            coef.append({k: _b(v, n) for k, v in c.items()})
        return cls(
            tuple(s.kind for s in arrays.stages),
            tuple(coef),
            tuple(dc_in),
            dc_out,
            _b(p["source_ohm"], n),
        )

    def take(self, rows: slice | np.ndarray) -> LargeSignalChain:
        return LargeSignalChain(
            self.kinds,
            tuple({k: v[rows] for k, v in c.items()} for c in self.coef),
            self.dc_in,
            self.dc_out,
            self.r_source[rows],
        )

    def rest_state(self, n_points: int) -> list[PeriodicState | None]:
        """Start of the periodic solution: every BJT stage at its rest bias."""
        m = n_points // 2 + 1
        out: list[PeriodicState | None] = []
        for kind, c in zip(self.kinds, self.coef, strict=True):
            if kind in _BJT:
                out.append(
                    PeriodicState(
                        np.repeat(c["vbe0"][:, None], m, axis=1),
                        np.repeat(c["vbc0"][:, None], m, axis=1),
                        c["ib0"].copy(),
                        c["ic0"].copy(),
                    )
                )
            else:
                out.append(None)
        return out


ChainState = list[PeriodicState | None]


def _cos_weights(m: int, k_max: int) -> tuple[np.ndarray, np.ndarray]:
    """Half-period cosine samples and the DCT-I weights giving harmonic amplitudes 0..k_max.

    The drive is a cosine, so every waveform in the chain is even in time: the M + 1 points of
    half a period define the whole period of N = 2M points, and the harmonic amplitudes are a
    DCT-I of them (the DFT of the even extension); column 0 is the period mean.
    """
    theta = np.pi * np.arange(m + 1) / m
    w = np.full(m + 1, 2.0)
    w[0] = w[-1] = 1.0
    k = np.arange(k_max + 1)
    basis = (w[:, None] * np.cos(theta[:, None] * k[None, :])) / m
    basis[:, 0] *= 0.5
    return np.cos(theta), basis


@dataclass
class ChainSolution:
    """The channel output over half a period (AC part about its driven mean; a load without
    C_out sees the DC shift too), the signal at the input connector (the generator's EMF less
    the drop on ``source_ohm``: the base current is not linear) and each BJT stage's mean
    base, emitter and collector voltage under drive (NaN for op-amp stages), ``(samples,)``."""

    out: np.ndarray
    inp: np.ndarray
    means: list[tuple[np.ndarray, np.ndarray, np.ndarray]]
    state: ChainState


def chain_waveform(
    chain: LargeSignalChain,
    amp_vpk: np.ndarray,
    n_points: int = 64,
    state: ChainState | None = None,
) -> ChainSolution:
    """Periodic steady state of the chain for a cosine EMF of peak ``amp_vpk`` behind the
    source resistance.

    Midband: coupling and bypass capacitors short for the signal but carrying no DC, so each
    BJT stage's operating point shifts under drive (:mod:`harness.model.periodic`).  A stage
    drives the next through its Thevenin equivalent (its output current behind ``r_out``),
    loaded for its own solution by the next stage's small-signal input impedance.  Op-amp
    stages: finite gain, hard rails.  ``state`` (from :meth:`LargeSignalChain.rest_state` or a
    previous solution nearby) is where Newton starts.
    """
    m = n_points // 2
    cos_t, basis = _cos_weights(m, 0)
    w = basis[:, 0]
    amp = np.asarray(amp_vpk, dtype=float)
    v_oc = amp[:, None] * cos_t[None, :]
    r_out = chain.r_source[:, None]
    dc_oc = np.zeros((amp.shape[0], 1))
    start = state if state is not None else chain.rest_state(n_points)
    new_state: ChainState = []
    means: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    last = len(chain.kinds) - 1
    out = v_oc
    nan = np.full(amp.shape[0], np.nan)
    for j, (kind, c) in enumerate(zip(chain.kinds, chain.coef, strict=True)):
        col = {k: v[:, None] for k, v in c.items()}
        if kind in _BJT:
            if chain.dc_in[j]:
                col.update(v_th=dc_oc, r_th=r_out, r_b=r_out)
                v_s = v_oc
            else:
                share = 1.0 / (1.0 + r_out / col["r_bias"])
                v_s = v_oc * share
                col["r_b"] = r_out * share
            st0 = start[j]
            assert st0 is not None
            sol = solve_periodic(v_s, col, w, st0)
            if j == 0:  # the input connector is the base for the signal (C_in short)
                v_base = v_s - col["r_b"] * sol.i_b
                inp = v_base - (v_base @ w)[:, None]
            new_state.append(sol.state)
            m_b, m_c = sol.state.m_b[:, None], sol.state.m_c[:, None]
            i_e = sol.i_b + sol.i_c
            m_e = m_b + m_c
            vb_mean = col["v_th"] - col["r_th"] * m_b
            ve_mean = (col["k_e"] + col["r_e"]) * m_e
            if kind == "common_emitter":
                vc_mean = col["v_cc"] - col["r_cdc"] * m_c
                node = vc_mean - col["r_cac"] * (sol.i_c - m_c)
                v_oc = -col["r_out"] * (sol.i_c - m_c)
                dc_oc = col["v_open"] - col["r_out"] * m_c
            else:
                vc_mean = col["v_cc"]
                node = ve_mean + col["r_e"] * (i_e - m_e)
                v_oc = col["r_out"] * (i_e - m_e)
                dc_oc = ve_mean
            means.append((vb_mean[:, 0], ve_mean[:, 0], np.broadcast_to(vc_mean, m_b.shape)[:, 0]))
            if chain.dc_in[j]:  # one node: the collector before carries this base current
                vb_prev, ve_prev, _ = means[j - 1]
                means[j - 1] = (vb_prev, ve_prev, vb_mean[:, 0])
            r_out = col["r_out"]
            if j == last:
                ref = col["out_rest"] if chain.dc_out else (node @ w)[:, None]
                out = node - ref
        else:
            x_in = v_oc / (1.0 + r_out / col["z_in"])
            if j == 0:
                inp = x_in
            v_oc = np.clip(col["gain"] * x_in, col["lo"], col["hi"])
            r_out = np.zeros_like(r_out)
            new_state.append(None)
            means.append((nan, nan, nan))
            out = v_oc
    return ChainSolution(out, inp, means, new_state)


def harmonics(
    chain: LargeSignalChain,
    amp_vpk: np.ndarray,
    n_points: int = 64,
    k_max: int = THD_HARMONICS,
    workers: int = 1,
    state: ChainState | None = None,
    input_fundamental: np.ndarray | None = None,
    start_scale: np.ndarray | None = None,
) -> np.ndarray:
    """Harmonic amplitudes 0..k_max (volts peak; index 0 is the DC shift of a DC-coupled
    load, 0 behind C_out) of the channel output for a sine EMF of peak ``amp_vpk`` behind the
    source resistance, shape ``(samples, k_max + 1)``; ``input_fundamental`` (if given,
    ``(samples,)``) receives the fundamental's peak at the input connector.

    Solved in blocks of :data:`BLOCK_ROWS` samples; ``workers`` > 1 spreads the blocks over
    threads (numpy releases the GIL inside its loops).  ``state`` (full size, see
    :meth:`LargeSignalChain.rest_state`) is the start and is replaced by the solution;
    ``start_scale`` (per sample) is the level's ratio to the one ``state`` was solved at,
    to scale the start by (:func:`_scale_to`)."""
    _, basis = _cos_weights(n_points // 2, k_max)
    amp = np.asarray(amp_vpk, dtype=float)
    n = amp.shape[0]
    out = np.empty((n, k_max + 1))

    def block(i0: int) -> None:
        sl = slice(i0, min(i0 + BLOCK_ROWS, n))
        part = chain.take(sl)
        start = None if state is None else [s.take(sl) if s else None for s in state]
        if start is not None and start_scale is not None:
            _scale_to(part, start, start_scale[sl])
        sol = chain_waveform(part, amp[sl], n_points, start)
        out[sl] = np.abs(sol.out @ basis)
        if input_fundamental is not None:
            input_fundamental[sl] = np.abs(sol.inp @ basis[:, 1])
        if state is not None:
            for s, new in zip(state, sol.state, strict=True):
                if s is not None and new is not None:
                    s.put(sl, new)

    starts = range(0, n, BLOCK_ROWS)
    if workers > 1 and n > BLOCK_ROWS:
        from concurrent.futures import ThreadPoolExecutor

        with ThreadPoolExecutor(max_workers=workers) as pool:
            list(pool.map(block, starts))
    else:
        for i0 in starts:
            block(i0)
    return out


def thd_from_harmonics(h: np.ndarray) -> np.ndarray:
    """THD_F in percent: sqrt(sum of harmonics 2..k_max squared) over the fundamental."""
    with np.errstate(divide="ignore", invalid="ignore"):
        thd: np.ndarray = 100.0 * np.sqrt(np.sum(h[:, 2:] ** 2, axis=1)) / h[:, 1]
    return thd


#: The criterion search (see :func:`criterion_level`): the score's rise per dB of level when
#: THD is proportional to level (ln 10 / 20); how far past the predicted root the steps that
#: look for a bracket aim (a share of the step); their largest step; how many they may take;
#: the shortest step (a share of the tolerance), so that a step beside the root closes the
#: bracket; steps inside the bracket that did not halve it before a bisection.
SEARCH_SLOPE = float(np.log(10.0) / 20.0)
SEARCH_OVERSHOOT = 0.1
SEARCH_MAX_STEP_DB = 6.0
SEARCH_WIDEN = 8
SEARCH_GUARD = 0.4
SEARCH_STALLS = 3


@dataclass
class SolvedLevel:
    """The chain solved at an EMF peak per sample: the state, the output's harmonics (as
    :func:`harmonics`) and the fundamental at the input connector."""

    state: ChainState
    emf_vpk: np.ndarray
    harmonics: np.ndarray
    input_vpk: np.ndarray


def _scale_to(chain: LargeSignalChain, state: ChainState, k: np.ndarray) -> None:
    """Newton's start for a level ``k`` times the one ``state`` was solved at (NaN: the rest
    bias, left as it is): every junction voltage's and mean current's departure from rest
    scaled by ``k`` (exact for small signals), a junction raised by at most 2 V_T beyond its
    old value (its voltage grows with the log of its current: SPICE's limit).  Replaces the
    state's arrays (never writes into them: they may be views of the caller's)."""
    k = np.where(np.isfinite(k), k, 1.0)
    kc = k[:, None]
    for s, c in zip(state, chain.coef, strict=True):
        if s is None:
            continue
        up = 2.0 * c["v_t"][:, None]
        for name, rest in (("vbe", c["vbe0"][:, None]), ("vbc", c["vbc0"][:, None])):
            old = getattr(s, name)
            new = old - rest
            new *= kc
            new += rest
            cap = np.maximum(old, rest)
            cap += up
            setattr(s, name, np.minimum(new, cap, out=new))
        s.m_b = c["ib0"] + k * (s.m_b - c["ib0"])
        s.m_c = c["ic0"] + k * (s.m_c - c["ic0"])


def _interpolated_root(hx: np.ndarray, hf: np.ndarray) -> np.ndarray:
    """Root estimate from the last three points ``(rows, 3)`` of each sample (the newest
    last): inverse quadratic interpolation where the three scores differ, else the secant
    through the newest two, else a step along :data:`SEARCH_SLOPE` (Brent, *Algorithms for
    Minimization without Derivatives*, 1973, ch. 4, from memory)."""
    x1, x2, x3 = hx[:, 0], hx[:, 1], hx[:, 2]
    f1, f2, f3 = hf[:, 0], hf[:, 1], hf[:, 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        iqi = (
            x1 * f2 * f3 / ((f1 - f2) * (f1 - f3))
            + x2 * f1 * f3 / ((f2 - f1) * (f2 - f3))
            + x3 * f1 * f2 / ((f3 - f1) * (f3 - f2))
        )
        sec = x3 - f3 * (x3 - x2) / (f3 - f2)
    out = np.where(np.isfinite(sec), sec, x3 - f3 / SEARCH_SLOPE)
    out = np.where(np.isfinite(iqi), iqi, out)
    return np.asarray(out, dtype=float)


def criterion_level(
    chain: LargeSignalChain,
    *,
    swing_vpk: np.ndarray,
    gain: np.ndarray,
    guess_vpk: np.ndarray,
    criterion: str,
    thd_percent: float,
    compression_db: float,
    n_points: int = 64,
    iterations: int = 10,
    workers: int = 1,
    tol_db: float = 0.0,
    emf_per_input: np.ndarray | float = 1.0,
    start: SolvedLevel | None = None,
) -> np.ndarray:
    """Input peak level where the board's clipping criterion is met, for every sample at once.

    Levels are the fundamental at the input connector; the search itself runs on the
    generator's EMF (``emf_per_input`` times the input level for small signals) and reads the
    input level off the solution, so the base current's drop on the source resistance counts.

    ``criterion`` "thd": THD reaches ``thd_percent``; "compression": the fundamental gain has
    dropped ``compression_db`` below the small-signal ``gain``.  The score (log THD over the
    criterion, or the compression less its figure) rises with the level in dB.  Each sample
    is searched on its own, Brent's way: from ``guess_vpk`` (capped just above the
    swing-limited threshold ``swing_vpk``) it steps to the root interpolated from its last
    points (:func:`_interpolated_root`), aiming past it until the root is bracketed; then
    the steps stay inside the bracket, a step shorter than :data:`SEARCH_GUARD` of
    ``tol_db`` is lengthened to that (so a step beside the root closes the bracket), and a
    bisection follows :data:`SEARCH_STALLS` steps that did not halve the bracket.  A sample
    stops once its bracket is narrower than ``tol_db`` (or after ``iterations`` steps inside
    it); only the samples still searching are solved, each from its own last solution.  The
    answer is the secant inside the final bracket; samples that cannot be bracketed within
    :data:`SEARCH_WIDEN` steps come back NaN.

    ``start``: the chain solved at some level (the nominal level's solution, at the same
    ``n_points``): the first point to interpolate from (and a bracket end), and where the
    first solve starts instead of the rest bias.  Every solve starts from the sample's last
    solution scaled to the new level (:func:`_scale_to`).
    """
    n = gain.shape[0]
    if start is None:
        state, amp_at = chain.rest_state(n_points), np.full(n, np.nan)
    else:
        state = [s.take(slice(None)).copy() if s else None for s in start.state]
        amp_at = np.array(start.emf_vpk, dtype=float)

    def score(
        h: np.ndarray, v_in: np.ndarray, amp: np.ndarray, rows: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Criterion score (>= 0: met) and input level over EMF in dB from the harmonics."""
        with np.errstate(divide="ignore"):
            ratio_db = 20.0 * np.log10(np.maximum(v_in, 1e-300) / amp)
        if criterion == "compression":
            with np.errstate(divide="ignore"):
                comp = 20.0 * np.log10(np.abs(gain[rows]) * v_in / np.maximum(h[:, 1], 1e-300))
            return comp - compression_db, ratio_db
        return np.log(np.maximum(thd_from_harmonics(h), 1e-9)) - np.log(thd_percent), ratio_db

    def g(level_db: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Criterion score and input level over EMF in dB at these EMF levels."""
        amp = 10.0 ** (level_db / 20.0)
        scale = amp / amp_at[rows]
        amp_at[rows] = amp
        # every sample: solve in place (views), else on copies of the rows put back after
        pick: np.ndarray | slice = slice(None) if rows.size == n else rows
        sub = [s.take(pick) if s else None for s in state]
        v_in = np.empty(amp.shape[0])
        h = harmonics(
            chain.take(pick),
            amp,
            n_points,
            workers=workers,
            state=sub,
            input_fundamental=v_in,
            start_scale=scale,
        )
        if isinstance(pick, np.ndarray):
            for s, new in zip(state, sub, strict=True):
                if s is not None and new is not None:
                    s.put(pick, new)
        return score(h, v_in, amp, rows)

    to_emf = 20.0 * np.log10(np.broadcast_to(np.asarray(emf_per_input, dtype=float), gain.shape))
    ref = 20.0 * np.log10(np.maximum(swing_vpk, 1e-12)) + to_emf
    with np.errstate(divide="ignore", invalid="ignore"):
        first = np.minimum(20.0 * np.log10(np.maximum(guess_vpk, 1e-12)) + to_emf, ref + 0.5)
    first = np.where(np.isfinite(first), first, ref)
    tol = max(tol_db, 1e-9)
    guard = SEARCH_GUARD * tol
    # the bracket [a, b], fa <= 0 < fb (an end not found yet: score -inf / +inf), and the
    # last three points solved, the newest last
    a, b = np.full(n, -np.inf), np.full(n, np.inf)
    fa, fb = np.full(n, -np.inf), np.full(n, np.inf)
    ra, rb = np.zeros(n), np.zeros(n)
    hx, hf = np.full((n, 3), np.nan), np.full((n, 3), np.nan)
    stalls = np.zeros(n, dtype=int)

    def solve_at(rows: np.ndarray, x: np.ndarray) -> None:
        f, r = g(x, rows)
        hx[rows, :2], hf[rows, :2] = hx[rows, 1:], hf[rows, 1:]
        hx[rows, 2], hf[rows, 2] = x, f
        lo, hi = f <= 0, f > 0  # NaN scores close neither end
        ia, ib = rows[lo], rows[hi]
        a[ia], fa[ia], ra[ia] = x[lo], f[lo], r[lo]
        b[ib], fb[ib], rb[ib] = x[hi], f[hi], r[hi]

    every = np.arange(n)
    if start is not None:  # a solved point to interpolate from, and maybe a bracket end
        f_s, r_s = score(start.harmonics, start.input_vpk, start.emf_vpk, every)
        x_s = 20.0 * np.log10(np.maximum(start.emf_vpk, 1e-300))
        hx[:, 2], hf[:, 2] = x_s, f_s
        lo, hi = f_s <= 0, f_s > 0
        a[lo], fa[lo], ra[lo] = x_s[lo], f_s[lo], r_s[lo]
        b[hi], fb[hi], rb[hi] = x_s[hi], f_s[hi], r_s[hi]
    solve_at(every, first)
    live = every[np.isfinite(hf[:, 2])]
    widen, inside = np.zeros(n, dtype=int), np.zeros(n, dtype=int)
    while live.size:
        closed = np.isfinite(fa[live]) & np.isfinite(fb[live])
        live = live[~closed | (b[live] - a[live] > tol)]
        closed = np.isfinite(fa[live]) & np.isfinite(fb[live])
        over = np.where(closed, inside[live] >= iterations, widen[live] >= SEARCH_WIDEN)
        live = live[~over]
        closed = closed[~over]
        if live.size == 0:
            break
        x3 = hx[live, 2]
        step = _interpolated_root(hx[live], hf[live]) - x3
        step = np.where(np.abs(step) < guard, np.copysign(guard, step), step)
        # open bracket: aim past the root, towards the missing end, at most the largest step
        need_up = ~np.isfinite(fb[live])
        aim = step + np.copysign(SEARCH_OVERSHOOT * np.abs(step), step)
        aim = np.where(need_up, np.maximum(aim, guard), np.minimum(aim, -guard))
        aim = np.clip(aim, -SEARCH_MAX_STEP_DB, SEARCH_MAX_STEP_DB)
        al, bl = a[live], b[live]
        c = x3 + step
        mid = 0.5 * (al + bl)
        bisect = ~((c > al) & (c < bl)) | (stalls[live] >= SEARCH_STALLS)
        c = np.where(closed, np.where(bisect, mid, c), x3 + aim)
        width = bl - al
        solve_at(live, c)
        widen[live] += ~closed
        inside[live] += closed
        halved = (b[live] - a[live] <= 0.5 * width) | (closed & bisect)
        stalls[live] = np.where(closed & ~halved, stalls[live] + 1, 0)
    ok = np.isfinite(fa) & np.isfinite(fb)
    with np.errstate(divide="ignore", invalid="ignore"):
        c = b - fb * (b - a) / (fb - fa)
        c = np.where(np.isfinite(c) & (c >= a) & (c <= b), c, 0.5 * (a + b))
        r = np.where(b > a, ra + (c - a) * (rb - ra) / (b - a), ra)
    return np.where(ok, 10.0 ** ((c + r) / 20.0), np.nan)


# --- the whole channel -------------------------------------------------------------------------


def evaluate_channel(
    board: Board,
    channel: Channel,
    p: Arrays,
    *,
    thd_points: int | None = 64,
    search_points: int | None = 64,
    search_iterations: int = 10,
    workers: int = 1,
    search_tol_db: float = 0.0,
) -> ChannelArrays:
    """Everything the model predicts for one channel, over the samples in ``p``.

    ``thd_points`` / ``search_points``: points per period for THD at the nominal level and for
    the criterion search (None skips that part); ``workers`` threads share the large-signal
    blocks.  Problems (saturated or cut off at rest, a
    chain that cannot drive its load) are returned with the samples they hit, not raised.
    """
    n = max(np.asarray(v).size for v in p.values())
    problems: list[Problem] = []
    stages = _dc(board, channel, p, n, problems)
    if any(k.endswith(".vaf_v") for k in p):  # the Early effect moves the bias a little
        q = _with_inverse_early(p, n)
        for _ in range(3):
            problems = []
            stages = _dc(board, channel, p, n, problems, _early_factors(channel, q, stages, n))
    _small_signal(channel, p, stages, n)
    _swing(channel, p, stages, n)
    res = ChannelArrays(channel.name, n, stages, _b(p["v_t"], n), problems=problems)

    # channel gain, impedances, clipping referred to the input
    cum = np.ones(n)
    clip = np.full(n, np.inf)
    clip_stage = np.zeros(n, dtype=int)
    clip_pos = np.zeros(n, dtype=bool)
    after = [sum(s.inverting for s in stages[j + 1 :]) % 2 == 1 for j in range(len(stages))]
    for j, s in enumerate(stages):
        cum = cum * s.gain
        with np.errstate(divide="ignore"):
            lim_up = s.swing_pos_v / np.abs(cum)
            lim_dn = s.swing_neg_v / np.abs(cum)
        # input peak at which this stage's positive / negative output limit is hit
        first_up = lim_up <= lim_dn
        lim = np.minimum(lim_up, lim_dn)
        # the stage output side maps to the channel output side through later inversions
        out_pos = first_up != after[j]
        better = lim < clip
        clip = np.where(better, lim, clip)
        clip_stage = np.where(better, j, clip_stage)
        clip_pos = np.where(better, out_pos, clip_pos)
    res.gain_midband = cum
    factor, corner = _low_end(channel, p, stages, n, board.conditions.frequency_hz)
    res.gain = cum * factor
    res.input_ohm = stages[0].input_ohm
    res.output_ohm = stages[-1].output_ohm
    res.clip_input_vpk = clip
    res.clip_stage = clip_stage
    res.clip_positive = clip_pos
    res.low_corner_hz = corner
    res.time_constants = time_constants(channel, p, stages, n)
    res.settle_time_s, res.dc_settle_time_s = settle_times(res.time_constants, n)
    span = _b(p["supply.positive_v"], n) - _b(p.get("supply.negative_v", np.zeros(n)), n)
    res.supply_settle_time_s = supply_settle_time(res.time_constants, res.settle_time_s, span)
    res.supply_current_a = sum((s.supply_a for s in stages), np.zeros(n))

    nominal_vpk = board.conditions.nominal_input_vrms * np.sqrt(2.0)
    short = clip < nominal_vpk
    if np.any(short):
        j = int(clip_stage[short][0])
        st = channel.stages[j]
        s = stages[j]
        i = int(np.flatnonzero(short)[0])
        needed = float(nominal_vpk * abs(np.prod([x.gain[i] for x in stages[: j + 1]])))
        problems.append(
            Problem(
                f"channel.{channel.name}.stage[{j}]({st.name})",
                f"cannot drive its load: it swings only +{float(s.swing_pos_v[i]):.3g} V / "
                f"-{float(s.swing_neg_v[i]):.3g} V peak into {float(s.r_next[i]):.4g} ohm "
                f"(load_ohm or the next stage), but the nominal input "
                f"{board.conditions.nominal_input_vrms:g} V rms needs {needed:.3g} V peak there",
                "raise the load resistance, lower conditions.nominal_input_vrms or the gain",
                short,
            )
        )

    chain = LargeSignalChain.from_arrays(res, channel, p)
    # the generator's EMF that puts a small signal of 1 V on the input connector
    emf_per_input = 1.0 + _b(p["source_ohm"], n) / res.input_ohm
    nominal: SolvedLevel | None = None
    if thd_points:
        # the search starts from this solution where it runs at the same resolution (kept
        # only then: a full-size state is memory the Monte Carlo's estimate counts)
        keep = search_points == thd_points
        state = chain.rest_state(thd_points) if keep else None
        emf = nominal_vpk * emf_per_input
        v_in = np.empty(n)
        h = harmonics(chain, emf, thd_points, workers=workers, state=state, input_fundamental=v_in)
        res.thd_percent = thd_from_harmonics(h)
        if state is not None:
            nominal = SolvedLevel(state, emf, h, v_in)
    if search_points:
        c = board.conditions
        if c.clip_criterion == "thd" and res.thd_percent is not None:
            # THD grows about in proportion to level below clipping (HD2-dominated)
            with np.errstate(divide="ignore"):
                guess = nominal_vpk * c.clip_thd_percent / np.maximum(res.thd_percent, 1e-12)
        else:
            guess = clip
        res.thd_clip_input_vpk = criterion_level(
            chain,
            swing_vpk=clip,
            gain=res.gain_midband,
            guess_vpk=guess,
            criterion=c.clip_criterion,
            thd_percent=c.clip_thd_percent,
            compression_db=c.clip_compression_db,
            n_points=search_points,
            iterations=search_iterations,
            workers=workers,
            tol_db=search_tol_db,
            emf_per_input=emf_per_input,
            start=nominal,
        )
    return res
