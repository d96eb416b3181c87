"""Coherent plans inside a record the instrument chose (f = J·fs/N, gcd(J, N) = 1).

Check values: the worked example fs 100 kS/s, N 4096, J 41 → 1000.9765625 Hz (Maxim/ADI
application note 1040 method; value computed, f = J·fs/N).
"""

from __future__ import annotations

import math

import pytest

from harness.errors import AnalysisError
from harness.measure.coherent import plan_coherent_within


def test_worked_example_takes_the_whole_record():
    p = plan_coherent_within(1000.9765625, 1e5, 4096, tolerance_rel=1e-6)
    assert (p.cycles, p.n_samples, p.frequency_hz) == (41, 4096, 1000.9765625)


@pytest.mark.parametrize(
    ("f", "fs", "n"), [(2.25, 1e4, 50000), (1000.0, 2e5, 20000), (17.3, 5e3, 1000)]
)
def test_plan_is_coherent_coprime_and_near(f, fs, n):
    p = plan_coherent_within(f, fs, n, tolerance_rel=0.01)
    assert p.n_samples <= n and p.sample_rate_hz == fs
    assert math.gcd(p.cycles, p.n_samples) == 1
    assert p.frequency_hz == pytest.approx(p.cycles * fs / p.n_samples, rel=1e-15)
    assert abs(p.frequency_hz / f - 1) <= 0.01


def test_no_plan_is_a_typed_error():
    with pytest.raises(AnalysisError, match="no coherent record"):
        plan_coherent_within(1.0, 1e4, 5000, tolerance_rel=0.01, min_cycles=3)
