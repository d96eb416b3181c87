"""Trigonometric sums over a uniform record, by block factorisation.

A uniform record of N samples is split into M blocks of B ≈ √N samples, n = m·B + r.  Then
e^{iωn} = e^{iωmB}·e^{iωr}, so every sum Σ y_n e^{iωn} over K frequencies is one small matrix
product (M×B)·(B×2K) plus O((M+B)·K) trig evaluations instead of N·K.  This is what makes
the IEEE Std 1241 sine fits (with harmonics) cost less than one FFT of the record: the time
axis is never expanded into N×K cos/sin columns.

The time index is centred, n' = n − (N−1)/2, which decouples the cosine and sine columns of
the least-squares problem and keeps the normal equations well conditioned.
"""

from __future__ import annotations

import numpy as np


class UniformGrid:
    """Block layout of a uniform record of ``n`` samples (centred index n')."""

    def __init__(self, n: int) -> None:
        self.n = n
        self.b = max(1, int(np.sqrt(n)))
        self.m = n // self.b
        self.rem = n - self.m * self.b
        self.centre = (n - 1) / 2.0
        self.r = np.arange(self.b, dtype=np.float64)
        self.a = np.arange(self.m, dtype=np.float64) * self.b - self.centre
        self.tail_idx = self.m * self.b - self.centre + np.arange(self.rem, dtype=np.float64)

    def _split(self, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        cut = self.m * self.b
        return y[:cut].reshape(self.m, self.b), y[cut:]

    def project(
        self, y: np.ndarray, omegas: np.ndarray, *, with_t: bool = False
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Q_p(ω) = Σ_n y_n n'^p e^{iωn'} for p = 0 and, with ``with_t``, p = 1.

        ``omegas`` are in radians per sample.  Float32 input stays float32 in the big
        matrix product (its rounding, ~1e-7, is far below any ADC's resolution).
        """
        om = np.asarray(omegas, dtype=np.float64)
        k = om.size
        main, tail = self._split(y)
        dtype = np.float32 if y.dtype == np.float32 else np.float64
        ph = np.outer(self.r, om)
        c, s = np.cos(ph), np.sin(ph)
        cols = [c, s]
        if with_t:
            cols += [c * self.r[:, None], s * self.r[:, None]]
        mat = np.concatenate(cols, axis=1).astype(dtype, copy=False)
        z = (main @ mat).astype(np.float64, copy=False)
        z0 = z[:, :k] + 1j * z[:, k : 2 * k]
        f = np.exp(1j * np.outer(self.a, om))
        q0 = (f * z0).sum(axis=0)
        q1 = None
        if with_t:
            z1 = z[:, 2 * k : 3 * k] + 1j * z[:, 3 * k :]
            q1 = (f * (self.a[:, None] * z0 + z1)).sum(axis=0)
        if self.rem:
            yt = tail.astype(np.float64)
            e = np.exp(1j * np.outer(self.tail_idx, om))
            q0 = q0 + yt @ e
            if with_t:
                q1 = q1 + (yt * self.tail_idx) @ e
        return q0, q1

    def power_sums(self, omegas: np.ndarray, p_max: int = 2) -> np.ndarray:
        """S_p(Ω) = Σ_n n'^p e^{iΩn'} for p = 0..p_max; shape (p_max + 1, len(omegas))."""
        om = np.asarray(omegas, dtype=np.float64)
        e = np.exp(1j * np.outer(self.r, om))
        f = np.exp(1j * np.outer(self.a, om))
        r_col, a_col = self.r[:, None], self.a[:, None]
        rs = [e.sum(axis=0)]
        fs = [f.sum(axis=0)]
        for _ in range(p_max):
            e = r_col * e
            f = a_col * f
            rs.append(e.sum(axis=0))
            fs.append(f.sum(axis=0))
        out = np.empty((p_max + 1, om.size), dtype=np.complex128)
        out[0] = fs[0] * rs[0]
        if p_max >= 1:
            out[1] = fs[1] * rs[0] + fs[0] * rs[1]
        if p_max >= 2:
            out[2] = fs[2] * rs[0] + 2 * fs[1] * rs[1] + fs[0] * rs[2]
        if self.rem:
            nt = self.tail_idx[:, None]
            et = np.exp(1j * nt * om)
            for p in range(p_max + 1):
                out[p] += et.sum(axis=0)
                et = nt * et
        return out

    def evaluate(
        self, coef: np.ndarray, omegas: np.ndarray, dc: float, dtype: type = np.float64
    ) -> np.ndarray:
        """dc + Re Σ_k coef_k e^{iω_k n'} at every sample, as one matrix product.

        Per block: Re(F_m·G_r) = [Re F, −Im F, 1]·[Re G; Im G; dc], written in place.
        """
        om = np.asarray(omegas, dtype=np.float64)
        coef = np.asarray(coef, dtype=np.complex128)
        out: np.ndarray = np.empty(self.n, dtype=dtype)
        ge = coef[None, :] * np.exp(1j * np.outer(self.r, om))  # b x K
        f = np.exp(1j * np.outer(self.a, om))  # m x K
        left: np.ndarray = np.concatenate([f.real, -f.imag, np.ones((self.m, 1))], axis=1).astype(
            dtype
        )
        right: np.ndarray = np.concatenate([ge.real.T, ge.imag.T, np.full((1, self.b), dc)]).astype(
            dtype
        )
        cut = self.m * self.b
        np.matmul(left, right, out=out[:cut].reshape(self.m, self.b))
        if self.rem:
            et = np.exp(1j * np.outer(self.tail_idx, om))
            out[cut:] = dc + (et @ coef).real
        return out

    def dirichlet(self, omegas: np.ndarray) -> np.ndarray:
        """S_0(Ω) = Σ_n e^{iΩn'} = sin(NΩ/2)/sin(Ω/2) in closed form (real: n' is centred),
        for 0 <= Ω < 2π."""
        om = np.asarray(omegas, dtype=np.float64)
        den = np.sin(om / 2)
        with np.errstate(divide="ignore", invalid="ignore"):
            d = np.where(np.abs(den) > 1e-300, np.sin(self.n * om / 2) / den, float(self.n))
        return d.astype(np.complex128)
