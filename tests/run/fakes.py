"""In-process fakes of the instruments and limits, for sequence tests that need no sockets.

The fake board is an ideal inverting amplifier of gain G followed by a hard symmetric
clipper at +-L volts: its THD-1 % threshold is known in closed form (describing function
of a hard limiter, Gelb & Vander Velde 1968, from memory: THD_F(2..10) reaches 1 % at
drive A/L = 1.031, computed with numpy here rather than trusted).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import SimpleNamespace
from typing import Any

import numpy as np

from harness.errors import ConnectionLost


@dataclass(frozen=True)
class FakeLimit:
    name: str
    unit: str
    nominal: float
    low: float | None
    high: float | None

    def contains(self, x: float) -> bool:
        return (self.low is None or x >= self.low) and (self.high is None or x <= self.high)


class FakeLimits:
    """Duck-typed BoardLimits for a board of identical hard-clipper channels."""

    def __init__(
        self,
        channels: list[str],
        gain: float,
        clip_v: float,
        *,
        thd_high: float = 0.5,
        supply_a: tuple[float, float] = (0.005, 0.02),
        clip_rel: float = 0.15,
    ) -> None:
        thr = hard_clip_threshold_vrms(gain, clip_v)
        self.channels = {
            ch: SimpleNamespace(
                gain_db=FakeLimit(
                    "gain",
                    "dB",
                    20 * math.log10(gain),
                    20 * math.log10(gain) - 1,
                    20 * math.log10(gain) + 1,
                ),
                clip_input_vrms=FakeLimit(
                    "clip", "V rms", thr, thr * (1 - clip_rel), thr * (1 + clip_rel)
                ),
                thd_percent=FakeLimit("thd", "%", 0.0, None, thd_high),
                phase_deg=180.0,
                inverting=True,
                clip_stage="gain",
                clip_side="negative",
                operating_point={"gain.collector_v": FakeLimit("vc", "V", 6.0, 5.0, 7.0)},
                clip_side_fraction={},
                settle_time_s=0.0,
                dc_settle_time_s=0.0,
                supply_settle_time_s=0.0,
                output_vrms_nominal=0.05 * gain,
                low_corner_hz=FakeLimit("fl", "Hz", 10.0, 5.0, 20.0),
            )
            for ch in channels
        }
        self.supply_current_a = FakeLimit("supply", "A", sum(supply_a) / 2, *supply_a)
        self.digest = "0" * 64

    def to_dict(self) -> dict[str, Any]:
        return {"provenance": {"method": "fake"}, "channels": list(self.channels)}


def hard_clip_thd(drive_over_limit: float, n: int = 4096) -> float:
    """THD_F (harmonics 2..10, percent) of a sine of amplitude r*L hard-clipped at L."""
    t = np.arange(n) / n
    y = np.clip(drive_over_limit * np.sin(2 * np.pi * t), -1.0, 1.0)
    spec = np.abs(np.fft.rfft(y)) / n
    return 100 * float(np.sqrt(np.sum(spec[2:11] ** 2)) / spec[1])


def hard_clip_threshold_vrms(gain: float, clip_v: float) -> float:
    """Input rms where a hard clipper at clip_v after gain G reaches 1 % THD (bisection)."""
    lo, hi = 1.0, 1.2
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if hard_clip_thd(mid) < 1.0:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi) * clip_v / gain / math.sqrt(2)


class FakeBench:
    """Generator + scope + supply + switch + DMM wired to hard-clipper channels."""

    def __init__(
        self,
        n_channels: int,
        gain: float,
        clip_v: float,
        *,
        supply_a: float = 0.012,
        fail_after: int | None = None,
        fail_role: str = "scope",
    ) -> None:
        self.gain = gain
        self.clip_v = clip_v
        self.n_channels = n_channels
        self.level_log: list[float] = []
        self.on = False
        self.frequency = 1000.0
        self.level = 0.0
        self.supply_on = False
        self.supply_a = supply_a
        self.calls = 0
        self.fail_after = fail_after
        self.fail_role = fail_role
        self.ranges: dict[int, float] = {}
        self.rate = 1e5
        self.points = 4096
        self.acquisitions = 0
        self.rng = np.random.default_rng(1)
        self.closed: set[int] = set()
        bench = self

        class Gen:
            def configure_sine(self, frequency_hz: float, output: int = 1) -> None:
                bench._tick("generator")
                bench.frequency = frequency_hz

            def set_level(
                self, vrms: float, *, load_ohm: float = math.inf, output: int = 1
            ) -> float:
                bench._tick("generator")
                bench.level = vrms
                bench.level_log.append(vrms)
                return vrms

            def level_readback_vrms(
                self, *, load_ohm: float = math.inf, output: int = 1
            ) -> float | None:
                return None  # like a profile without query_amplitude

            def output(self, on: bool, output: int = 1) -> None:
                bench._tick("generator")
                bench.on = on

            def is_on(self, output: int = 1) -> bool:
                bench._tick("generator")
                return bench.on

            def safe_off(self) -> bool:
                bench.on = False
                return True

        class Scope:
            ranges_vpp = (0.04, 0.08, 0.2, 0.4, 0.8, 2, 4, 8, 20, 40, 80)
            sample_rates_hz = (1e4, 2e4, 5e4, 1e5, 2e5, 5e5, 1e6)
            record_lengths = (1000, 2000, 4096, 5000, 8192)
            bits = 8
            inputs = 4

            def configure_input(
                self,
                input: int,
                *,
                range_vpp: float,
                offset_v: float = 0.0,
                coupling: str = "DC",
                probe: float = 1.0,
                bandwidth_limit: bool = False,
            ) -> Any:
                bench._tick("scope")
                r = next(x for x in self.ranges_vpp if x >= range_vpp * (1 - 1e-9))
                bench.ranges[input] = r
                return SimpleNamespace(range_vpp=r)

            def configure_timebase(self, sample_rate_hz: float, points: int) -> None:
                bench.rate, bench.points = sample_rate_hz, points

            def configure_trigger(self, source: int, level_v: float = 0.0) -> None:
                pass

            def acquire(self, inputs: list[int]) -> Any:
                bench._tick("scope")
                bench.acquisitions += 1
                return bench._record(list(inputs))

        class Supply:
            def configure(self, voltage_v: float, current_limit_a: float, output: int = 1):
                bench._tick("supply")

            def output(self, on: bool, output: int = 1) -> None:
                bench.supply_on = on

            def is_on(self, output: int = 1) -> bool:
                return bench.supply_on

            def current_a(self, output: int = 1) -> float:
                return bench.supply_a if bench.supply_on else 0.0

            def tripped(self, output: int = 1) -> bool:
                return False

            def safe_off(self) -> bool:
                bench.supply_on = False
                return True

        class Switch:
            def close(self, channels: list[int]) -> None:
                bench.closed |= set(channels)

            def open(self, channels: list[int]) -> None:
                bench.closed -= set(channels)

            def open_all(self) -> None:
                bench.closed.clear()

            def watch(self, channels: list[int]) -> None:
                pass  # open_all above leaves nothing closed to read back

        class Dmm:
            def dc_volts(self, range_v: float | None = None) -> float:
                return 6.1 if bench.closed else 0.0

        self.instruments = SimpleNamespace(
            generator=Gen(),
            scope=Scope(),
            supply=Supply(),
            switch=Switch(),
            dmm=Dmm(),
            identities={"generator": "fake,GEN,1,1", "scope": "fake,SCOPE,1,1"},
            sessions={},  # in-process: no sessions, so no recoveries to count
        )

    def _tick(self, role: str) -> None:
        self.calls += 1
        if self.fail_after is not None and self.calls > self.fail_after and role == self.fail_role:
            raise ConnectionLost(
                "fake instrument gone", role=role, resource="TCPIP::127.0.0.1::9::SOCKET"
            )

    def _record(self, inputs: list[int]) -> Any:
        n = self.points
        t = np.arange(n) / self.rate
        a = self.level * math.sqrt(2) if self.on else 0.0
        x = a * np.sin(2 * np.pi * self.frequency * t)
        y = np.clip(-self.gain * x, -self.clip_v, self.clip_v)
        volts: dict[int, np.ndarray] = {}
        limits: dict[int, tuple[float, float]] = {}
        for k in inputs:
            sig = x if k == 1 else y
            r = self.ranges[k]
            lsb = r / 256
            lo, hi = -128 * lsb, 127 * lsb
            noisy = sig + self.rng.normal(0, lsb * 0.3, n)
            volts[k] = np.clip(np.round(noisy / lsb), -128, 127) * lsb
            limits[k] = (lo, hi)
        return SimpleNamespace(
            sample_rate_hz=self.rate,
            volts=volts,
            adc_limits=limits,
            bits=8,
            ranges_vpp=dict(self.ranges),
        )


@dataclass
class FakeFixtureBoard:
    """Minimal Board stand-in: conditions, supply, part number, channels by name."""

    names: list[str]
    safe_input_vrms: float = 0.6
    nominal_input_vrms: float = 0.05
    extra: tuple[float, ...] = ()
    conditions: Any = field(init=False)

    def __post_init__(self) -> None:
        self.conditions = SimpleNamespace(
            frequency_hz=1000.0,
            nominal_input_vrms=self.nominal_input_vrms,
            safe_input_vrms=self.safe_input_vrms,
            extra_frequencies_hz=self.extra,
            clip_criterion="thd",
            clip_thd_percent=1.0,
            clip_compression_db=1.0,
        )
        self.supply = SimpleNamespace(v_pos=12.0, v_neg=0.0)
        self.part_number = "FAKE-1"
        self.name = "fake clipper board"
        self.revision = "A"
        self.digest = "f" * 64
        self.source = "<fake>"
