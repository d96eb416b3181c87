"""The five simulated instruments, each a command table over :class:`ScpiDevice`.

They implement exactly the commands of the default profiles in ``fixtures/instruments``
(checked by tests/sim/test_sim_bench_files.py) plus the SCPI forms around them
(queries, MIN/MAX, optional nodes).  Capabilities match the profiles' ``[settings]``.

Conventions worth knowing:

- Generator: the amplitude is volts peak-to-peak into a high impedance (the profile says
  ``amplitude_unit = "vpp"``, ``calibrated_load = "high_z"``), so the EMF peak behind the
  50 Ω output is setting / 2.  ``|offset| + amplitude/2`` may not pass 10 V (-221).
- Scope: range, offset, trigger level and data are volts at the PROBE TIP: the instrument
  divides by the ``INPut:ATTenuation`` factor itself.  int codes span the range:
  volts = offset + code · range / 2**bits, codes -2**(bits-1) .. 2**(bits-1)-1, clipped
  there (over-range).  A requested range is rounded up to the next front-end range
  (the profile's ``ranges_vpp``, at the scope's own input) times the probe factor.
  The record starts at the trigger point (trigger input rising through the level) plus
  a random fraction of a sample (the sample clock is not locked to the trigger); with no
  crossing the scope auto-triggers at a random phase.  AC coupling removes the DC part.
- DMM: reads the test point the closed switch relay connects; no relay closed: 0 V plus
  noise; two test points at once: -221 and 9.91E37.
- Supply: constant voltage until the board draws more than the current limit, then
  constant current with the voltage folded back (``CURRent:PROTection:TRIPped?`` = 1).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
from scipy.signal import lfilter

from harness.instruments.scpi import encode_block, format_number
from harness.sim.scpi import (
    Bool,
    ChannelList,
    Choice,
    Command,
    Ctx,
    Num,
    ScpiDevice,
    ScpiFailure,
)
from harness.sim.world import Drive, SignalSet, World

__all__ = [
    "GeneratorEvent",
    "ScopeSettings",
    "SimDmm",
    "SimGenerator",
    "SimScope",
    "SimSupply",
    "SimSwitch",
    "SupplyEvent",
]

_QUERY_BOUND = Choice(("MINimum", "MAXimum", "DEFault"), optional=True)


def _bound(param: Num, which: str | None, value: float) -> str:
    """Answer of a numeric query: the setting, or the bound MIN/MAX/DEF asks for."""
    if which == "MINimum":
        value = param.lo
    elif which == "MAXimum":
        value = param.hi
    elif which == "DEFault" and param.default is not None:
        value = param.default
    return format_number(float(value))


class _BenchDevice(ScpiDevice):
    """An instrument of the simulated bench: shares the world's lock and clock."""

    def __init__(self, world: World, *, serial: str = "0001", latency: bool = False) -> None:
        self.world = world
        super().__init__(serial=serial, lock=world.lock)
        self.latency = latency

    def _note(self, event: Any) -> None:
        """Log a change of what the board sees, and tell the world when it happened (the
        board's capacitors start moving toward the new balance at that moment)."""
        self.log.append(event)  # type: ignore[attr-defined]
        self.world.changed()

    def busy_for(self, seconds: float) -> None:
        """An overlapped operation: *OPC? / *WAI / the next data query wait for it."""
        if self.latency:
            self.busy_until = max(self.busy_until, time.monotonic()) + seconds


# --- generator ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class GeneratorEvent:
    """One change of the generator's output, for the safety tests.

    ``what``: "amplitude_vpp", "offset_v", "frequency_hz", "output" (value 1.0/0.0) or
    "reset"; ``time_s`` is ``time.monotonic()``.
    """

    time_s: float
    what: str
    value: float
    output: int = 1


class SimGenerator(_BenchDevice):
    """Sine generator, one output, 50 Ω, amplitude in Vpp at high impedance."""

    IDN = ("stageproof-sim", "SIG-1")
    OUTPUTS = 1
    OUTPUT_OHM = 50.0
    MAX_VPP = 20.0

    FREQ = Num("HZ", 1e-3, 10e6, 1000.0)
    AMPL = Num("V", 1e-3, MAX_VPP, 0.1)
    OFFS = Num("V", -10.0, 10.0, 0.0)

    def __init__(self, world: World, **kw: Any) -> None:
        self.log: list[GeneratorEvent] = []
        super().__init__(world, **kw)

    def reset(self) -> None:
        self.function = "SINusoid"
        self.frequency_hz = 1000.0
        self.amplitude_vpp = 0.1
        self.offset_v = 0.0
        self.output_on = False
        self._note(GeneratorEvent(time.monotonic(), "reset", 0.0))
        self._note(GeneratorEvent(time.monotonic(), "amplitude_vpp", self.amplitude_vpp))
        self._note(GeneratorEvent(time.monotonic(), "output", 0.0))

    def drive(self) -> Drive:
        """EMF peak = Vpp setting / 2 (calibrated at high impedance)."""
        return Drive(
            self.amplitude_vpp / 2.0,
            self.frequency_hz,
            self.offset_v,
            self.OUTPUT_OHM,
            self.output_on,
        )

    def _out(self, ctx: Ctx) -> int:
        return (
            ctx.index("SOURce", self.OUTPUTS)
            if "SOURce" in ctx.suffixes
            else ctx.index("OUTPut", self.OUTPUTS)
        )

    def _function(self, ctx: Ctx, shape: str) -> None:
        self._out(ctx)
        self.function = shape

    def _function_q(self, ctx: Ctx) -> str:
        self._out(ctx)
        return "SIN"

    def _frequency(self, ctx: Ctx, value: float) -> None:
        self._out(ctx)
        self.frequency_hz = value
        self._note(GeneratorEvent(time.monotonic(), "frequency_hz", value))

    def _frequency_q(self, ctx: Ctx, which: str | None) -> str:
        self._out(ctx)
        return _bound(self.FREQ, which, self.frequency_hz)

    def _amplitude(self, ctx: Ctx, value: float) -> None:
        out = self._out(ctx)
        if abs(self.offset_v) + value / 2 > self.MAX_VPP / 2 + 1e-12:
            raise ScpiFailure(-221, "amplitude + offset exceed 10 V")
        self.amplitude_vpp = value
        self._note(GeneratorEvent(time.monotonic(), "amplitude_vpp", value, out))

    def _amplitude_q(self, ctx: Ctx, which: str | None) -> str:
        self._out(ctx)
        return _bound(self.AMPL, which, self.amplitude_vpp)

    def _offset(self, ctx: Ctx, value: float) -> None:
        out = self._out(ctx)
        if abs(value) + self.amplitude_vpp / 2 > self.MAX_VPP / 2 + 1e-12:
            raise ScpiFailure(-221, "amplitude + offset exceed 10 V")
        self.offset_v = value
        self._note(GeneratorEvent(time.monotonic(), "offset_v", value, out))

    def _offset_q(self, ctx: Ctx, which: str | None) -> str:
        self._out(ctx)
        return _bound(self.OFFS, which, self.offset_v)

    def _output(self, ctx: Ctx, on: bool) -> None:
        out = self._out(ctx)
        self.output_on = on
        self._note(GeneratorEvent(time.monotonic(), "output", 1.0 if on else 0.0, out))

    def _output_q(self, ctx: Ctx) -> str:
        self._out(ctx)
        return "1" if self.output_on else "0"

    def _load_q(self, ctx: Ctx) -> str:
        self._out(ctx)
        return "9.9E37"  # the calibrated load: high impedance (SCPI INFinity)

    COMMANDS: ClassVar[tuple[Command, ...]] = (
        Command(
            "[SOURce#:]FUNCtion[:SHAPe]", _function, (Choice(("SINusoid",)),), name="set_function"
        ),
        Command("[SOURce#:]FUNCtion[:SHAPe]?", _function_q),
        Command("[SOURce#:]FREQuency[:CW]", _frequency, (FREQ,), name="set_frequency"),
        Command("[SOURce#:]FREQuency:FIXed", _frequency, (FREQ,)),
        Command("[SOURce#:]FREQuency[:CW]?", _frequency_q, (_QUERY_BOUND,)),
        Command(
            "[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            _amplitude,
            (AMPL,),
            name="set_amplitude",
        ),
        Command(
            "[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]?",
            _amplitude_q,
            (_QUERY_BOUND,),
            name="query_amplitude",
        ),
        Command(
            "[SOURce#:]VOLTage[:LEVel][:IMMediate]:OFFSet", _offset, (OFFS,), name="set_offset"
        ),
        Command("[SOURce#:]VOLTage[:LEVel][:IMMediate]:OFFSet?", _offset_q, (_QUERY_BOUND,)),
        Command("OUTPut#[:STATe]", _output, (Bool(),), name="output"),
        Command("OUTPut#[:STATe]?", _output_q, name="query_output"),
        Command("OUTPut#:LOAD?", _load_q),
    )


# --- scope ----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ScopeSettings:
    """The digitiser's front end (defaults match fixtures/instruments/scpi-scope.toml).

    ``noise_lsb_rms`` and ``noise_v_rms`` (at the scope's own input) add in quadrature;
    ``inl_hd2_dbc`` / ``inl_hd3_dbc`` set the ADC's second/third-order integral
    nonlinearity by the harmonic it makes on a full-scale sine (our choice: -60 dBc).
    """

    inputs: int = 4
    adc_bits: int = 8
    sample_rates_hz: tuple[float, ...] = (1e4, 2e4, 5e4, 1e5, 2e5, 5e5, 1e6, 2e6, 5e6, 1e7)
    record_lengths: tuple[int, ...] = (
        1000,
        2000,
        4096,
        5000,
        8192,
        10000,
        16384,
        20000,
        50000,
        100000,
        1000000,
    )
    ranges_vpp: tuple[float, ...] = (0.04, 0.08, 0.2, 0.4, 0.8, 2, 4, 8, 20, 40, 80)
    noise_lsb_rms: float = 0.2
    noise_v_rms: float = 20e-6
    inl_hd2_dbc: float = -60.0
    inl_hd3_dbc: float = -60.0
    link_bytes_per_s: float = 12.5e6  # transfer time at 100 Mbit/s when latency is on
    rearm_s: float = 1e-3
    ac_corner_hz: float = 10.0  # AC coupling's high-pass corner (our choice; common practice)


@dataclass
class _Input:
    on: bool = True
    range_vpp: float = 8.0  # requested, at the probe tip
    offset_v: float = 0.0
    coupling: str = "DC"
    bw_limit: bool = False
    probe: float = 1.0


@dataclass
class _Record:
    """One acquisition: the signals as they were at INIT, sampled lazily per input."""

    signals: SignalSet
    t0_s: float
    rate_hz: float
    points: int
    inputs: dict[int, _Input]
    seed: int
    codes: dict[int, np.ndarray] = field(default_factory=dict)
    bits: int = 8
    noise_v_rms: float = 20e-6


class SimScope(_BenchDevice):
    """Multi-input digitiser with an 8-bit (configurable) ADC model."""

    IDN = ("stageproof-sim", "DIG-4")

    def __init__(self, world: World, settings: ScopeSettings | None = None, **kw: Any) -> None:
        self.settings = settings or ScopeSettings()
        s = self.settings
        self.RANGE = Num("V", min(s.ranges_vpp) * 0.001, max(s.ranges_vpp) * 1000, 8.0)
        self.TINT = Num(
            "S", 1 / max(s.sample_rates_hz) * 0.999, 1 / min(s.sample_rates_hz) * 1.001, 1e-5
        )
        self.POINTS = Num(None, 1, max(s.record_lengths), 10000, integer=True)
        self.record: _Record | None = None
        super().__init__(world, **kw)
        if s.inputs > 4:
            self.IDN = ("stageproof-sim", f"DIG-{s.inputs}")

    def reset(self) -> None:
        self.inputs = {n: _Input() for n in range(1, self.settings.inputs + 1)}
        self.rate_hz = 1e5
        self.points = 10000
        self.trig_source: int | None = 1
        self.trig_slope = "POSitive"
        self.trig_level_v = 0.0
        self.continuous = False
        self.data_format = ("INTeger", 8)
        self.swapped = False
        self.record = None

    # front end ----------------------------------------------------------------------------------

    def _inp(self, ctx: Ctx, node: str) -> _Input:
        return self.inputs[ctx.index(node, self.settings.inputs)]

    def effective_range(self, inp: _Input) -> float:
        """Tip range actually used: requested / probe rounded up to a front-end range."""
        at_input = inp.range_vpp / inp.probe
        for r in sorted(self.settings.ranges_vpp):
            if r >= at_input * (1 - 1e-9):
                return r * inp.probe
        return max(self.settings.ranges_vpp) * inp.probe

    def _state(self, ctx: Ctx, on: bool) -> None:
        self._inp(ctx, "INPut").on = on

    def _state_q(self, ctx: Ctx) -> str:
        return "1" if self._inp(ctx, "INPut").on else "0"

    def _range(self, ctx: Ctx, value: float) -> None:
        inp = self._inp(ctx, "SENSe")
        if value / inp.probe > max(self.settings.ranges_vpp) * (1 + 1e-9):
            raise ScpiFailure(-222, f"range {value:g} Vpp")
        inp.range_vpp = value

    def _range_q(self, ctx: Ctx, which: str | None) -> str:
        inp = self._inp(ctx, "SENSe")
        if which == "MINimum":
            return format_number(min(self.settings.ranges_vpp) * inp.probe)
        if which == "MAXimum":
            return format_number(max(self.settings.ranges_vpp) * inp.probe)
        return format_number(self.effective_range(inp))

    def _offset(self, ctx: Ctx, value: float) -> None:
        inp = self._inp(ctx, "SENSe")
        if abs(value) > 5 * max(self.settings.ranges_vpp) * inp.probe:
            raise ScpiFailure(-222, f"offset {value:g} V")
        inp.offset_v = value

    def _offset_q(self, ctx: Ctx) -> str:
        return format_number(self._inp(ctx, "SENSe").offset_v)

    def _coupling(self, ctx: Ctx, value: str) -> None:
        self._inp(ctx, "INPut").coupling = value

    def _coupling_q(self, ctx: Ctx) -> str:
        return self._inp(ctx, "INPut").coupling

    def _filter(self, ctx: Ctx, on: bool) -> None:
        self._inp(ctx, "INPut").bw_limit = on

    def _filter_q(self, ctx: Ctx) -> str:
        return "1" if self._inp(ctx, "INPut").bw_limit else "0"

    def _atten(self, ctx: Ctx, value: float) -> None:
        self._inp(ctx, "INPut").probe = value

    def _atten_q(self, ctx: Ctx) -> str:
        return format_number(self._inp(ctx, "INPut").probe)

    # timebase and trigger -----------------------------------------------------------------------

    def _tinterval(self, ctx: Ctx, interval: float) -> None:
        want = 1.0 / interval
        self.rate_hz = min(self.settings.sample_rates_hz, key=lambda r: abs(math.log(r / want)))

    def _tinterval_q(self, ctx: Ctx) -> str:
        return format_number(1.0 / self.rate_hz)

    def _points(self, ctx: Ctx, n: int) -> None:
        for length in sorted(self.settings.record_lengths):
            if length >= n:
                self.points = length
                return
        raise ScpiFailure(-222, f"{n} points")  # pragma: no cover - POINTS bounds it

    def _points_q(self, ctx: Ctx) -> str:
        return str(self.points)

    def _trig_source(self, ctx: Ctx, value: Any) -> None:
        if value == "IMMediate":
            self.trig_source = None
            return
        n = value[1] if isinstance(value, tuple) else round(value)
        if not 1 <= n <= self.settings.inputs:
            raise ScpiFailure(-224, f"trigger source {n}")
        self.trig_source = n

    def _trig_source_q(self, ctx: Ctx) -> str:
        return "IMM" if self.trig_source is None else f"INT{self.trig_source}"

    def _slope(self, ctx: Ctx, value: str) -> None:
        self.trig_slope = value

    def _slope_q(self, ctx: Ctx) -> str:
        return self.trig_slope[:3].upper()

    def _level(self, ctx: Ctx, value: float) -> None:
        self.trig_level_v = value

    def _level_q(self, ctx: Ctx) -> str:
        return format_number(self.trig_level_v)

    def _continuous(self, ctx: Ctx, on: bool) -> None:
        self.continuous = on

    def _continuous_q(self, ctx: Ctx) -> str:
        return "1" if self.continuous else "0"

    def _init(self, ctx: Ctx) -> None:
        self.acquire()

    def trigger(self) -> None:
        self.acquire()

    # data format -------------------------------------------------------------------------------

    def _format(self, ctx: Ctx, kind: str, length: float | None) -> None:
        if kind == "ASCii":
            self.data_format = ("ASCii", 0)
            return
        n = round(length) if length is not None else (8 if kind == "INTeger" else 32)
        if (kind, n) not in (("INTeger", 8), ("INTeger", 16), ("REAL", 32)):
            raise ScpiFailure(-224, f"{kind},{n}")
        if kind == "INTeger" and self.settings.adc_bits > n:
            raise ScpiFailure(-221, f"{self.settings.adc_bits}-bit codes do not fit INT,{n}")
        self.data_format = (kind, n)

    def _format_q(self, ctx: Ctx) -> str:
        kind, n = self.data_format
        return {"ASCii": "ASC", "INTeger": "INT", "REAL": "REAL"}[kind] + f",{n}"

    def _border(self, ctx: Ctx, value: str) -> None:
        self.swapped = value == "SWAPped"

    def _border_q(self, ctx: Ctx) -> str:
        return "SWAP" if self.swapped else "NORM"

    # acquisition -------------------------------------------------------------------------------

    def acquire(self) -> None:
        """Take one record of every input now (samples are computed when fetched)."""
        sig = self.world.signals(self.points / self.rate_hz)
        rng = self.world.rng
        ts = 1.0 / self.rate_hz
        t_trig, wait = self._trigger_time(sig, rng)
        t0 = t_trig + float(rng.uniform(0.0, ts))
        inputs = {n: _Input(**vars(i)) for n, i in self.inputs.items()}
        bits, noise_v = self.resolution()
        self.record = _Record(
            sig,
            t0,
            self.rate_hz,
            self.points,
            inputs,
            int(rng.integers(0, 2**31)),
            bits=bits,
            noise_v_rms=noise_v,
        )
        self.busy_for(self.settings.rearm_s + wait + self.points * ts)

    def resolution(self) -> tuple[int, float]:
        """(ADC bits, input noise in V rms) of the next record: the front end's own."""
        return self.settings.adc_bits, self.settings.noise_v_rms

    def _trigger_time(self, sig: SignalSet, rng: np.random.Generator) -> tuple[float, float]:
        """(time of the trigger point within one period, expected wait for it)."""
        period = 1.0 / sig.frequency_hz
        if self.trig_source is None:
            return float(rng.uniform(0, period)), 0.0
        inp = self.inputs[self.trig_source]
        n = 4096
        t = np.arange(n) * (period / n)
        v = self._front(sig, self.trig_source, inp, t)
        a, b = (v, np.roll(v, -1)) if self.trig_slope == "POSitive" else (-v, -np.roll(v, -1))
        level = self.trig_level_v if self.trig_slope == "POSitive" else -self.trig_level_v
        idx = np.flatnonzero((a < level) & (b >= level))
        if idx.size == 0:
            return float(rng.uniform(0, period)), 0.1  # auto trigger after 100 ms
        i = int(idx[0])
        frac = (level - a[i]) / (b[i] - a[i]) if b[i] != a[i] else 0.0
        return float(t[i] + frac * (period / n)), float(rng.uniform(0, period))

    def _front(
        self, sig: SignalSet, n: int, inp: _Input, t: np.ndarray, *, record: bool = False
    ) -> np.ndarray:
        """Probe-tip volts the input sees.  AC coupling is a first-order high-pass at
        ``ac_corner_hz``: the mean over a period goes (the filter's long-run state for a
        steady level); on a ``record`` (uniform ``t``) the filter also runs over a pre-roll
        of three time constants, so a DC level still moving is attenuated as a real
        coupling capacitor attenuates it, not passed whole."""
        v = sig.signal(n, t)
        if inp.coupling != "AC":
            return v
        period = 1.0 / sig.frequency_hz
        grid = np.arange(1024) * (period / 1024)
        mean = float(np.mean(sig.signal(n, grid)))
        v = v - mean
        if not record or len(t) < 2:
            return v
        dt = float(t[1] - t[0])
        tau = 1.0 / (2 * math.pi * self.settings.ac_corner_hz)
        pre = min(int(3 * tau / dt), 200_000)
        before = sig.signal(n, t[0] - dt * np.arange(pre, 0, -1)) - mean
        x = np.concatenate([before, v])
        # RC high-pass, backward Euler: y[i] = a (y[i-1] + x[i] - x[i-1]), a = tau/(tau + dt)
        a = tau / (tau + dt)
        y = lfilter([a, -a], [1.0, -a], x - x[0])
        return y[pre:]

    def codes(self, n: int) -> tuple[np.ndarray, float, float]:
        """(ADC codes, lsb volts, offset volts) of input ``n`` in the last record."""
        rec = self.record
        if rec is None:
            raise ScpiFailure(-230, "no acquisition", reply=encode_block(b""))
        inp = rec.inputs[n]
        if not inp.on:
            raise ScpiFailure(-221, f"input {n} is off", reply=encode_block(b""))
        s = self.settings
        full = 2**rec.bits
        lsb = self.effective_range(inp) / full
        if n not in rec.codes:
            rng = np.random.default_rng([rec.seed, n])
            t = rec.t0_s + np.arange(rec.points) / rec.rate_hz
            v = self._front(rec.signals, n, inp, t, record=True)
            x = (v - inp.offset_v) / lsb  # ideal code, LSB units
            half = full / 2
            u = np.clip(x / half, -1.5, 1.5)  # normalised input for the INL polynomial
            a2 = 2 * half * 10 ** (s.inl_hd2_dbc / 20)
            a3 = 4 * half * 10 ** (s.inl_hd3_dbc / 20)
            sigma = math.hypot(s.noise_lsb_rms, rec.noise_v_rms * inp.probe / lsb)
            x = x + a2 * u * u + a3 * u**3 + rng.normal(0.0, sigma, x.shape)
            rec.codes[n] = np.clip(np.rint(x), -half, half - 1).astype(np.int32)
        return rec.codes[n], lsb, inp.offset_v

    def _fetch(self, ctx: Ctx, channels: tuple[int, ...]) -> bytes:
        if len(channels) != 1:
            raise ScpiFailure(-224, "fetch one input at a time", reply=encode_block(b""))
        n = channels[0]
        if not 1 <= n <= self.settings.inputs:
            raise ScpiFailure(-224, f"input {n}", reply=encode_block(b""))
        self.wait_busy(ctx)
        codes, lsb, offset = self.codes(n)
        kind, bits = self.data_format
        order = "<" if self.swapped else ">"
        if kind == "ASCii":
            volts = offset + codes * lsb
            return ",".join(format_number(float(v)) for v in volts).encode()
        if kind == "INTeger":
            payload = codes.astype(f"{order}i{bits // 8}").tobytes()
        else:
            payload = (offset + codes * lsb).astype(f"{order}f4").tobytes()
        if self.latency:
            ctx.outcome.delay_s += len(payload) / self.settings.link_bytes_per_s
        return encode_block(payload)

    def _read(self, ctx: Ctx, channels: tuple[int, ...]) -> bytes:
        self.acquire()
        return self._fetch(ctx, channels)

    COMMANDS: ClassVar[tuple[Command, ...]] = ()  # built per instance (ranges from settings)

    def _common_commands(self) -> tuple[Command, ...]:
        cls = SimScope
        fetch_q = "FETCh[:ARRay][:VOLTage]?"
        return (
            *super()._common_commands(),
            Command("INPut#[:STATe]", cls._state, (Bool(),), name="input_on"),
            Command("INPut#[:STATe]?", cls._state_q),
            Command("INPut#:COUPling", cls._coupling, (Choice(("AC", "DC")),), name="set_coupling"),
            Command("INPut#:COUPling?", cls._coupling_q),
            Command(
                "INPut#:FILTer[:LPASs][:STATe]", cls._filter, (Bool(),), name="set_bandwidth_limit"
            ),
            Command("INPut#:FILTer[:LPASs][:STATe]?", cls._filter_q),
            Command(
                "INPut#:ATTenuation", cls._atten, (Num(None, 0.001, 1000.0, 1.0),), name="set_probe"
            ),
            Command("INPut#:ATTenuation?", cls._atten_q),
            Command(
                "[SENSe#:]VOLTage[:DC]:RANGe[:UPPer]", cls._range, (self.RANGE,), name="set_range"
            ),
            Command("[SENSe#:]VOLTage[:DC]:RANGe[:UPPer]?", cls._range_q, (_QUERY_BOUND,)),
            Command(
                "[SENSe#:]VOLTage[:DC]:OFFSet",
                cls._offset,
                (Num("V", -1e4, 1e4, 0.0),),
                name="set_offset",
            ),
            Command("[SENSe#:]VOLTage[:DC]:OFFSet?", cls._offset_q),
            Command(
                "[SENSe:]SWEep:TINTerval", cls._tinterval, (self.TINT,), name="set_sample_rate"
            ),
            Command("[SENSe:]SWEep:TINTerval?", cls._tinterval_q),
            Command("[SENSe:]SWEep:POINts", cls._points, (self.POINTS,), name="set_record_length"),
            Command("[SENSe:]SWEep:POINts?", cls._points_q),
            Command(
                "TRIGger[:SEQuence]:SOURce",
                cls._trig_source,
                (_TriggerSource(),),
                name="set_trigger",
            ),
            Command("TRIGger[:SEQuence]:SOURce?", cls._trig_source_q),
            Command("TRIGger[:SEQuence]:SLOPe", cls._slope, (Choice(("POSitive", "NEGative")),)),
            Command("TRIGger[:SEQuence]:SLOPe?", cls._slope_q),
            Command("TRIGger[:SEQuence]:LEVel", cls._level, (Num("V", -1e4, 1e4, 0.0),)),
            Command("TRIGger[:SEQuence]:LEVel?", cls._level_q),
            Command("INITiate:CONTinuous", cls._continuous, (Bool(),)),
            Command("INITiate:CONTinuous?", cls._continuous_q),
            Command("INITiate[:IMMediate]", cls._init, name="single"),
            Command(
                "FORMat[:DATA]",
                cls._format,
                (
                    Choice(("ASCii", "INTeger", "REAL")),
                    Num(None, 0, 64, integer=True, optional=True),
                ),
                name="set_data_format",
            ),
            Command("FORMat[:DATA]?", cls._format_q),
            Command("FORMat:BORDer", cls._border, (Choice(("NORMal", "SWAPped")),)),
            Command("FORMat:BORDer?", cls._border_q),
            Command(fetch_q, cls._fetch, (ChannelList(),), name="fetch", block=True),
            Command("READ[:ARRay][:VOLTage]?", cls._read, (ChannelList(),), block=True),
        )


class _TriggerSource(Choice):
    """INTernal<n> (SCPI-99), INPut<n> or CHANnel<n>, a bare number, or IMMediate."""

    def __init__(self) -> None:
        super().__init__(("IMMediate", "INTernal#", "INPut#", "CHANnel#"))

    def parse(self, token: str) -> Any:
        t = token.strip()
        if t[:1].isdigit():
            return Num(None, 1, 64, integer=True).parse(t)
        return super().parse(t)


# --- switch ---------------------------------------------------------------------------------------


class SimSwitch(_BenchDevice):
    """Relay switch: channels ``<card><relay>``, cards 1-9, relays 01-40."""

    IDN = ("stageproof-sim", "SW-40")
    SETTLE_S = 0.005

    def reset(self) -> None:
        self.closed: set[int] = set()

    @staticmethod
    def _valid(channels: tuple[int, ...]) -> tuple[int, ...]:
        for c in channels:
            if not (1 <= c // 100 <= 9 and 1 <= c % 100 <= 40):
                raise ScpiFailure(-224, f"no relay {c}")
        return channels

    def _close(self, ctx: Ctx, channels: tuple[int, ...]) -> None:
        self.closed.update(self._valid(channels))
        self.busy_for(self.SETTLE_S)

    def _open(self, ctx: Ctx, channels: tuple[int, ...]) -> None:
        self.closed.difference_update(self._valid(channels))
        self.busy_for(self.SETTLE_S)

    def _open_all(self, ctx: Ctx) -> None:
        self.closed.clear()
        self.busy_for(self.SETTLE_S)

    def _close_q(self, ctx: Ctx, channels: tuple[int, ...]) -> str:
        return ",".join("1" if c in self.closed else "0" for c in self._valid(channels))

    def _open_q(self, ctx: Ctx, channels: tuple[int, ...]) -> str:
        return ",".join("0" if c in self.closed else "1" for c in self._valid(channels))

    def _state_q(self, ctx: Ctx) -> str:
        return "(@" + ",".join(str(c) for c in sorted(self.closed)) + ")"

    COMMANDS: ClassVar[tuple[Command, ...]] = (
        Command("ROUTe:CLOSe", _close, (ChannelList(),), name="close"),
        Command("ROUTe:CLOSe?", _close_q, (ChannelList(),), name="query_closed"),
        Command("ROUTe:CLOSe:STATe?", _state_q),
        Command("ROUTe:OPEN", _open, (ChannelList(),), name="open"),
        Command("ROUTe:OPEN?", _open_q, (ChannelList(),)),
        Command("ROUTe:OPEN:ALL", _open_all, name="open_all"),
    )


# --- DMM ------------------------------------------------------------------------------------------


class SimDmm(_BenchDevice):
    """DC voltmeter on the switch's common line, 10 MΩ, ranges 0.1-1000 V."""

    IDN = ("stageproof-sim", "DVM-6")
    RANGES_V = (0.1, 1.0, 10.0, 100.0, 1000.0)
    NOISE_V = 10e-6
    MEASURE_S = 0.02  # one power-line cycle of integration, when latency is on

    def __init__(self, world: World, switch: SimSwitch, **kw: Any) -> None:
        self.switch = switch
        super().__init__(world, **kw)

    def reset(self) -> None:
        pass

    def reading(self, range_v: Any) -> str:
        connected = [c for c in self.switch.closed if self.world.is_test_point(c)]
        if len(connected) > 1:
            raise ScpiFailure(-221, f"relays {sorted(connected)} both connect the DMM")
        v = self.world.test_point_v(connected[0]) if connected else 0.0
        v += float(self.world.rng.normal(0.0, self.NOISE_V))
        if isinstance(range_v, float):
            rng = next((r for r in self.RANGES_V if r >= range_v * (1 - 1e-9)), self.RANGES_V[-1])
            if abs(v) > 1.2 * rng:
                return "9.9E37"  # overload (SCPI infinity)
        # No range, DEF or AUTO: the meter picks its range itself (SCPI-99 vol. 1 MEASure,
        # from memory: DEFault leaves the range to the instrument), so it never overloads
        # below its top range.
        elif abs(v) > 1.2 * self.RANGES_V[-1]:
            return "9.9E37"
        return format_number(round(v, 7))

    def _measure(self, ctx: Ctx, range_v: Any, resolution: Any) -> str:
        self.wait_busy(ctx)
        if self.latency:
            ctx.outcome.delay_s += self.MEASURE_S
        ctx.outcome.ready_at = max(ctx.outcome.ready_at, self.switch.busy_until)
        return self.reading(range_v)

    COMMANDS: ClassVar[tuple[Command, ...]] = (
        Command(
            "MEASure[:SCALar]:VOLTage[:DC]?",
            _measure,
            (
                # DEF and AUTO both mean autorange here: no default number stands in
                Num("V", 0.0, 1000.0, None, optional=True, keywords=("AUTO", "DEF", "DEFAULT")),
                Num("V", 0.0, 1000.0, 1e-5, optional=True),
            ),
            name="measure_dc_volts",
        ),
    )


# --- supply ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SupplyEvent:
    """One change of a supply output (``what``: voltage_v, current_limit_a, output, reset)."""

    time_s: float
    what: str
    value: float
    output: int


@dataclass
class _Output:
    voltage_v: float = 0.0
    current_a: float = 0.1
    on: bool = False


class SimSupply(_BenchDevice):
    """Two-output bench supply: output 1 feeds the positive rail, output 2 the negative
    rail's magnitude on a split-supply board.  Both outputs report the board's current
    (the op-amps' quiescent current flows from one rail to the other)."""

    IDN = ("stageproof-sim", "PSU-2")
    OUTPUTS = 2
    VOLT = Num("V", 0.0, 30.0, 0.0)
    CURR = Num("A", 0.0, 3.0, 0.1)
    NOISE_A = 1e-6

    def __init__(self, world: World, **kw: Any) -> None:
        self.log: list[SupplyEvent] = []
        super().__init__(world, **kw)

    def reset(self) -> None:
        self.outputs = {n: _Output() for n in range(1, self.OUTPUTS + 1)}
        self._note(SupplyEvent(time.monotonic(), "reset", 0.0, 0))

    def _n(self, ctx: Ctx) -> int:
        for node in ("SOURce", "OUTPut", "MEASure"):
            if node in ctx.suffixes:
                return ctx.index(node, self.OUTPUTS)
        return 1

    def _split(self) -> bool:
        return self.world.board.supply.negative is not None

    def state(self) -> dict[int, tuple[float, float, bool]]:
        """Per output: (volts at the terminals, amps drawn, constant-current mode)."""
        out1, out2 = self.outputs[1], self.outputs[2]
        set1 = out1.voltage_v if out1.on else 0.0
        set2 = out2.voltage_v if out2.on else 0.0
        nominal = self.world.board.supply
        ratio = set1 / nominal.v_pos
        if self._split():
            ratio = min(ratio, set2 / abs(nominal.v_neg))
        v_board = min(max(ratio, 0.0), 2.0) * nominal.v_pos
        i = self.world.supply_current_a(round(v_board, 4)) if v_board > 0 else 0.0
        result: dict[int, tuple[float, float, bool]] = {}
        for n, o, v_set in ((1, out1, set1), (2, out2, set2)):
            feeds = n == 1 or self._split()
            draw = i if feeds and o.on else 0.0
            if o.on and draw > o.current_a:
                # constant current: a resistive board at the limit current
                result[n] = (v_set * o.current_a / draw, o.current_a, True)
            else:
                result[n] = (v_set, draw, False)
        return result

    def rails(self) -> tuple[float, float]:
        """(positive rail volts, negative rail magnitude) the board sees."""
        st = self.state()
        return st[1][0], st[2][0]

    def _voltage(self, ctx: Ctx, value: float) -> None:
        n = self._n(ctx)
        self.outputs[n].voltage_v = value
        self._note(SupplyEvent(time.monotonic(), "voltage_v", value, n))

    def _voltage_q(self, ctx: Ctx, which: str | None) -> str:
        return _bound(self.VOLT, which, self.outputs[self._n(ctx)].voltage_v)

    def _current(self, ctx: Ctx, value: float) -> None:
        n = self._n(ctx)
        self.outputs[n].current_a = value
        self._note(SupplyEvent(time.monotonic(), "current_limit_a", value, n))

    def _current_q(self, ctx: Ctx, which: str | None) -> str:
        return _bound(self.CURR, which, self.outputs[self._n(ctx)].current_a)

    def _output(self, ctx: Ctx, on: bool) -> None:
        n = self._n(ctx)
        self.outputs[n].on = on
        self._note(SupplyEvent(time.monotonic(), "output", 1.0 if on else 0.0, n))

    def _output_q(self, ctx: Ctx) -> str:
        return "1" if self.outputs[self._n(ctx)].on else "0"

    def _meas_current(self, ctx: Ctx) -> str:
        amps = self.state()[self._n(ctx)][1]
        return format_number(round(amps + float(self.world.rng.normal(0, self.NOISE_A)), 9))

    def _meas_voltage(self, ctx: Ctx) -> str:
        return format_number(round(self.state()[self._n(ctx)][0], 6))

    def _tripped_q(self, ctx: Ctx) -> str:
        return "1" if self.state()[self._n(ctx)][2] else "0"

    COMMANDS: ClassVar[tuple[Command, ...]] = (
        Command(
            "[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            _voltage,
            (VOLT,),
            name="set_voltage",
        ),
        Command("[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]?", _voltage_q, (_QUERY_BOUND,)),
        Command(
            "[SOURce#:]CURRent[:LEVel][:IMMediate][:AMPLitude]",
            _current,
            (CURR,),
            name="set_current_limit",
        ),
        Command("[SOURce#:]CURRent[:LEVel][:IMMediate][:AMPLitude]?", _current_q, (_QUERY_BOUND,)),
        Command("[SOURce#:]CURRent:PROTection:TRIPped?", _tripped_q, name="query_tripped"),
        Command("OUTPut#[:STATe]", _output, (Bool(),), name="output"),
        Command("OUTPut#[:STATe]?", _output_q, name="query_output"),
        Command("MEASure#[:SCALar]:CURRent[:DC]?", _meas_current, name="measure_current"),
        Command("MEASure#[:SCALar]:VOLTage[:DC]?", _meas_voltage, name="measure_voltage"),
    )
