"""Channel failure modes from synthetic records (harness.measure.condition).

Each record is built with numpy from known tones through an ideal 8-bit quantiser with
noise (tests/measure/conftest.py), so the expected mode, frequency and level are known
exactly.  Sampling facts used: a tone at f sampled at fs appears at |f - k fs| (aliasing,
Nyquist-Shannon; common practice), so 400 kHz sampled at 200 kS/s lands on DC.
"""

from __future__ import annotations

import numpy as np
import pytest

from harness.errors import AnalysisError
from harness.measure.condition import classify_channel
from tests.measure.conftest import scope

FS, N, F0 = 200e3, 20000, 1000.9765625  # 0.1 s, about 100 cycles
GAIN = 9.3  # an inverting channel of about 19.4 dB
VIN = 0.05 * np.sqrt(2)


def _records(out=None, *, gain=-GAIN, rng_seed=1, extra=(), dc=0.0, vpp_out=2.0, fs=FS, n=N):
    rng = np.random.default_rng(rng_seed)
    t = np.arange(n) / fs
    x = VIN * np.sin(2 * np.pi * F0 * t)
    y = gain * x + dc if out is None else out(t)
    for f, a in extra:
        y = y + a * np.sin(2 * np.pi * f * t + 0.3)
    return scope(x, 8, 0.2, 20e-6, rng), scope(y, 8, vpp_out, 20e-6, rng)


def _classify(x, y, *, wide=None, rails=None, fs=FS):
    return classify_channel(
        x, y, fs, F0, expected_gain=GAIN, expected_phase_deg=180.0, rails_v=rails, wide=wide
    )


def test_a_good_channel_with_harmonics_is_working() -> None:
    """HD2 1 % and HD3 0.5 % are harmonics of the test signal, never another component."""
    t = np.arange(N) / FS
    w = 2 * np.pi * F0 * t
    a = GAIN * VIN
    x, y = _records(lambda t: -a * np.sin(w) + 0.01 * a * np.cos(2 * w) + 0.005 * a * np.sin(3 * w))
    cond = _classify(x, y)
    assert cond.mode == "working", cond.text
    assert cond.evidence["gain_db"] == pytest.approx(20 * np.log10(GAIN), abs=0.05)


def test_a_silent_output_is_dead_not_an_error() -> None:
    x, y = _records(lambda t: np.zeros_like(t), vpp_out=0.04)
    cond = _classify(x, y)
    assert cond.mode == "dead"
    assert cond.evidence["output_fundamental_vpk"] < 1e-3


def test_an_oscillation_the_nominal_record_aliases_onto_dc_is_seen_in_the_wide_record() -> None:
    """0.2 V peak at 400 kHz: at 200 kS/s it aliases to 0 Hz (a DC offset the sine fit
    removes), so the nominal record alone calls the channel working; a record at 10 MS/s
    (100,000 points, 100 Hz bins: 400 kHz in bin 4000) names it at its own frequency."""
    x, y = _records(extra=[(400e3, 0.2)])
    assert _classify(x, y).mode == "working"
    t = np.arange(100_000) / 10e6
    wide = -GAIN * VIN * np.sin(2 * np.pi * F0 * t) + 0.2 * np.sin(2 * np.pi * 400e3 * t + 0.3)
    cond = _classify(x, y, wide=(scope(wide, 8, 2.0, 20e-6, np.random.default_rng(3)), 10e6))
    assert cond.mode == "oscillating"
    assert cond.evidence["frequency_hz"] == pytest.approx(400e3, abs=100)
    assert cond.evidence["level_vpk"] == pytest.approx(0.2, rel=0.02)


def test_an_oscillation_inside_the_record_band_is_seen_directly() -> None:
    """A 23.4 kHz parasitic at 0.1 V peak (not a harmonic of 1000.98 Hz), -16 dB re the
    signal: oscillating, at its frequency within one 10 Hz bin."""
    x, y = _records(extra=[(23400.0, 0.1)])
    cond = _classify(x, y)
    assert cond.mode == "oscillating"
    assert cond.evidence["frequency_hz"] == pytest.approx(23400.0, abs=10)


def test_mains_hum_is_named_with_its_frequency() -> None:
    """60 Hz at 20 mV peak and 120 Hz at 10 mV: rms sqrt(0.02² + 0.01²)/√2 = 15.8 mV."""
    x, y = _records(extra=[(60.0, 0.02), (120.0, 0.01)])
    cond = _classify(x, y)
    assert cond.mode == "hum"
    assert cond.evidence["frequency_hz"] == 60.0
    assert cond.evidence["level_vrms"] == pytest.approx(np.hypot(0.02, 0.01) / np.sqrt(2), rel=0.05)
    # hum 50 dB under the signal is below the level that counts
    x, y = _records(extra=[(50.0, GAIN * VIN * 10 ** (-50 / 20))])
    assert _classify(x, y).mode == "working"


def test_reversed_polarity_and_gross_gain_error() -> None:
    x, y = _records(gain=+GAIN)  # non-inverting where 180 degrees is expected
    cond = _classify(x, y)
    assert cond.mode == "reversed_polarity"
    assert abs(cond.evidence["phase_deg"]) < 5
    x, y = _records(gain=-GAIN / 30, vpp_out=0.2)  # 29.5 dB low
    assert _classify(x, y).mode == "gain_error"
    x, y = _records(gain=-GAIN / 3, vpp_out=0.8)  # 9.5 dB low: an ordinary failed gain
    assert _classify(x, y).mode == "working"


def test_an_output_pinned_near_a_rail_is_stuck() -> None:
    x, y = _records(lambda t: np.full_like(t, 11.8), vpp_out=40.0)
    cond = _classify(x, y, rails=(0.0, 12.0))
    assert cond.mode == "stuck"
    assert cond.evidence["rail"] == "positive"
    # without rails (an output behind a coupling capacitor) the same record is dead
    assert _classify(x, y).mode == "dead"


def test_no_test_signal_at_the_input_is_a_bench_error() -> None:
    _, y = _records()
    with pytest.raises(AnalysisError, match="no test signal"):
        _classify(np.zeros(N), y)
