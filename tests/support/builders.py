"""Results stores built through the store's own API, for the report tests.

The data are invented (a two-channel board of our own); the signals are synthetic sines
with chosen harmonics so the page has something real to analyse.
"""

from __future__ import annotations

import json

import numpy as np

from harness.store import MeasurementRow, RunHeader, SweepPointRow

FS_HZ = 100_000.0
N = 4096
F0_HZ = 41 * FS_HZ / N  # coherent: 41 cycles, gcd(41, 4096) = 1
CHANNELS = ("left", "right")
LIMITS = {
    "gain": (19.0, 21.0),
    "thd": (None, 1.0),
    "clip_input": (0.5, None),
}


def header(serial: str, part_number: str = "AB-100") -> RunHeader:
    limits = {
        "provenance": {
            "method": "worst-case corners",
            "samples": 0,
            "coverage": 0.95,
            "seed": 7,
            "board_digest": "d1",
            "software_version": "t",
        }
    }
    return RunHeader(
        serial=serial,
        part_number=part_number,
        board_name="demo twin preamp",
        board_file="limits/demo-twin-preamp.toml",
        board_digest="b" * 64,
        limits_json=json.dumps(limits),
        limits_digest="c" * 64,
        station="bench-3",
        fixture="fixture-twin",
        operator="op-17",
        instruments={
            "generator": "STAGEPROOF-SIM,GEN,0001,0.1",
            "scope": "STAGEPROOF-SIM,SCOPE,0002,0.1",
        },
        settle_note="waited 5 coupling time constants after each level step",
    )


def _decide(value: float, low: float | None, high: float | None) -> str:
    if low is not None and value < low:
        return "fail"
    if high is not None and value > high:
        return "fail"
    return "pass"


def clipped_sine(amplitude: float, n: int = N, clip_v: float | None = None) -> np.ndarray:
    t = np.arange(n) / FS_HZ
    y = amplitude * np.sin(2 * np.pi * F0_HZ * t)
    y += 0.001 * amplitude * np.sin(2 * 2 * np.pi * F0_HZ * t)  # HD2 0.1 %
    if clip_v is not None:
        y = np.maximum(y, -clip_v)  # the negative half-cycle clips first
    return y


def add_run(
    store,
    serial: str,
    *,
    verdict: str = "PASS",
    gain_db: float = 20.0,
    part_number: str = "AB-100",
    records: bool = True,
    sweep: bool = True,
    status: str = "complete",
    values: dict[str, float] | None = None,
) -> int:
    """One run: per channel gain, THD and clipping measurements, a sweep, raw records."""
    run_id = store.begin_run(header(serial, part_number))
    values = values or {}
    clip_vrms = values.get("clip_input", 0.8)
    gain = 10 ** (gain_db / 20)
    for ch in CHANNELS:
        measured = {
            "gain": gain_db,
            "thd": values.get("thd", 0.05),
            "clip_input": clip_vrms,
        }
        units = {"gain": "dB", "thd": "%", "clip_input": "V rms"}
        for name, value in measured.items():
            low, high = LIMITS[name]
            store.add_measurement(
                run_id,
                MeasurementRow(
                    channel=ch,
                    name=name,
                    value=value,
                    unit=units[name],
                    low=low,
                    high=high,
                    uncertainty=0.05,
                    decision=_decide(value, low, high),
                    step=f"{ch}.sweep",
                    detail_json=json.dumps({"criterion": "THD 1 %"})
                    if name.startswith("clip")
                    else None,
                ),
            )
        if sweep:
            for level in np.geomspace(0.01, 1.6, 12):
                over = max(level / clip_vrms, 1.0)
                store.add_sweep_point(
                    run_id,
                    SweepPointRow(
                        channel=ch,
                        sweep="clip",
                        level_vrms=float(level),
                        gain_db=gain_db - 6 * np.log10(over) * 3,
                        thd_percent=0.02 + 0.5 * (over**6 - 1) if over > 1 else 0.02,
                        thdn_percent=0.04 + 0.5 * (over**6 - 1) if over > 1 else 0.04,
                        clipped=bool(over > 1.02),
                        clip_side="negative" if over > 1.02 else None,
                    ),
                )
            for f_hz in (20.0, 1000.0, 20000.0):
                store.add_sweep_point(
                    run_id,
                    SweepPointRow(
                        channel=ch,
                        sweep="frequency",
                        level_vrms=0.3,
                        gain_db=gain_db - (0.5 if f_hz != 1000.0 else 0.0),
                        thd_percent=0.02,
                        thdn_percent=0.04,
                        clipped=False,
                        extra_json=json.dumps({"frequency_hz": f_hz}),
                    ),
                )
        if records:
            amp_in = 0.3 * np.sqrt(2)
            x = clipped_sine(amp_in)
            nominal = {"input": x, "output": -clipped_sine(amp_in * gain)}
            store.add_record(run_id, ch, "nominal", FS_HZ, nominal)
            store.add_record(run_id, ch, "nominal (settling check)", FS_HZ, nominal)
            # clipping search: below, at and above the threshold; the output is inverted
            # and its positive half-cycle clips at 0.8 of the threshold's peak
            amp_clip = clip_vrms * np.sqrt(2)
            for n, rel in enumerate((0.5, 1.0, 1.6)):
                a = amp_clip * rel
                y = -clipped_sine(a * gain, clip_v=0.8 * amp_clip * gain)
                store.add_record(
                    run_id, ch, f"clip {n}", FS_HZ, {"input": clipped_sine(a), "output": y}
                )
    store.add_measurement(
        run_id,
        MeasurementRow(
            channel="",
            name="supply_current",
            value=0.012,
            unit="A",
            low=0.008,
            high=0.016,
            uncertainty=0.0002,
            decision="pass",
            step="supply",
        ),
    )
    if status == "aborted":
        store.finish_run(run_id, "aborted", None, "operator stopped the run")
    else:
        store.finish_run(run_id, "complete", verdict)
    return run_id
