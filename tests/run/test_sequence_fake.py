"""The sequence against in-process fake instruments (a hard clipper board): search result,
safety on every exit path, the quiescent stop and unresolvable limits, with a real store."""

from __future__ import annotations

import math

import pytest

from harness.errors import RunAborted
from harness.io.fixture import ChannelConnection, FixtureConfig, SupplyConnection, TestPoint
from harness.run.progress import RecordingProgress
from harness.run.sequence import RunOptions, run_board
from harness.store import open_store
from tests.run.fakes import FakeBench, FakeFixtureBoard, FakeLimits, hard_clip_threshold_vrms

GAIN, CLIP_V = 10.0, 3.0


def _fixture(n: int = 2, supply: bool = True, points: bool = True) -> FixtureConfig:
    names = ["A", "B"][:n]
    return FixtureConfig(
        name="fake",
        board_part_number="FAKE-1",
        path="<fake fixture>",
        digest="0" * 64,
        generator_output=1,
        channels=tuple(ChannelConnection(c, 1, 2 + i) for i, c in enumerate(names)),
        test_points=(TestPoint("TP1", "A", "gain", "collector_v", (101,)),) if points else (),
        supply=SupplyConnection(1, 12.0, 0.05) if supply else None,
    )


def _run(tmp_path, bench, limits, board=None, fixture=None, options=None, progress=None):
    board = board or FakeFixtureBoard(["A", "B"])
    tmp_path.mkdir(parents=True, exist_ok=True)
    with open_store(tmp_path / "r.db") as store:
        store.recover_aborted()
        res = run_board(
            bench.instruments,
            board,
            limits,
            fixture or _fixture(),
            "SN-1",
            store,
            options=options or RunOptions(settle_wait_s=0.0),
            progress=progress,
        )
        runs = store.list_runs()
        stored = store.measurements(res.run_id)
        sweep = store.sweep_points(res.run_id)
    return res, runs, stored, sweep


def test_hard_clip_reference_value():
    """Describing function of a hard limiter (Gelb & Vander Velde, 1968, from memory), value
    computed with numpy: a hard symmetric clipper reaches THD_F(2-10) = 1 % at drive
    A/L = 1.031; the fakes' numpy reference reproduces it."""
    thr = hard_clip_threshold_vrms(1.0, 1.0) * math.sqrt(2)
    assert thr == pytest.approx(1.031, abs=0.002)


def test_good_board_passes_and_finds_threshold(tmp_path):
    bench = FakeBench(2, GAIN, CLIP_V)
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V)
    res, runs, stored, sweep = _run(tmp_path, bench, limits)
    assert res.verdict == "PASS", res.failing()
    assert runs[0].status == "complete" and runs[0].verdict == "PASS"
    true = hard_clip_threshold_vrms(GAIN, CLIP_V)
    for ch in ("A", "B"):
        row = next(m for m in res.measurements if m.channel == ch and m.name == "clip_input")
        assert abs(20 * math.log10(row.value / true)) < 0.1
        phase = next(m for m in res.measurements if m.channel == ch and m.name == "phase")
        assert phase.value == pytest.approx(180.0, abs=1.0)  # inverting
    assert not bench.on
    assert max(bench.level_log) <= 0.6
    # every measurement and every search point stored, in order
    assert [m.name for m in stored] == [m.name for m in res.measurements]
    assert len(sweep) == 2 * (1 + res.search_acquisitions)
    assert res.search_acquisitions <= 12  # hard clipper: a kink, the worst case for secant


def test_threshold_above_safe_level_is_a_result(tmp_path):
    """A board that does not clip below the safe level: the search stops at the safe level
    and reports it; nothing above is commanded."""
    bench = FakeBench(2, GAIN, 20.0)
    limits = FakeLimits(["A", "B"], GAIN, 3.0, clip_rel=0.9)
    board = FakeFixtureBoard(["A", "B"], safe_input_vrms=0.3)
    res, *_ = _run(tmp_path, bench, limits, board=board)
    row = next(m for m in res.measurements if m.channel == "A" and m.name == "clip_input")
    assert "threshold above safe level" in row.detail_json
    assert max(bench.level_log) <= 0.3 * (1 + 1e-9)
    assert not bench.on


def test_quiescent_failure_stops_before_any_signal(tmp_path):
    bench = FakeBench(2, GAIN, CLIP_V, supply_a=0.049)  # a shorted board, supply limiting
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V)
    res, _runs, stored, _ = _run(tmp_path, bench, limits)
    assert res.verdict == "FAIL"
    assert "quiescent" in (res.reason or "")
    assert bench.level_log == [] and not bench.on
    assert not bench.supply_on
    assert [m.name for m in stored] == ["supply_current"]


def test_unresolvable_thd_limit_reported_before_signal(tmp_path):
    """A THD limit under the 8-bit scope's floor (Kester, ADI MT-001: ideal SNR
    6.02 N + 1.76 dB) cannot be resolved: stored as such before any level is set."""
    bench = FakeBench(2, GAIN, CLIP_V)
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V, thd_high=1e-5)
    prog = RecordingProgress()
    seen: list[tuple[str, int]] = []
    orig = prog.measurement

    def spy(row):
        seen.append((row.decision, len(bench.level_log)))
        orig(row)

    prog.measurement = spy  # type: ignore[method-assign]
    res, *_ = _run(tmp_path, bench, limits, progress=prog)
    assert seen[0] == ("not resolvable", 0)
    assert res.verdict == "FAIL"  # strict policy: not resolvable is not accepted
    thd_rows = [m for m in res.measurements if m.name == "thd"]
    assert all(m.decision == "not resolvable" for m in thd_rows)


def _clean_calls(tmp_path) -> int:
    """Instrument calls of a clean run up to its last scope call (the shutdown's read-backs
    after it talk to the generator and supply only)."""
    bench = FakeBench(2, GAIN, CLIP_V)
    last_scope = 0
    tick = bench._tick

    def counting(role: str) -> None:
        nonlocal last_scope
        tick(role)
        if role == "scope":
            last_scope = bench.calls

    bench._tick = counting  # type: ignore[method-assign]
    _run(tmp_path, bench, FakeLimits(["A", "B"], GAIN, CLIP_V))
    return last_scope


@pytest.mark.parametrize("fraction", [0.05, 0.3, 0.6, 0.9])
def test_lost_scope_aborts_and_generator_ends_off(tmp_path, fraction):
    total = _clean_calls(tmp_path / "clean")
    bench = FakeBench(2, GAIN, CLIP_V, fail_after=int(fraction * total), fail_role="scope")
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V)
    with open_store(tmp_path / "r.db") as store:
        with pytest.raises(RunAborted):
            run_board(
                bench.instruments,
                FakeFixtureBoard(["A", "B"]),
                limits,
                _fixture(),
                "SN-2",
                store,
                options=RunOptions(settle_wait_s=0.0),
            )
        run = store.list_runs()[0]
    assert run.status == "aborted" and run.verdict is None
    assert "ConnectionLost" in (run.reason or "")
    assert not bench.on and not bench.supply_on


def test_lost_generator_output_state_unknown(tmp_path):
    bench = FakeBench(2, GAIN, CLIP_V, fail_after=10, fail_role="generator")
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V)
    bench.instruments.generator.safe_off = lambda: (_ for _ in ()).throw(OSError("gone"))
    with open_store(tmp_path / "r.db") as store:
        with pytest.raises(RunAborted):
            run_board(
                bench.instruments,
                FakeFixtureBoard(["A", "B"]),
                limits,
                _fixture(),
                "SN-3",
                store,
                options=RunOptions(settle_wait_s=0.0),
            )
        run = store.list_runs()[0]
    assert run.status == "aborted"
    assert "output state unknown" in (run.reason or "")


def test_keyboard_interrupt_marks_aborted(tmp_path):
    bench = FakeBench(2, GAIN, CLIP_V)
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V)
    calls = {"n": 0}

    def sleep(_s: float) -> None:
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt

    with open_store(tmp_path / "r.db") as store:
        with pytest.raises(KeyboardInterrupt):
            run_board(
                bench.instruments,
                FakeFixtureBoard(["A", "B"]),
                limits,
                _fixture(),
                "SN-4",
                store,
                options=RunOptions(settle_wait_s=0.01, sleep=sleep),
            )
        run = store.list_runs()[0]
        kept = store.measurements(run.run_id)
    assert run.status == "aborted" and "Ctrl-C" in (run.reason or "")
    assert not bench.on and not bench.supply_on
    assert kept  # what was measured before the interrupt is kept


def test_dmm_overload_is_reported_as_over_range_with_no_value(tmp_path):
    """SCPI-99 (from memory): 9.9E37 is the overload reading, parsed as infinity.  It is
    stored as "over-range at TP1" with a null value and no uncertainty, the run goes on;
    the DMM was asked for a range fitting the point's expected value, not DEF."""
    bench = FakeBench(2, GAIN, CLIP_V)
    asked: list[float | None] = []

    def overload(range_v: float | None = None) -> float:
        asked.append(range_v)
        return math.inf

    bench.instruments.dmm.dc_volts = overload
    limits = FakeLimits(["A", "B"], GAIN, CLIP_V)
    res, runs, stored, _ = _run(tmp_path, bench, limits)
    row = next(m for m in stored if m.name == "dc.gain.collector_v")
    assert row.value is None and row.uncertainty is None and row.decision == "fail"
    assert "over-range at TP1" in row.detail_json
    assert runs[0].status == "complete" and res.verdict == "FAIL"
    high = limits.channels["A"].operating_point["gain.collector_v"].high
    assert asked == [pytest.approx(1.25 * high)]
