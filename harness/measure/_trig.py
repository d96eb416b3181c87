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

    def power_sums(self, omegas: np.ndarray) -> np.ndarray:
        """S_p(Ω) = Σ_n n'^p e^{iΩn'} for p = 0, 1, 2; shape (3, len(omegas))."""
        om = np.asarray(omegas, dtype=np.float64)
        e = np.exp(1j * np.outer(self.r, om))
        r0 = e.sum(axis=0)
        r1 = (self.r[:, None] * e).sum(axis=0)
        r2 = (self.r[:, None] ** 2 * e).sum(axis=0)
        f = np.exp(1j * np.outer(self.a, om))
        a = self.a[:, None]
        f0, f1, f2 = f.sum(axis=0), (a * f).sum(axis=0), (a**2 * f).sum(axis=0)
        out = np.empty((3, om.size), dtype=np.complex128)
        out[0] = f0 * r0
        out[1] = f1 * r0 + f0 * r1
        out[2] = f2 * r0 + 2 * f1 * r1 + f0 * r2
        if self.rem:
            nt = self.tail_idx[:, None]
            et = np.exp(1j * nt * om)
            out[0] += et.sum(axis=0)
            out[1] += (nt * et).sum(axis=0)
            out[2] += (nt**2 * et).sum(axis=0)
        return out

    def evaluate(
        self, coef: np.ndarray, omegas: np.ndarray, dc: float, dtype: type = np.float64
    ) -> np.ndarray:
        """dc + Re Σ_k coef_k e^{iω_k n'} at every sample, as one matrix product."""
        om = np.asarray(omegas, dtype=np.float64)
        coef = np.asarray(coef, dtype=np.complex128)
        out = np.empty(self.n, dtype=dtype)
        ge = coef[None, :] * np.exp(1j * np.outer(self.r, om))  # b x K
        f = np.exp(1j * np.outer(self.a, om))  # m x K
        main = f.real.astype(dtype) @ ge.real.T.astype(dtype) - f.imag.astype(
            dtype
        ) @ ge.imag.T.astype(dtype)
        cut = self.m * self.b
        out[:cut] = main.reshape(-1)
        out[:cut] += dc
        if self.rem:
            et = np.exp(1j * np.outer(self.tail_idx, om))
            out[cut:] = dc + (et @ coef).real
        return out
