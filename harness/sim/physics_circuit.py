"""A small large-signal circuit solver: nodal analysis, Ebers-Moll BJTs, an op-amp macro-model.

Why a solver of its own: the simulated board must not share a single formula with the limit
model (harness.model), otherwise a bug in the model's bias or gain equations would be copied
into the bench it is tested against and could never show.  This module knows nothing of
stages or tolerances; it solves a netlist.

Formulation (nodal analysis, the usual SPICE one; Vlach & Singhal, *Computer Methods for
Circuit Analysis and Design*, ch. 4, from memory).  Every node voltage is an unknown except
the *known* nodes (ground and the supply rails), which are held at fixed voltages; so no
voltage-source branch currents are needed.  The generator is its Norton equivalent: a
conductance 1/R_s from the input node to ground and a current e(t)/R_s into it.  KCL residual
per node: currents leaving through elements minus currents injected; Newton solves
r(x) = 0 with the analytic Jacobian.  A conductance GMIN = 1e-12 S from every unknown node
to ground keeps nodes left floating by an open fault defined (SPICE does the same).

BJT: Ebers-Moll in transport form with both junctions (Ebers & Moll, Proc. IRE 42, 1954,
pp. 1761-1772; the transport form as in the SPICE Gummel-Poon documentation with
IKF = IKR = ∞, ISE = ISC = 0, no resistances or capacitances; from memory):

    I_CC = I_S (exp(V_BE/V_T) − 1),   I_EC = I_S (exp(V_BC/V_T) − 1)
    I_C  = (I_CC − I_EC)(1 − V_BC/V_AF) − I_EC/β_R
    I_B  = I_CC/β_F + I_EC/β_R,       I_E = −(I_C + I_B)

So saturation is physical: when the base-collector junction forward-biases, I_EC steals
collector current, V_CE settles at a few tens of mV to a few hundred mV depending on the
forced β, and the collector follows the emitter (and therefore the base drive) instead of
sitting at a fixed "V_CE(sat)".  (1 − V_BC/V_AF) is Gummel-Poon's q_b with VAR = ∞ and
IKF = ∞ (Early effect); V_AF = ∞ when the board gives none.  Newton uses SPICE's junction
voltage limiting ``pnjlim`` (Nagel, SPICE2 thesis, UCB ERL-M520, 1975, from memory) on both
junctions, so the exponentials cannot run away from a poor first guess.

Op-amp macro-model: one internal node p with conductance g0 to ground, capacitance
C_p = g0·A0/(2π·GBW) and a transconductance A0·g0 from the input difference: a single-pole
open-loop gain A0/(1 + s·A0/(2π·GBW)).  The output voltage is p passed through a smooth clamp
(softplus corners, 50 mV knee) to [V− + headroom, V+ − headroom]; it drives the output node
through R_out with a smooth current limit i = I_lim·tanh(Δv/(R_out·I_lim)).  p itself is held
just beyond the clamp by a stiff soft clamp so the model recovers from clipping in one step,
as a real output stage does, instead of winding its integrator up by kilovolts.

Time integration: BDF2 (Gear, second order) on a uniform grid, capacitor companion
i = (C/h)(1.5 v_{n+1} − 2 v_n + 0.5 v_{n−1}).  Why not the trapezoidal rule: it is not
L-stable, and the op-amp's clamped internal node is a very stiff mode whose trapezoidal
multiplier is close to −1 (ringing at Nyquist during clipping); BDF2 damps it, and its
amplitude error at 256-1024 points per period is below 1e-6 at the fundamental.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import lapack

#: Boltzmann constant and elementary charge (CODATA 2018 exact values, as in scipy.constants).
_K_BOLTZMANN = 1.380649e-23
_Q_ELECTRON = 1.602176634e-19
#: SPICE's default nominal temperature 27 °C, so the ngspice cross-checks use the same V_T.
T_DEFAULT_K = 300.15
GMIN_S = 1e-12
_EXP_LIMIT = 80.0  # exp() argument cap: only reached far from a solution
_dgesv = lapack.dgesv  # LU solve without numpy.linalg's per-call overhead


def thermal_voltage(temperature_k: float = T_DEFAULT_K) -> float:
    """kT/q in volts (25.865 mV at 27 °C)."""
    return _K_BOLTZMANN * temperature_k / _Q_ELECTRON


# --- netlist -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BjtModel:
    """Ebers-Moll NPN parameters.  ``vaf_v`` = inf: no Early effect."""

    is_a: float
    beta_f: float
    beta_r: float
    vaf_v: float = math.inf


@dataclass(frozen=True)
class OpAmpModel:
    """Macro-model parameters (see module docstring)."""

    open_loop_gain: float
    gbw_hz: float
    headroom_v: float
    i_limit_a: float
    r_out_ohm: float = 20.0
    quiescent_a: float = 0.0


@dataclass(frozen=True)
class Element:
    """One netlist element.  ``kind`` R/C: ``value`` in ohm/farad between nodes[0], nodes[1];
    Q: nodes (c, b, e), ``model`` a BjtModel; A: nodes (in+, in−, out), ``model`` OpAmpModel.
    ``ref`` is the designator or stage it came from (faults, reports); ``role`` a unique name."""

    kind: str
    role: str
    nodes: tuple[str, ...]
    value: float = 0.0
    model: BjtModel | OpAmpModel | None = None
    ref: str = ""


@dataclass
class Netlist:
    """A channel's circuit.  ``known`` holds the fixed node voltages (ground "0", rails)."""

    elements: list[Element] = field(default_factory=list)
    known: dict[str, float] = field(default_factory=lambda: {"0": 0.0})
    input_node: str = "in"
    output_node: str = "out"
    pos_rail: str = "vpos"
    neg_rail: str = "vneg"

    def add(
        self,
        kind: str,
        role: str,
        nodes: tuple[str, ...],
        value: float = 0.0,
        model: BjtModel | OpAmpModel | None = None,
        ref: str = "",
    ) -> None:
        self.elements.append(Element(kind, role, nodes, value, model, ref))


# --- compiled circuit ----------------------------------------------------------------------------


class ConvergenceError(ArithmeticError):
    """Newton did not converge (internal; the public layer turns it into a clear error)."""


def _pnjlim(vnew: float, vold: float, vt: float, vcrit: float) -> float:
    """SPICE junction limiting: a forward step larger than 2 V_T above V_crit is taken on a
    log scale, so exp(V/V_T) grows at most by a factor (1 + ΔV/V_T) per iteration."""
    if vnew > vcrit and abs(vnew - vold) > 2.0 * vt:
        if vold > 0.0:
            arg = 1.0 + (vnew - vold) / vt
            return vold + vt * math.log(arg) if arg > 0.0 else vcrit
        return vt * math.log(vnew / vt)
    return vnew


def _softplus(x: float, k: float) -> tuple[float, float]:
    """k·ln(1 + e^(x/k)) and its slope, overflow-safe."""
    z = x / k
    if z > 30.0:
        return x, 1.0
    if z < -30.0:
        return k * math.exp(z), math.exp(z)
    ez = math.exp(z)
    return k * math.log1p(ez), ez / (1.0 + ez)


@dataclass
class StepResult:
    x: np.ndarray
    y: np.ndarray | None  # J^-1 · A_u, for the shooting sensitivities
    iterations: int


class Circuit:
    """A netlist compiled to matrices.  Unknown nodes come first in the full node vector, so
    the reduced system is a leading sub-block (a view, no copy)."""

    _KNEE_V = 0.05  # op-amp output clamp knee
    _CLAMP_MARGIN_V = 0.3  # internal node clamp beyond the output clamp

    def __init__(self, netlist: Netlist, temperature_k: float = T_DEFAULT_K) -> None:
        self.netlist = netlist
        self.vt = thermal_voltage(temperature_k)
        names: list[str] = []
        for el in netlist.elements:
            for nd in el.nodes:
                if nd not in netlist.known and nd not in names:
                    names.append(nd)
        # op-amp internal nodes are unknowns of their own
        self.opamps = [el for el in netlist.elements if el.kind == "A"]
        for el in self.opamps:
            names.append(f"{el.role}#p")
        if netlist.input_node not in names:
            names.append(netlist.input_node)
        self.unknown = names
        self.n = len(names)
        known_names = list(netlist.known)
        self.index = {nd: i for i, nd in enumerate(names)}
        for j, nd in enumerate(known_names):
            self.index[nd] = self.n + j
        self.nf = self.n + len(known_names)
        self.known_values = np.array([netlist.known[k] for k in known_names], dtype=float)

        nf = self.nf
        g = np.zeros((nf, nf))
        for i in range(self.n):
            g[i, i] += GMIN_S
        self.resistors = [el for el in netlist.elements if el.kind == "R"]
        for el in self.resistors:
            a, b = self.index[el.nodes[0]], self.index[el.nodes[1]]
            gv = 1.0 / el.value
            g[a, a] += gv
            g[b, b] += gv
            g[a, b] -= gv
            g[b, a] -= gv
        caps = [
            (self.index[el.nodes[0]], self.index[el.nodes[1]], el.value)
            for el in netlist.elements
            if el.kind == "C" and el.value > 0.0
        ]
        self.bjts = [el for el in netlist.elements if el.kind == "Q"]
        self._bjt_idx = [tuple(self.index[nd] for nd in el.nodes) for el in self.bjts]
        self._bjt_vcrit = []
        for el in self.bjts:
            m = el.model
            assert isinstance(m, BjtModel)
            self._bjt_vcrit.append(self.vt * math.log(self.vt / (math.sqrt(2.0) * m.is_a)))
        # op-amps: linear part (g0, transconductance, internal capacitor) goes in G and caps
        self._op: list[tuple[int, int, int, int, OpAmpModel, float, float]] = []
        vpos = netlist.known.get(netlist.pos_rail, 0.0)
        vneg = netlist.known.get(netlist.neg_rail, 0.0)
        for el in self.opamps:
            m = el.model
            assert isinstance(m, OpAmpModel)
            ip, im, io = (self.index[nd] for nd in el.nodes)
            ix = self.index[f"{el.role}#p"]
            g0 = 1e-4
            gm = m.open_loop_gain * g0
            g[ix, ix] += g0
            g[ix, ip] -= gm
            g[ix, im] += gm
            caps.append((ix, self.index["0"], g0 * m.open_loop_gain / (2 * math.pi * m.gbw_hz)))
            mid = 0.5 * (vpos + vneg)
            hi = max(vpos - m.headroom_v, mid)
            lo = min(vneg + m.headroom_v, mid)
            self._op.append((ip, im, io, ix, m, hi, lo))
        self._op_gcl = [10.0 * m.open_loop_gain * 1e-4 for (_, _, _, _, m, _, _) in self._op]
        self.g = g
        self.k = len(caps)
        self.cap_a = np.array([c[0] for c in caps], dtype=int)
        self.cap_b = np.array([c[1] for c in caps], dtype=int)
        self.cap_c = np.array([c[2] for c in caps], dtype=float)
        inc = np.zeros((nf, self.k))
        for j, (a, b, _) in enumerate(caps):
            inc[a, j] += 1.0
            inc[b, j] -= 1.0
        self.inc = inc
        self.inc_u = np.ascontiguousarray(inc[: self.n, :])
        self.in_idx = self.index[netlist.input_node]
        self.out_idx = self.index[netlist.output_node]
        self._build_scatter()

    # --- device evaluation ---------------------------------------------------------------------

    def _build_scatter(self) -> None:
        """Flat indices where the devices' Jacobian entries and currents land, so one
        ``np.bincount`` per Newton iteration scatters them (fast, and duplicates add up)."""
        nf = self.nf
        jidx: list[int] = []
        ridx: list[int] = []
        for ic_, ib_, ie_ in self._bjt_idx:
            for row in (ic_, ib_, ie_):
                for col in (ib_, ie_, ic_):
                    jidx.append(row * nf + col)
            ridx.extend((ic_, ib_, ie_))
        for _ip, _im, io, ix, _m, _hi, _lo in self._op:
            jidx.extend((ix * nf + ix, io * nf + ix, io * nf + io))
            ridx.extend((ix, io))
        self._jidx = np.array(jidx, dtype=np.intp)
        self._ridx = np.array(ridx, dtype=np.intp)
        self._bjt_par = []
        for el in self.bjts:
            m = el.model
            assert isinstance(m, BjtModel)
            inv_vaf = 0.0 if math.isinf(m.vaf_v) else 1.0 / m.vaf_v
            self._bjt_par.append((m.is_a, m.beta_f, m.beta_r, inv_vaf))

    def _devices(
        self, xl: list[float], u: list[tuple[float, float]] | None
    ) -> tuple[list[float], list[float], list[tuple[float, float]], bool]:
        """The devices' Jacobian entries and currents at node voltages ``xl`` (a list: plain
        floats are several times faster than numpy scalars here).  ``u`` holds the previous
        iteration's (limited) junction voltages; returns the new ones and whether limiting
        changed any (then Newton has not converged yet)."""
        vt = self.vt
        jv: list[float] = []
        rv: list[float] = []
        new_u: list[tuple[float, float]] = []
        limited = False
        exp = math.exp
        for k, (ic_, ib_, ie_) in enumerate(self._bjt_idx):
            is_a, bf, br, inv_vaf = self._bjt_par[k]
            vbe_raw = xl[ib_] - xl[ie_]
            vbc_raw = xl[ib_] - xl[ic_]
            if u is not None:
                vcrit = self._bjt_vcrit[k]
                vbe = _pnjlim(vbe_raw, u[k][0], vt, vcrit)
                vbc = _pnjlim(vbc_raw, u[k][1], vt, vcrit)
                if vbe != vbe_raw or vbc != vbc_raw:
                    limited = True
            else:
                vbe, vbc = vbe_raw, vbc_raw
            new_u.append((vbe, vbc))
            ebe = exp(min(vbe / vt, _EXP_LIMIT))
            ebc = exp(min(vbc / vt, _EXP_LIMIT))
            icc = is_a * (ebe - 1.0)
            iec = is_a * (ebc - 1.0)
            gbe = is_a * ebe / vt
            gbc = is_a * ebc / vt
            q = 1.0 - vbc * inv_vaf
            dic_be = gbe * q
            dic_bc = -gbc * q - (icc - iec) * inv_vaf - gbc / br
            dib_be = gbe / bf
            dib_bc = gbc / br
            # companion: current at the actual node voltages, linearised about (vbe, vbc)
            dbe, dbc = vbe_raw - vbe, vbc_raw - vbc
            ic = (icc - iec) * q - iec / br + dic_be * dbe + dic_bc * dbc
            ib = icc / bf + iec / br + dib_be * dbe + dib_bc * dbc
            rv.extend((ic, ib, -ic - ib))
            # columns (b, e, c): d/dx_b = d/dvbe + d/dvbc ; d/dx_e = -d/dvbe ; d/dx_c = -d/dvbc
            die_be = -dic_be - dib_be
            die_bc = -dic_bc - dib_bc
            jv.extend(
                (
                    dic_be + dic_bc,
                    -dic_be,
                    -dic_bc,
                    dib_be + dib_bc,
                    -dib_be,
                    -dib_bc,
                    die_be + die_bc,
                    -die_be,
                    -die_bc,
                )
            )
        knee = self._KNEE_V
        for k, (_ip, _im, io, ix, m, hi, lo) in enumerate(self._op):
            vp = xl[ix]
            # stiff clamp of the internal node just beyond the output range
            gcl = self._op_gcl[k]
            s1, d1 = _softplus(vp - (hi + self._CLAMP_MARGIN_V), knee)
            s2, d2 = _softplus((lo - self._CLAMP_MARGIN_V) - vp, knee)
            # smooth output clamp: lo + sp(vp - lo) - sp(vp - hi)
            a1, e1 = _softplus(vp - lo, knee)
            a2, e2 = _softplus(vp - hi, knee)
            vo = lo + a1 - a2
            dvo = e1 - e2
            ro = m.r_out_ohm
            il = m.i_limit_a
            th = math.tanh((vo - xl[io]) / (ro * il))
            sech2 = 1.0 - th * th
            jv.extend((gcl * (d1 + d2), -sech2 / ro * dvo, sech2 / ro))
            rv.extend((gcl * (s1 - s2), -il * th))
        return jv, rv, new_u, limited

    def opamp_output_current(self, xf: np.ndarray) -> list[float]:
        """Current each op-amp output delivers (A), for the supply current."""
        out = []
        for _ip, _im, io, ix, m, hi, lo in self._op:
            vp = xf[ix]
            vo = lo + _softplus(vp - lo, self._KNEE_V)[0] - _softplus(vp - hi, self._KNEE_V)[0]
            out.append(m.i_limit_a * math.tanh((vo - xf[io]) / (m.r_out_ohm * m.i_limit_a)))
        return out

    def bjt_currents(self, xf: np.ndarray) -> list[tuple[float, float]]:
        """(I_C, I_B) of each BJT at node voltages ``xf`` (no limiting)."""
        out = []
        vt = self.vt
        for k, el in enumerate(self.bjts):
            m = el.model
            ic_, ib_, ie_ = self._bjt_idx[k]
            vbe = xf[ib_] - xf[ie_]
            vbc = xf[ib_] - xf[ic_]
            icc = m.is_a * (math.exp(min(vbe / vt, _EXP_LIMIT)) - 1.0)  # type: ignore[union-attr]
            iec = m.is_a * (math.exp(min(vbc / vt, _EXP_LIMIT)) - 1.0)  # type: ignore[union-attr]
            inv_vaf = 0.0 if math.isinf(m.vaf_v) else 1.0 / m.vaf_v  # type: ignore[union-attr]
            ic = (icc - iec) * (1.0 - vbc * inv_vaf) - iec / m.beta_r  # type: ignore[union-attr]
            ib = icc / m.beta_f + iec / m.beta_r  # type: ignore[union-attr]
            out.append((ic, ib))
        return out

    # --- Newton ---------------------------------------------------------------------------------

    def full(self, x: np.ndarray) -> np.ndarray:
        xf = np.empty(self.nf)
        xf[: self.n] = x
        xf[self.n :] = self.known_values
        return xf

    def newton(
        self,
        jac_lin: np.ndarray,
        b: np.ndarray,
        x0: np.ndarray,
        *,
        want_y: bool = False,
        max_iter: int = 60,
        tol_v: float = 1e-6,
        max_step_v: float = 5.0,
    ) -> StepResult:
        """Solve jac_lin·xf + devices(xf) = b for the unknowns, from ``x0``.  Converged when
        the last step is below ``tol_v`` and no junction was limited: Newton's quadratic
        convergence then leaves an error of order tol_v²/V_T, far below a microvolt."""
        n, nf = self.n, self.nf
        xf = self.full(x0)
        u: list[tuple[float, float]] | None = None
        rhs = np.empty((n, 1 + self.k)) if want_y else None
        if rhs is not None:
            rhs[:, 1:] = self.inc_u
        jidx, ridx, nf2 = self._jidx, self._ridx, nf * nf
        for it in range(1, max_iter + 1):
            jv, rv, u, limited = self._devices(xf.tolist(), u)
            jac = jac_lin + np.bincount(jidx, jv, nf2).reshape(nf, nf)
            r = jac_lin @ xf - b + np.bincount(ridx, rv, nf)
            if rhs is not None:
                rhs[:, 0] = r[:n]
                _lu, _piv, sol, info = _dgesv(jac[:n, :n], rhs)
                dx = sol[:, 0]
            else:
                _lu, _piv, dx, info = _dgesv(jac[:n, :n], r[:n])
            if info != 0 or not np.isfinite(dx).all():
                raise ConvergenceError("singular or non-finite Newton step")
            big = max(map(abs, dx.tolist()))
            # a global step bound on top of pnjlim: no node moves more than max_step_v at once
            if big > max_step_v:
                dx = dx * (max_step_v / big)
            xf[:n] -= dx
            if big < tol_v and not limited:
                y = sol[:, 1:] if rhs is not None else None
                return StepResult(xf[:n].copy(), y, it)
        raise ConvergenceError(f"Newton did not converge in {max_iter} iterations")

    def dc(self, e_v: float, g_src: float, x0: np.ndarray | None = None) -> np.ndarray:
        """DC operating point (capacitors open), generator EMF ``e_v`` behind ``g_src``.
        Falls back to source stepping (rails and EMF ramped from zero) if plain Newton fails."""
        jac_lin = self.g.copy()
        jac_lin[self.in_idx, self.in_idx] += g_src
        b = np.zeros(self.nf)
        b[self.in_idx] += g_src * e_v
        start = np.zeros(self.n) if x0 is None else x0
        try:
            return self.newton(jac_lin, b, start, max_iter=150).x
        except ConvergenceError:
            pass
        saved = self.known_values.copy()
        x = np.zeros(self.n)
        try:
            for lam in np.linspace(0.05, 1.0, 20):
                self.known_values = saved * lam
                b[self.in_idx] = g_src * e_v * lam
                x = self.newton(jac_lin, b, x, max_iter=150).x
        finally:
            self.known_values = saved
        return x


@dataclass
class PeriodSolution:
    x: np.ndarray  # (steps, n) node voltages at t = 0, h, ..., T-h
    iterations: int  # shooting Newton iterations
    residual_v: float  # final periodicity error (cap voltages, V)
    newton_steps: int
    history_v: tuple[float, ...] = ()  # periodicity error after each shooting pass
    coarse_iterations: int = 0  # passes on the coarse pre-grid
    #: d(state at T)/d(state at 0) about the periodic solution (2k × 2k, state = (v_C(0),
    #: v_C(−h))): its powers carry a capacitor deviation forward by whole periods
    monodromy: np.ndarray | None = None


def periodic_steady_state(
    circ: Circuit,
    emf,
    g_src: float,
    period_s: float,
    steps: int,
    x_dc: np.ndarray,
    init_state: np.ndarray | None = None,
    x_guess: np.ndarray | None = None,
    max_shoot: int = 25,
    coarse_steps: int = 64,
) -> tuple[PeriodSolution, np.ndarray]:
    """Periodic steady state by shooting on the capacitor voltages (Newton on the state
    s = (v_C(0), v_C(−h)) of the BDF2 map over one period, with the monodromy matrix
    propagated step by step from the factored Jacobians).

    Why shooting, not a long transient: the board's coupling time constants (tens to hundreds
    of ms) are 10-1000 periods; a transient would need that many periods to settle, shooting
    needs 2-5 because the state map is nearly linear.  Without a warm start, the state is
    first converged on a coarse grid (``coarse_steps`` per period, 1/8 of the cost per pass),
    so the fine grid usually needs two passes.  ``emf(t)`` gives the generator EMF at an
    array of times.  Returns the solution and the converged state (a warm start for a
    neighbouring point)."""
    if init_state is None and circ.k and coarse_steps * 2 <= steps:
        try:
            coarse, s_c = _shoot(
                circ, emf, g_src, period_s, coarse_steps, x_dc, None, None, max_shoot, tol_scale=1e3
            )
            k = circ.k
            v0, vm = s_c[:k], s_c[k:]
            init_state = np.concatenate([v0, v0 + (vm - v0) * (coarse_steps / steps)])
            pre = coarse.iterations
        except ConvergenceError:
            pre = 0
        sol, state = _shoot(circ, emf, g_src, period_s, steps, x_dc, init_state, None, max_shoot)
        sol.coarse_iterations = pre
        return sol, state
    return _shoot(circ, emf, g_src, period_s, steps, x_dc, init_state, x_guess, max_shoot)


def _shoot(
    circ: Circuit,
    emf,
    g_src: float,
    period_s: float,
    steps: int,
    x_dc: np.ndarray,
    init_state: np.ndarray | None,
    x_guess: np.ndarray | None,
    max_shoot: int,
    tol_scale: float = 1.0,
) -> tuple[PeriodSolution, np.ndarray]:
    n, k = circ.n, circ.k
    h = period_s / steps
    t = np.arange(1, steps + 1) * h
    e = emf(t)
    cap_a, cap_b, cap_c = circ.cap_a, circ.cap_b, circ.cap_c
    cg = cap_c / h
    cg2, cg05 = (2.0 * cg)[None, :], (0.5 * cg)[None, :]
    jac_lin = circ.g.copy()
    jac_lin[circ.in_idx, circ.in_idx] += g_src
    jac_lin += circ.inc @ np.diag(1.5 * cg) @ circ.inc.T
    xf_dc = circ.full(x_dc)
    v_dc = xf_dc[cap_a] - xf_dc[cap_b]
    s0 = np.concatenate([v_dc, v_dc]) if init_state is None else init_state.copy()
    prev = x_guess
    total_newton = 0
    known_part = circ.full(x_dc)
    inc_u_t = circ.inc_u.T
    inc = circ.inc
    in_idx = circ.in_idx
    src = g_src * e
    resid = math.inf
    history: list[float] = []
    xs = np.empty((steps, n))
    for it in range(1, max_shoot + 1):
        v_n = s0[:k].copy()
        v_nm1 = s0[k:].copy()
        # monodromy blocks: d(v_n, v_{n-1}) / d(s0)
        p_top = np.hstack([np.eye(k), np.zeros((k, k))])
        p_bot = np.hstack([np.zeros((k, k)), np.eye(k)])
        x = x_dc.copy() if prev is None else prev[-1].copy()
        x_last = x.copy()
        for i in range(steps):
            b = inc @ (cg * (2.0 * v_n - 0.5 * v_nm1))
            b[in_idx] += src[i]
            if prev is not None:
                guess = prev[i] + (xs[i - 1] - prev[i - 1]) if i > 0 else prev[i]
            else:
                guess = x + (x - x_last) if i > 1 else x
            x_last = x
            try:
                res = circ.newton(jac_lin, b, guess, want_y=True)
            except ConvergenceError:
                # damped retry from the previous point: slow but sure through the op-amp clamp
                res = circ.newton(jac_lin, b, x, want_y=True, max_iter=400, max_step_v=0.2)
            total_newton += res.iterations
            x = res.x
            xs[i] = x
            known_part[:n] = x
            v_new = known_part[cap_a] - known_part[cap_b]
            # sensitivities: dx/dv_n = Y·diag(2C/h), dx/dv_{n-1} = −Y·diag(0.5C/h)
            assert res.y is not None  # asked for with want_y
            w = inc_u_t @ res.y
            p_new = (w * cg2) @ p_top - (w * cg05) @ p_bot
            p_bot, p_top = p_top, p_new
            v_nm1, v_n = v_n, v_new
        s_end = np.concatenate([v_n, v_nm1])
        f = s_end - s0
        resid = float(np.max(np.abs(f))) if k else 0.0
        history.append(resid)
        scale = (1e-7 + 1e-7 * float(np.max(np.abs(s0)))) * tol_scale if k else 1.0
        if resid <= scale:
            # the sample at t = 0 is the one at t = T of a periodic solution
            x_period = np.vstack([xs[-1:], xs[:-1]])
            mono = np.vstack([p_top, p_bot])
            sol = PeriodSolution(x_period, it, resid, total_newton, tuple(history), 0, mono)
            return sol, s_end
        a = np.vstack([p_top, p_bot]) - np.eye(2 * k)
        try:
            delta = np.linalg.solve(a, -f)
        except np.linalg.LinAlgError:
            delta = np.linalg.lstsq(a, -f, rcond=None)[0]
        big = float(np.max(np.abs(delta)))
        if big > 2.0:
            delta *= 2.0 / big
        s0 = s0 + delta
        prev = xs.copy()
    raise ConvergenceError(
        f"periodic steady state not reached in {max_shoot} shooting "
        f"iterations (residual {resid:.3g} V)"
    )


def transient_period(
    circ: Circuit,
    emf,
    g_src: float,
    period_s: float,
    steps: int,
    state: np.ndarray,
    x_guess: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """One period of the BDF2 map from capacitor state ``state`` = (v_C(0), v_C(−h)), not
    periodic: the circuit on its way from an old balance to a new one.  ``x_guess`` (steps,
    n) is a nearby solution (the periodic one) for Newton's first guesses.  Returns the node
    voltages at t = h … T (steps, n) and the state at T."""
    n, k = circ.n, circ.k
    h = period_s / steps
    src = g_src * emf(np.arange(1, steps + 1) * h)
    cg = circ.cap_c / h
    jac_lin = circ.g.copy()
    jac_lin[circ.in_idx, circ.in_idx] += g_src
    jac_lin += circ.inc @ np.diag(1.5 * cg) @ circ.inc.T
    known_part = circ.full(x_guess[-1])
    v_n, v_nm1 = state[:k].copy(), state[k:].copy()
    xs = np.empty((steps, n))
    # x_guess[i] is the periodic solution at t = i·h; step i solves t = (i+1)·h
    nxt = np.vstack([x_guess[1:], x_guess[:1]])
    x = x_guess[0]
    for i in range(steps):
        b = circ.inc @ (cg * (2.0 * v_n - 0.5 * v_nm1))
        b[circ.in_idx] += src[i]
        guess = nxt[i] + (xs[i - 1] - nxt[i - 1]) if i > 0 else nxt[i] + (x - x_guess[0])
        try:
            res = circ.newton(jac_lin, b, guess)
        except ConvergenceError:
            res = circ.newton(jac_lin, b, x, max_iter=400, max_step_v=0.2)
        x = res.x
        xs[i] = x
        known_part[:n] = x
        v_nm1, v_n = v_n, known_part[circ.cap_a] - known_part[circ.cap_b]
    return xs, np.concatenate([v_n, v_nm1])
