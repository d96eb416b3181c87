"""Periodic steady state of one BJT stage under a cosine drive, vectorised over samples.

The transistor is the Ebers-Moll transport model with both junctions and the Early effect,
the form SPICE's Gummel-Poon model reduces to with IKF = IKR = ISE = ISC = 0, VAR = infinite
and no terminal resistances (Ebers & Moll, Proc. IRE 42, 1954; Early, Proc. IRE 40, 1952;
ngspice manual, BJT chapter, Gummel-Poon parameters; Sedra & Smith, *Microelectronic
Circuits*, BJT chapter, for the transport form, from memory)::

    I_CC = I_S (exp(V_BE/V_T) - 1),   I_EC = I_S (exp(V_BC/V_T) - 1)
    I_C  = (I_CC - I_EC)(1 - V_BC/V_AF) - I_EC/beta_R
    I_B  = I_CC/beta_F + I_EC/beta_R

So a saturating collector is soft: once the base-collector junction conducts, I_EC takes
collector current and the collector follows the emitter.

The circuit around the transistor is linear and its capacitors are shorts at the signal
frequency, but they carry no DC: in the periodic steady state the mean current of every
coupling and bypass capacitor is zero, so the mean node voltages are the DC bias equations
evaluated with the *mean* junction currents, and the signal parts see the AC resistances.
With the mean base and collector currents ``m_B``, ``m_C`` as two more unknowns::

    v_B(t) = V_TH - (R_TH - R_b) m_B + v_s(t) - R_b i_B(t)     (divider DC, source AC)
    v_E(t) = k_E (m_B + m_C) + R_E i_E(t)                     (bypassed part at its mean)
    v_C(t) = V_CC - (R_Cdc - R_Cac) m_C - R_Cac i_C(t)         (load after C_out AC only)

That is the bias shift under drive: rectified base current recharges the input coupling
capacitor, the emitter bypass capacitor charges to the mean emitter current.  Newton solves
the junction voltages at every time point and the two means together; the Jacobian is
block-diagonal (2x2 per time point) bordered by the two mean equations, so each step is a
2x2 Schur complement per sample.  Junction steps are limited as SPICE does (``pnjlim``,
Nagel, SPICE2 thesis, UCB ERL-M520, 1975, from memory).
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

#: Coefficients of one stage, each ``(rows, 1)``: see the module docstring.
STAGE_KEYS = (
    "is_a",
    "beta_f",
    "beta_r",
    "inv_vaf",
    "v_t",
    "v_th",
    "r_th",
    "r_b",
    "k_e",
    "r_e",
    "v_cc",
    "r_cdc",
    "r_cac",
)


#: Newton's error after a junction step ``d`` is about ``d**2 / (2 V_T)`` near the solution (the
#: exponential's second derivative over its first, 1/V_T, halved); a row is taken as converged
#: once ``QUADRATIC_GAIN * d**2 / V_T`` is below the tolerance: a margin of 100 on that bound.
QUADRATIC_GAIN = 50.0


@dataclass
class PeriodicState:
    """Junction voltages over the half period ``(rows, points)`` and the mean currents."""

    vbe: np.ndarray
    vbc: np.ndarray
    m_b: np.ndarray
    m_c: np.ndarray

    def take(self, rows: slice | np.ndarray) -> PeriodicState:
        return PeriodicState(self.vbe[rows], self.vbc[rows], self.m_b[rows], self.m_c[rows])

    def copy(self) -> PeriodicState:
        return PeriodicState(self.vbe.copy(), self.vbc.copy(), self.m_b.copy(), self.m_c.copy())

    def put(self, rows: slice | np.ndarray, other: PeriodicState) -> None:
        self.vbe[rows], self.vbc[rows] = other.vbe, other.vbc
        self.m_b[rows], self.m_c[rows] = other.m_b, other.m_c


@dataclass
class PeriodicSolution:
    """Currents over the half period and their means; ``state`` restarts a nearby solve."""

    i_b: np.ndarray
    i_c: np.ndarray
    state: PeriodicState


def _pnjlim(v_new: np.ndarray, v_old: np.ndarray, v_t: np.ndarray, v_crit: np.ndarray) -> None:
    """SPICE junction limiting, in place on ``v_new``: above ``v_crit`` a step of more than
    2 V_T is replaced by the logarithm of the current ratio it would have asked for."""
    big = (v_new > v_crit) & (np.abs(v_new - v_old) > 2.0 * v_t)
    if not big.any():
        return
    with np.errstate(divide="ignore", invalid="ignore"):
        arg = 1.0 + (v_new - v_old) / v_t
        from_old = np.where(arg > 0, v_old + v_t * np.log(np.maximum(arg, 1e-300)), v_crit)
        fresh = v_t * np.log(np.maximum(v_new / v_t, 1e-300))
    lim = np.where(v_old > 0, from_old, fresh)
    v_new[big] = np.broadcast_to(lim, v_new.shape)[big]


@functools.cache
def compiled_kernel() -> Callable[..., None] | None:
    """numba's compiled row solver (:func:`harness.model.periodic_kernel.solve_rows`), or
    None where numba is not installed.  Imported on the first solve, not with the model:
    numba's import alone takes a fifth of a second."""
    try:
        from harness.model.periodic_kernel import solve_rows
    except ImportError:
        return None
    return solve_rows


def solve_periodic(
    v_s: np.ndarray,
    c: Mapping[str, np.ndarray],
    weights: np.ndarray,
    state: PeriodicState,
    *,
    tol_v: float = 1e-10,
    max_iterations: int = 60,
    compiled: bool = True,
) -> PeriodicSolution:
    """Periodic steady state of one stage (see the module docstring).

    ``v_s``: the AC source at the base (Thevenin of the drive through the bias network),
    ``(rows, points)``; ``c``: the coefficients of :data:`STAGE_KEYS`, each ``(rows, 1)``;
    ``weights``: the quadrature giving the period mean from the points; ``state``: the start
    (the rest bias, or a nearby solution).  A row stops once its junction voltages are within
    ``tol_v`` of the solution, as estimated from its last Newton step
    (:data:`QUADRATIC_GAIN`).

    ``compiled``: solve row by row in numba's compiled kernel
    (:mod:`harness.model.periodic_kernel`, the same equations and stopping rule, several times
    faster) where numba is installed; False, or without numba, the numpy loop.
    """
    kernel = compiled_kernel() if compiled else None
    if kernel is not None:
        return _solve_compiled(kernel, v_s, c, weights, state, tol_v, max_iterations)
    return _solve_numpy(v_s, c, weights, state, tol_v, max_iterations)


def _solve_compiled(
    kernel: Callable[..., None],
    v_s: np.ndarray,
    c: Mapping[str, np.ndarray],
    weights: np.ndarray,
    state: PeriodicState,
    tol_v: float,
    max_iterations: int,
) -> PeriodicSolution:
    """:func:`solve_periodic` in the compiled kernel: the arrays it takes, C-ordered float64
    (one compiled signature), the start copied (the caller's state is left as it is)."""
    rows, pts = state.vbe.shape
    coef = np.empty((rows, len(STAGE_KEYS)))
    for j, name in enumerate(STAGE_KEYS):
        coef[:, j] = np.broadcast_to(np.asarray(c[name], dtype=float), (rows, 1))[:, 0]
    vbe = np.array(state.vbe, dtype=float, order="C")
    vbc = np.array(state.vbc, dtype=float, order="C")
    means = np.empty((rows, 2))
    means[:, 0], means[:, 1] = state.m_b, state.m_c
    src = np.ascontiguousarray(np.broadcast_to(v_s, (rows, pts)), dtype=float)
    w = np.ascontiguousarray(weights, dtype=float)
    i_b, i_c = np.empty((rows, pts)), np.empty((rows, pts))
    kernel(
        vbe, vbc, means, src, w, coef, float(tol_v), QUADRATIC_GAIN, int(max_iterations), i_b, i_c
    )
    return PeriodicSolution(
        i_b, i_c, PeriodicState(vbe, vbc, means[:, 0].copy(), means[:, 1].copy())
    )


def _solve_numpy(
    v_s: np.ndarray,
    c: Mapping[str, np.ndarray],
    weights: np.ndarray,
    state: PeriodicState,
    tol_v: float,
    max_iterations: int,
) -> PeriodicSolution:
    """:func:`solve_periodic` in numpy, every row at once.

    Internally the arrays are ``(points, rows)``: the per-row coefficients then broadcast
    along the long axis and the reductions over the period run across rows, several times
    faster in numpy than along a short last axis.
    """
    rows, pts = state.vbe.shape
    full_vbe, full_vbc = np.ascontiguousarray(state.vbe.T), np.ascontiguousarray(state.vbc.T)
    full_mb, full_mc = state.m_b.copy(), state.m_c.copy()
    idx = np.arange(rows)
    k = _row_constants(c, np.broadcast_to(v_s, (rows, pts)).T, rows)
    vbe, vbc, m_b, m_c = full_vbe, full_vbc, full_mb, full_mc
    w = weights
    # a step this small leaves an error below tol_v (quadratic convergence)
    done_step = np.sqrt(tol_v * k["v_t"][0] / QUADRATIC_GAIN)
    early = bool(np.any(k["inv_vaf"]))
    for _ in range(max_iterations):
        i_s, inv_vt, bf_inv, br_inv, inv_vaf = (
            k["is_a"],
            k["inv_vt"],
            k["bf_inv"],
            k["br_inv"],
            k["inv_vaf"],
        )
        e1 = vbe * inv_vt
        np.minimum(e1, 80.0, out=e1)
        np.exp(e1, out=e1)
        e1 *= i_s
        e2 = vbc * inv_vt
        np.minimum(e2, 80.0, out=e2)
        np.exp(e2, out=e2)
        e2 *= i_s
        # with e = I_S exp(V/V_T): I_CC - I_EC = e1 - e2, I_EC / beta_R = e2 / beta_R - I_S / beta_R
        d = e1 - e2
        t = e2 * br_inv
        i_b = e1 * bf_inv
        i_b += t
        i_b -= k["is_b"]
        if early:  # the Early factor q = 1 - V_BC / V_AF on the transport current
            q = vbc * inv_vaf
            np.subtract(1.0, q, out=q)
            i_c = d * q
        else:
            i_c = d.copy()
        i_c -= t
        i_c += k["is_r"]
        g1, g2 = e1, e2  # the junction conductances, in place of the exponentials
        g1 *= inv_vt
        g2 *= inv_vt
        db1 = g1 * bf_inv
        db2 = t
        db2 *= inv_vt
        r_b, r_e, r_cac = k["r_b"], k["r_e"], k["r_cac"]
        # the loops' Jacobian in (vbe, vbc), point by point: column 1 is linear in the
        # base-emitter derivatives (db1, dc1), column 2 in the base-collector ones
        if early:
            dc1 = g1 * q
            dc2 = g2 * q
            d *= inv_vaf
            dc2 += d
            dc2 += db2
            np.negative(dc2, out=dc2)
            j11 = k["rbe"] * db1
            j11 += r_e * dc1
            j11 += 1.0
            np.negative(j11, out=j11)
            j12 = k["rbe"] * db2
            j12 += r_e * dc2
            np.negative(j12, out=j12)
            j21 = r_cac * dc1
            j21 -= r_b * db1
            j22 = r_cac * dc2
            j22 -= r_b * db2
            j22 -= 1.0
        else:  # dc1 = g1, dc2 = -g2 (1 + 1/beta_R): each entry one product
            dc1 = g1
            dc2 = g2 * k["m_br"]
            j11 = g1 * k["n11"]
            j11 -= 1.0
            j12 = g2 * k["n12"]
            j21 = g1 * k["n21"]
            j22 = g2 * k["n22"]
            j22 -= 1.0
        # residuals of the base-emitter and base-collector loops
        base = k["v_src"] - k["rth_b"] * m_b
        base -= r_b * i_b
        f1 = base - (k["k_e"] * (m_b + m_c) + vbe)
        f1 -= r_e * (i_b + i_c)
        f2 = base - (k["v_cc"] - k["b22"] * m_c + vbc)
        f2 += r_cac * i_c
        inv = j11 * j22
        inv -= j12 * j21
        np.reciprocal(inv, out=inv)
        # P = D J^-1, D the currents' derivatives: the mean equations' Schur complement is
        # I + <P> B, B the loops' derivatives in the means (constant over the period)
        p11 = db1 * j22
        p11 -= db2 * j21
        p11 *= inv
        p12 = db2 * j11
        p12 -= db1 * j12
        p12 *= inv
        p21 = dc1 * j22
        p21 -= dc2 * j21
        p21 *= inv
        p22 = dc2 * j11
        p22 -= dc1 * j12
        p22 *= inv
        q11, q12, q21, q22 = w @ p11, w @ p12, w @ p21, w @ p22
        b11, b12, b21, b22 = k["b11"][0], k["b12"][0], k["b21"][0], k["b22"][0]
        s11 = 1.0 + q11 * b11 + q12 * b21
        s12 = q11 * b12 + q12 * b22
        s21 = q21 * b11 + q22 * b21
        s22 = 1.0 + q21 * b12 + q22 * b22
        p11 *= f1
        p12 *= f2
        p21 *= f1
        p22 *= f2
        r1 = w @ i_b - w @ p11 - w @ p12 - m_b
        r2 = w @ i_c - w @ p21 - w @ p22 - m_c
        det = s11 * s22 - s12 * s21
        dm_b = (s22 * r1 - s12 * r2) / det
        dm_c = (s11 * r2 - s21 * r1) / det
        # the junction steps: -J^-1 (f + B dm)
        f1 += b11 * dm_b + b12 * dm_c
        f2 += b21 * dm_b + b22 * dm_c
        step_be = j12 * f2
        step_be -= j22 * f1
        step_be *= inv
        step_bc = j21 * f1
        step_bc -= j11 * f2
        step_bc *= inv
        new_be = vbe + step_be
        new_bc = vbc + step_bc
        np.abs(step_be, out=step_be)
        np.abs(step_bc, out=step_bc)
        row_step = np.maximum(step_be.max(axis=0), step_bc.max(axis=0))
        if np.any(row_step > k["two_vt"][0]):
            _pnjlim(new_be, vbe, k["v_t"], k["v_crit"])
            _pnjlim(new_bc, vbc, k["v_t"], k["v_crit"])
            row_step = np.maximum(
                np.abs(new_be - vbe).max(axis=0), np.abs(new_bc - vbc).max(axis=0)
            )
        vbe, vbc = new_be, new_bc
        m_b, m_c = m_b + dm_b, m_c + dm_c
        done = row_step < done_step
        if done.all():
            break
        if done.mean() > 0.3:  # carry on with the rows still moving only
            full_vbe[:, idx], full_vbc[:, idx], full_mb[idx], full_mc[idx] = vbe, vbc, m_b, m_c
            keep = ~done
            idx = idx[keep]
            vbe, vbc, m_b, m_c = vbe[:, keep], vbc[:, keep], m_b[keep], m_c[keep]
            done_step = done_step[keep]
            k = {name: v[:, keep] for name, v in k.items()}
    full_vbe[:, idx], full_vbc[:, idx], full_mb[idx], full_mc[idx] = vbe, vbc, m_b, m_c
    vbe, vbc = np.ascontiguousarray(full_vbe.T), np.ascontiguousarray(full_vbc.T)
    i_s, bf, br, inv_vaf, v_t = c["is_a"], c["beta_f"], c["beta_r"], c["inv_vaf"], c["v_t"]
    e1 = i_s * np.expm1(np.minimum(vbe / v_t, 80.0))
    e2 = i_s * np.expm1(np.minimum(vbc / v_t, 80.0))
    i_c = (e1 - e2) * (1.0 - vbc * inv_vaf) - e2 / br
    i_b = e1 / bf + e2 / br
    return PeriodicSolution(i_b, i_c, PeriodicState(vbe, vbc, i_b @ w, i_c @ w))


def _row_constants(
    c: Mapping[str, np.ndarray], v_s_t: np.ndarray, rows: int
) -> dict[str, np.ndarray]:
    """What the Newton loop reads of the coefficients, each ``(1, rows)`` but ``v_src`` (the
    base's open-circuit source, ``(points, rows)``), computed once per solve."""
    g = {
        name: np.broadcast_to(np.asarray(c[name], dtype=float), (rows, 1)).reshape(1, rows)
        for name in STAGE_KEYS
    }
    v_t, i_s = g["v_t"], g["is_a"]
    rth_b = g["r_th"] - g["r_b"]
    return {
        "is_a": i_s,
        "v_t": v_t,
        "inv_vt": 1.0 / v_t,
        "two_vt": 2.0 * v_t,
        "v_crit": v_t * np.log(v_t / (np.sqrt(2.0) * i_s)),
        "bf_inv": 1.0 / g["beta_f"],
        "br_inv": 1.0 / g["beta_r"],
        "inv_vaf": g["inv_vaf"],
        "is_b": i_s / g["beta_f"] + i_s / g["beta_r"],
        "is_r": i_s / g["beta_r"],
        "r_b": g["r_b"],
        "r_e": g["r_e"],
        "rbe": g["r_b"] + g["r_e"],
        # the Jacobian's per-row factors without the Early effect (see the loop)
        "m_br": -(1.0 + 1.0 / g["beta_r"]),
        "n11": -((g["r_b"] + g["r_e"]) / g["beta_f"] + g["r_e"]),
        "n12": g["r_e"] * (1.0 + 1.0 / g["beta_r"]) - (g["r_b"] + g["r_e"]) / g["beta_r"],
        "n21": g["r_cac"] - g["r_b"] / g["beta_f"],
        "n22": -(g["r_cac"] * (1.0 + 1.0 / g["beta_r"]) + g["r_b"] / g["beta_r"]),
        "r_cac": g["r_cac"],
        "k_e": g["k_e"],
        "rth_b": rth_b,
        "v_cc": g["v_cc"],
        "b11": -rth_b - g["k_e"],
        "b12": -g["k_e"],
        "b21": -rth_b,
        "b22": g["r_cdc"] - g["r_cac"],
        "v_src": g["v_th"] + v_s_t,
    }
