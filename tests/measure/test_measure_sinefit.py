"""Sine fits (IEEE Std 1241-2010 Annex B.1/B.2) against a reference optimiser and a check value."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import least_squares

from harness.measure import fit_sine3, fit_sine4, fit_sine4_uniform

FS, N, F = 100e3, 8192, 1000.37
AMPS = {1: 1.0, 2: 0.01, 3: 0.005, 5: 0.001}
PHASES = {1: 0.3, 2: 1.1, 3: -0.7, 5: 2.0}


def test_check_value_multiharmonic_four_parameter_fit(synth):
    """IEEE Std 1241-2010 Annex B.2 four-parameter fit with harmonic columns; check value
    computed with numpy: fs 100 kS/s, N 8192, f 1000.37 Hz, A 1, offset 0.2,
    HD2 1 %, HD3 0.5 %, HD5 0.1 % -> a multi-harmonic 4-parameter fit recovers f 1000.3700 Hz
    and A1 1.0000000.  Noiseless, so only rounding (~1e-12) limits the recovery."""
    t, y = synth(N, FS, F, AMPS, PHASES, dc=0.2)
    fit = fit_sine4(t, y, None, harmonics=10)
    assert fit.frequency_hz == pytest.approx(F, abs=1e-7)
    assert fit.amplitude == pytest.approx(1.0, abs=1e-9)
    assert fit.offset == pytest.approx(0.2, abs=1e-9)
    assert fit.phase_rad == pytest.approx(0.3, abs=1e-9)
    assert dict(zip(fit.orders[1:], fit.harmonic_amplitudes, strict=True))[5] == pytest.approx(
        0.001, abs=1e-10
    )
    assert fit.residual_rms < 1e-9


def test_harmonics_bias_a_fundamental_only_fit(synth):
    """IEEE Std 1241-2010 Annex B (computed with numpy): on a non-coherent record the harmonics
    bias a fundamental-only fit;
    the multi-harmonic fit removes it.  The biased fit must be measurably worse."""
    t, y = synth(N, FS, F, AMPS, PHASES, dc=0.2)
    plain = fit_sine4(t, y, None)
    multi = fit_sine4(t, y, None, harmonics=10)
    assert abs(plain.frequency_hz - F) > 100 * abs(multi.frequency_hz - F)


def _model(p, t, k_orders):
    f, c = p[0], p[1]
    y = np.full_like(t, c)
    for i, k in enumerate(k_orders):
        y += p[2 + 2 * i] * np.cos(2 * np.pi * k * f * t) + p[3 + 2 * i] * np.sin(
            2 * np.pi * k * f * t
        )
    return y


@pytest.mark.parametrize("harmonics", [0, 3])
def test_four_parameter_fit_matches_scipy_least_squares(synth, adc, rng, harmonics):
    """Reference: scipy.optimize.least_squares minimising the same model (offset, cos/sin of
    k·2πft for k = 1..harmonics, and f) on the same 8-bit noisy record.  Both minimise the
    same sum of squares, so they must agree to the optimiser's tolerance (~1e-9 relative)."""
    t, y = synth(3000, FS, 1234.567, AMPS, PHASES, dc=0.05)
    y = adc(y, 8, 2.5, 2e-3, rng)
    fit = fit_sine4(t, y, 1230.0, harmonics=harmonics)
    orders = [1] if harmonics == 0 else [1, 2, 3]
    p0 = np.zeros(2 + 2 * len(orders))
    p0[0] = 1233.0
    ref = least_squares(
        lambda p: _model(p, t, orders) - y, p0, x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15
    )
    f_ref = ref.x[0]
    a_ref = np.hypot(ref.x[2], ref.x[3])
    phase_ref = np.arctan2(-ref.x[3], ref.x[2])
    assert fit.frequency_hz == pytest.approx(f_ref, rel=1e-9)
    assert fit.amplitude == pytest.approx(a_ref, rel=1e-8)
    assert fit.offset == pytest.approx(ref.x[1], abs=1e-8)
    assert np.angle(np.exp(1j * (fit.phase_rad - phase_ref))) == pytest.approx(0, abs=1e-7)
    res_ref = np.sqrt(np.mean(ref.fun**2))
    assert fit.residual_rms == pytest.approx(res_ref, rel=1e-6)


def test_three_parameter_fit_matches_scipy_least_squares(synth, adc, rng):
    """Reference: scipy.optimize.least_squares on y = A cos ωt + B sin ωt + C at the known
    frequency (IEEE 1241 B.1), time axis not starting at zero."""
    t, y = synth(2000, FS, 777.7, {1: 0.8, 2: 0.02}, {1: -1.0, 2: 0.4}, dc=-0.1)
    t = t + 0.0123
    y = adc(y, 8, 2.0, 1e-3, rng)
    fit = fit_sine3(t, y, 777.7)
    w = 2 * np.pi * 777.7
    ref = least_squares(
        lambda p: p[0] * np.cos(w * t) + p[1] * np.sin(w * t) + p[2] - y, [0.0, 0.0, 0.0]
    )
    assert fit.amplitude == pytest.approx(np.hypot(ref.x[0], ref.x[1]), rel=1e-9)
    assert fit.phase_rad == pytest.approx(np.arctan2(-ref.x[1], ref.x[0]), abs=1e-9)
    assert fit.offset == pytest.approx(ref.x[2], abs=1e-10)
    assert np.allclose(fit.residual, -ref.fun, atol=1e-9)


def test_float32_long_record_keeps_precision(synth, adc, rng):
    """A 1e6-sample float32 record (a REAL,32 scope block) fits as well as float64: the
    frequency's Cramér-Rao bound here is σ_f = √12 σ fs /(2π A N^1.5) ≈ 2e-8 Hz; float32
    rounding (~1e-7 relative) must not add more than ~10x that."""
    n, fs, f = 1_000_000, 10e6, 10003.7
    _, y = synth(n, fs, f, {1: 1.0, 2: 0.01}, {1: 0.2, 2: 0.5})
    y = adc(y, 8, 2.5, 2e-3, rng)
    fit64 = fit_sine4_uniform(y, fs, None, 10)
    fit32 = fit_sine4_uniform(y.astype(np.float32), fs, None, 10)
    sigma = np.hypot(2.5 / 256 / np.sqrt(12), 2e-3)
    crb_f = np.sqrt(12) * sigma * fs / (2 * np.pi * 1.0 * n**1.5)
    assert abs(fit64.frequency_hz - f) < 6 * crb_f
    assert abs(fit32.frequency_hz - fit64.frequency_hz) < 10 * crb_f
    assert fit32.amplitude == pytest.approx(fit64.amplitude, rel=1e-6)


def test_harmonic_amplitudes_and_phases_of_noisy_8bit_record(synth, adc, rng):
    """Known harmonic amplitudes and phases, 8-bit quantisation (2.5 Vpp) plus 2 mV noise.

    Derivation: each fitted cos/sin coefficient has std s = σ√(2/N), σ² = q²/12 + σ_n²; so a
    harmonic's amplitude has std s and its phase std s/A_k rad.  Bound: 5 std."""
    n = 8192
    t, y = synth(n, FS, F, AMPS, PHASES, dc=0.2)
    y = adc(y, 8, 2.5, 2e-3, rng)
    s = np.hypot(2.5 / 256 / np.sqrt(12), 2e-3) * np.sqrt(2 / n)
    fit = fit_sine4(t, y, None, harmonics=10)
    got = dict(
        zip(
            fit.orders[1:],
            zip(fit.harmonic_amplitudes, fit.harmonic_phases_rad, strict=True),
            strict=True,
        )
    )
    for k in (2, 3, 5):
        amp, ph = got[k]
        assert amp == pytest.approx(AMPS[k], abs=5 * s)
        assert np.angle(np.exp(1j * (ph - PHASES[k]))) == pytest.approx(0, abs=5 * s / AMPS[k])
    assert fit.phase_rad == pytest.approx(PHASES[1], abs=5 * s)


@pytest.mark.parametrize("cycles", [3.0, 3.3, 4.7])
def test_few_cycles_still_fit(synth, adc, rng, cycles):
    """Three cycles is the stated minimum: the four-parameter fit converges from the FFT
    start even there (the windowed FFT would not: its lobes overlap below 11 cycles)."""
    n = 2048
    f = cycles * FS / n
    t, y = synth(n, FS, f, {1: 1.0, 2: 0.02}, {1: 1.0}, dc=0.3)
    fit = fit_sine4(t, adc(y, 8, 3.0, 2e-3, rng), None, harmonics=10)
    s = np.hypot(3.0 / 256 / np.sqrt(12), 2e-3) * np.sqrt(2 / n)
    assert fit.frequency_hz * n / FS == pytest.approx(cycles, abs=1e-3)
    assert fit.amplitude == pytest.approx(1.0, abs=10 * s)
