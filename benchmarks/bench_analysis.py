"""Benchmark: full analysis of a two-channel 1,000,000-sample record vs two numpy FFTs.

Full analysis = four-parameter fit of the input with harmonics to 10, three-parameter fit of
the output, THD, THD+N, clipping evidence, measurement floor (harness.measure.analyze_uniform).
Timed in the same run as one numpy rfft of each channel; prints both and the ratio.
Aim (issue): the whole analysis within the time of those two FFTs; a coherent record should
beat it.  Run: python benchmarks/bench_analysis.py
"""

from __future__ import annotations

import os

# numpy's FFT is single-threaded; the analysis' matrix products are small (about N x 40), and
# BLAS threads cost more than they give on these 2-core machines (on a loaded machine a
# threaded run took 3-4x longer).  Compare like with like: one thread unless the caller says
# otherwise.  Must be set before numpy is imported.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import time  # noqa: E402

import numpy as np  # noqa: E402

from harness.measure import analyze_uniform, plan_coherent  # noqa: E402

N = 1_000_000
FS = 10e6
REPEATS = 7


def best_ms(fn, repeats: int = REPEATS) -> tuple[float, float]:
    """Best wall-clock and best process-CPU time in ms (CPU time is steadier on a shared,
    loaded machine; both are printed)."""
    fn()  # warm-up
    wall = cpu = float("inf")
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall = min(wall, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
    return wall * 1e3, cpu * 1e3


def record(f: float, dtype) -> tuple[np.ndarray, np.ndarray]:
    """8-bit scope record: input sine, inverting output with HD2/HD3 and a soft negative
    limit, Gaussian noise, quantised on ±1.25 V / ±12.5 V ranges."""
    rng = np.random.default_rng(1)
    w = 2 * np.pi * f * np.arange(N) / FS
    x = 0.5 * np.sin(w)
    y = np.maximum(-10 * x + 0.05 * np.cos(2 * w) + 0.02 * np.cos(3 * w), -4.5 + x)
    xq = np.round((x + rng.normal(0, 2e-3, N)) / (2.5 / 256)) * (2.5 / 256)
    yq = np.round((y + rng.normal(0, 2e-2, N)) / (25 / 256)) * (25 / 256)
    return xq.astype(dtype), yq.astype(dtype)


def main() -> None:
    plan = plan_coherent(10e3, [FS], [N])
    print(f"record: 2 channels x {N} samples, fs {FS:.3g} S/s, 8-bit quantised")
    print(f"BLAS threads: OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}")
    print(f"coherent plan: J={plan.cycles}, f={plan.frequency_hz:.6f} Hz")
    cases = (
        ("coherent, f given", plan.frequency_hz, plan.frequency_hz),
        ("coherent, f fitted", plan.frequency_hz, None),
        ("non-coherent", 10003.7, None),
    )
    print(
        f"\n{'record':<20}{'dtype':<9}{'2 FFTs ms':>15}{'analysis ms':>15}{'ratio':>12}"
        f"{'fft-method ms':>15}  THD %   clip"
    )
    print(f"{'':<29}{'wall / cpu':>15}{'wall / cpu':>15}{'wall / cpu':>12}{'wall':>15}")
    for label, f, f_given in cases:
        for dtype in (np.float32, np.float64):
            x, y = record(f, dtype)
            fft_w, fft_c = best_ms(lambda x=x, y=y: (np.fft.rfft(x), np.fft.rfft(y)))

            def full(x=x, y=y, f_given=f_given, method="fit"):
                return analyze_uniform(
                    x,
                    y,
                    FS,
                    in_adc=(-1.25, 1.25),
                    out_adc=(-12.5, 12.5),
                    adc_bits=8,
                    frequency_hz=f_given,
                    method=method,
                )

            an_w, an_c = best_ms(full)
            sp_w, _ = best_ms(lambda full=full: full(method="fft"), 3)
            r = full()
            print(
                f"{label:<20}{np.dtype(dtype).name:<9}{fft_w:>7.1f} / {fft_c:<5.1f}"
                f"{an_w:>7.1f} / {an_c:<5.1f}{an_w / fft_w:>5.2f} / {an_c / fft_c:<4.2f}"
                f"{sp_w:>15.1f}  {r.thd_percent:.3f}  {r.clip_side}"
            )
    print(
        "\nratio = full analysis (method 'fit': fits, harmonics to 10, THD+N, clipping "
        "evidence, floor)\n        / one numpy rfft of each channel; below 1 meets the aim."
    )


if __name__ == "__main__":
    main()
