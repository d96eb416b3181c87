"""Sine fits per IEEE Std 1241-2010 Annex B (also IEEE Std 1057).

The three-parameter fit solves y ≈ A cos ωt + B sin ωt + C at a known frequency by linear
least squares; the four-parameter fit adds the frequency and iterates Gauss-Newton on Δω
(Annex B.2), starting from an interpolated FFT peak.  Both may also fit harmonics 2..K
(cos/sin of kω): on a non-coherent record the harmonics otherwise bias the fundamental.

The normal equations are formed without ever expanding N×K cos/sin columns: the inner
products of the trigonometric columns are closed sums over a centred time index, computed
by block factorisation (see :mod:`harness.measure._trig`).  With a centred index the
columns are nearly orthogonal, so the small (2K+2)² system is well conditioned.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from harness.errors import AnalysisError
from harness.measure import _checks
from harness.measure._trig import UniformGrid

_COND_MAX = 1e12


@dataclass(frozen=True, eq=False)
class SineFit:
    """y(t) ≈ offset + amplitude·cos(2π·frequency_hz·t + phase_rad) [+ fitted harmonics].

    ``phase_rad`` refers to t = 0 of the time axis given (for ``*_uniform`` fits: the first
    sample).  ``residual`` is y minus the whole fitted model (harmonics included when fitted).
    """

    frequency_hz: float
    amplitude: float
    phase_rad: float
    offset: float
    residual: np.ndarray = field(repr=False)
    residual_rms: float
    orders: tuple[int, ...] = (1,)
    harmonic_amplitudes: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)
    harmonic_phases_rad: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)
    sample_rate_hz: float = float("nan")
    n_samples: int = 0
    iterations: int = 0

    @property
    def cycles(self) -> float:
        return self.frequency_hz * self.n_samples / self.sample_rate_hz

    @property
    def rms(self) -> float:
        """RMS of the fitted fundamental."""
        return float(self.amplitude / np.sqrt(2.0))


@dataclass(frozen=True, eq=False)
class _Core:
    """Raw least-squares result on the centred sample index (internal)."""

    grid: UniformGrid
    omega: float  # rad/sample
    orders: np.ndarray
    dc: float
    coef: np.ndarray  # complex a_k - i b_k per order: model = dc + Re Σ coef_k e^{ikωn'}
    sum_sq: float
    iterations: int

    def model(self, dtype: type = np.float64, orders: int | None = None) -> np.ndarray:
        ks, coef = self.orders, self.coef
        if orders is not None:
            keep = ks <= orders
            ks, coef = ks[keep], coef[keep]
        return self.grid.evaluate(coef, ks * self.omega, self.dc, dtype)


def _orders(harmonics: int, omega: float) -> np.ndarray:
    """Fundamental plus harmonics 2..harmonics that lie below Nyquist (kω < π)."""
    k_hi = max(1, int(harmonics))
    ks = np.arange(1, k_hi + 1)
    return ks[ks * omega < np.pi * (1 - 1e-9)]


def _lin_basis(ks: np.ndarray, jmax: int) -> np.ndarray:
    """Coefficients C[a, j] (j = -jmax..jmax) of columns 1, cos kθ, sin kθ as e^{ijθ} sums."""
    p = 1 + 2 * ks.size
    c = np.zeros((p, 2 * jmax + 1), dtype=np.complex128)
    c[0, jmax] = 1.0
    for i, k in enumerate(ks):
        c[1 + 2 * i, jmax + k] = 0.5
        c[1 + 2 * i, jmax - k] = 0.5
        c[2 + 2 * i, jmax + k] = -0.5j
        c[2 + 2 * i, jmax - k] = 0.5j
    return c


def _pair_sums(s: np.ndarray, jmax: int) -> np.ndarray:
    """M[j, l] = S((j + l)ω) for j, l in -jmax..jmax, from S over -2jmax..2jmax."""
    idx = np.arange(2 * jmax + 1)
    out: np.ndarray = s[idx[:, None] + idx[None, :]]
    return out


def _q_full(q: np.ndarray, ks: np.ndarray, jmax: int, q_dc: float) -> np.ndarray:
    """Σ y n'^p e^{ijωn'} over j = -jmax..jmax from the projections at e^{-ikωn'}, k in ks."""
    out = np.zeros(2 * jmax + 1, dtype=np.complex128)
    out[jmax] = q_dc
    out[jmax + ks] = np.conj(q)  # project() gives Σ y e^{+ikωn'}; see _project
    out[jmax - ks] = q
    return out


def _project(
    grid: UniformGrid, y: np.ndarray, ks: np.ndarray, omega: float, with_t: bool
) -> tuple[np.ndarray, np.ndarray | None]:
    """Σ y n'^p e^{-ikωn'} for k in ks (p = 0, and 1 with ``with_t``)."""
    return grid.project(y, -ks * omega, with_t=with_t)


def _fit_core(
    y: np.ndarray,
    omega: float,
    harmonics: int,
    *,
    refine: bool,
    max_iter: int = 30,
    tol_cycles: float = 1e-7,
    grid: UniformGrid | None = None,
) -> _Core:
    n = y.size
    grid = grid or UniformGrid(n)
    yd = y
    it = 0
    while True:
        ks = _orders(harmonics, omega)
        jmax = int(ks[-1])
        c = _lin_basis(ks, jmax)
        # S_p(-Ω) = conj S_p(Ω): compute Ω = 0..2·jmax·ω only.
        want_t = refine and it < max_iter
        om_pos = np.arange(0, 2 * jmax + 1) * omega
        s_pos = grid.power_sums(om_pos, 2) if want_t else grid.dirichlet(om_pos)[None, :]
        s = np.concatenate([np.conj(s_pos[:, :0:-1]), s_pos], axis=1)
        m0 = _pair_sums(s[0], jmax)
        g = np.einsum("aj,bl,jl->ab", c, c, m0).real
        # ω = 0 rides along in the same matrix product: Σy and Σ y n'.
        q0, q1 = _project(grid, yd, np.concatenate([[0], ks]), omega, want_t)
        ysum = float(q0[0].real)
        q0 = q0[1:]
        qf0 = _q_full(q0, ks, jmax, ysum)
        h = (c @ qf0).real
        cond = np.linalg.cond(g)
        if not np.isfinite(cond) or cond > _COND_MAX:
            raise AnalysisError(
                f"sine fit is ill-conditioned (cond {cond:.3g}): too few cycles or a "
                "harmonic at Nyquist",
                hint="capture more cycles or lower --k-max",
            )
        beta = np.linalg.solve(g, h)
        rss_beta = beta
        if not refine or it >= max_iter:
            break
        # Gauss-Newton step on ω (IEEE 1241 B.2), harmonics move with k·Δω.
        w = beta @ c  # model = Σ_j w_j e^{ijωn'}
        cd = 1j * np.arange(-jmax, jmax + 1) * w  # ∂model/∂ω = Σ_j (i j w_j) n' e^{ijωn'}
        m1 = _pair_sums(s[1], jmax)
        m2 = _pair_sums(s[2], jmax)
        gd = np.einsum("aj,l,jl->a", c, cd, m1).real
        dd = float(np.einsum("j,l,jl->", cd, cd, m2).real)
        assert q1 is not None  # projected with n' whenever the frequency is refined
        qf1 = _q_full(q1[1:], ks, jmax, float(q1[0].real))
        dy = float((cd @ qf1).real)
        big = np.zeros((g.shape[0] + 1, g.shape[0] + 1))
        big[:-1, :-1] = g
        big[:-1, -1] = gd
        big[-1, :-1] = gd
        big[-1, -1] = dd
        rhs = np.concatenate([h - g @ beta, [dy - gd @ beta]])
        try:
            delta = np.linalg.solve(big, rhs)
        except np.linalg.LinAlgError as exc:
            raise AnalysisError(f"four-parameter sine fit failed: {exc}") from None
        d_omega = float(delta[-1])
        omega += d_omega
        it += 1
        if not (0 < omega < np.pi) or not np.isfinite(omega):
            raise AnalysisError(
                "four-parameter sine fit diverged (no clear sine in the record?)",
                hint="give the frequency, or check the signal",
            )
        if abs(d_omega) * n / (2 * np.pi) < tol_cycles:
            # Converged: Gauss-Newton is quadratic, so the step just taken leaves an error
            # of order its square; take its linear update too instead of another pass.
            # (The sum of squares stays the one at the previous ω: it differs by a term of
            # second order in the step.)
            if np.array_equal(_orders(harmonics, omega), ks):
                rss_beta = beta
                beta = beta + delta[:-1]
                break
            max_iter = it  # the set of orders changed: one last linear solve
    ks = _orders(harmonics, omega)
    coef = beta[1::2] - 1j * beta[2::2]
    y64 = yd if yd.dtype == np.float64 else yd.astype(np.float64)
    sum_sq = max(float(np.dot(y64, y64)) - float(rss_beta @ h), 0.0)
    return _Core(grid, omega, ks, float(beta[0]), coef, sum_sq, it)


def coarse_omega(y: np.ndarray) -> float:
    """Fundamental in rad/sample from a Hann-windowed, zero-padded FFT peak (start value).

    Uses at most the first 2**16 samples: the fit refines it on spans growing ×16, each
    start well inside the next span's convergence region (error ≪ 1/16 cycle).
    """
    seg = y[: 1 << 16].astype(np.float64)
    seg = seg - seg.mean()
    n = seg.size
    pad = 4
    spec = np.abs(np.fft.rfft(seg * np.hanning(n), n * pad))
    lo = int(1.5 * pad)  # below 1.5 cycles in the segment: DC leftovers
    if spec.size <= lo + 2:
        raise AnalysisError("record too short to find its fundamental")
    k = lo + int(np.argmax(spec[lo:-1]))
    a, b, c = np.log(spec[k - 1 : k + 2] + 1e-300)
    den = a - 2 * b + c
    frac = 0.5 * (a - c) / den if den != 0 else 0.0
    return float(2 * np.pi * (k + float(np.clip(frac, -0.5, 0.5))) / (n * pad))


def estimate_omega(y: np.ndarray, harmonics: int = 0, omega0: float | None = None) -> _Core:
    """Four-parameter fit from a coarse start, on spans growing ×16 up to the whole record."""
    n = y.size
    omega = coarse_omega(y) if omega0 is None else float(omega0)
    span = min(n, 1 << 16) if omega0 is None else n
    while True:
        core = _fit_core(y[:span], omega, harmonics, refine=True)
        omega = core.omega
        if span == n:
            return core
        span = min(n, span * 16)


def _significance(core: _Core, n: int) -> None:
    amp = float(abs(core.coef[0]))
    noise = np.sqrt(core.sum_sq / n)
    s = noise * np.sqrt(2.0 / n)
    if amp <= (6.0 + np.sqrt(2.0 * np.log(n))) * s:
        raise AnalysisError(
            f"no sine wave above the noise (fitted amplitude {amp:.3g}, noise rms {noise:.3g})",
            hint="check the signal path; a silent or noise-only record cannot be analysed",
        )


def _to_fit(core: _Core, y: np.ndarray, fs: float, t0: float, t_centre: float) -> SineFit:
    """Public SineFit, phases referred to t = 0 of the caller's time axis."""
    n = y.size
    dtype = np.float32 if y.dtype == np.float32 else np.float64
    residual = y - core.model(dtype)
    f = core.omega * fs / (2 * np.pi)
    amps = np.abs(core.coef)
    # coef = A e^{iφ'} with φ' the phase at the centre sample; move the reference to t = 0.
    phases = np.angle(core.coef) - core.orders * 2 * np.pi * f * t_centre
    phases = np.angle(np.exp(1j * phases))
    res_rms = float(np.sqrt(np.mean(np.square(residual, dtype=np.float64))))
    return SineFit(
        frequency_hz=float(f),
        amplitude=float(amps[0]),
        phase_rad=float(phases[0]),
        offset=core.dc,
        residual=residual,
        residual_rms=res_rms,
        orders=tuple(int(k) for k in core.orders),
        harmonic_amplitudes=amps[1:],
        harmonic_phases_rad=phases[1:],
        sample_rate_hz=fs,
        n_samples=n,
        iterations=core.iterations,
    )


def _prepare(t: object, y: object) -> tuple[np.ndarray, float, float]:
    yy = _checks.as_samples(y, "y")
    fs, t0 = _checks.sample_rate_from_time(t, yy.size)
    return yy, fs, t0


def fit_sine3(t: object, y: object, frequency_hz: float, harmonics: int = 0) -> SineFit:
    """Three-parameter fit at a known frequency (IEEE 1241 B.1); ``harmonics`` = highest
    order also fitted (0 or 1: fundamental only; orders at or above Nyquist are dropped)."""
    yy, fs, t0 = _prepare(t, y)
    return fit_sine3_uniform(yy, fs, frequency_hz, harmonics, t0_s=t0)


def fit_sine3_uniform(
    y: object,
    sample_rate_hz: float,
    frequency_hz: float,
    harmonics: int = 0,
    *,
    t0_s: float = 0.0,
) -> SineFit:
    """:func:`fit_sine3` for a uniform record given by its sample rate (t0_s = first sample)."""
    yy = _checks.as_samples(y, "y")
    fs = _checks.check_rate(sample_rate_hz)
    f = _checks.check_fundamental(frequency_hz, fs, yy.size)
    core = _fit_core(yy, 2 * np.pi * f / fs, harmonics, refine=False)
    _significance(core, yy.size)
    return _to_fit(core, yy, fs, t0_s, t0_s + core.grid.centre / fs)


def fit_sine4(
    t: object,
    y: object,
    frequency_hz: float | None = None,
    harmonics: int = 0,
    *,
    max_iter: int = 30,
) -> SineFit:
    """Four-parameter fit (IEEE 1241 B.2): frequency refined by Gauss-Newton from
    ``frequency_hz`` or, if None, from an interpolated FFT peak."""
    yy, fs, t0 = _prepare(t, y)
    return fit_sine4_uniform(yy, fs, frequency_hz, harmonics, t0_s=t0, max_iter=max_iter)


def fit_sine4_uniform(
    y: object,
    sample_rate_hz: float,
    frequency_hz: float | None = None,
    harmonics: int = 0,
    *,
    t0_s: float = 0.0,
    max_iter: int = 30,
) -> SineFit:
    """:func:`fit_sine4` for a uniform record given by its sample rate."""
    yy = _checks.as_samples(y, "y")
    fs = _checks.check_rate(sample_rate_hz)
    if frequency_hz is not None:
        f = _checks.check_fundamental(frequency_hz, fs, yy.size)
        core = _fit_core(yy, 2 * np.pi * f / fs, harmonics, refine=True, max_iter=max_iter)
    else:
        core = estimate_omega(yy, harmonics)
    _checks.check_fundamental(core.omega * fs / (2 * np.pi), fs, yy.size)
    _significance(core, yy.size)
    return _to_fit(core, yy, fs, t0_s, t0_s + core.grid.centre / fs)
