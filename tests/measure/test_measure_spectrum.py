"""Coherent planner, windows and harmonic analysis against published figures and formulas."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal.windows import blackmanharris
from scipy.special import iv

from harness.measure import (
    analyze_uniform,
    harmonic_analysis,
    plan_coherent,
    window_properties,
)
from harness.measure.windows import get_window

# --- coherent sampling -----------------------------------------------------------------------


def test_planner_app_note_example():
    """Coherent sampling, f = J·fs/N with gcd(J, N) = 1 (Maxim/ADI application note 1040): fs 100
    kS/s, N 4096, J 41 -> 1000.9765625 Hz."""
    plan = plan_coherent(1000.0, [100e3], [4096])
    assert (plan.cycles, plan.n_samples, plan.sample_rate_hz) == (41, 4096, 100e3)
    assert plan.frequency_hz == 1000.9765625


@pytest.mark.parametrize("target", [20.0, 97.3, 1000.0, 1234.5, 5000.0, 19999.0])
def test_planner_coprime_and_within_tolerance(target):
    """f = J·fs/N with gcd(J, N) = 1 (Blair, IMTC 2002; app note 1040), within the stated
    tolerance, at least min_cycles and with harmonics to k_max below Nyquist."""
    rates = [1e6, 500e3, 100e3, 50e3]
    lengths = [1000, 4096, 10000, 65536]
    plan = plan_coherent(target, rates, lengths, tolerance_rel=0.01, min_cycles=5)
    assert math.gcd(plan.cycles, plan.n_samples) == 1
    assert plan.frequency_hz == plan.cycles * plan.sample_rate_hz / plan.n_samples
    assert abs(plan.frequency_hz / target - 1) <= 0.01
    assert plan.cycles >= 5
    assert 10 * plan.frequency_hz < plan.sample_rate_hz / 2


def test_planner_refuses_impossible_request():
    from harness.errors import AnalysisError

    with pytest.raises(AnalysisError, match="no coherent record"):
        plan_coherent(1000.0, [100e3], [64], tolerance_rel=0.001)


def _ideal_8bit(j: int, n: int = 4096) -> np.ndarray:
    k = np.arange(n)
    return np.clip(np.round(127.5 + 127.5 * np.sin(2 * np.pi * j * k / n)), 0, 255)


def test_coprime_cycles_spread_quantisation_error():
    """Coherent sampling (Maxim/ADI application note 1040; Blair, IMTC 2002), computed with
    numpy: ideal 8-bit quantiser, full scale, N 4096: J = 127 gives SINAD 49.99 dB
    and harmonic-bin THD at the noise level; J = 128 (gcd 128) piles the quantisation error
    onto the harmonic bins (about -51 dBc).

    Derivation of the J = 127 band: the error power 10^(-49.99/10) spreads over 2047 bins, so
    9 harmonic bins hold 9/2047 of it: expected THD ≈ -73.6 dBc.  The 9 bins (18 degrees of
    freedom, χ²) put 99.9 % of readings within -5.7/+3.6 dB of that (one numpy draw gave -74.7)."""
    h127 = harmonic_analysis(_ideal_8bit(127), 4096.0, 127.0)
    h128 = harmonic_analysis(_ideal_8bit(128), 4096.0, 128.0)
    assert h127.coherent and h127.window == "rectangular"
    assert h127.sinad_db == pytest.approx(49.99, abs=0.02)
    expected = 10 * math.log10(10 ** (-49.99 / 10) * 9 / 2047)
    assert expected - 5.7 <= h127.thd_db <= expected + 3.6
    assert h128.thd_db == pytest.approx(-51.0, abs=1.5)
    assert h128.thd_db - h127.thd_db > 15.0


# --- windows ----------------------------------------------------------------------------------


def test_bh4_matches_scipy():
    """Reference: scipy.signal.windows.blackmanharris (same Harris coefficients), periodic."""
    assert np.allclose(get_window("blackman-harris-4", 1000), blackmanharris(1000, sym=False))


@pytest.mark.parametrize(
    ("name", "sidelobe_db", "enbw", "hpbw", "scallop_db", "null_bins"),
    [
        ("rectangular", -13.3, 1.00, 0.89, 3.92, 1.0),
        ("hann", -31.5, 1.50, 1.44, 1.42, 2.0),
        ("blackman-harris-4", -92.0, 2.00, 1.90, 0.83, 4.0),
    ],
)
def test_window_properties_harris_table1(name, sidelobe_db, enbw, hpbw, scallop_db, null_bins):
    """F. J. Harris, Proc. IEEE 66(1) 1978, Table I (and Heinzel, Rüdiger & Schilling 2002; the 3-dB
    bandwidths 0.89/1.44/1.90 bins from memory of the same table).  First nulls at K bins for a
    K-term cosine-sum window (common practice).  Table precision: ±0.05 dB / ±0.01 bin."""
    p = window_properties(get_window(name, 4096))
    assert p.highest_sidelobe_db == pytest.approx(sidelobe_db, abs=0.06)
    assert p.enbw_bins == pytest.approx(enbw, abs=0.006)
    assert p.half_power_width_bins == pytest.approx(hpbw, abs=0.01)
    assert p.scalloping_loss_db == pytest.approx(scallop_db, abs=0.01)
    assert p.first_null_bins == pytest.approx(null_bins, abs=0.02)


# --- harmonics ----------------------------------------------------------------------------

FS, N, F = 100e3, 8192, 1000.37
AMPS = {1: 1.0, 2: 0.01, 3: 0.005, 5: 0.001}
PHASES = {1: 0.3, 2: 1.1, 3: -0.7, 5: 2.0}
THD_CHECK = 1.12250  # % (THD_F, IEC 61000-2-2 vocabulary) = 100·√(0.01² + 0.005² + 0.001²)


def test_windowed_thd_check_value(synth):
    """Check value THD_F 1.12250 % (closed form above) from a non-coherent record (Blackman-Harris
    path).
    Tolerance from the window: its highest side lobe is -92 dB, so the fundamental can leak at
    most 2.5e-5·V1 into each harmonic's lobe; over 9 harmonics ΔTHD ≤ 3·2.5e-5 = 0.0075 %."""
    _, y = synth(N, FS, F, AMPS, PHASES, dc=0.2)
    h = harmonic_analysis(y, FS, F)
    assert not h.coherent and h.window == "blackman-harris-4"
    assert h.thd_percent == pytest.approx(THD_CHECK, abs=0.0075)
    assert h.hd_ratio(2) == pytest.approx(0.01, abs=2.5e-5)


def test_fit_thd_check_value(synth):
    """Same check value through the sine-fit analysis: exact up to rounding."""
    _, y = synth(N, FS, F, AMPS, PHASES, dc=0.2)
    r = analyze_uniform(y / 10, y, FS)
    assert r.thd_percent == pytest.approx(THD_CHECK, abs=1e-5)


def _sigma(bits: int, vpp: float, noise: float) -> float:
    return math.hypot(vpp / 2**bits / math.sqrt(12), noise)


@pytest.mark.parametrize("coherent", [True, False])
def test_thd_of_noisy_8bit_record_within_derived_tolerance(synth, adc, rng, coherent):
    """Known harmonics + Gaussian noise + 8-bit quantisation (2.5 Vpp, q = 9.77 mV).

    Derivation: quantisation noise q/√12 (treated as white, the noise dithers it) and added
    noise give σ.  A least-squares (or coherent single-bin) estimate of each cos/sin
    coefficient has std s = σ√(2/N).  The THD error is at most |e|/V1 where e collects the 9
    harmonic coefficient pairs: |e|² ~ s²χ²₁₈, whose 1-in-10⁶ quantile is 55, so |ΔTHD| ≤
    √55·s/A.  The windowed path sums 2L+1 = 11 bins per tone: bound × √11."""
    f = 1000.0 if coherent else F
    n = 8192
    fs = FS if not coherent else 8192 * 1000.0 / 83  # 83 cycles exactly
    _, y = synth(n, fs, f, AMPS, PHASES, dc=0.1)
    noise = 2e-3
    yq = adc(y, 8, 2.5, noise, rng)
    s = _sigma(8, 2.5, noise) * math.sqrt(2 / n)
    tol = math.sqrt(55) * s * 100
    h = harmonic_analysis(yq, fs, f)
    assert h.coherent is coherent
    r = analyze_uniform(yq / 10, yq, fs)
    assert r.thd_percent == pytest.approx(THD_CHECK, abs=tol)
    assert h.thd_percent == pytest.approx(THD_CHECK, abs=tol * (1 if coherent else math.sqrt(11)))
    # THD+N: harmonics and noise over Nyquist, relative to V1 = 1/√2
    thdn_true = math.sqrt((THD_CHECK / 100) ** 2 + 2 * _sigma(8, 2.5, noise) ** 2)
    assert r.thdn_percent == pytest.approx(100 * thdn_true, rel=0.05)
    assert h.thdn_percent == pytest.approx(100 * thdn_true, rel=0.05)


@pytest.mark.parametrize("x", [0.1, 1.0, 3.0])
def test_exponential_transfer_harmonics_are_bessel_ratios(x):
    """exp(x cos θ) = I₀(x) + 2 Σ Iₙ(x) cos nθ (generating function of the modified Bessel
    functions, Abramowitz & Stegun 9.6.34; chapter cited from memory), so HD_n = Iₙ(x)/I₁(x).
    Reference: scipy.special.iv, which gives x = 0.1 HD2 2.4990 %, x = 1 HD2 24.02 %.
    Coherent, noiseless: only rounding and aliasing (I_n at n ~ 2000 is 0) limit the match."""
    n, j = 4096, 101
    k = np.arange(n)
    y = np.exp(x * np.cos(2 * np.pi * j * k / n))
    h = harmonic_analysis(y, float(n), float(j), k_max=10)
    r = analyze_uniform(np.cos(2 * np.pi * j * k / n), y, float(n), k_max=10)
    for order in range(2, 11):
        ref = iv(order, x) / iv(1, x)
        assert h.hd_ratio(order) == pytest.approx(ref, rel=1e-9, abs=1e-14)
        assert r.harmonics.hd_ratio(order) == pytest.approx(ref, rel=1e-9, abs=1e-14)
    if x == 0.1:
        assert 100 * h.hd_ratio(2) == pytest.approx(2.4990, abs=5e-5)
        assert 100 * h.hd_ratio(3) == pytest.approx(0.04164, abs=5e-6)
    if x == 1.0:
        assert 100 * h.hd_ratio(2) == pytest.approx(24.02, abs=5e-3)
        assert 100 * h.hd_ratio(3) == pytest.approx(3.923, abs=5e-4)


def test_harmonics_limited_by_nyquist_and_bandwidth(synth):
    """Harmonics above Nyquist or the analysis bandwidth are not analysed (issue item 3)."""
    _, y = synth(N, FS, 7000.3, {1: 1.0, 3: 0.01}, {})
    h = harmonic_analysis(y, FS, 7000.3)
    assert h.orders == (2, 3, 4, 5, 6, 7)  # 7·7000.3 < 50 kHz < 8·7000.3
    hb = harmonic_analysis(y, FS, 7000.3, bandwidth_hz=22000.0)
    assert hb.orders == (2, 3)
    assert hb.thd_percent == pytest.approx(1.0, abs=0.001)


def test_fit_and_fft_methods_agree(synth, adc, rng):
    """The sine-fit analysis and the Blackman-Harris FFT analysis of one non-coherent record
    estimate the same THD; they differ by their noise (bound as in the test above, √11·7.4 s)."""
    n = 16384
    _, y = synth(n, FS, F, AMPS, PHASES, dc=0.1)
    yq = adc(y, 8, 2.5, 2e-3, rng)
    a = analyze_uniform(yq / 10, yq, FS)
    b = analyze_uniform(yq / 10, yq, FS, method="fft")
    s = _sigma(8, 2.5, 2e-3) * math.sqrt(2 / n)
    assert a.method == "fit" and b.method == "fft" and b.harmonics.window == "blackman-harris-4"
    assert a.thd_percent == pytest.approx(b.thd_percent, abs=100 * math.sqrt(55 * 12) * s)
    assert a.gain_db == b.gain_db


def test_noise_subtraction_reveals_that_j127_thd_is_only_noise():
    """With the expected noise per bin removed, the coprime record's harmonic bins hold
    nothing above noise (THD collapses) while J = 128 keeps its real, periodic error."""
    h127 = harmonic_analysis(_ideal_8bit(127), 4096.0, 127.0, subtract_noise=True)
    h128 = harmonic_analysis(_ideal_8bit(128), 4096.0, 128.0, subtract_noise=True)
    assert h127.thd_db < -75.0
    assert h128.thd_db == pytest.approx(-51.0, abs=1.5)
