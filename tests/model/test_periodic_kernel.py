"""The compiled periodic solve (harness.model.periodic_kernel) against the numpy loop it
replaces: the same equations, junction limiting and stopping rule, so array for array the
same solution to far inside the Newton tolerance, on random rows and on the Monte Carlo."""

from __future__ import annotations

import numpy as np
import pytest

from harness.io.board import load_board
from harness.model.core import _cos_weights, evaluate_channel
from harness.model.limits import MC_SEARCH_POINTS, MC_SEARCH_TOL_DB, MC_THD_POINTS
from harness.model.params import channel_parameters, sample_arrays
from harness.model.periodic import PeriodicState, compiled_kernel, solve_periodic

pytestmark = pytest.mark.skipif(compiled_kernel() is None, reason="numba not installed")


def _random_stage(rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
    """Random common-emitter stages about a working bias, driven from small to hard clipping."""
    col = lambda x: np.asarray(x, dtype=float)[:, None]  # noqa: E731
    r1, r2 = rng.uniform(20e3, 100e3, n), rng.uniform(5e3, 30e3, n)
    vcc = rng.uniform(9.0, 24.0, n)
    rc, re = rng.uniform(2e3, 10e3, n), rng.uniform(100.0, 2e3, n)
    return {
        "is_a": col(10 ** rng.uniform(-15, -13, n)),
        "beta_f": col(rng.uniform(80, 400, n)),
        "beta_r": col(rng.uniform(1, 10, n)),
        "inv_vaf": col(np.where(rng.random(n) < 0.5, 0.0, 1.0 / rng.uniform(30, 150, n))),
        "v_t": col(np.full(n, 0.025852)),
        "v_th": col(vcc * r2 / (r1 + r2)),
        "r_th": col(r1 * r2 / (r1 + r2)),
        "r_b": col(rng.uniform(0.0, 2e3, n)),
        "k_e": col(rng.uniform(0.0, 1e3, n)),
        "r_e": col(re),
        "v_cc": col(vcc),
        "r_cdc": col(rc),
        "r_cac": col(rc * rng.uniform(0.3, 1.0, n)),
    }


@pytest.mark.parametrize("points", [16, 32, 64])
def test_kernel_matches_numpy_on_random_rows(points: int) -> None:
    """From a rough start (a junction at 0.6 V forward, the collector junction reversed), up
    to drives far into clipping: junction voltages, currents and means agree to 1e-9
    relative (the Newton tolerance is 1e-10 V on 26 mV: 4e-9 on a current), and rows the
    numpy loop cannot solve (non-finite) are the same rows."""
    rng = np.random.default_rng(7)
    n = 3000
    c = _random_stage(rng, n)
    cos_t, basis = _cos_weights(points // 2, 0)
    v_s = (10 ** rng.uniform(-3, 0.5, n))[:, None] * cos_t[None, :]
    m = cos_t.size
    start = PeriodicState(
        np.full((n, m), 0.6), np.full((n, m), -2.0), np.full(n, 1e-6), np.full(n, 1e-3)
    )
    a = solve_periodic(v_s, c, basis[:, 0], start, compiled=True)
    b = solve_periodic(v_s, c, basis[:, 0], start, compiled=False)
    assert np.all(start.vbe == 0.6)  # the start is left as it is
    pairs = [
        (a.state.vbe, b.state.vbe),
        (a.state.vbc, b.state.vbc),
        (a.i_b, b.i_b),
        (a.i_c, b.i_c),
        (a.state.m_b, b.state.m_b),
        (a.state.m_c, b.state.m_c),
    ]
    for x, y in pairs:
        assert x.shape == y.shape
        assert np.array_equal(np.isfinite(x), np.isfinite(y))
        ok = np.isfinite(y)
        scale = np.max(np.abs(y[ok]))
        assert np.max(np.abs(x[ok] - y[ok])) <= 1e-9 * scale


def test_kernel_matches_numpy_on_the_monte_carlo(monkeypatch) -> None:
    """The whole channel with the criterion search (warm starts, shrinking active set) on
    1,000 Monte Carlo boards of the demo preamp: THD and the clip threshold agree to 1e-9."""
    import harness.model.core as core

    board = load_board("limits/demo-twin-preamp.toml")
    ch = board.channel("A")
    p = sample_arrays(channel_parameters(board, ch), np.random.default_rng(3), 1000)

    def run() -> tuple[np.ndarray, np.ndarray]:
        res = evaluate_channel(
            board, ch, p, thd_points=MC_THD_POINTS, search_points=MC_SEARCH_POINTS,
            search_tol_db=MC_SEARCH_TOL_DB,
        )  # fmt: skip
        assert res.thd_percent is not None and res.thd_clip_input_vpk is not None
        return res.thd_percent, res.thd_clip_input_vpk

    thd_k, clip_k = run()
    plain = solve_periodic
    monkeypatch.setattr(core, "solve_periodic", lambda *a, **k: plain(*a, compiled=False, **k))
    thd_n, clip_n = run()
    for x, y in ((thd_k, thd_n), (clip_k, clip_n)):
        assert np.array_equal(np.isfinite(x), np.isfinite(y))
        ok = np.isfinite(y)
        assert ok.sum() > 900
        np.testing.assert_allclose(x[ok], y[ok], rtol=1e-9)
