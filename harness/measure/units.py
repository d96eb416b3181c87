"""Level units used across the harness.  0 dBu = √0.6 V rms ≈ 0.7746 V (1 mW in 600 Ω;
common practice)."""

from __future__ import annotations

import numpy as np

DBU_REF_VRMS = float(np.sqrt(0.6))


def vrms_to_dbu(v: float | np.ndarray) -> float | np.ndarray:
    """dBu of an RMS voltage (−inf for 0)."""
    with np.errstate(divide="ignore"):
        out = 20 * np.log10(np.asarray(v, dtype=np.float64) / DBU_REF_VRMS)
    return float(out) if np.ndim(out) == 0 else out


def dbu_to_vrms(dbu: float | np.ndarray) -> float | np.ndarray:
    out = DBU_REF_VRMS * 10 ** (np.asarray(dbu, dtype=np.float64) / 20)
    return float(out) if np.ndim(out) == 0 else out


def db20(ratio: float | np.ndarray) -> float | np.ndarray:
    with np.errstate(divide="ignore"):
        out = 20 * np.log10(np.asarray(ratio, dtype=np.float64))
    return float(out) if np.ndim(out) == 0 else out
