"""Measurement floor (ADI MT-001), two-probe gain/phase and the dBu helpers."""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.measure import (
    analyze_uniform,
    dbu_to_vrms,
    harmonic_analysis,
    measurement_floor,
    quantisation_snr_db,
    transfer,
    vrms_to_dbu,
)


@pytest.mark.parametrize("bits", [8, 10, 12])
def test_ideal_quantiser_snr_matches_6_02n_plus_1_76(bits):
    """Ideal N-bit quantiser, full-scale sine: SNR = 6.02 N + 1.76 dB (Kester, ADI MT-001).
    Coprime J = 1021 in N = 16384 spreads the error over all bins.  Tolerance: the noise
    power is estimated from ~8000 bins, relative std √(2/8000) -> 0.07 dB; 3σ = 0.2 dB."""
    n, j = 16384, 1021
    k = np.arange(n)
    half = 2 ** (bits - 1)
    # mid-rise quantiser: 2^N levels ±(i + 1/2)·q spanning exactly full scale
    y = np.clip(np.floor(half * np.sin(2 * np.pi * j * k / n + 0.1)), -half, half - 1) + 0.5
    h = harmonic_analysis(y, float(n), float(j))
    assert h.sinad_db == pytest.approx(6.02 * bits + 1.76, abs=0.2)
    assert quantisation_snr_db(bits) == pytest.approx(6.02 * bits + 1.76, abs=0.01 * bits)


def test_floor_8bit_full_and_half_scale():
    """Kester, ADI tutorial MT-001 (ideal N-bit SNR = 6.02 N + 1.76 dB), computed with numpy: an
    8-bit scope's THD+N floor is about 0.32 % at full
    scale over Nyquist and 6 dB worse at half scale.  The THD floor (9 coherent bins of
    2σ²/N each) is √(9·2/N) times the THD+N floor."""
    full = measurement_floor(8, 2.0, 1.0, 0.0, 4096, 10)
    half = measurement_floor(8, 2.0, 0.5, 0.0, 4096, 10)
    assert full.thdn_percent == pytest.approx(0.32, abs=0.005)
    assert half.thdn_percent == pytest.approx(2 * full.thdn_percent, rel=1e-12)
    assert full.thd_ratio == pytest.approx(full.thdn_ratio * math.sqrt(18 / 4096), rel=1e-12)
    noisy = measurement_floor(8, 2.0, 1.0, 0.01, 4096, 10)
    assert noisy.thdn_ratio > full.thdn_ratio


def test_floor_predicts_the_reading_of_a_clean_record(adc, rng):
    """The floor is the THD+N a perfect sine reads on that bench: checked on a synthetic
    8-bit record with added noise (same formula as ADI MT-001 plus white noise)."""
    n, fs, f = 8192, 100e3, 1000.37
    t = np.arange(n) / fs
    y = adc(0.9 * np.cos(2 * np.pi * f * t), 8, 2.5, 3e-3, rng)
    r = analyze_uniform(y / 10, y, fs, out_adc=(-1.25, 1.25), adc_bits=8)
    assert r.thdn_percent == pytest.approx(r.floor.thdn_percent, rel=0.05)
    assert r.thd_below_floor
    assert r.thd_report.startswith("<")


def test_dbu_helpers():
    """0 dBu = √0.6 V rms = 0.7746 V (1 mW in 600 Ω; common practice)."""
    assert dbu_to_vrms(0.0) == pytest.approx(0.7745967, abs=1e-7)
    assert vrms_to_dbu(0.7745967) == pytest.approx(0.0, abs=1e-6)
    assert vrms_to_dbu(dbu_to_vrms(-12.5)) == pytest.approx(-12.5)
    assert vrms_to_dbu(1.0) == pytest.approx(2.218, abs=1e-3)


def test_transfer_gain_phase_with_probes_and_8bit_noise(adc, rng):
    """Output = -G·input delayed by τ, both channels 8-bit with noise; output through a 10:1
    probe.  Expected gain 20log10(G), phase -180° - 360°·f·τ (wrapped).

    Derivation of the tolerance: each channel's fitted amplitude has std s = σ√(2/N) (σ from
    q/√12 and the added noise) and its phase std s/A rad.  Gain: relative std
    √((s_i/A_i)² + (s_o/A_o)²); phase: the same in radians.  Bound: 5 std."""
    n, fs, f, g, tau = 10000, 200e3, 1503.1, 12.0, 5e-6
    t = np.arange(n) / fs
    a_in = 0.2
    x = adc(a_in * np.sin(2 * np.pi * f * t), 8, 0.5, 5e-4, rng)
    y_tip = -g * a_in * np.sin(2 * np.pi * f * (t - tau))
    y = adc(y_tip / 10, 8, 0.6, 5e-4, rng)
    tr = transfer(t, x, y, out_probe=10.0)
    s_i = math.hypot(0.5 / 256 / math.sqrt(12), 5e-4) * math.sqrt(2 / n)
    s_o = math.hypot(0.6 / 256 / math.sqrt(12), 5e-4) * math.sqrt(2 / n)
    rel = math.hypot(s_i / a_in, s_o / (g * a_in / 10))
    assert tr.gain == pytest.approx(g, rel=5 * rel)
    expect_phase = -180.0 - 360.0 * f * tau + 360.0
    assert tr.phase_deg == pytest.approx(expect_phase, abs=math.degrees(5 * rel))
    assert tr.inverting
    assert tr.frequency_hz == pytest.approx(f, rel=1e-5)
    assert tr.output_vpk == pytest.approx(g * a_in, rel=5 * rel)
