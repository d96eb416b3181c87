"""Fault diagnosis against the simulated board (harness.sim.physics.BoardSim).

The reference outside the diagnosis is the simulated bench's own physics: a netlist solved
for its periodic steady state with full Ebers-Moll transistors (Ebers & Moll, Proc. IRE 42,
1954) and an op-amp macro-model, independent of the stage model's formulas; the
"measurements" are made from its waveforms with harness.measure (IEEE Std 1241-2010 sine
fits) the way the sequencer makes them (tests/diagnose/simmeasure.py).  Each injected fault
must come out among the top three candidates.
"""

from __future__ import annotations

import json
import math

import pytest

from harness.cli.main import main
from harness.diagnose import diagnose_run, rank_faults, tolerance_spread
from harness.diagnose.names import from_rows
from harness.diagnose.predict import predict_channel
from harness.errors import AnalysisError
from harness.io.board import load_board
from harness.store import MeasurementRow, RunHeader, open_store

from .simmeasure import measure_board

TWIN = "limits/demo-twin-preamp.toml"
OPAMP = "limits/demo-opamp-line.toml"

TWIN_FAULTS = (
    [f"{r}:drift={f}" for r in ("R101", "R102", "R103", "R104", "R105") for f in (1.6, 0.6)]
    + [f"{r}:open" for r in ("R101", "R102", "R103", "R104", "R105", "R106")]
    + [f"{r}:short" for r in ("R101", "R102", "R103", "R104", "R105", "R106")]
    + [
        "A.gain:open_bypass",
        "A.gain:low_beta=30",
        "A.buffer:low_beta=15",
        "A.gain:shorted_junction=be",
        "A.gain:shorted_junction=ce",
        "A.buffer:shorted_junction=be",
        "A.buffer:shorted_junction=ce",
        "R204:drift=1.6",
    ]
)
OPAMP_FAULTS = [
    f"{r}:{k}" for r in ("R302", "R303", "R401", "R402") for k in ("drift=1.6", "drift=0.6", "open")
]


class _Bench:
    """One board: its tolerance spreads and the good board's measurements, computed once."""

    def __init__(self, path: str) -> None:
        self.board = load_board(path)
        f = self.board.conditions.extra_frequencies_hz
        self.spreads = {c.name: tolerance_spread(self.board, c, f) for c in self.board.channels}
        self.good = measure_board(self.board)
        self._cache: dict[str, dict] = {}

    def measure(self, fault: str) -> dict:
        """Good channels from the good board, the faulted channel and the supply current
        from the faulted one (cached: several tests use the same fault)."""
        if fault not in self._cache:
            ref = fault.split(":", 1)[0]
            channel = ref.split(".")[0] if "." in ref else _channel_of(self.board, ref)
            m = {k: v for k, v in self.good.items() if not k.startswith(channel + ".")}
            m.update(measure_board(self.board, (fault,), channels=(channel,)))
            self._cache[fault] = m
        return dict(self._cache[fault])


def _channel_of(board, ref: str) -> str:
    from harness.model.board import Part

    for ch in board.channels:
        for st in ch.stages:
            for v in vars(st).values():
                if isinstance(v, Part) and v.ref == ref:
                    return ch.name
    raise KeyError(ref)


@pytest.fixture(scope="module")
def twin() -> _Bench:
    return _Bench(TWIN)


@pytest.fixture(scope="module")
def opamp() -> _Bench:
    return _Bench(OPAMP)


def _component(fault: str) -> str:
    ref = fault.split(":", 1)[0]
    return {"A.gain:open_bypass": "C102"}.get(fault, ref)


@pytest.mark.parametrize("fault", TWIN_FAULTS)
def test_twin_preamp_fault_in_top_three(twin: _Bench, fault: str) -> None:
    """Every fault the simulated bench injects on the discrete preamp (Ebers-Moll physics,
    harness.sim.physics) is ranked among the top three candidates."""
    cands = rank_faults(twin.board, twin.measure(fault), spreads=twin.spreads)
    refs = [c.ref for c in cands[:3]]
    assert _component(fault) in refs, (fault, [c.spec for c in cands[:5]])


@pytest.mark.parametrize("fault", OPAMP_FAULTS)
def test_opamp_board_fault_in_top_three(opamp: _Bench, fault: str) -> None:
    """Drift and open of the op-amp board's gain resistors (simulated op-amp macro-model)
    are ranked among the top three candidates."""
    cands = rank_faults(opamp.board, opamp.measure(fault), spreads=opamp.spreads)
    assert _component(fault) in [c.ref for c in cands[:3]], [c.spec for c in cands[:5]]


@pytest.mark.parametrize("fault", ["R301:drift=1.6", "R301:open"])
def test_unobservable_bias_resistor_reads_as_good_board(opamp: _Bench, fault: str) -> None:
    """R301 (47 kOhm input bias resistor behind a 50 Ohm source) changes the gain by
    20 log10(47k/(47k+50)) = -0.009 dB (voltage divider, Ohm's law) and moves only the
    sub-hertz corner: no measurement at 1 kHz can see it, so "no fault" must rank first
    rather than a made-up culprit (common practice: say when a fault is not observable)."""
    cands = rank_faults(opamp.board, opamp.measure(fault), spreads=opamp.spreads)
    assert cands[0].kind == "none"
    assert cands[0].chi2 < 3.0 * len(cands[0].evidence)


@pytest.mark.parametrize("fault,factor", [("R104:drift=1.6", 1.6), ("R105:drift=0.6", 0.6)])
def test_fitted_drift_recovers_injected_factor(twin: _Bench, fault: str, factor: float) -> None:
    """The fitted drift factor is the injected one (the simulated part value) within 5 %."""
    best = rank_faults(twin.board, twin.measure(fault), spreads=twin.spreads)[0]
    assert best.kind == "drift" and best.ref == fault.split(":")[0]
    assert best.fitted_value == pytest.approx(factor, rel=0.05)
    assert "A.gain.collector_v" in best.explained


def test_shorted_junction_degraded_prediction_is_the_divider() -> None:
    """A shorted base-emitter junction leaves base = emitter on R2 || (RE + RE_byp) under R1:
    V = 12 * 1339.5 / (68000 + 1339.5) = 0.2318 V (voltage divider, Ohm's law) - a
    prediction the stage model alone refuses (transistor cut off at rest)."""
    board = load_board(TWIN)
    ch = board.channel("A")
    pred = predict_channel(
        board, ch, [{"gain.is_a": 1e-60}], ["shorted_be"], stage_of_patch=["gain"]
    )
    rp = 15e3 * 1470 / (15e3 + 1470)
    expect = 12.0 * rp / (68e3 + rp)
    assert pred.dead[0] and pred.degraded[0]
    assert pred.values["gain.base_v"][0] == pytest.approx(expect, rel=1e-9)
    assert pred.values["gain.emitter_v"][0] == pytest.approx(expect, rel=1e-9)


def test_bad_measurements_raise_typed_errors() -> None:
    board = load_board(TWIN)
    with pytest.raises(AnalysisError, match="no channel"):
        rank_faults(board, {"Z.gain_db": (10.0, 0.1)})
    with pytest.raises(AnalysisError, match="not a number"):
        rank_faults(board, {"A.gain_db": ("loud", 0.1)})
    with pytest.raises(AnalysisError, match="no measurements"):
        rank_faults(board, {})


# --- from the store ---------------------------------------------------------------------------

_STORE_NAME = {
    "gain_db": ("gain", "dB"),
    "thd_percent": ("thd", "%"),
    "clip_input_vrms": ("clip_input", "V rms"),
    "supply_current_a": ("supply_current", "A"),
}


def _rows(meas: dict) -> list[MeasurementRow]:
    """The measurements as the sequencer stores them (harness.run.sequence names)."""
    rows = []
    for k, (v, u) in meas.items():
        ch, _, q = k.partition(".") if "." in k else ("", "", k)
        detail = None
        if q in _STORE_NAME or k in _STORE_NAME:
            name, unit = _STORE_NAME[q or k]
            if q == "thd_percent" and f"{ch}.thd_floor_percent" in meas:
                detail = {"floor_percent": meas[f"{ch}.thd_floor_percent"][0]}
            val = None if isinstance(v, float) and not math.isfinite(v) else v
        elif q == "clip_side":
            name, unit, val, detail = "clip_side", "", 0.0, {"side": v}
        elif q == "clip_above_vrms":
            name, unit, val = "clip_input", "V rms", None
            detail = {"result": "threshold above safe level", "highest_measured_vrms": v}
        elif q.startswith("gain_db@"):
            name, unit, val = f"gain@{q.split('@')[1]}Hz", "dB", v
        elif q.endswith("_v"):
            name, unit, val = f"dc.{q}", "V", v
        else:
            continue
        rows.append(
            MeasurementRow(
                channel=ch,
                name=name,
                value=val,
                unit=unit,
                low=None,
                high=None,
                uncertainty=u,
                decision="info",
                step="test",
                detail_json=json.dumps(detail) if detail else None,
            )
        )
    return rows


def _store_run(path, board, serial: str, meas: dict, digest: str | None = None) -> int:
    with open_store(path) as store:
        run_id = store.begin_run(
            RunHeader(
                serial=serial,
                part_number=board.part_number,
                board_name=board.name,
                board_file=board.source,
                board_digest=digest or board.digest,
                limits_json="{}",
                limits_digest="",
                station="sim",
                fixture="test",
                operator="test",
            )
        )
        for r in _rows(meas):
            store.add_measurement(run_id, r)
        store.finish_run(run_id, "complete", "FAIL")
    return run_id


def test_from_rows_reads_the_sequencer_names(twin: _Bench) -> None:
    """Stored names (gain, thd, clip_input, clip_side detail, dc.<stage>.<q>, gain@<f>Hz,
    supply_current) map back onto the diagnosis keys without loss."""
    meas = twin.measure("R104:drift=1.6")
    back = from_rows(_rows(meas))
    for k, (v, _u) in meas.items():
        if k.endswith("thd_floor_percent"):
            continue
        assert k in back, k
        if isinstance(v, float) and math.isfinite(v):
            assert back[k][0] == pytest.approx(v)


def test_diagnose_run_and_cli(twin: _Bench, tmp_path, capsys) -> None:
    """diagnose_run reads a stored run; stageproof diagnose --json names the injected part
    first and warns when the board file's digest differs from the run's."""
    db = tmp_path / "r.db"
    meas = twin.measure("R103:drift=0.6")
    run_id = _store_run(db, twin.board, "SN-7", meas)
    with open_store(db, readonly=True) as store:
        diag = diagnose_run(store, run_id, twin.board, spreads=twin.spreads)
    assert diag.best is not None and diag.best.ref == "R103"
    assert diag.warnings == []
    assert main(["diagnose", "SN-7", "--db", str(db), "--board", TWIN, "--json", "--top", "3"]) == 0
    doc = json.loads(capsys.readouterr().out)
    best = doc["candidates"][0]
    assert best["ref"] == "R103" and best["fitted_value"] == pytest.approx(0.6, rel=0.05)
    assert len(doc["candidates"]) == 3
    _store_run(db, twin.board, "SN-8", meas, digest="0" * 64)
    assert main(["diagnose", "SN-8", "--db", str(db), "--board", TWIN, "--top", "2"]) == 0
    out = capsys.readouterr()
    assert "is not the one run" in out.err and "R103" in out.out
    assert main(["diagnose", "NOPE", "--db", str(db)]) == 2
