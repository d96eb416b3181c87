"""Input checks shared by the analysis functions: every bad record gets a typed, clear error."""

from __future__ import annotations

import numpy as np

from harness.errors import AnalysisError

#: A record must hold at least this many cycles of the fundamental (the fits and the
#: harmonic bins are not trustworthy below it).
MIN_CYCLES = 3.0

#: Relative jitter of the time stamps tolerated before a record counts as non-uniform
#: (CSV exports round time stamps; a missing sample makes one step 100 % longer).
TIME_JITTER_REL = 1e-3


def as_samples(y: object, name: str = "y", *, min_len: int = 8) -> np.ndarray:
    """1-D finite float array (float32 kept, anything else made float64)."""
    arr = np.asarray(y)
    if arr.dtype.kind not in "fiu":
        raise AnalysisError(f"{name}: samples must be numbers, got dtype {arr.dtype}")
    if arr.dtype != np.float32:
        arr = arr.astype(np.float64, copy=False)
    if arr.ndim != 1:
        raise AnalysisError(f"{name}: expected a 1-D record, got shape {arr.shape}")
    if arr.size < min_len:
        raise AnalysisError(
            f"{name}: record has {arr.size} samples; at least {min_len} are needed",
            hint="capture a longer record",
        )
    if not np.isfinite(arr).all():
        bad = int(np.flatnonzero(~np.isfinite(arr))[0])
        raise AnalysisError(
            f"{name}: sample {bad} is {arr[bad]} (NaN or infinite samples)",
            hint="check the scope channel and the capture file",
        )
    if float(np.ptp(arr)) == 0.0:
        raise AnalysisError(
            f"{name}: record is constant ({float(arr[0])!r}): silent or DC only",
            hint="check the generator output, the probe and the channel coupling",
        )
    return np.ascontiguousarray(arr)


def same_length(**arrays: np.ndarray) -> int:
    lengths = {k: len(v) for k, v in arrays.items()}
    if len(set(lengths.values())) != 1:
        desc = ", ".join(f"{k}={n}" for k, n in lengths.items())
        raise AnalysisError(f"mismatched record lengths: {desc}", hint="use one capture")
    return next(iter(lengths.values()))


def sample_rate_from_time(t: object, n: int) -> tuple[float, float]:
    """(sample rate, t[0]) of uniform, increasing time stamps; otherwise AnalysisError."""
    tt = np.asarray(t, dtype=np.float64)
    if tt.ndim != 1 or tt.size != n:
        raise AnalysisError(f"mismatched record lengths: t={tt.size}, samples={n}")
    if not np.isfinite(tt).all():
        bad = int(np.flatnonzero(~np.isfinite(tt))[0])
        raise AnalysisError(f"time stamp {bad} is {tt[bad]} (NaN or infinite)")
    dt = np.diff(tt)
    if (dt <= 0).any():
        bad = int(np.flatnonzero(dt <= 0)[0])
        raise AnalysisError(
            f"time stamps not increasing at sample {bad + 1} ({tt[bad]!r} then {tt[bad + 1]!r})",
            hint="time must increase strictly, one sample interval per row",
        )
    step = (tt[-1] - tt[0]) / (n - 1)
    dev = np.abs(dt - step)
    worst = int(np.argmax(dev))
    if dev[worst] > TIME_JITTER_REL * step:
        raise AnalysisError(
            f"time stamps not uniform at sample {worst + 1}: step {dt[worst]:.6g} s "
            f"where the record's mean step is {step:.6g} s",
            hint="the analysis needs a uniformly sampled record (no gaps, no merged captures)",
        )
    return 1.0 / step, float(tt[0])


def check_rate(sample_rate_hz: float) -> float:
    fs = float(sample_rate_hz)
    if not np.isfinite(fs) or fs <= 0:
        raise AnalysisError(f"sample rate must be a positive number, got {sample_rate_hz!r}")
    return fs


def check_fundamental(
    frequency_hz: float, sample_rate_hz: float, n: int, bandwidth_hz: float | None = None
) -> float:
    """The fundamental must lie inside the record's bandwidth and fill >= MIN_CYCLES cycles."""
    f = float(frequency_hz)
    nyq = sample_rate_hz / 2.0
    if not np.isfinite(f) or f <= 0:
        raise AnalysisError(f"fundamental frequency must be positive, got {frequency_hz!r}")
    if f >= nyq:
        raise AnalysisError(
            f"fundamental {f:.6g} Hz is outside the record's bandwidth "
            f"(Nyquist {nyq:.6g} Hz at {sample_rate_hz:.6g} S/s)",
            hint="raise the scope's sample rate",
        )
    if bandwidth_hz is not None and f > bandwidth_hz:
        raise AnalysisError(
            f"fundamental {f:.6g} Hz is outside the analysis bandwidth {bandwidth_hz:.6g} Hz",
            hint="widen --bandwidth",
        )
    cycles = f * n / sample_rate_hz
    if cycles < MIN_CYCLES * (1 - 1e-3):  # a noisy 3-cycle record may fit as 2.9995
        raise AnalysisError(
            f"record holds {cycles:.4g} cycles of {f:.6g} Hz; at least {MIN_CYCLES:g} needed",
            hint="capture a longer record (longer time base)",
        )
    return f


def check_bandwidth(bandwidth_hz: float | None, sample_rate_hz: float) -> float:
    """Analysis bandwidth, defaulting to Nyquist and never above it."""
    nyq = sample_rate_hz / 2.0
    if bandwidth_hz is None:
        return nyq
    bw = float(bandwidth_hz)
    if not np.isfinite(bw) or bw <= 0:
        raise AnalysisError(f"analysis bandwidth must be positive, got {bandwidth_hz!r}")
    return min(bw, nyq)
