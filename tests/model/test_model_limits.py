"""Monte Carlo limits, clipping side and criterion search: checks against scipy references,
ngspice and the model's own nominal path (the same functions at size one)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import brentq

from harness.cli.main import main
from harness.io.board import load_board
from harness.model import compute_limits, design_channel
from harness.model.core import (
    LargeSignalChain,
    evaluate_channel,
    harmonics,
    thd_from_harmonics,
)
from harness.model.design import to_design
from harness.model.limits import (
    MC_SEARCH_ITERATIONS,
    MC_SEARCH_POINTS,
    MC_SEARCH_TOL_DB,
    MC_THD_POINTS,
    MODEL_UNCERTAINTY,
)
from harness.model.params import channel_parameters, nominal_arrays, sample_arrays
from harness.model.spice import channel_netlist
from tests.support.boards import board_text, make_board, write_board

TWIN = "limits/demo-twin-preamp.toml"
OPAMP = "limits/demo-opamp-line.toml"


def _clipped_sine_harmonic(k: int, r: float) -> float:
    """k-th Fourier amplitude of cos(t) clipped at +-r (scipy.integrate.quad)."""
    val, _ = quad(lambda t: np.clip(np.cos(t), -r, r) * np.cos(k * t), 0, np.pi, limit=200)
    return 2.0 * val / np.pi


def test_hard_clip_criterion_matches_fourier_series() -> None:
    """A hard symmetric clipper (op-amp stage at its rails) reaches THD(2-10) = 1 % at a drive
    A/L found here from the Fourier series of the clipped sine (scipy.integrate.quad +
    scipy.optimize.brentq, about 1.031); the model's criterion search must land there."""

    def thd(ratio: float) -> float:
        r = 1.0 / ratio
        h = [_clipped_sine_harmonic(k, r) for k in range(1, 11)]
        return 100.0 * math.sqrt(sum(x * x for x in h[1:])) / h[0]

    ratio = brentq(lambda a: thd(a) - 1.0, 1.0001, 1.2, xtol=1e-10)
    board = load_board(OPAMP)
    d = design_channel(board, "AUX")
    assert d.thd_clip_input_vrms / d.clip_input_vrms == pytest.approx(ratio, rel=5e-4)


def test_compression_criterion_matches_describing_function(tmp_path) -> None:
    """1 dB compression of a hard clipper: describing function A1 = (2A/pi)(asin r + r sqrt(1-r^2)),
    r = L/A (textbook describing-function result, from memory; solved with scipy brentq,
    about A/L = 1.26) against the model with clip_criterion = "compression"."""
    text = board_text(
        '[[channel]]\nname = "X"\n  [[channel.stage]]\n  kind = "opamp_inverting"\n'
        '  name = "amp"\n  opamp = "u"\n  r_in = "10k"\n  r_f = "47k"\n  c_in = "10u"\n',
        vcc=15.0,
        negative='negative_v = "-15 0%"',
        load="100k",
        nominal=0.1,
    )
    text = text.replace("source_ohm = 50.0", 'source_ohm = 50.0\nclip_criterion = "compression"')
    board = load_board(write_board(tmp_path, text))

    def gain_db(a: float) -> float:
        r = 1.0 / a
        return 20 * math.log10((2 / math.pi) * (math.asin(r) + r * math.sqrt(1 - r * r)))

    ratio = brentq(lambda a: gain_db(a) + 1.0, 1.0001, 3.0, xtol=1e-10)
    d = design_channel(board, "X")
    assert d.clip_criterion == "1 dB gain compression"
    assert d.thd_clip_input_vrms / d.clip_input_vrms == pytest.approx(ratio, rel=1e-3)


def test_mc_resolution_close_to_nominal_resolution() -> None:
    """The Monte Carlo's coarser large-signal grid (32 points, 10 search iterations) gives the
    same THD and criterion level as the nominal 256-point solution: within 0.5 % / 0.01 dB."""
    for path, name in ((TWIN, "A"), (OPAMP, "MIC")):
        board = load_board(path)
        ch = board.channel(name)
        res = evaluate_channel(
            board,
            ch,
            nominal_arrays(channel_parameters(board, ch)),
            thd_points=MC_THD_POINTS,
            search_points=MC_SEARCH_POINTS,
            search_iterations=MC_SEARCH_ITERATIONS,
        )
        d = design_channel(board, name)
        level = float(res.thd_clip_input_vpk[0]) / math.sqrt(2)
        assert 20 * math.log10(level / d.thd_clip_input_vrms) == pytest.approx(0, abs=0.01)
        if d.thd_percent > 1e-6:
            assert float(res.thd_percent[0]) == pytest.approx(d.thd_percent, rel=5e-3)


def test_vectorised_equals_per_sample() -> None:
    """The same functions serve the nominal design and the Monte Carlo: sample i of a vector
    run equals a size-one run on sample i's parameters."""
    board = load_board(TWIN)
    ch = board.channel("A")
    specs = channel_parameters(board, ch)
    p = sample_arrays(specs, np.random.default_rng(5), 50)
    vec = evaluate_channel(board, ch, p)
    for i in (0, 17, 49):
        one = evaluate_channel(board, ch, {k: v[i : i + 1] for k, v in p.items()})
        a, b = to_design(board, ch, vec, i), to_design(board, ch, one, 0)
        assert a.gain == pytest.approx(b.gain, rel=1e-12)
        assert a.thd_percent == pytest.approx(b.thd_percent, rel=1e-9)
        assert a.thd_clip_input_vrms == pytest.approx(b.thd_clip_input_vrms, rel=1e-9)
        assert a.stages[0].vc_v == pytest.approx(b.stages[0].vc_v, rel=1e-12)


def test_limits_reproducible_and_cover_fresh_boards() -> None:
    """Same seed, same limits (digest); and a fresh Monte Carlo population drawn with another
    seed falls inside the gain limits in about the stated coverage (binomial: 4000 boards at
    coverage 0.9973 leave on average 11 outside; we allow 0-40)."""
    board = load_board(TWIN)
    a = compute_limits(board, samples=4000, seed=11, workers=1)
    b = compute_limits(board, samples=4000, seed=11, workers=2)
    c = compute_limits(board, samples=4000, seed=12)
    assert a.digest == b.digest != c.digest
    assert a.provenance.board_digest == board.digest and len(board.digest) == 64
    lim = a.channels["A"].gain_db
    ch = board.channel("A")
    fresh = evaluate_channel(
        board,
        ch,
        sample_arrays(channel_parameters(board, ch), np.random.default_rng(99), 4000),
        thd_points=None,
        search_points=None,
    )
    gains = 20 * np.log10(np.abs(fresh.gain))
    outside = int(np.sum((gains < lim.low) | (gains > lim.high)))
    assert 0 <= outside <= 40
    assert lim.low < lim.nominal < lim.high
    thd = a.channels["A"].thd_percent
    assert thd.low is None and thd.high > thd.nominal


def test_worst_case_corners_bound_the_monte_carlo() -> None:
    """Gain is monotone in every part, so the sensitivity-signed extreme corners bound every Monte
    Carlo board: corner low <= MC low and corner high >= MC high (the band less the model's own
    uncertainty, which the limits add on top)."""
    board = load_board(TWIN)
    lim = compute_limits(board, samples=3000, seed=4).channels["A"]
    wc = lim.worst_case["gain_db"]
    ga = 20 * math.log10(1 + MODEL_UNCERTAINTY["gain_rel"])
    assert wc.low <= lim.gain_db.low + ga and wc.high >= lim.gain_db.high - ga


def test_limits_json_roundtrip_and_digest() -> None:
    """to_dict is JSON-serialisable and from_dict rebuilds a set with the same digest."""
    from harness.model.limits import BoardLimits

    lim = compute_limits(load_board(OPAMP), samples=500)
    doc = json.loads(json.dumps(lim.to_dict()))
    assert BoardLimits.from_dict(doc).digest == lim.digest
    assert lim.channels["AUX"].inverting and lim.channels["AUX"].phase_deg == 180.0
    assert not lim.channels["MIC"].inverting and lim.channels["MIC"].phase_deg == 0.0


def _peaks(stdout: str) -> tuple[float, float]:
    """Max and min of v(out) over the last period, from ngspice ``meas`` lines."""
    vals = {}
    for line in stdout.splitlines():
        parts = line.replace("=", " ").split()
        if len(parts) >= 2 and parts[0] in ("vmax", "vmin"):
            vals[parts[0]] = float(parts[1])
    return vals["vmax"], vals["vmin"]


def _clip_side_spice(spice, board, channel: str, level_vrms: float) -> str:
    net = channel_netlist(board, channel, amplitude_vpk=level_vrms * math.sqrt(2))
    period = 1.0 / board.conditions.frequency_hz
    meas = (
        f"meas tran vmax max v(out) from={19 * period:.9g} to={20 * period:.9g}\n"
        f"meas tran vmin min v(out) from={19 * period:.9g} to={20 * period:.9g}\n"
    )
    net = net.replace("quit\n", meas + "quit\n")
    vmax, vmin = _peaks(spice(net))
    return "positive" if vmax < -vmin else "negative"


@pytest.mark.ngspice
def test_clip_side_against_ngspice(spice, tmp_path) -> None:
    """Which half-cycle of the OUTPUT clips first, against ngspice transients driven 2 dB past
    the swing limit: the demo channel (cutoff of the inverting CE stage: its collector high side,
    the positive output half) and a CE stage biased near saturation (negative output half)."""
    board = load_board(TWIN)
    d = design_channel(board, "A")
    assert d.clip_side == "positive"
    assert _clip_side_spice(spice, board, "A", d.clip_input_vrms * 10 ** (2 / 20)) == "positive"
    sat = make_board(
        tmp_path,
        r1="68k",
        r2="15k",
        rc="6k8",
        re="470R",
        bypass='re_bypassed = "1k"\n  c_e = "100u"',
        load="22k",
        beta=290,
        is_a=1.2e-14,
    )
    d2 = design_channel(sat, "X")
    assert d2.clip_side == "negative"
    assert _clip_side_spice(spice, sat, "X", d2.clip_input_vrms * 10 ** (2 / 20)) == "negative"


def test_second_inverting_stage_flips_clip_side(tmp_path) -> None:
    """An inverting stage after the clipping stage turns its clipped half-cycle over (derived
    from the stage polarity): the same CE stage followed by an inverting op-amp of gain -0.5
    clips on the other output half-cycle."""
    one = make_board(
        tmp_path,
        r1="68k",
        r2="15k",
        rc="6k8",
        re="470R",
        bypass='re_bypassed = "1k"\n  c_e = "100u"',
        load="22k",
    )
    two_text = board_text(
        '[[channel]]\nname = "X"\n  [[channel.stage]]\n  kind = "common_emitter"\n'
        '  name = "gain"\n  transistor = "q"\n  r1 = "68k"\n  r2 = "15k"\n  rc = "6k8"\n'
        '  re = "470R"\n  re_bypassed = "1k"\n  c_e = "100u"\n  c_in = "10u"\n  c_out = "10u"\n'
        '  [[channel.stage]]\n  kind = "opamp_inverting"\n  name = "inv"\n  opamp = "u"\n'
        '  r_in = "22k"\n  r_f = "11k"\n',
        negative='negative_v = "-15 0%"',
        load="22k",
    )
    two = load_board(write_board(tmp_path, two_text, "two.toml"))
    d1, d2 = design_channel(one, "X"), design_channel(two, "X")
    assert d1.clip_stage == d2.clip_stage == "gain"
    assert {d1.clip_side, d2.clip_side} == {"positive", "negative"}
    assert d1.inverting and not d2.inverting


def test_cli_limits_json(capsys) -> None:
    """``stageproof limits --json`` prints per channel gain_db, clip_input_vrms (nominal, low,
    high), thd_percent (nominal, high), clip_stage, clip_side and the provenance."""
    assert main(["limits", TWIN, "--samples", "300", "--seed", "5", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    ch = doc["channels"]["A"]
    for key in ("gain_db", "clip_input_vrms", "swing_clip_input_vrms"):
        assert set(ch[key]) >= {"nominal", "low", "high"}
        assert ch[key]["low"] <= ch[key]["nominal"] <= ch[key]["high"]
    assert ch["thd_percent"]["high"] >= ch["thd_percent"]["nominal"] > 0
    assert ch["clip_stage"] == "gain" and ch["clip_side"] in ("positive", "negative")
    prov = doc["provenance"]
    assert prov["samples"] == 300 and prov["seed"] == 5 and len(prov["board_digest"]) == 64
    assert prov["software_version"] and prov["method"] == "monte_carlo"
    assert len(doc["digest"]) == 64


def test_cli_limits_table(capsys) -> None:
    """The table view names the channel, polarity, clipping stage and half-cycle and dBu."""
    assert main(["limits", OPAMP, "--samples", "200"]) == 0
    out = capsys.readouterr().out
    assert "channel AUX" in out and "inverting" in out and "dBu" in out
    assert "clips first: stage aux_gain" in out


def test_cli_bad_samples(capsys) -> None:
    """--samples below 100 is a usage error: exit status 2, no traceback."""
    with pytest.raises(SystemExit) as info:
        main(["limits", TWIN, "--samples", "5"])
    assert info.value.code == 2
    assert "Traceback" not in capsys.readouterr().err


def test_limits_carry_the_models_own_uncertainty() -> None:
    """The acceptance window is never narrower than the model can promise: each band is the
    Monte Carlo interval widened by the model's uncertainty as measured against ngspice
    (tests/model/test_model_spice_random.py), and the provenance states it and its source."""
    board = load_board(TWIN)
    lim = compute_limits(board, samples=400)
    u = lim.provenance.model_uncertainty
    assert u == MODEL_UNCERTAINTY
    assert "ngspice" in lim.provenance.model_uncertainty_source
    d = lim.provenance.to_dict()
    assert d["model_uncertainty"]["clip_db"] == pytest.approx(0.1)
    ch = lim.channels["A"]
    ga = 20 * math.log10(1 + u["gain_rel"])
    assert ch.gain_db.nominal - ch.gain_db.low >= ga - 1e-12
    assert ch.gain_db.high - ch.gain_db.nominal >= ga - 1e-12
    c = ch.clip_input_vrms
    assert 20 * math.log10(c.high / c.nominal) >= u["clip_db"] - 1e-9
    assert 20 * math.log10(c.nominal / c.low) >= u["clip_db"] - 1e-9
    assert ch.thd_percent.high >= ch.thd_percent.nominal * (1 + u["thd_rel"]) - 1e-12
    for op in ch.operating_point.values():
        assert op.high - op.nominal >= u["bias_v"] - 1e-12
        assert op.nominal - op.low >= u["bias_v"] - 1e-12
    again = type(lim).from_dict(json.loads(json.dumps(lim.to_dict())))
    assert again.digest == lim.digest


def test_threshold_band_from_the_search_subsample_matches_the_full_search(monkeypatch) -> None:
    """The criterion threshold is searched on the first MC_SEARCH_SAMPLES draws only.  The
    draws are independent and identically distributed, so the first n are an unbiased
    subsample (common practice in Monte Carlo estimation); the band they give must sit
    within the 0.1 dB model uncertainty of the band the full search gives, and every other
    quantity must be untouched by the subsample."""
    import harness.model.limits as lm

    board = load_board("limits/demo-twin-preamp.toml")
    monkeypatch.setattr(lm, "MC_SEARCH_SAMPLES", 1500)
    sub = compute_limits(board, samples=6000, seed=11)
    assert sub.provenance.search_samples == 1500
    monkeypatch.setattr(lm, "MC_SEARCH_SAMPLES", 10**9)
    full = compute_limits(board, samples=6000, seed=11)
    assert full.provenance.search_samples == 6000
    for name, ch in full.channels.items():
        s = sub.channels[name]
        for a, b in ((s.clip_input_vrms.low, ch.clip_input_vrms.low),
                     (s.clip_input_vrms.high, ch.clip_input_vrms.high)):  # fmt: skip
            assert abs(20 * math.log10(a / b)) < 0.1, (name, a, b)
        assert s.gain_db == ch.gain_db and s.thd_percent == ch.thd_percent
        assert s.swing_clip_input_vrms == ch.swing_clip_input_vrms


def _plain_bisection(board, ch, p, n_points: int, tol_db: float = 1e-5) -> np.ndarray:
    """The criterion level the slow, plain way: the chain solved from rest at every level of
    a 0.25 dB grid (-12..+6 dB about the swing-limited threshold), the first grid step
    where the criterion is met, then bisection to ``tol_db``; the input fundamental there."""
    res = evaluate_channel(board, ch, p, thd_points=None, search_points=None)
    chain = LargeSignalChain.from_arrays(res, ch, p)
    cond = board.conditions
    emf_per_input = 1.0 + p["source_ohm"] / res.input_ohm

    def score(level_db: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        amp = 10.0 ** (level_db / 20.0)
        v_in = np.empty(res.n)
        h = harmonics(chain, amp, n_points, input_fundamental=v_in)
        if cond.clip_criterion == "compression":
            comp = 20.0 * np.log10(np.abs(res.gain_midband) * v_in / h[:, 1])
            return comp - cond.clip_compression_db, v_in
        return thd_from_harmonics(h) - cond.clip_thd_percent, v_in

    ref = 20.0 * np.log10(res.clip_input_vpk * emf_per_input)
    grid = np.arange(-12.0, 6.001, 0.25)
    f = np.array([score(ref + g)[0] for g in grid])
    first = np.argmax(f >= 0, axis=0)
    cols = np.arange(res.n)
    assert np.all(first > 0) and np.all(f[first, cols] >= 0)
    lo, hi = ref + grid[first - 1], ref + grid[first]
    while np.max(hi - lo) > tol_db:
        mid = 0.5 * (lo + hi)
        below = score(mid)[0] < 0
        lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
    return score(0.5 * (lo + hi))[1]


@pytest.mark.parametrize(
    "path, criterion",
    [(TWIN, "thd"), (TWIN, "compression"), ("limits/demo-audio-ce.toml", "thd"), (OPAMP, "thd")],
)
def test_criterion_search_matches_a_plain_bisection(tmp_path, path, criterion) -> None:
    """The Monte Carlo's criterion search (per-board interpolation steps inside a guarded
    bracket, warm starts from the nominal level) lands within its tolerance of the slow exact
    path it replaced: a dense level grid solved from rest and plain bisection, on the same
    draws (CE into follower, a CE stage and op-amp stages clipping hard, and the compression
    criterion)."""
    text = Path(path).read_text(encoding="utf-8")
    if criterion == "compression":
        text = text.replace('clip_criterion = "thd"', 'clip_criterion = "compression"')
        assert 'clip_criterion = "compression"' in text
    board = load_board(write_board(tmp_path, text))
    for ch in board.channels[:1]:
        p = sample_arrays(channel_parameters(board, ch), np.random.default_rng(7), 24)
        fast = evaluate_channel(
            board,
            ch,
            p,
            thd_points=MC_THD_POINTS,
            search_points=MC_SEARCH_POINTS,
            search_iterations=MC_SEARCH_ITERATIONS,
            search_tol_db=MC_SEARCH_TOL_DB,
        ).thd_clip_input_vpk
        slow = _plain_bisection(board, ch, p, MC_SEARCH_POINTS)
        assert np.max(np.abs(20.0 * np.log10(fast / slow))) < MC_SEARCH_TOL_DB
        nominal = design_channel(board, ch.name).thd_clip_input_vrms * math.sqrt(2.0)
        slow1 = _plain_bisection(board, ch, nominal_arrays(channel_parameters(board, ch)), 256)
        assert abs(20.0 * math.log10(nominal / float(slow1[0]))) < 1e-3
