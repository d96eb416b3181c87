"""The periodic solve of :mod:`harness.model.periodic`, row by row, compiled with numba.

Same equations, junction limiting and stopping rule as the numpy loop of
:func:`harness.model.periodic.solve_periodic` (see that module's docstring), written one
sample (row) at a time: each row runs its own Newton iterations over its points and stops on
its own, so none of numpy's temporaries over the whole block and no Python between the
steps.  The numpy loop may take a few more steps on rows already converged (it drops them in
batches); those steps move a junction by less than a hundredth of the tolerance, so the two
agree far inside it (tests/model/test_periodic_kernel.py).  The exponentials are taken in a
loop of their own so that the arithmetic after them vectorises; that loop and the period
sums may be reordered by the compiler (numba's ``fastmath`` reassociation and contraction,
never its no-NaN or no-infinity assumptions), a change in the last bits only.

numba compiles :func:`solve_rows` on the first call and caches the machine code in a
``__pycache__`` directory beside this file (numba's ``cache=True``): a file written once per
machine and numba version, never read or written by the model's own code.  The compiled
function releases the GIL (``nogil``), so the block threads of
:func:`harness.model.core.harmonics` run it in parallel.
"""

from __future__ import annotations

import math

import numba
import numpy as np

#: Column of each coefficient in the ``coef`` array :func:`solve_rows` takes, the order of
#: :data:`harness.model.periodic.STAGE_KEYS`.
IS_A, BETA_F, BETA_R, INV_VAF, V_T, V_TH, R_TH, R_B, K_E, R_E, V_CC, R_CDC, R_CAC = range(13)


@numba.njit(cache=True, nogil=True, inline="always")
def _pnjlim(v_new: float, v_old: float, v_t: float, v_crit: float) -> float:
    """SPICE junction limiting of one junction step (as :func:`harness.model.periodic._pnjlim`)."""
    if v_new > v_crit and abs(v_new - v_old) > 2.0 * v_t:
        if v_old > 0.0:
            arg = 1.0 + (v_new - v_old) / v_t
            if arg > 0.0:
                return v_old + v_t * math.log(max(arg, 1e-300))
            return v_crit
        return v_t * math.log(max(v_new / v_t, 1e-300))
    return v_new


@numba.njit(cache=True, nogil=True, fastmath={"nsz", "arcp", "contract", "reassoc"})
def _solve_row(
    vbe: np.ndarray,
    vbc: np.ndarray,
    state_m: np.ndarray,
    v_s: np.ndarray,
    w: np.ndarray,
    cf: np.ndarray,
    tol_v: float,
    quadratic_gain: float,
    max_iterations: int,
    scratch: np.ndarray,
) -> None:
    """Newton on one row, in place on its junction voltages ``vbe``, ``vbc`` (points) and its
    means ``state_m`` = (m_B, m_C); ``cf`` its coefficients, ``scratch`` ``(9, points)``."""
    pts = vbe.shape[0]
    i_s, v_t = cf[IS_A], cf[V_T]
    inv_vt = 1.0 / v_t
    two_vt = 2.0 * v_t
    v_crit = v_t * math.log(v_t / (math.sqrt(2.0) * i_s))
    bf_inv, br_inv, inv_vaf = 1.0 / cf[BETA_F], 1.0 / cf[BETA_R], cf[INV_VAF]
    is_b = i_s / cf[BETA_F] + i_s / cf[BETA_R]
    is_r = i_s / cf[BETA_R]
    r_b, r_e, r_cac, k_e, v_cc = cf[R_B], cf[R_E], cf[R_CAC], cf[K_E], cf[V_CC]
    rbe = r_b + r_e
    rth_b = cf[R_TH] - r_b
    b11, b12, b21, b22 = -rth_b - k_e, -k_e, -rth_b, cf[R_CDC] - r_cac
    v_th = cf[V_TH]
    done_step = math.sqrt(tol_v * v_t / quadratic_gain)
    m_b, m_c = state_m[0], state_m[1]
    j11s, j12s, j21s, j22s = scratch[0], scratch[1], scratch[2], scratch[3]
    invs, f1s, f2s = scratch[4], scratch[5], scratch[6]
    e1s, e2s = scratch[7], scratch[8]
    for _ in range(max_iterations):
        q11 = q12 = q21 = q22 = 0.0
        r1 = -m_b
        r2 = -m_c
        for i in range(pts):  # the exponentials apart: the loop below then vectorises
            e1s[i] = i_s * math.exp(min(vbe[i] * inv_vt, 80.0))
            e2s[i] = i_s * math.exp(min(vbc[i] * inv_vt, 80.0))
        for i in range(pts):
            e1 = e1s[i]
            e2 = e2s[i]
            d = e1 - e2
            t = e2 * br_inv
            i_b = e1 * bf_inv + t - is_b
            q = 1.0 - vbc[i] * inv_vaf
            i_c = d * q - t + is_r
            g1 = e1 * inv_vt
            g2 = e2 * inv_vt
            db1 = g1 * bf_inv
            db2 = t * inv_vt
            dc1 = g1 * q
            dc2 = -(g2 * q + d * inv_vaf + db2)
            j11 = -(rbe * db1 + r_e * dc1 + 1.0)
            j12 = -(rbe * db2 + r_e * dc2)
            j21 = r_cac * dc1 - r_b * db1
            j22 = r_cac * dc2 - r_b * db2 - 1.0
            base = v_th + v_s[i] - rth_b * m_b - r_b * i_b
            f1 = base - (k_e * (m_b + m_c) + vbe[i]) - r_e * (i_b + i_c)
            f2 = base - (v_cc - b22 * m_c + vbc[i]) + r_cac * i_c
            inv = 1.0 / (j11 * j22 - j12 * j21)
            p11 = (db1 * j22 - db2 * j21) * inv
            p12 = (db2 * j11 - db1 * j12) * inv
            p21 = (dc1 * j22 - dc2 * j21) * inv
            p22 = (dc2 * j11 - dc1 * j12) * inv
            wi = w[i]
            q11 += wi * p11
            q12 += wi * p12
            q21 += wi * p21
            q22 += wi * p22
            r1 += wi * (i_b - p11 * f1 - p12 * f2)
            r2 += wi * (i_c - p21 * f1 - p22 * f2)
            j11s[i] = j11
            j12s[i] = j12
            j21s[i] = j21
            j22s[i] = j22
            invs[i] = inv
            f1s[i] = f1
            f2s[i] = f2
        s11 = 1.0 + q11 * b11 + q12 * b21
        s12 = q11 * b12 + q12 * b22
        s21 = q21 * b11 + q22 * b21
        s22 = 1.0 + q21 * b12 + q22 * b22
        det = s11 * s22 - s12 * s21
        dm_b = (s22 * r1 - s12 * r2) / det
        dm_c = (s11 * r2 - s21 * r1) / det
        row_step = 0.0
        for i in range(pts):
            f1 = f1s[i] + b11 * dm_b + b12 * dm_c
            f2 = f2s[i] + b21 * dm_b + b22 * dm_c
            step_be = (j12s[i] * f2 - j22s[i] * f1) * invs[i]
            step_bc = (j21s[i] * f1 - j11s[i] * f2) * invs[i]
            f1s[i] = vbe[i] + step_be  # the new junction voltages, before limiting
            f2s[i] = vbc[i] + step_bc
            a = max(abs(step_be), abs(step_bc))
            if a > row_step or a != a:  # a NaN step stays the row's step
                row_step = a
        if row_step > two_vt:
            row_step = 0.0
            for i in range(pts):
                new_be = _pnjlim(f1s[i], vbe[i], v_t, v_crit)
                new_bc = _pnjlim(f2s[i], vbc[i], v_t, v_crit)
                a = max(abs(new_be - vbe[i]), abs(new_bc - vbc[i]))
                if a > row_step or a != a:
                    row_step = a
                f1s[i], f2s[i] = new_be, new_bc
        for i in range(pts):
            vbe[i], vbc[i] = f1s[i], f2s[i]
        m_b += dm_b
        m_c += dm_c
        if row_step < done_step:
            break
    state_m[0], state_m[1] = m_b, m_c


@numba.njit(cache=True, nogil=True, fastmath={"nsz", "arcp", "contract", "reassoc"})
def solve_rows(
    vbe: np.ndarray,
    vbc: np.ndarray,
    means: np.ndarray,
    v_s: np.ndarray,
    w: np.ndarray,
    coef: np.ndarray,
    tol_v: float,
    quadratic_gain: float,
    max_iterations: int,
    i_b: np.ndarray,
    i_c: np.ndarray,
) -> None:
    """Every row's periodic solution: ``vbe``, ``vbc`` ``(rows, points)`` and ``means``
    ``(rows, 2)`` (m_B, m_C) hold the start and receive the junction voltages and the means
    of the currents; ``i_b``, ``i_c`` ``(rows, points)`` receive the currents.  ``v_s`` the
    AC source at the base ``(rows, points)``, ``coef`` ``(rows, 13)`` the coefficients in
    the order of :data:`harness.model.periodic.STAGE_KEYS`, ``w`` the period-mean weights;
    a row stops once ``quadratic_gain * step**2 / V_T`` is below ``tol_v``
    (:data:`harness.model.periodic.QUADRATIC_GAIN`)."""
    rows, pts = vbe.shape
    scratch = np.empty((9, pts))
    for r in range(rows):
        cf = coef[r]
        _solve_row(
            vbe[r], vbc[r], means[r], v_s[r], w, cf, tol_v, quadratic_gain, max_iterations, scratch
        )
        i_s, bf, br, inv_vaf, v_t = cf[IS_A], cf[BETA_F], cf[BETA_R], cf[INV_VAF], cf[V_T]
        mb = mc = 0.0
        for i in range(pts):
            e1 = i_s * math.expm1(min(vbe[r, i] / v_t, 80.0))
            e2 = i_s * math.expm1(min(vbc[r, i] / v_t, 80.0))
            ic = (e1 - e2) * (1.0 - vbc[r, i] * inv_vaf) - e2 / br
            ib = e1 / bf + e2 / br
            i_b[r, i], i_c[r, i] = ib, ic
            mb += ib * w[i]
            mc += ic * w[i]
        means[r, 0], means[r, 1] = mb, mc
