"""The store refuses a measurement the registry of quantities says is wrong, on both
backends, and keeps nothing of it; rows already stored are read back unchecked.

Why: a gain stored in volts would be shown and exported as decibels by every report (the
units are SI symbols, BIPM SI Brochure 9th ed. §2.3.4), and a decision that is no outcome
would be counted as neither accepted nor failed.
"""

from __future__ import annotations

import pytest
from store_worker import header

from harness.errors import StoreError
from harness.store import MeasurementRow, open_store


def _row(name: str, unit: str, decision: str = "pass") -> MeasurementRow:
    return MeasurementRow("A", name, 1.0, unit, 0.0, 2.0, 0.01, decision, "nominal")


@pytest.mark.parametrize(
    ("name", "unit", "decision", "words"),
    [
        ("gain", "V", "pass", ["'gain'", "dB"]),
        ("dc.Q1.collector_v", "mV", "pass", ["dc.Q1.collector_v", "in V"]),
        ("thd", "%", "passed", ["'passed'", "not an outcome", "conditional pass"]),
    ],
)
def test_a_wrong_unit_or_decision_is_refused_and_nothing_is_kept(
    store_url: str, name: str, unit: str, decision: str, words: list[str]
) -> None:
    with open_store(store_url) as store:
        run_id = store.begin_run(header("SN-1", "st1"))
        store.add_measurement(run_id, _row("gain", "dB"))
        with pytest.raises(StoreError) as err:
            store.add_measurement(run_id, _row(name, unit, decision))
        text = f"{err.value} {err.value.hint}"
        for w in words:
            assert w in text
        assert [m.name for m in store.measurements(run_id)] == ["gain"]


def test_names_outside_the_registry_keep_their_own_units(store_url: str) -> None:
    """A line's own extra measurement (not a registered quantity) is stored as given."""
    with open_store(store_url) as store:
        run_id = store.begin_run(header("SN-2", "st1"))
        store.add_measurement(run_id, _row("output_noise", "µV"))
        assert store.measurements(run_id)[0].unit == "µV"
