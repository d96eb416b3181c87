"""Synthetic records for the analysis tests: known tones, noise and an ideal N-bit scope."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest


def tones(
    n: int, fs: float, f: float, amps: dict[int, float], phases: dict[int, float], dc: float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """t and y = dc + Σ_k amps[k] cos(2π k f t + phases[k])."""
    t = np.arange(n) / fs
    y = np.full(n, dc, dtype=np.float64)
    for k, a in amps.items():
        y += a * np.cos(2 * np.pi * k * f * t + phases.get(k, 0.0))
    return t, y


def scope(y: np.ndarray, bits: int, vpp: float, noise_vrms: float, rng) -> np.ndarray:
    """Add Gaussian noise, then an ideal mid-tread quantiser of ``bits`` over ±vpp/2."""
    q = vpp / 2**bits
    yn = y + rng.normal(0.0, noise_vrms, y.size) if noise_vrms else y
    codes = np.clip(np.round(yn / q), -(2 ** (bits - 1)), 2 ** (bits - 1) - 1)
    return codes * q


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)


@pytest.fixture
def synth() -> Callable[..., tuple[np.ndarray, np.ndarray]]:
    return tones


@pytest.fixture
def adc() -> Callable[..., np.ndarray]:
    return scope
