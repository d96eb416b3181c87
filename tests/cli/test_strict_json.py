"""Every ``--json`` output is strict JSON, and an over-range reading says so.

RFC 8259 §6: "Numeric values that cannot be represented in the grammar below (such as
Infinity and NaN) are not permitted."  Python's json module writes them unless told not
to, and reads them back unless ``parse_constant`` refuses them (Python docs, json.loads),
so every output is parsed here with a ``parse_constant`` that raises.

The over-range run uses a fixture whose output probe factor (0.01) is 100 times too small:
the scope is ranged for a signal a hundred times smaller than the real one, and the record
is clipped at the ADC's extreme codes whatever the re-ranging does.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from harness import jsontext
from harness.cli.main import main
from harness.store import MeasurementRow, open_store
from tests.support.bench import BOARD_FILE, sim_bench
from tests.support.builders import header
from tests.support.line import FIXTURE_TEXT

pytestmark = pytest.mark.wire


def strict(text: str):
    """json.loads that refuses NaN, Infinity and -Infinity (RFC 8259 §6)."""

    def refuse(name: str):
        raise AssertionError(f"{name} in JSON output")

    return json.loads(text, parse_constant=refuse)


def test_dumps_writes_null_for_non_finite_numbers():
    doc = {"a": math.inf, "b": [-math.inf, math.nan, 1.5], "c": np.float32("inf"), "d": 2}
    assert strict(jsontext.dumps(doc)) == {"a": None, "b": [None, None, 1.5], "c": None, "d": 2}
    with pytest.raises(ValueError):  # the library default would have written Infinity
        json.dumps({"a": math.inf}, allow_nan=False)


def test_measurement_row_keeps_nothing_infinite():
    row = MeasurementRow("A", "gain", math.inf, "dB", -math.inf, math.inf, math.inf, "fail", "x")
    assert (row.value, row.low, row.high, row.uncertainty) == (None, None, None, None)
    assert row.reason == "reading not finite (inf)"


def _fixture(tmp_path, probe: float):
    path = tmp_path / f"fixture-{probe:g}.toml"
    path.write_text(FIXTURE_TEXT.replace("output_probe = 1.0", f"output_probe = {probe}"))
    return path


def _capture(path, clip: bool):
    fs, n, f = 100_000.0, 4096, 41 * 100_000.0 / 4096  # coherent: J = 41 (gcd 1 with N)
    t = np.arange(n) / fs
    x = 0.5 * np.sin(2 * np.pi * f * t)
    y = -10.0 * x
    if clip:
        y = np.clip(y, -4.0, 4.0)  # the ADC's limits with --range-vpp 8
    with open(path, "w") as fh:
        fh.write("time_s,input_v,output_v\n")
        for row in zip(t, x, y, strict=True):
            fh.write(",".join(f"{v:.9g}" for v in row) + "\n")
    return path


def test_every_json_output_is_strict_and_over_range_is_stored_with_its_reason(
    board, tmp_path, capsys
):
    db = tmp_path / "j.db"
    outputs: dict[str, str] = {}

    def call(name: str, argv: list[str], codes=(0,)) -> None:
        code = main(argv)
        cap = capsys.readouterr()
        assert code in codes, (name, code, cap.err)
        outputs[name] = cap.out

    call("limits", ["limits", str(BOARD_FILE), "--json", "--samples", "500"])
    for clip in (False, True):
        cap = _capture(tmp_path / f"cap-{clip}.csv", clip)
        call(f"analyze clip={clip}", ["analyze", str(cap), "--json", "--range-vpp", "8"])
    with sim_bench(board, tmp_path) as (_, station):
        fixture = _fixture(tmp_path, 0.01)
        run = ["run", "--station", str(station), "--fixture", str(fixture)]
        run += ["--board", str(BOARD_FILE), "--db", str(db), "--settle-wait", "0", "--json"]
        call("run over-range", [*run, "--serial", "OVR-1"], codes=(1,))
    # a row with an infinite value, as an older version could store it
    with open_store(db) as store:
        rid = store.begin_run(header("INF-1", board.part_number))
        store.add_measurement(
            rid, MeasurementRow("A", "gain", math.inf, "dB", 1.0, math.inf, math.inf, "fail", "n")
        )
        store.finish_run(rid, "complete", "FAIL", None)
    call("results", ["results", "--db", str(db), "--json"])
    run_id = strict(outputs["run over-range"])["run_id"]
    call("results --run", ["results", "--db", str(db), "--run", str(run_id), "--json"])
    call("results --run inf", ["results", "--db", str(db), "--run", str(rid), "--json"])
    call("diagnose", ["diagnose", "OVR-1", "--db", str(db), "--json"])

    docs = {name: strict(text) for name, text in outputs.items()}

    assert docs["analyze clip=True"]["over_range"] is True
    assert docs["analyze clip=True"]["gain_db"] is None and docs["analyze clip=True"]["reason"]
    # the over-range readings: null, no uncertainty claimed, and the reason beside them
    over = [m for m in docs["run over-range"]["measurements"] if m["name"] in ("gain", "thd")]
    assert over
    for m in over:
        assert m["value"] is None and m["uncertainty"] is None
        assert m["reason"].startswith("over-range: ")
        assert m["decision"] == "fail"
    stored = [m for m in docs["results --run"]["measurements"] if m["name"] in ("gain", "thd")]
    assert stored and all(m["reason"].startswith("over-range") for m in stored)
    assert all(m["uncertainty"] is None for m in stored)
    (inf_row,) = docs["results --run inf"]["measurements"]
    assert inf_row["value"] is None and inf_row["high"] is None and inf_row["reason"]
    # the table says it too
    assert main(["results", "--db", str(db), "--run", str(run_id)]) == 0
    assert "over-range" in capsys.readouterr().out
