"""The registry of measured quantities (harness.quantities) against the layers that use it.

The registry is the one place a quantity's stored name, unit, limit and diagnosis key are
written; these tests check each field against the code that reads it (the limit fields
against the limit model's dataclasses, the diagnosis keys against what the stage model
predicts, the units against the SI symbols, BIPM SI Brochure 9th ed. (2019) §2.3.4 and
table 5 for the degree).
"""

from __future__ import annotations

import dataclasses
import json
import math

import pytest

from harness.diagnose.names import from_rows
from harness.diagnose.predict import nominal_params, predict_channel
from harness.model.limits import BoardLimits, ChannelLimits
from harness.quantities import (
    CLIP_ABOVE_EVIDENCE,
    CLIP_BELOW_EVIDENCE,
    CLIP_INPUT,
    CLIP_SIDE,
    DB_SCORED_EVIDENCE,
    GAIN,
    QUANTITIES,
    SUPPLY_CURRENT,
    THD,
    THD_FLOOR_EVIDENCE,
    by_evidence,
    dc_point,
    frequency_of,
    gain_at,
    lookup,
)
from harness.store import MeasurementRow

#: SI symbols (BIPM SI Brochure §2.3.4; "deg" for the degree of arc, table 5, written out
#: because the ° sign is not ASCII), the rms qualifier written after the unit as in
#: IEC 60050-103 (from memory), "%" for a ratio, and "" for a count or a word.
SI_UNITS = {"dB", "%", "deg", "V rms", "A", "Hz", "V", ""}


def test_every_fixed_quantity_is_found_by_its_own_name() -> None:
    for name, q in QUANTITIES.items():
        assert lookup(name) is q
        assert q.unit in SI_UNITS, q


@pytest.mark.parametrize(
    "name",
    ["gain_db", "Gain", "thd_percent", "dc.", "gain@Hz", "gain@0Hz", "gain@-5Hz", "gain@nanHz"],
)
def test_names_of_no_quantity_are_not_guessed(name: str) -> None:
    """The old readers matched any name starting with "gain"; the registry names exactly."""
    assert lookup(name) is None


def test_families_carry_their_parameter() -> None:
    dc = lookup("dc.Q2.emitter_v")
    assert dc == dc_point("Q2.emitter_v")
    assert (dc.unit, dc.limit, dc.evidence) == ("V", "Q2.emitter_v", "Q2.emitter_v")
    g = lookup("gain@20000Hz")
    assert g == gain_at(20000.0)
    assert (g.unit, g.limit, g.evidence) == ("dB", None, "gain_db@20000")
    assert frequency_of(g.name) == 20000.0
    assert by_evidence("gain_db@20000") == g
    assert by_evidence("gain_db") is GAIN


def test_limit_fields_are_fields_of_the_limits() -> None:
    """Every limit a quantity names is a field of a channel's limits, or of the board's for
    a board-wide quantity (a renamed limit field fails here, not in a report)."""
    channel_fields = {f.name for f in dataclasses.fields(ChannelLimits)}
    board_fields = {f.name for f in dataclasses.fields(BoardLimits)}
    for q in QUANTITIES.values():
        if q.limit is None:
            continue
        assert q.limit in (board_fields if q.board else channel_fields), q


def test_evidence_keys_are_what_the_stage_model_predicts(board) -> None:
    """Each diagnosis key is a quantity the diagnosis's stage model predicts for a board:
    a key nobody predicts would be evidence silently ignored."""
    ch = board.channels[0]
    pred = predict_channel(board, ch, [nominal_params(board, ch)])
    keys = set(pred.values)
    for q in QUANTITIES.values():
        if q.evidence is not None:
            assert q.evidence in keys, q
    for k in DB_SCORED_EVIDENCE - {CLIP_ABOVE_EVIDENCE, CLIP_BELOW_EVIDENCE}:
        assert k in keys, k
    stage = ch.stages[0].name
    assert dc_point(f"{stage}.collector_v").evidence in keys


def _row(name: str, value: float | None, unit: str, detail: dict | None = None) -> MeasurementRow:
    return MeasurementRow(
        "A", name, value, unit, None, None, 0.02, "info", "s", None, json.dumps(detail or {})
    )


def test_stored_rows_become_evidence_through_the_registry() -> None:
    rows = [
        _row(GAIN.name, 20.1, GAIN.unit),
        _row(THD.name, 0.3, THD.unit, {"floor_percent": 0.01}),
        _row(CLIP_INPUT.name, None, CLIP_INPUT.unit, {"highest_measured_vrms": 0.5}),
        _row(CLIP_SIDE.name, 0.2, CLIP_SIDE.unit, {"side": "negative"}),
        _row("dc.Q1.collector_v", 6.2, "V"),
        _row("gain@100Hz", 19.0, "dB"),
        _row("phase", 180.0, "deg"),
        MeasurementRow("", SUPPLY_CURRENT.name, 0.012, "A", None, None, None, "info", "s"),
    ]
    got = from_rows(rows)
    assert got == {
        "A.gain_db": (20.1, 0.02),
        "A.thd_percent": (0.3, 0.02),
        f"A.{THD_FLOOR_EVIDENCE}": (0.01, None),
        f"A.{CLIP_ABOVE_EVIDENCE}": (0.5, 0.02),
        "A.clip_side": ("negative", None),
        "A.Q1.collector_v": (6.2, 0.02),
        "A.gain_db@100": (19.0, 0.02),
        "supply_current_a": (0.012, None),
    }


def test_values_are_shown_in_the_registry_format() -> None:
    assert GAIN.show(20.04567) == "20.046 dB"
    assert GAIN.show(None) == "-"
    assert THD.show(math.nan) == "-"
    assert CLIP_INPUT.show(0.41234, unit=False) == "0.4123"
