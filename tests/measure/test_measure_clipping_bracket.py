"""Clipping evidence (flat and bending-back), over-range, and the bracketed level search."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from harness.errors import OverRangeError
from harness.measure import (
    ClipCriterion,
    StepPoint,
    analyze_uniform,
    clip_evidence,
    clip_threshold,
    fit_sine3_uniform,
    next_search_level,
    sweep_curves,
)

FS, N, F = 100e3, 8192, 1000.37
T = np.arange(N) / FS


def ce_stage(x: np.ndarray, gain: float = 10.0, k_sat: float = 3.0) -> np.ndarray:
    """Inverting stage with an emitter resistor, AC parts only (invented values).

    Linear: v_out = -gain·v_in.  In saturation the collector cannot go below
    V_E + V_CE(sat), and V_E follows the base (v_E ≈ v_in), so the floor is
    -k_sat + v_in: it RISES with the input.  The negative output half-cycle therefore bends
    back up past the knee instead of staying flat (common practice; Ebers-Moll with both
    junctions forward)."""
    return np.maximum(-gain * x, -k_sat + x)


def test_bending_back_bottom_is_detected_as_negative_clipping(adc, rng):
    """The clipped half-cycle is not flat: the output at the input's crest rises with drive
    (the test checks that first, so it cannot silently pass on a flat top), yet the
    departure from the fitted sine names the negative half-cycle."""
    lows = []
    for a in (0.5, 0.8):
        y = ce_stage(a * np.sin(2 * np.pi * F * T))
        crest = np.argmax(np.sin(2 * np.pi * F * T))
        lows.append(y[crest])
        assert y[crest] > y.min() + 0.2  # bottom has a hump: crest sits above the knee
    assert lows[1] > lows[0] + 0.25  # and it rises with the drive
    y = adc(ce_stage(0.5 * np.sin(2 * np.pi * F * T)), 8, 12.0, 5e-3, rng)
    ev = clip_evidence(T, y)
    assert ev.clipped and ev.side == "negative" and not ev.both_sides
    assert ev.deficit_negative > 0.05 and ev.deficit_positive < 0
    # where the stage is saturated the record spans many LSBs: it is not a flat top
    x = 0.5 * np.sin(2 * np.pi * F * T)
    sat = -10 * x < -3.0 + x
    q = 12.0 / 256
    assert np.ptp(y[sat]) >= 4 * q  # the hump rises 0.23 V = 4.8 LSB above the knee


@pytest.mark.parametrize(("lo", "hi", "side"), [(-10.0, 3.5, "positive"), (-3.5, 10.0, "negative")])
def test_flat_clipping_either_side(adc, rng, lo, hi, side):
    y = adc(np.clip(-10 * 0.45 * np.sin(2 * np.pi * F * T), lo, hi), 8, 12.0, 5e-3, rng)
    ev = clip_evidence(T, y)
    assert ev.clipped and ev.side == side and not ev.over_range


def test_symmetric_clipping_flags_both_sides(adc, rng):
    y = adc(np.clip(4.0 * np.sin(2 * np.pi * F * T), -3.2, 3.2), 8, 10.0, 5e-3, rng)
    ev = clip_evidence(T, y)
    assert ev.clipped and ev.both_sides and abs(ev.asymmetry) < 0.01


def test_clean_and_mildly_distorted_records_are_not_clipped(adc, rng):
    """Quantised, noisy sine with 0.5 % HD2: crest deficit about 0.5 %, below the 2 %
    threshold; the noise averages out over the crest windows."""
    w = 2 * np.pi * F * T
    y = adc(2.0 * np.cos(w) + 0.01 * np.cos(2 * w), 8, 5.0, 5e-3, rng)
    ev = clip_evidence(T, y)
    assert not ev.clipped and ev.side is None
    assert abs(ev.deficit_negative - 0.005) < 0.002


def test_over_range_is_flagged_not_measured(adc, rng):
    """Samples at the ADC limits: no THD is reported; the reason says why (issue item 5)."""
    y = adc(1.5 * np.sin(2 * np.pi * F * T), 8, 2.5, 1e-3, rng)  # ±1.25 V range, 1.5 V peak
    ev = clip_evidence(T, y, adc_min=-1.25, adc_max=1.25 - 2.5 / 256)
    assert ev.over_range and ev.over_range_fraction > 0.1
    r = analyze_uniform(y / 10, y, FS, out_adc=(-1.25, 1.25 - 2.5 / 256), adc_bits=8)
    assert r.over_range and r.thd_percent is None and r.thdn_percent is None
    assert "over-range" in r.reason and r.to_dict()["thd_percent"] is None
    with pytest.raises(OverRangeError, match="ADC limits"):
        analyze_uniform(y / 10, y, FS, out_adc=(-1.25, 1.2402), raise_over_range=True)


@pytest.mark.parametrize("ratio", [1.031, 1.2595, 2.0, 5.0])
def test_hard_clip_fundamental_matches_describing_function(ratio):
    """Describing function of an ideal saturation (Gelb & Vander Velde, 1968, from memory):
    A₁ = (2A/π)(asin r + r√(1−r²)), r = L/A.  Computed with numpy: THD 1 % at A/L 1.031 and
    1 dB compression at A/L 1.2595.  Coherent noiseless record; the clipped wave's harmonics
    fall as k⁻² (slope steps), and orders N ± 1 alias onto the fundamental's bin: relative
    error ~ 1/N² ≈ 6e-8, so the match is held to 2e-7."""
    n, j = 4096, 127
    a = ratio
    y = np.clip(a * np.sin(2 * np.pi * j * np.arange(n) / n), -1.0, 1.0)
    fit = fit_sine3_uniform(y, float(n), float(j))
    r = 1.0 / a
    a1 = 2 * a / math.pi * (math.asin(r) + r * math.sqrt(1 - r * r))
    assert fit.amplitude == pytest.approx(a1, rel=2e-7)
    if ratio == 1.2595:
        assert 20 * math.log10(a1 / a) == pytest.approx(-1.0, abs=0.001)


def _clipper(level_vrms: float, gain: float = 10.0, clip_v: float = 1.0) -> StepPoint:
    """One level of the ladder on a symmetric hard clipper (coherent, noiseless)."""
    n, j = 4096, 127
    x = math.sqrt(2) * level_vrms * np.sin(2 * np.pi * j * np.arange(n) / n)
    y = np.clip(gain * x, -clip_v, clip_v)
    r = analyze_uniform(x, y, float(n))
    return StepPoint(level_vrms, r.thd_percent, r.gain_db)


def _search(criterion, start, max_v, measure=_clipper, limit=40):
    points, proposals = [], []
    for _ in range(limit):
        step = next_search_level(points, criterion, start_vrms=start, max_vrms=max_v)
        if step.done:
            return step, points, proposals
        proposals.append(step.level_vrms)
        points.append(measure(step.level_vrms))
    raise AssertionError(f"search did not finish in {limit} steps: {proposals}")


@pytest.mark.parametrize(
    ("criterion", "ratio"),
    [(ClipCriterion("thd", threshold_percent=1.0), 1.031), (ClipCriterion("compression"), 1.2595)],
)
def test_search_finds_hard_clipper_threshold(criterion, ratio):
    """Hard clipper, clip level 1 V, gain 10: THD reaches 1 % at A/L = 1.031 and 1 dB
    compression at A/L = 1.2595 (describing function of a hard limiter, Gelb & Vander Velde
    1968, from memory; values computed with numpy).  The search must
    bracket to 0.1 dB, stay below max_vrms and land within its stated uncertainty (plus the
    ±0.0005 rounding of the quoted ratio, 0.005 dB)."""
    expected_vrms = ratio * 1.0 / 10.0 / math.sqrt(2)
    step, points, proposals = _search(criterion, start=0.01, max_v=1.0)
    th = step.threshold
    assert step.bracketed and th.bracketed
    assert max(proposals) <= 1.0
    assert 20 * math.log10(th.above_vrms / th.below_vrms) <= 0.1 + 1e-9
    err_db = abs(20 * math.log10(th.level_vrms / expected_vrms))
    assert err_db <= th.uncertainty_db + 0.005
    assert len(points) <= 20


def test_search_never_exceeds_max_and_reports_unbracketed():
    """max_vrms below the clipping point: the search stops at max_vrms, not bracketed."""
    step, _points, proposals = _search(ClipCriterion(), start=0.005, max_v=0.05)
    assert step.done and not step.bracketed
    assert max(proposals) <= 0.05 and proposals[-1] == pytest.approx(0.05)
    assert step.threshold.level_vrms is None and step.threshold.below_vrms == pytest.approx(0.05)


@settings(max_examples=60, deadline=None, database=None)
@given(
    thr_db=st.floats(-40, 20),
    slope=st.floats(0.2, 20),
    kink=st.booleans(),
    start_db=st.floats(-60, 0),
    max_db=st.floats(-30, 30),
)
def test_search_property_bounded_and_converges(thr_db, slope, kink, start_db, max_db):
    """For any monotone THD curve (log-linear, or with a sharp kink where a pure secant step
    misbehaves) the search never proposes above max_vrms and ends within 40 steps, with a
    0.1 dB bracket when the crossing lies below max_vrms."""

    def measure(v):
        d = 20 * math.log10(v) - thr_db
        s = slope * d if (not kink or d > 0) else 0.01 * d
        s = min(max(s, -12.0), 6.0)  # THD between 1e-12 % and 1e6 %
        return StepPoint(v, 10**s, 0.0)  # THD in %, 1 % at thr_db

    max_v = 10 ** (max_db / 20)
    step, _points, proposals = _search(
        ClipCriterion(), 10 ** (start_db / 20), max_v, measure=measure
    )
    assert all(p <= max_v * (1 + 1e-12) for p in proposals)
    if step.bracketed:
        th = step.threshold
        assert 20 * math.log10(th.above_vrms / th.below_vrms) <= 0.1 + 1e-9
        assert abs(th.level_dbu - (thr_db - 20 * math.log10(math.sqrt(0.6)))) <= 0.1


def test_clip_threshold_interpolates_log_thd():
    """log THD linear in level dB: interpolation is exact (issue item 6)."""
    levels = [0.1, 0.2, 0.4]
    thd = [0.1, 0.4, 1.6]  # log10 THD = -1 + (L_dB + 20)/10: 1 % exactly at -10 dB(V)
    th = clip_threshold(levels, thd, [20.0, 20.0, 19.9], ClipCriterion())
    assert th.bracketed
    assert 20 * math.log10(th.level_vrms) == pytest.approx(-10.0, abs=1e-9)
    curves = sweep_curves(
        [StepPoint(v, t, g) for v, t, g in zip(levels, thd, [20, 20, 19.9], strict=True)]
    )
    assert curves.compression_db[-1] == pytest.approx(0.1)


def test_threshold_uncertainty_carries_the_thd_readings_noise() -> None:
    """GUM (JCGM 100:2008) §5.1.2 law of propagation: the crossing of log10 THD interpolated
    between two readings with standard uncertainty u moves by u/(THD ln 10) over the slope of
    log10 THD per dB; checked against a numerical derivative of the same interpolation."""
    from harness.measure import clip_threshold

    lv = [0.2, 0.2 * 10 ** (0.5 / 20)]
    thd = [0.8, 1.3]
    u = [0.02, 0.03]
    th = clip_threshold(lv, thd, [20.0, 19.9], thd_u_percent=u)
    quiet = clip_threshold(lv, thd, [20.0, 19.9])
    assert quiet.noise_u_db == 0.0

    def xc(t0: float, t1: float) -> float:
        return clip_threshold(lv, [t0, t1], [20.0, 19.9]).level_dbu  # type: ignore[return-value]

    h = 1e-6
    d0 = (xc(thd[0] + h, thd[1]) - xc(thd[0] - h, thd[1])) / (2 * h)
    d1 = (xc(thd[0], thd[1] + h) - xc(thd[0], thd[1] - h)) / (2 * h)
    assert th.noise_u_db == pytest.approx(math.hypot(d0 * u[0], d1 * u[1]), rel=1e-5)
    assert th.uncertainty_db == pytest.approx(math.hypot(quiet.uncertainty_db, th.noise_u_db))


def test_search_stops_once_the_bracket_is_inside_the_readings_noise() -> None:
    """A bracket of 0.4 dB is wider than the 0.1 dB resolution, but readings whose noise
    makes a crossing uncertainty of more than 0.2 dB cannot narrow it usefully: the search
    stops there (and does not with quiet readings)."""
    from harness.measure import next_search_level

    a, b = 0.2, 0.2 * 10 ** (0.4 / 20)
    noisy = [(a, 0.9, 20.0, 0.15), (b, 1.1, 19.9, 0.15)]
    step = next_search_level(noisy, start_vrms=a, max_vrms=1.0, resolution_db=0.1)
    assert step.done and step.bracketed and "noise" in step.reason
    assert step.threshold is not None and 2 * step.threshold.noise_u_db >= 0.4
    quiet = [p[:3] for p in noisy]
    step = next_search_level(quiet, start_vrms=a, max_vrms=1.0, resolution_db=0.1)
    assert not step.done


def test_a_step_without_thd_is_a_typed_error_not_a_crash():
    """An over-range record has no THD: the threshold search names the step instead of
    failing inside float()."""
    from harness.errors import AnalysisError

    with pytest.raises(AnalysisError, match="no valid THD/gain"):
        clip_threshold([0.1, 0.2, 0.4], [0.1, None, 2.0], [20.0, 20.0, 19.0])
