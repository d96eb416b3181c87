"""The "benchtop" dialect of the simulated bench: a scope and a generator that work the way
most small-line and repair-bench instruments do, with SCPI-style command names of our own.

Scope (``benchtop-scope`` profile):

- vertical in volts per division over 10 divisions with a position in divisions
  (``VIEW<n>:SCALe``, ``VIEW<n>:POSition``); a requested scale is rounded up to the
  1-2-5 ladder; the screen centre is at position × scale volts;
- horizontal in seconds per division over 10 divisions (``TBASe:DIVision``, 1-2-5 ladder)
  and a memory depth (``TBASe:DEPTh``); the instrument chooses the sample rate — the
  highest rate of its 1-2-5 ladder whose record fits the depth — and so the record
  length; ``TBASe:INTerval?`` and ``TBASe:POINts?`` say what it chose;
- unsigned 8-bit codes around reference code 128 (``DUMP:ENCoding BYTE``), or in the
  12-bit high-resolution mode (``RUN:FINE ON``; averaging lowers the input noise by 4)
  16-bit words around 2048 (``WORD``), or decimal text (``TEXT``); the scaling comes from
  a preamble ``DUMP<n>:SCALing?`` = ``<encoding>,<points>,<x_increment>,<x_origin>,
  <y_increment>,<y_origin>,<y_reference>``, volts = (code − y_reference)·y_increment +
  y_origin;
- reads by start and stop index, 1-based and inclusive, of at most 5000 points
  (``DUMP<n>:DATA? <start>,<stop>``; more is -222); a read while the acquisition runs
  is -230 with an empty block;
- ``RUN:SINGle`` starts one acquisition; ``RUN:STATe?`` answers ``WAIT`` until it is
  done, then ``DONE``; ``*OPC?`` answers at once and does not wait for it.

Generator (``benchtop-generator`` profile): level ``TONE:LEVel`` in the unit of
``TONE:LEVel:UNIT`` (VRMS, VPP or DBM), meaning the level across the load that
``TERMinal:LOAD`` names (50 ohm, or INFinity for high impedance; dBm needs a finite load);
frequency rounded to 1 mHz; output ``TERMinal:DRIVe``; 50 ohm source, 20 Vpp EMF at most.
"""

from __future__ import annotations

import math
import time
from dataclasses import replace
from typing import Any, ClassVar

from harness.instruments.scpi import encode_block, format_number, ladder_values
from harness.sim.instruments import GeneratorEvent, ScopeSettings, SimGenerator, SimScope
from harness.sim.scpi import Bool, Choice, Command, Ctx, Num, ScpiDevice, ScpiFailure
from harness.sim.world import Drive, World

__all__ = ["BENCHTOP_SCOPE", "SimBenchtopGenerator", "SimBenchtopScope"]

_L125 = (1.0, 2.0, 5.0)
#: Volts per division at the scope's own input, 1 mV to 10 V.
SCALES_V_DIV = ladder_values(_L125, 1e-3, 10.0)
#: Seconds per division, 1 us to 10 s.
TIME_SCALES_S_DIV = ladder_values(_L125, 1e-6, 10.0)
#: Sample rates the instrument chooses from, 1 kS/s to 100 MS/s.
RATES_HZ = ladder_values(_L125, 1e3, 1e8)
DEPTHS = (1000, 2000, 5000, 10000, 20000, 50000, 100000)
DIVISIONS = 10
MAX_POINTS_PER_READ = 5000

#: The benchtop front end: ranges are the scales over 10 divisions.
BENCHTOP_SCOPE = ScopeSettings(
    inputs=4,
    adc_bits=8,
    sample_rates_hz=RATES_HZ,
    record_lengths=DEPTHS,
    ranges_vpp=tuple(float(f"{x * DIVISIONS:.9g}") for x in SCALES_V_DIV),
)

_QUERY = Choice(("MINimum", "MAXimum"), optional=True)


def _round_up(values: tuple[float, ...], wanted: float) -> float:
    for v in values:
        if v >= wanted * (1 - 1e-9):
            return v
    return values[-1]


class SimBenchtopScope(SimScope):
    """Per-division scope with instrument-chosen timing, a preamble and chunked reads."""

    IDN = ("stageproof-sim", "BTS-4")
    HIGH_RES_BITS = 12
    HIGH_RES_NOISE_FACTOR = 0.25  # averaging 16 samples: input noise / 4

    def __init__(self, world: World, settings: ScopeSettings | None = None, **kw: Any) -> None:
        s = settings or BENCHTOP_SCOPE
        if s.ranges_vpp != BENCHTOP_SCOPE.ranges_vpp:
            s = replace(
                s,
                ranges_vpp=BENCHTOP_SCOPE.ranges_vpp,
                sample_rates_hz=RATES_HZ,
                record_lengths=DEPTHS,
            )
        super().__init__(world, s, **kw)
        self.IDN = ("stageproof-sim", f"BTS-{s.inputs}")

    def reset(self) -> None:
        super().reset()
        self.position = {n: 0.0 for n in self.inputs}
        for inp in self.inputs.values():
            inp.range_vpp = 1.0 * DIVISIONS  # 1 V/div
        self.time_div_s = 1e-3
        self.depth = 10000
        self.fine = False
        self.encoding = "BYTE"
        self._retime()

    # timing: the instrument chooses ------------------------------------------------------------

    def _retime(self) -> None:
        span = self.time_div_s * DIVISIONS
        fits = [r for r in RATES_HZ if r * span <= self.depth * (1 + 1e-9)]
        self.rate_hz = fits[-1] if fits else RATES_HZ[0]
        self.points = max(2, min(self.depth, round(self.rate_hz * span)))

    def _tdiv(self, ctx: Ctx, value: float) -> None:
        self.time_div_s = _round_up(TIME_SCALES_S_DIV, value)
        self._retime()

    def _tdiv_q(self, ctx: Ctx, which: str | None) -> str:
        return format_number(self.time_div_s)

    def _depth(self, ctx: Ctx, value: int) -> None:
        self.depth = int(_round_up(tuple(float(d) for d in DEPTHS), value))
        self._retime()

    def _depth_q(self, ctx: Ctx) -> str:
        return str(self.depth)

    def _interval_q(self, ctx: Ctx) -> str:
        return format_number(1.0 / self.rate_hz)

    def _points_read_q(self, ctx: Ctx) -> str:
        return str(self.points)

    # vertical ---------------------------------------------------------------------------------

    def _view(self, ctx: Ctx) -> int:
        return ctx.index("VIEW", self.settings.inputs)

    def _enable(self, ctx: Ctx, on: bool) -> None:
        self.inputs[self._view(ctx)].on = on

    def _enable_q(self, ctx: Ctx) -> str:
        return "1" if self.inputs[self._view(ctx)].on else "0"

    def _scale(self, ctx: Ctx, value: float) -> None:
        n = self._view(ctx)
        inp = self.inputs[n]
        at_input = value / inp.probe
        if at_input > SCALES_V_DIV[-1] * (1 + 1e-9):
            raise ScpiFailure(-222, f"scale {value:g} V/div")
        inp.range_vpp = _round_up(SCALES_V_DIV, at_input) * inp.probe * DIVISIONS
        inp.offset_v = self.position[n] * inp.range_vpp / DIVISIONS

    def _scale_q(self, ctx: Ctx) -> str:
        inp = self.inputs[self._view(ctx)]
        return format_number(float(f"{self.effective_range(inp) / DIVISIONS:.9g}"))

    def _position(self, ctx: Ctx, value: float) -> None:
        n = self._view(ctx)
        self.position[n] = value
        inp = self.inputs[n]
        inp.offset_v = value * self.effective_range(inp) / DIVISIONS

    def _position_q(self, ctx: Ctx) -> str:
        return format_number(self.position[self._view(ctx)])

    def _coupling(self, ctx: Ctx, value: str) -> None:
        self.inputs[self._view(ctx)].coupling = value

    def _bwl(self, ctx: Ctx, on: bool) -> None:
        self.inputs[self._view(ctx)].bw_limit = on

    def _probe(self, ctx: Ctx, value: float) -> None:
        inp = self.inputs[self._view(ctx)]
        scale_at_input = inp.range_vpp / inp.probe
        inp.probe = value
        inp.range_vpp = scale_at_input * value

    def _catch_source(self, ctx: Ctx, value: Any) -> None:
        n = value[1] if isinstance(value, tuple) else None
        if n is None or not 1 <= n <= self.settings.inputs:
            raise ScpiFailure(-224, f"trigger source {value}")
        self.trig_source = n

    def _catch_edge(self, ctx: Ctx, value: str) -> None:
        self.trig_slope = "POSitive" if value == "RISE" else "NEGative"

    # acquisition -------------------------------------------------------------------------------

    def resolution(self) -> tuple[int, float]:
        if self.fine:
            return self.HIGH_RES_BITS, self.settings.noise_v_rms * self.HIGH_RES_NOISE_FACTOR
        return self.settings.adc_bits, self.settings.noise_v_rms

    def _fine(self, ctx: Ctx, on: bool) -> None:
        self.fine = on

    def _fine_q(self, ctx: Ctx) -> str:
        return "1" if self.fine else "0"

    def _single(self, ctx: Ctx) -> None:
        self.acquire()

    def _run_state_q(self, ctx: Ctx) -> str:
        return "DONE" if time.monotonic() >= self.busy_until else "WAIT"

    def _opc_now(self, ctx: Ctx) -> str:
        """``*OPC?`` of this instrument: it does not count the acquisition as pending."""
        return "1"

    def _encoding(self, ctx: Ctx, value: str) -> None:
        self.encoding = value

    def _encoding_q(self, ctx: Ctx) -> str:
        return self.encoding

    def _ref_code(self, bits: int) -> int:
        return 2 ** (bits - 1)

    def _scaling_q(self, ctx: Ctx) -> str:
        n = ctx.index("DUMP", self.settings.inputs)
        rec = self.record
        if rec is None:
            raise ScpiFailure(-230, "no acquisition")
        inp = rec.inputs[n]
        lsb = self.effective_range(inp) / 2**rec.bits
        return ",".join(
            [
                self.encoding,
                str(rec.points),
                format_number(1.0 / rec.rate_hz),
                "0",
                format_number(float(f"{lsb:.10g}")),
                format_number(inp.offset_v),
                str(self._ref_code(rec.bits)),
            ]
        )

    def _dump(self, ctx: Ctx, start: int, stop: int) -> bytes:
        n = ctx.index("DUMP", self.settings.inputs)
        empty = encode_block(b"") if self.encoding != "TEXT" else b""
        if time.monotonic() < self.busy_until:
            raise ScpiFailure(-230, "acquisition still running", reply=empty)
        rec = self.record
        if rec is None:
            raise ScpiFailure(-230, "no acquisition", reply=empty)
        if not 1 <= start <= stop <= rec.points:
            raise ScpiFailure(-222, f"points {start}-{stop} of {rec.points}", reply=empty)
        if stop - start + 1 > MAX_POINTS_PER_READ:
            raise ScpiFailure(-222, f"more than {MAX_POINTS_PER_READ} points", reply=empty)
        codes, _lsb, _offset = self.codes(n)
        unsigned = codes[start - 1 : stop] + self._ref_code(rec.bits)
        if self.encoding == "TEXT":
            return ",".join(str(int(c)) for c in unsigned).encode()
        if self.encoding == "BYTE":
            if rec.bits > 8:
                raise ScpiFailure(-221, "12-bit codes do not fit BYTE; use WORD", reply=empty)
            payload = unsigned.astype("u1").tobytes()
        else:
            payload = unsigned.astype(">u2").tobytes()
        if self.latency:
            ctx.outcome.delay_s += len(payload) / self.settings.link_bytes_per_s
        return encode_block(payload)

    def _common_commands(self) -> tuple[Command, ...]:
        cls = SimBenchtopScope
        common = tuple(c for c in ScpiDevice._common_commands(self) if c.pattern != "*OPC?")
        scale = Num("V", 1e-6, 1e5, 1.0)
        return (
            *common,
            Command("*OPC?", cls._opc_now, name="wait_complete"),
            Command("VIEW#:ENABle", cls._enable, (Bool(),), name="input_on"),
            Command("VIEW#:ENABle?", cls._enable_q),
            Command("VIEW#:SCALe", cls._scale, (scale,), name="set_scale"),
            Command("VIEW#:SCALe?", cls._scale_q, name="query_scale"),
            Command("VIEW#:POSition", cls._position, (Num(None, -5, 5, 0.0),), name="set_offset"),
            Command("VIEW#:POSition?", cls._position_q),
            Command("VIEW#:COUPling", cls._coupling, (Choice(("AC", "DC")),)),
            Command("VIEW#:BWLimit", cls._bwl, (Bool(),)),
            Command("VIEW#:PROBe", cls._probe, (Num(None, 0.001, 1000.0, 1.0),)),
            Command("TBASe:DIVision", cls._tdiv, (Num("S", 1e-9, 100.0, 1e-3),)),
            Command("TBASe:DIVision?", cls._tdiv_q, (_QUERY,)),
            Command("TBASe:DEPTh", cls._depth, (Num(None, 1, max(DEPTHS), 10000, integer=True),)),
            Command("TBASe:DEPTh?", cls._depth_q),
            Command("TBASe:INTerval?", cls._interval_q, name="query_sample_interval"),
            Command("TBASe:POINts?", cls._points_read_q, name="query_record_length"),
            Command("CATCh:SOURce", cls._catch_source, (Choice(("VIEW#",)),)),
            Command("CATCh:EDGE", cls._catch_edge, (Choice(("RISE", "FALL")),)),
            Command("CATCh:LEVel", SimScope._level, (Num("V", -1e4, 1e4, 0.0),)),
            Command("RUN:SINGle", cls._single, name="single"),
            Command("RUN:STATe?", cls._run_state_q, name="query_acquire_state"),
            Command("RUN:FINE", cls._fine, (Bool(),), name="set_high_resolution"),
            Command("RUN:FINE?", cls._fine_q),
            Command(
                "DUMP:ENCoding",
                cls._encoding,
                (Choice(("BYTE", "WORD", "TEXT")),),
                name="set_data_format",
            ),
            Command("DUMP:ENCoding?", cls._encoding_q),
            Command("DUMP#:SCALing?", cls._scaling_q, name="query_preamble"),
            Command(
                "DUMP#:DATA?",
                cls._dump,
                (Num(None, 1, 1e7, integer=True), Num(None, 1, 1e7, integer=True)),
                name="fetch",
                block=True,
            ),
        )


class SimBenchtopGenerator(SimGenerator):
    """Sine generator whose level means volts (or dBm) across the load it is told about."""

    IDN = ("stageproof-sim", "BTG-1")
    FREQ_RESOLUTION_HZ = 1e-3
    MAX_EMF_VPP = 20.0

    def reset(self) -> None:
        super().reset()
        self.unit = "VRMS"
        self.load_ohm = math.inf
        self.emf_rms = self.amplitude_vpp / (2 * math.sqrt(2))

    def drive(self) -> Drive:
        return Drive(
            self.emf_rms * math.sqrt(2),
            self.frequency_hz,
            self.offset_v,
            self.OUTPUT_OHM,
            self.output_on,
        )

    def _at_load(self) -> float:
        """Rms volts across the named load for the present EMF."""
        if math.isinf(self.load_ohm):
            return self.emf_rms
        return self.emf_rms * self.load_ohm / (self.load_ohm + self.OUTPUT_OHM)

    def _in_unit(self, vrms: float) -> float:
        if self.unit == "DBM":
            return 10 * math.log10(max(vrms, 1e-12) ** 2 / self.load_ohm / 1e-3)
        return vrms * (2 * math.sqrt(2) if self.unit == "VPP" else 1.0)

    def _level(self, ctx: Ctx, value: float) -> None:
        self._out(ctx)
        if self.unit == "DBM":
            if math.isinf(self.load_ohm):
                raise ScpiFailure(-221, "dBm needs a finite load")
            vrms = math.sqrt(1e-3 * self.load_ohm * 10 ** (value / 10))
        elif value < 0:
            raise ScpiFailure(-222, f"level {value:g}")
        else:
            vrms = value / (2 * math.sqrt(2)) if self.unit == "VPP" else value
        emf = vrms if math.isinf(self.load_ohm) else vrms * (1 + self.OUTPUT_OHM / self.load_ohm)
        if emf * 2 * math.sqrt(2) > self.MAX_EMF_VPP * (1 + 1e-9):
            raise ScpiFailure(-222, f"level {value:g} {self.unit}")
        self.emf_rms = emf
        self.amplitude_vpp = emf * 2 * math.sqrt(2)  # the log's unit: EMF Vpp (at high Z)
        self._note(GeneratorEvent(time.monotonic(), "amplitude_vpp", self.amplitude_vpp))

    def _level_q(self, ctx: Ctx) -> str:
        self._out(ctx)
        if self.unit == "DBM" and math.isinf(self.load_ohm):
            raise ScpiFailure(-221, "dBm needs a finite load")
        return format_number(float(f"{self._in_unit(self._at_load()):.10g}"))

    def _level_unit(self, ctx: Ctx, value: str) -> None:
        self._out(ctx)
        self.unit = value

    def _load(self, ctx: Ctx, value: Any) -> None:
        self._out(ctx)
        self.load_ohm = math.inf if value in ("INF", "INFINITY") else float(value)

    def _load_value_q(self, ctx: Ctx) -> str:
        self._out(ctx)
        return "9.9E37" if math.isinf(self.load_ohm) else format_number(self.load_ohm)

    def _tone_frequency(self, ctx: Ctx, value: float) -> None:
        res = self.FREQ_RESOLUTION_HZ
        super()._frequency(ctx, round(value / res) * res)

    def _tone_frequency_q(self, ctx: Ctx) -> str:
        self._out(ctx)
        return format_number(float(f"{self.frequency_hz:.12g}"))

    def _out(self, ctx: Ctx) -> int:
        return 1

    COMMANDS: ClassVar[tuple[Command, ...]] = (
        Command("TONE:SHAPe", SimGenerator._function, (Choice(("SINE",)),), name="set_function"),
        Command(
            "TONE:FREQuency",
            _tone_frequency,
            (Num("HZ", 1e-3, 10e6, 1000.0),),
            name="set_frequency",
        ),
        Command("TONE:FREQuency?", _tone_frequency_q, name="query_frequency"),
        Command("TONE:LEVel", _level, (Num(None, -200.0, 100.0, 0.1),), name="set_amplitude"),
        Command("TONE:LEVel?", _level_q, name="query_amplitude"),
        Command("TONE:LEVel:UNIT", _level_unit, (Choice(("VRMS", "VPP", "DBM")),)),
        Command("TONE:BIAS", SimGenerator._offset, (SimGenerator.OFFS,), name="set_offset"),
        Command(
            "TERMinal:LOAD",
            _load,
            (Num("OHM", 1.0, 1e6, 50.0, keywords=("INFINITY", "INF")),),
            name="set_load",
        ),
        Command("TERMinal:LOAD?", _load_value_q, name="query_load"),
        Command("TERMinal:DRIVe", SimGenerator._output, (Bool(),), name="output"),
        Command("TERMinal:DRIVe?", SimGenerator._output_q, name="query_output"),
    )
