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

from collections.abc import Mapping
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


@dataclass
class PeriodicState:
    """Junction voltages over the half period ``(rows, points)`` and the mean currents."""

    vbe: np.ndarray
    vbc: np.ndarray
    m_b: np.ndarray
    m_c: np.ndarray

    def take(self, rows: slice | np.ndarray) -> PeriodicState:
        return PeriodicState(self.vbe[rows], self.vbc[rows], self.m_b[rows], self.m_c[rows])

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


def solve_periodic(
    v_s: np.ndarray,
    c: Mapping[str, np.ndarray],
    weights: np.ndarray,
    state: PeriodicState,
    *,
    tol_v: float = 1e-10,
    max_iterations: int = 60,
) -> PeriodicSolution:
    """Periodic steady state of one stage (see the module docstring).

    ``v_s``: the AC source at the base (Thevenin of the drive through the bias network),
    ``(rows, points)``; ``c``: the coefficients of :data:`STAGE_KEYS`, each ``(rows, 1)``;
    ``weights``: the quadrature giving the period mean from the points; ``state``: the start
    (the rest bias, or a nearby solution).  Stops when every junction step is below ``tol_v``.
    """
    full_vbe, full_vbc = state.vbe.copy(), state.vbc.copy()
    full_mb, full_mc = state.m_b.copy(), state.m_c.copy()
    idx = np.arange(full_vbe.shape[0])
    cw = {k: np.broadcast_to(c[k], (idx.size, 1)) for k in STAGE_KEYS}
    vs = v_s
    vbe, vbc, m_b, m_c = full_vbe, full_vbc, full_mb, full_mc
    w = weights
    for _ in range(max_iterations):
        i_s, bf, br, inv_vaf, v_t = cw["is_a"], cw["beta_f"], cw["beta_r"], cw["inv_vaf"], cw["v_t"]
        r_b, r_e, r_cac, k_e = cw["r_b"], cw["r_e"], cw["r_cac"], cw["k_e"]
        b11 = -(cw["r_th"] - r_b) - k_e
        b12 = -k_e
        b21 = -(cw["r_th"] - r_b)
        b22 = cw["r_cdc"] - r_cac
        e1 = i_s * np.exp(np.minimum(vbe / v_t, 80.0))
        e2 = i_s * np.exp(np.minimum(vbc / v_t, 80.0))
        icc, iec = e1 - i_s, e2 - i_s
        q = 1.0 - vbc * inv_vaf
        i_c = (icc - iec) * q - iec / br
        i_b = icc / bf + iec / br
        g1, g2 = e1 / v_t, e2 / v_t
        dc1 = g1 * q
        dc2 = -g2 * (q + 1.0 / br) - (icc - iec) * inv_vaf
        db1 = g1 / bf
        db2 = g2 / br
        base = cw["v_th"] - (cw["r_th"] - r_b) * m_b[:, None] + vs - r_b * i_b
        f1 = base - k_e * (m_b + m_c)[:, None] - r_e * (i_b + i_c) - vbe
        f2 = base - (cw["v_cc"] - b22 * m_c[:, None]) + r_cac * i_c - vbc
        j11 = -r_b * db1 - r_e * (db1 + dc1) - 1.0
        j12 = -r_b * db2 - r_e * (db2 + dc2)
        j21 = -r_b * db1 + r_cac * dc1
        j22 = -r_b * db2 + r_cac * dc2 - 1.0
        inv = 1.0 / (j11 * j22 - j12 * j21)
        a1 = (j22 * f1 - j12 * f2) * inv
        a2 = (j11 * f2 - j21 * f1) * inv
        c11 = (j22 * b11 - j12 * b21) * inv
        c12 = (j22 * b12 - j12 * b22) * inv
        c21 = (j11 * b21 - j21 * b11) * inv
        c22 = (j11 * b22 - j21 * b12) * inv
        s11 = 1.0 + (db1 * c11 + db2 * c21) @ w
        s12 = (db1 * c12 + db2 * c22) @ w
        s21 = (dc1 * c11 + dc2 * c21) @ w
        s22 = 1.0 + (dc1 * c12 + dc2 * c22) @ w
        r1 = i_b @ w - m_b - (db1 * a1 + db2 * a2) @ w
        r2 = i_c @ w - m_c - (dc1 * a1 + dc2 * a2) @ w
        det = s11 * s22 - s12 * s21
        dm_b = (s22 * r1 - s12 * r2) / det
        dm_c = (s11 * r2 - s21 * r1) / det
        new_be = vbe - a1 - c11 * dm_b[:, None] - c12 * dm_c[:, None]
        new_bc = vbc - a2 - c21 * dm_b[:, None] - c22 * dm_c[:, None]
        v_crit = v_t * np.log(v_t / (np.sqrt(2.0) * i_s))
        _pnjlim(new_be, vbe, v_t, v_crit)
        _pnjlim(new_bc, vbc, v_t, v_crit)
        row_step = np.maximum(np.abs(new_be - vbe).max(axis=1), np.abs(new_bc - vbc).max(axis=1))
        vbe, vbc = new_be, new_bc
        m_b, m_c = m_b + dm_b, m_c + dm_c
        done = row_step < tol_v
        if done.all():
            break
        if done.mean() > 0.5:  # carry on with the rows still moving only
            full_vbe[idx], full_vbc[idx], full_mb[idx], full_mc[idx] = vbe, vbc, m_b, m_c
            keep = ~done
            idx = idx[keep]
            vbe, vbc, m_b, m_c, vs = vbe[keep], vbc[keep], m_b[keep], m_c[keep], vs[keep]
            cw = {k: v[keep] for k, v in cw.items()}
    full_vbe[idx], full_vbc[idx], full_mb[idx], full_mc[idx] = vbe, vbc, m_b, m_c
    vbe, vbc = full_vbe, full_vbc
    i_s, bf, br, inv_vaf, v_t = c["is_a"], c["beta_f"], c["beta_r"], c["inv_vaf"], c["v_t"]
    e1 = i_s * np.expm1(np.minimum(vbe / v_t, 80.0))
    e2 = i_s * np.expm1(np.minimum(vbc / v_t, 80.0))
    i_c = (e1 - e2) * (1.0 - vbc * inv_vaf) - e2 / br
    i_b = e1 / bf + e2 / br
    return PeriodicSolution(i_b, i_c, PeriodicState(vbe, vbc, i_b @ w, i_c @ w))
