"""Role drivers: what the sequencer asks for, in SI units, turned into profile operations.

Each driver speaks only through its :class:`~harness.instruments.session.Session` and the
session's profile, so adapting stageproof to another instrument means editing a TOML file,
not this code.  Drivers remember the settings they sent and replay them after a
reconnect (an instrument that was power-cycled comes back in its reset state).
"""

from __future__ import annotations

import contextlib
import logging
import math
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any, TypeVar

import numpy as np

from harness.errors import (
    ConnectionLost,
    InstrumentError,
    InstrumentTimeout,
    MalformedReply,
    ReadbackMismatch,
    StageproofError,
)
from harness.instruments.scpi import (
    DATATYPES,
    channel_list,
    format_text,
    parse_ascii_values,
    parse_bool,
    parse_number,
    parse_preamble,
)
from harness.instruments.session import Session

T = TypeVar("T")

__all__ = [
    "Acquisition",
    "Dmm",
    "Generator",
    "Scope",
    "Supply",
    "Switch",
    "amplitude_setting",
    "level_at_load",
]

log = logging.getLogger("harness.instruments")

_RMS_TO = {"vrms": 1.0, "vpk": math.sqrt(2.0), "vpp": 2.0 * math.sqrt(2.0)}


def _rms_to_unit(vrms: float, unit: str, load_ohm: float) -> float:
    """An rms voltage across ``load_ohm`` in ``unit``; dBm is power re 1 mW into that load."""
    if unit == "dbm":
        if not vrms > 0:
            raise ValueError("a level of 0 V has no dBm value; switch the output off instead")
        return 10.0 * math.log10(vrms * vrms / load_ohm / 1e-3)
    return vrms * _RMS_TO[unit]


def _unit_to_rms(setting: float, unit: str, load_ohm: float) -> float:
    if unit == "dbm":
        return math.sqrt(1e-3 * load_ohm * 10.0 ** (setting / 10.0))
    return setting / _RMS_TO[unit]


def amplitude_setting(
    level_vrms: float, *, load_ohm: float, unit: str, calibrated_load_ohm: float, output_ohm: float
) -> float:
    """The generator setting that puts ``level_vrms`` across a load of ``load_ohm``.

    The generator is an EMF behind ``output_ohm``; the level at a load Z_L is
    EMF·Z_L/(Z_L + R_out).  Its display assumes ``calibrated_load_ohm``: the setting is the
    level that EMF would give across that load, so a generator calibrated for 50 Ω whose
    output is 50 Ω has EMF = 2 × setting (common practice), and a high-Z-calibrated one
    EMF = setting.  ``math.inf`` stands for high impedance.  A dBm setting is the power that
    level would put into the calibrated load: 10·log10(V²/R / 1 mW).
    """
    if level_vrms < 0 or not math.isfinite(level_vrms):
        raise ValueError(f"level must be a finite rms value >= 0, not {level_vrms}")
    emf = level_vrms * (1.0 + output_ohm / load_ohm)  # V·(Z_L+R)/Z_L, Z_L=inf -> V
    setting_rms = emf / (1.0 + output_ohm / calibrated_load_ohm)
    return _rms_to_unit(setting_rms, unit, calibrated_load_ohm)


def level_at_load(
    setting: float, *, load_ohm: float, unit: str, calibrated_load_ohm: float, output_ohm: float
) -> float:
    """Inverse of :func:`amplitude_setting`: rms volts across ``load_ohm`` for a setting."""
    emf = _unit_to_rms(setting, unit, calibrated_load_ohm) * (
        1.0 + output_ohm / calibrated_load_ohm
    )
    return emf / (1.0 + output_ohm / load_ohm)


class _Driver:
    role = ""

    def __init__(self, session: Session) -> None:
        if session.profile.role != self.role:
            raise InstrumentError(
                f"{type(self).__name__} needs a {self.role} profile, got "
                f"{session.profile.role!r} ({session.profile.name})",
                resource=session.resource,
                role=session.role,
            )
        self.session = session
        self.profile = session.profile
        self.settings = session.profile.settings
        # key -> (op, params): the last value of each setting, replayed after reconnect
        self._state: dict[tuple[Any, ...], tuple[str, dict[str, Any]]] = {}
        session.add_reconfigure_hook(self._replay)

    def _set(self, key: tuple[Any, ...], op: str, **params: Any) -> str:
        cmd = self.session.configure(op, **params)
        self._state.pop(key, None)  # keep replay order = order of last change
        self._state[key] = (op, params)
        return cmd

    def _replay(self) -> None:
        for op, params in list(self._state.values()):
            self.session.configure(op, **params)

    def _parsed(self, parse: Callable[[str], T], reply: str, command: str) -> T:
        """Parse a reply; a reply that does not parse names this instrument and the command."""
        try:
            return parse(reply)
        except MalformedReply as exc:
            raise self.session._typed(MalformedReply, exc.message, command, exc.hint) from None

    def _ask(self, parse: Callable[[str], T], op: str, **params: Any) -> T:
        command = self.profile.render(op, **params)
        return self._parsed(parse, self.session.query(command), command)

    def read_back(
        self,
        setting: str,
        op: str,
        requested: float | bool,
        *,
        tolerance: float = 0.0,
        hint: str | None = None,
        **params: Any,
    ) -> Any:
        """Ask the instrument what ``setting`` is now and hold it to ``requested``.

        Read back, never assume: a number may differ by ``tolerance`` (the instrument's
        resolution), a state not at all; anything else is a :class:`ReadbackMismatch`
        naming this instrument and the setting.  Returns the value read back.
        """
        command = self.profile.render(op, **params)
        parse: Callable[[str], Any] = parse_bool if isinstance(requested, bool) else parse_number
        value = self._parsed(parse, self.session.query(command), command)
        if isinstance(requested, bool):
            ok = value is requested
        else:
            # equal covers infinity (SCPI 9.9E37: a high-impedance load, for one)
            ok = value == requested or (
                math.isfinite(value) and abs(value - requested) <= tolerance
            )
        if not ok:
            raise self._mismatch(
                setting,
                requested,
                value,
                command,
                hint or f"check the profile's {setting} settings against the instrument",
            )
        return value

    def _mismatch(
        self, setting: str, requested: Any, got: Any, command: str, hint: str
    ) -> ReadbackMismatch:
        return ReadbackMismatch(
            setting,
            requested,
            got,
            resource=self.session.resource,
            command=command,
            role=self.session.role,
            hint=hint,
        )

    def _err(self, message: str, hint: str | None = None) -> InstrumentError:
        return InstrumentError(
            message, resource=self.session.resource, role=self.session.role, hint=hint
        )

    def _output_no(self, output: int) -> int:
        n = self.settings.get("outputs", 1)
        if not 1 <= int(output) <= n:
            raise self._err(
                f"output {output} does not exist (profile has {n})",
                "fix the output number in the fixture file",
            )
        return int(output)


class _SwitchedOutputs(_Driver):
    """Outputs that switch on and off and read back their state (generator, supply)."""

    def output(self, on: bool, output: int = 1) -> None:
        o = self._output_no(output)
        self._set(("output", o), "output_on" if on else "output_off", output=o)

    def is_on(self, output: int = 1) -> bool:
        return self._ask(parse_bool, "query_output", output=self._output_no(output))

    def _outputs_off(self, count: int) -> bool:
        """Outputs 1..count off, each read back; logs instead of raising, True when all are off."""
        ok = True
        for o in range(1, count + 1):
            try:
                self.session.write(self.profile.render("output_off", output=o))
                self._state[("output", o)] = ("output_off", {"output": o})
                if self.is_on(o):  # read back: an ignored command must not pass as off
                    raise self._err(f"output {o} still reports ON after output_off")
            except (StageproofError, OSError) as exc:
                ok = False
                log.error(
                    "%s %s output %d may still be ON: %s", self.session.resource, self.role, o, exc
                )
        return ok


# --- signal generator -------------------------------------------------------------------------


class Generator(_SwitchedOutputs):
    """Sine source.  Levels are rms volts at the DUT input, whatever the profile's unit."""

    role = "generator"

    def __init__(self, session: Session) -> None:
        super().__init__(session)
        self._prepared: set[int] = set()
        #: output -> amplitude read back after the last set_level (profile unit)
        self._read_setting: dict[int, float] = {}

    @property
    def output_ohm(self) -> float:
        return float(self.settings["output_ohm"])

    def _replay(self) -> None:
        """Replay settings after a reconnect, but never switch an output back on.

        A power-cycled generator comes back with its output off; turning it on again is the
        sequencer's decision (it ramps up from a low level), not a side effect of a reconnect.
        """
        for key, (op, params) in list(self._state.items()):
            if op == "output_on":
                self._state[key] = ("output_off", params)
        self._read_setting.clear()  # a read-back from before the reconnect is stale
        super()._replay()

    def _prepare(self, o: int) -> None:
        """Before the first setting of an output: the amplitude unit and the load the
        instrument is told to assume (a 50 ohm / high-Z setting changes what a level means),
        the load read back where the profile can ask."""
        if o in self._prepared:
            return
        if self.profile.has("set_amplitude_unit"):
            self._set(("unit", o), "set_amplitude_unit", output=o)
        if self.profile.has("set_load"):
            cal = self.settings["calibrated_load"]
            self._set(
                ("load", o), "set_load", output=o, load="INFinity" if math.isinf(cal) else cal
            )
            if self.profile.has("query_load"):
                self.read_back(
                    "load",
                    "query_load",
                    cal,
                    tolerance=cal * 1e-6,
                    hint="the generator did not take the load setting: check set_load",
                    output=o,
                )
        self._prepared.add(o)

    def frequency_for(self, frequency_hz: float) -> float:
        """``frequency_hz`` on the generator's frequency grid (its resolution)."""
        res = float(self.settings["frequency_resolution_hz"])
        return round(frequency_hz / res) * res if res > 0 else float(frequency_hz)

    def configure_sine(self, frequency_hz: float, output: int = 1) -> float:
        """A sine at ``frequency_hz`` (rounded to the generator's resolution); returns the
        frequency the generator reports, which is what the analysis must use."""
        o = self._output_no(output)
        if not frequency_hz > 0:
            raise ValueError(f"frequency must be > 0 Hz, not {frequency_hz}")
        self._prepare(o)
        f = self.frequency_for(frequency_hz)
        self._set(("function", o), "set_function", output=o)
        self._set(("frequency", o), "set_frequency", output=o, frequency_hz=f)
        res = float(self.settings["frequency_resolution_hz"])
        return float(
            self.read_back(
                "frequency",
                "query_frequency",
                f,
                tolerance=max(res * 0.5, abs(f) * 1e-9) * (1 + 1e-6),
                hint="check frequency_resolution_hz in the generator profile",
                output=o,
            )
        )

    def amplitude_for(self, level_vrms: float, *, load_ohm: float = math.inf) -> float:
        """The setting (in the profile's unit) for ``level_vrms`` across ``load_ohm``."""
        return amplitude_setting(
            level_vrms,
            load_ohm=load_ohm,
            unit=self.settings["amplitude_unit"],
            calibrated_load_ohm=self.settings["calibrated_load"],
            output_ohm=self.output_ohm,
        )

    def set_level(self, vrms: float, *, load_ohm: float = math.inf, output: int = 1) -> float:
        """Set the level so the DUT input (``load_ohm``) sees ``vrms``; returns the setting.

        The amplitude is read back: a generator that clamps or ignores a level stops the
        run (:class:`ReadbackMismatch`) instead of leaving a wrong level unnoticed.
        """
        o = self._output_no(output)
        self._prepare(o)
        unit = self.settings["amplitude_unit"]
        cal = self.settings["calibrated_load"]
        setting = self.amplitude_for(vrms, load_ohm=load_ohm)
        setting_rms = _unit_to_rms(setting, unit, cal)
        setting_vpp = setting_rms * _RMS_TO["vpp"]
        if setting_vpp > self.settings["max_amplitude_vpp"] * (1 + 1e-9):
            raise self._err(
                f"{vrms:g} Vrms into {load_ohm:g} ohm needs {setting_vpp:g} Vpp, above the "
                f"generator's {self.settings['max_amplitude_vpp']:g} Vpp",
                "lower the level or check calibrated_load/output_ohm in the profile",
            )
        self._set(("amplitude", o), "set_amplitude", output=o, amplitude=setting)
        rel = float(self.settings["amplitude_tolerance_rel"])
        # compared as rms volts: a relative tolerance means the same in every unit
        tol = 20 * math.log10(1 + rel) if unit == "dbm" else abs(setting) * rel
        self._read_setting.pop(o, None)
        if not self.profile.has("query_amplitude"):
            return setting  # nothing to read back with: the input probe is the only check
        try:
            got = self.read_back(
                "amplitude",
                "query_amplitude",
                setting,
                tolerance=tol,
                hint="check amplitude_unit, calibrated_load and max_amplitude_vpp in the profile",
                output=o,
            )
        except ReadbackMismatch as exc:
            if isinstance(exc.read_back, float) and math.isfinite(exc.read_back):
                self._read_setting[o] = exc.read_back  # what the caller reports as the level
            raise
        self._read_setting[o] = float(got)
        return setting

    def set_offset(self, offset_v: float, *, load_ohm: float = math.inf, output: int = 1) -> None:
        """DC offset at the load; scaled by the same divider as the level."""
        o = self._output_no(output)
        cal = self.settings["calibrated_load"]
        emf = offset_v * (1.0 + self.output_ohm / load_ohm)
        self._set(
            ("offset", o), "set_offset", output=o, offset_v=emf / (1.0 + self.output_ohm / cal)
        )

    def amplitude_setting(self, output: int = 1) -> float:
        """The amplitude the instrument reports (profile unit), if the profile can ask."""
        return self._ask(parse_number, "query_amplitude", output=self._output_no(output))

    def level_readback_vrms(self, *, load_ohm: float = math.inf, output: int = 1) -> float | None:
        """The level the instrument reports, as rms volts across ``load_ohm`` (the inverse
        of :meth:`set_level`, which reads the amplitude back after every change); None when
        the profile has no ``query_amplitude``."""
        if not self.profile.has("query_amplitude"):
            return None
        o = self._output_no(output)
        # the value set_level has just read back, else a fresh query: one read per change
        setting = self._read_setting.get(o)
        return level_at_load(
            self.amplitude_setting(o) if setting is None else setting,
            load_ohm=load_ohm,
            unit=self.settings["amplitude_unit"],
            calibrated_load_ohm=self.settings["calibrated_load"],
            output_ohm=self.output_ohm,
        )

    def safe_off(self) -> bool:
        """Best effort: every output off and read back.  Never raises; True when all are off."""
        return self._outputs_off(int(self.settings.get("outputs", 1)))


# --- oscilloscope / digitiser -----------------------------------------------------------------


@dataclass(frozen=True)
class InputSetup:
    input: int
    range_vpp: float  # full scale at the probe tip, as read back
    offset_v: float  # centre of the range at the probe tip
    probe: float
    coupling: str
    bandwidth_limit: bool


@dataclass(frozen=True)
class Timebase:
    """What the scope reports it will acquire (read back after every timebase set-up)."""

    sample_rate_hz: float
    points: int


@dataclass(frozen=True)
class Acquisition:
    """One single-shot record.  Volts are at the probe tip (probe factor applied)."""

    sample_rate_hz: float
    volts: dict[int, np.ndarray]
    adc_limits: dict[int, tuple[float, float]]
    bits: int
    ranges_vpp: dict[int, float] = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return len(next(iter(self.volts.values()))) if self.volts else 0


def _pick(values: Iterable[float], wanted: float, what: str) -> float:
    for v in sorted(values):
        if math.isclose(v, wanted, rel_tol=1e-9):
            return v
    raise ValueError(f"{what} {wanted:g} not offered")


def _at_least(values: Iterable[float], wanted: float) -> float:
    """The smallest of ``values`` >= ``wanted`` (else the largest)."""
    vs = sorted(values)
    for v in vs:
        if v >= wanted * (1 - 1e-9):
            return v
    return vs[-1]


@dataclass(frozen=True)
class _Scaling:
    """Codes -> probe-tip volts for one input of one record: (code - ref) * lsb + origin."""

    reference: float
    lsb_v: float
    origin_v: float


class Scope(_Driver):
    """Digitiser: input set-up, timebase, trigger, single acquisition, fetch — every mode
    the profile language describes (README, "Writing a profile for your instrument").

    Vertical by full-scale range or volts/division; horizontal by sample rate, time per
    division or record time (the latter two let the instrument choose rate and length).
    Every set-up is read back and what the instrument reports is what is used.  Scaling is
    one of a fixed set (``range_and_bits``, ``per_division``, ``preamble``): volts =
    (code − reference)·lsb + origin, lsb and origin from the read-back range (range/2^bits,
    offset) or from the preamble (y_increment, y_origin, y_reference).  When the profile has
    ``set_probe`` the instrument works in probe-tip volts; otherwise the driver divides range
    and offset by the probe factor on the way out and multiplies the data.
    """

    role = "scope"

    def __init__(self, session: Session) -> None:
        super().__init__(session)
        self._inputs: dict[int, InputSetup] = {}
        self._rate_hz: float | None = None
        self._points: int | None = None
        self._format_sent = False

    @property
    def inputs(self) -> int:
        return int(self.settings["inputs"])

    @property
    def high_resolution(self) -> bool:
        return bool(self.settings["high_resolution"])

    @property
    def bits(self) -> int:
        if self.high_resolution:
            return int(self.settings["high_resolution_bits"])
        return int(self.settings["adc_bits"])

    @property
    def data_format(self) -> str:
        if self.high_resolution and self.settings["high_resolution_format"]:
            return str(self.settings["high_resolution_format"])
        return str(self.settings["data_format"])

    @property
    def sample_rates_hz(self) -> tuple[float, ...]:
        return tuple(self.settings["sample_rates_hz"])

    @property
    def record_lengths(self) -> tuple[int, ...]:
        return tuple(self.settings["record_lengths"])

    @property
    def ranges_vpp(self) -> tuple[float, ...]:
        """Full-scale ranges at the scope input; per-division scopes: scale × divisions."""
        if self.settings["vertical"] == "per_division":
            d = int(self.settings["divisions"])
            return tuple(float(f"{x * d:.9g}") for x in self.settings["scales_v_div"])
        return tuple(self.settings["ranges_vpp"])

    @property
    def _instrument_probe(self) -> bool:
        return self.profile.has("set_probe")

    def _input_no(self, n: int) -> int:
        if not 1 <= int(n) <= self.inputs:
            raise self._err(
                f"scope input {n} does not exist (profile has {self.inputs})",
                "fix the scope input in the fixture file",
            )
        return int(n)

    def _close(self, a: float, b: float) -> bool:
        return math.isclose(a, b, rel_tol=float(self.settings["readback_tolerance_rel"]))

    def range_for(self, range_vpp: float, probe: float = 1.0) -> float:
        """Smallest offered full-scale range (tip volts) >= ``range_vpp``."""
        for r in self.ranges_vpp:
            if r * probe >= range_vpp * (1 - 1e-9):
                return r * probe
        raise self._err(
            f"no range covers {range_vpp:g} Vpp with probe {probe:g}",
            f"largest is {self.ranges_vpp[-1] * probe:g} Vpp; use a higher probe factor",
        )

    def configure_input(
        self,
        input: int,
        *,
        range_vpp: float,
        offset_v: float = 0.0,
        coupling: str = "DC",
        probe: float = 1.0,
        bandwidth_limit: bool = False,
    ) -> InputSetup:
        """Switch ``input`` on with the smallest range covering ``range_vpp`` (tip volts);
        the range (or scale) is read back and the returned set-up holds what the scope says."""
        n = self._input_no(input)
        cpl = coupling.upper()
        if cpl not in ("AC", "DC"):
            raise ValueError(f"coupling must be 'AC' or 'DC', not {coupling!r}")
        if not probe > 0:
            raise ValueError(f"probe factor must be > 0, not {probe}")
        tip_range = self.range_for(range_vpp, probe)
        div = 1.0 if self._instrument_probe else probe
        self._set(("input_on", n), "input_on", input=n)
        if self._instrument_probe:
            self._set(("probe", n), "set_probe", input=n, probe=probe)
        per_div = self.settings["vertical"] == "per_division"
        divisions = int(self.settings["divisions"])
        if per_div:
            scale = tip_range / divisions / div
            self._set(("range", n), "set_scale", input=n, scale_v_div=scale)
            got = self.read_back(
                "vertical scale (V/div)",
                "query_scale",
                scale,
                tolerance=scale * float(self.settings["readback_tolerance_rel"]),
                hint="the profile's scales_v_div must list the scales the scope offers",
                input=n,
            )
            tip_range = float(got) * divisions * div
        else:
            self._set(("range", n), "set_range", input=n, range_vpp=tip_range / div)
            got = self.read_back(
                "vertical range (Vpp)",
                "query_range",
                tip_range / div,
                tolerance=tip_range / div * float(self.settings["readback_tolerance_rel"]),
                hint="the profile's ranges_vpp must list the ranges the scope offers",
                input=n,
            )
            tip_range = float(got) * div
        scale_tip = tip_range / divisions
        self._set(
            ("offset", n),
            "set_offset",
            input=n,
            offset_v=offset_v / div,
            position_div=offset_v / scale_tip,
        )
        self._set(("coupling", n), "set_coupling", input=n, coupling=cpl)
        self._set(
            ("bwl", n), "set_bandwidth_limit", input=n, state="ON" if bandwidth_limit else "OFF"
        )
        setup = InputSetup(n, tip_range, float(offset_v), float(probe), cpl, bool(bandwidth_limit))
        self._inputs[n] = setup
        return setup

    def disable_input(self, input: int) -> None:
        n = self._input_no(input)
        if self.profile.has("input_off"):
            self._set(("input_on", n), "input_off", input=n)
        self._inputs.pop(n, None)

    def configure_timebase(self, sample_rate_hz: float, points: int) -> Timebase:
        """Ask for ``points`` samples at ``sample_rate_hz``; returns what the scope reports.

        A scope set by sample rate must take the request exactly (a mismatch beyond the
        read-back tolerance is a :class:`ReadbackMismatch`); a scope set by time per
        division or record time chooses rate and length itself, and the caller plans
        with what it chose (at least the record time asked for).
        """
        mode = self.settings["horizontal"]
        want_s = int(points) / float(sample_rate_hz)
        if mode == "sample_rate":
            try:
                rate = _pick(self.sample_rates_hz, sample_rate_hz, "sample rate")
            except ValueError:
                raise self._err(
                    f"sample rate {sample_rate_hz:g} S/s not offered",
                    f"use one of {list(self.sample_rates_hz)}",
                ) from None
            if int(points) not in self.record_lengths:
                raise self._err(
                    f"record length {points} not offered",
                    f"use one of {list(self.record_lengths)}",
                )
            self._set(("rate",), "set_sample_rate", interval_s=1.0 / rate, sample_rate_hz=rate)
            self._set(("points",), "set_record_length", points=int(points))
        elif mode == "per_division":
            hdiv = int(self.settings["horizontal_divisions"])
            per_div = _at_least(self.settings["time_scales_s_div"], want_s / hdiv)
            depth = int(_at_least(self.record_lengths, sample_rate_hz * per_div * hdiv))
            self._set(("points",), "set_record_length", points=depth)
            self._set(("rate",), "set_time_scale", time_s_div=per_div)
        else:
            depth = int(_at_least(self.record_lengths, int(points)))
            self._set(("points",), "set_record_length", points=depth)
            self._set(("rate",), "set_record_time", record_s=want_s)
        interval = self._ask(parse_number, "query_sample_interval")
        got_points = self._ask(parse_number, "query_record_length")
        if not (interval > 0 and math.isfinite(interval) and got_points >= 1):
            raise MalformedReply(
                f"timebase read back as interval {interval!r} s, {got_points!r} points",
                resource=self.session.resource,
                command=self.profile.render("query_sample_interval"),
                role=self.session.role,
                hint="check query_sample_interval and query_record_length in the profile",
            )
        # 1/interval in ten digits: an instrument reporting 1E-5 s samples at 100 kS/s exactly
        tb = Timebase(float(f"{1.0 / interval:.10g}"), round(got_points))
        if mode == "sample_rate":
            if not self._close(tb.sample_rate_hz, sample_rate_hz):
                raise self._mismatch(
                    "sample rate (S/s)",
                    float(sample_rate_hz),
                    tb.sample_rate_hz,
                    self.profile.render("query_sample_interval"),
                    "the profile's sample_rates_hz must list rates the scope offers",
                )
            if tb.points != int(points):
                raise self._mismatch(
                    "record length (points)",
                    int(points),
                    tb.points,
                    self.profile.render("query_record_length"),
                    "the profile's record_lengths must list lengths the scope offers",
                )
            tb = Timebase(float(sample_rate_hz), tb.points)
        self._rate_hz, self._points = tb.sample_rate_hz, tb.points
        return tb

    def configure_trigger(self, source: int | str, level_v: float = 0.0) -> None:
        """Trigger on scope input ``source`` (an int) or a named source (``EXTernal``)."""
        if isinstance(source, int):
            src = self.settings["trigger_input_source"].format(input=self._input_no(source))
        else:
            src = source
        self._set(("trigger",), "set_trigger", source=src, level_v=level_v)

    def _ensure_format(self) -> None:
        if not self._format_sent:
            if self.profile.has("set_high_resolution"):
                self._set(
                    ("hires",), "set_high_resolution", state="ON" if self.high_resolution else "OFF"
                )
            ascii_ = self.settings["transfer"] == "ascii"
            text = format_text(self.settings, "ascii" if ascii_ else self.data_format)
            self._set(("format",), "set_data_format", format=text)
            self._format_sent = True

    def _code_span(self) -> tuple[int, int]:
        """Lowest and highest code of the data format at the active bit depth."""
        b = self.bits
        if self.data_format.startswith("uint"):
            return 0, 2**b - 1
        return -(2 ** (b - 1)), 2 ** (b - 1) - 1

    def _reference(self) -> float:
        ref = int(self.settings["code_reference"])
        if ref >= 0:
            return float(ref)
        return float(2 ** (self.bits - 1)) if self.data_format.startswith("uint") else 0.0

    def _scaling(self, setup: InputSetup, pre: dict[str, float] | None) -> _Scaling:
        if pre is not None:
            k = 1.0 if self._instrument_probe else setup.probe
            return _Scaling(pre["y_reference"], pre["y_increment"] * k, pre["y_origin"] * k)
        return _Scaling(self._reference(), setup.range_vpp / 2**self.bits, setup.offset_v)

    def adc_limits(
        self, setup: InputSetup, pre: dict[str, float] | None = None
    ) -> tuple[float, float]:
        """Tip volts of the lowest and highest code: a sample there may be clipped."""
        sc = self._scaling(setup, pre)
        lo, hi = self._code_span()
        return (lo - sc.reference) * sc.lsb_v + sc.origin_v, (
            hi - sc.reference
        ) * sc.lsb_v + sc.origin_v

    def _to_volts(
        self, data: np.ndarray, setup: InputSetup, pre: dict[str, float] | None = None
    ) -> np.ndarray:
        if self.data_format == "float32":
            v = data.astype(np.float64)
            return v if self._instrument_probe else v * setup.probe
        sc = self._scaling(setup, pre)
        return (data.astype(np.float64) - sc.reference) * sc.lsb_v + sc.origin_v

    def acquire(self, inputs: Iterable[int], points: int | None = None) -> Acquisition:
        """Single acquisition, wait until done, fetch the first ``points`` samples (default:
        the whole record read back) of each input.

        A connection lost part way (power cycle) restarts the whole acquisition once after
        the session has reconnected and replayed the settings.
        """
        wanted = [self._input_no(i) for i in inputs]
        for n in wanted:
            if n not in self._inputs:
                raise self._err(f"scope input {n} not configured", "call configure_input first")
        if self._rate_hz is None or self._points is None:
            raise self._err("timebase not configured", "call configure_timebase first")
        npts = self._points if points is None else int(points)
        if not 1 <= npts <= self._points:
            raise self._err(
                f"{npts} points asked of a {self._points}-point record",
                "plan the record from the timebase the scope reported",
            )
        try:
            return self._acquire_once(wanted, npts)
        except ConnectionLost as exc:
            log.warning("%s acquisition lost (%s); repeating once", self.session.resource, exc)
            return self._acquire_once(wanted, npts)

    def _wait_acquired(self, timeout_s: float) -> None:
        """``*OPC?``, or poll the profile's state query until its done reply (bounded)."""
        if self.settings["acquire_done"] == "opc":
            self.session.wait_complete(timeout_s, retry=False)
            return
        done = self.settings["done_reply"].strip().strip('"').upper()
        command = self.profile.render("query_acquire_state")
        deadline = time.monotonic() + timeout_s
        while True:
            reply = self.session.query(command, retry=False)
            if reply.strip().strip('"').upper() == done:
                return
            if time.monotonic() >= deadline:
                raise InstrumentTimeout(
                    f"acquisition not done within {timeout_s:.3g} s: query_acquire_state "
                    f"answered {reply[:40]!r}, never {self.settings['done_reply']!r}",
                    resource=self.session.resource,
                    command=command,
                    role=self.session.role,
                    hint="check done_reply and the trigger, or raise acquire_margin_s",
                )
            time.sleep(float(self.settings["poll_interval_s"]))

    def _preamble(self, n: int) -> dict[str, float]:
        command = self.profile.render("query_preamble", input=n)
        pre = self._parsed(
            lambda t: parse_preamble(t, self.settings["preamble_fields"]),
            self.session.query(command),
            command,
        )
        assert self._rate_hz is not None and self._points is not None
        if not self._close(1.0 / pre["x_increment"], self._rate_hz):
            raise self._mismatch(
                "sample interval (preamble x_increment)",
                1.0 / self._rate_hz,
                pre["x_increment"],
                command,
                "check the preamble_fields positions in the profile",
            )
        if "points" in pre and int(pre["points"]) != self._points:
            raise self._mismatch(
                "record length (preamble points)",
                self._points,
                int(pre["points"]),
                command,
                "check the preamble_fields positions in the profile",
            )
        return pre

    def _fetch(self, n: int, npts: int, tmo: int) -> np.ndarray:
        """The first ``npts`` codes (or volts) of input ``n``, in chunks of at most
        ``max_points_per_read`` addressed by start and stop index."""
        fmt = self.data_format
        big = self.settings["byte_order"] == "big"
        chunk = int(self.settings["max_points_per_read"]) or npts
        base = int(self.settings["index_base"])
        chunked = bool(self.settings["max_points_per_read"])
        parts: list[np.ndarray] = []
        for first in range(0, npts, chunk):
            count = min(chunk, npts - first)
            cmd = self.profile.render(
                "fetch", input=n, start=first + base, stop=first + count - 1 + base, count=count
            )
            if self.settings["transfer"] == "ascii":
                text = self.session.query(cmd, timeout_ms=tmo, retry=False)
                data = self._parsed(parse_ascii_values, text, cmd)
            else:
                data = self.session.query_block(
                    cmd,
                    fmt,
                    big_endian=big,
                    timeout_ms=tmo,
                    retry=False,
                    max_points=count if chunked else self._points,
                )
            if not chunked and len(data) == self._points:
                data = data[:count]  # a whole-record fetch: the plan uses its first points
            if len(data) != count:
                self.session.check_errors(cmd)  # an instrument refusal explains it best
                where = f" for points {first + base}-{first + count - 1 + base}" if chunked else ""
                raise MalformedReply(
                    f"input {n} returned {len(data)} points{where}, {count} announced",
                    resource=self.session.resource,
                    command=cmd,
                    role=self.session.role,
                    hint="check max_points_per_read, index_base and the fetch command",
                )
            parts.append(np.asarray(data))
        return parts[0] if len(parts) == 1 else np.concatenate(parts)

    def _acquire_once(self, wanted: list[int], npts: int) -> Acquisition:
        assert self._rate_hz is not None and self._points is not None
        self._ensure_format()
        record_s = self._points / self._rate_hz
        self.session.configure("single")
        self._wait_acquired(record_s + self.settings["acquire_margin_s"])
        # transfer time at the slowest expected rate (~10 MB/s) on top of the I/O timeout
        width = (
            12
            if self.settings["transfer"] == "ascii"
            else np.dtype(DATATYPES[self.data_format]).itemsize
        )
        tmo = self.session.timeout_ms + int(npts * width / 10e6 * 1000)
        preamble = self.settings["scaling"] == "preamble" and self.data_format != "float32"
        volts: dict[int, np.ndarray] = {}
        limits: dict[int, tuple[float, float]] = {}
        for n in wanted:
            pre = self._preamble(n) if preamble else None
            data = self._fetch(n, npts, tmo)
            setup = self._inputs[n]
            volts[n] = self._to_volts(data, setup, pre)
            limits[n] = self.adc_limits(setup, pre)
        # an error the scope queued during the acquisition must stop the run here, before
        # the record is analysed and stored as if it were sound
        self.session.check_errors(
            self.profile.render("fetch", input=wanted[-1], start=1, stop=npts, count=npts)
        )
        return Acquisition(
            sample_rate_hz=self._rate_hz,
            volts=volts,
            adc_limits=limits,
            bits=self.bits,
            ranges_vpp={n: self._inputs[n].range_vpp for n in wanted},
        )


# --- switch, DMM, supply ------------------------------------------------------------------------


class Switch(_Driver):
    """Relay matrix; channels are SCPI channel-list numbers."""

    role = "switch"

    def __init__(self, session: Session) -> None:
        super().__init__(session)
        # relays whose state open_all reads back: the fixture's routes (watch) and every
        # relay this session closed
        self._watched: set[int] = set()

    def watch(self, channels: Iterable[int]) -> None:
        """Also read back ``channels`` after every open_all (a station's fixture routes, so
        a relay a crashed process left closed is found at connect)."""
        self._watched.update(int(c) for c in channels)

    def _settle(self) -> None:
        if self.settings["settle_s"] > 0:
            time.sleep(self.settings["settle_s"])

    def close(self, channels: Iterable[int]) -> None:
        chans = list(channels)
        if chans:
            self._watched.update(chans)
            self._set(("route", tuple(chans)), "close", channels=channel_list(chans))
            self._settle()

    def open(self, channels: Iterable[int]) -> None:
        chans = list(channels)
        if chans:
            self._state.pop(("route", tuple(chans)), None)
            self.session.configure("open", channels=channel_list(chans))
            self._settle()

    def open_all(self) -> None:
        """Open every route, then read back each relay watched: one still closed (a welded
        contact, a profile whose open_all does nothing) is an InstrumentError, never "off"."""
        self._state = {k: v for k, v in self._state.items() if k[0] != "route"}
        self.session.configure("open_all")
        self._settle()
        chans = sorted(self._watched)
        if not chans:
            return
        left = [c for c, closed in zip(chans, self.is_closed(chans), strict=True) if closed]
        if left:
            raise InstrumentError(
                f"switch: relay(s) {', '.join(map(str, left))} still read closed after open_all",
                resource=self.session.resource,
                role=self.session.role,
                hint="check the relay card and the profile's open_all and query_closed",
            )

    def is_closed(self, channels: Iterable[int]) -> list[bool]:
        chans = list(channels)
        cmd = self.profile.render("query_closed", channels=channel_list(chans))
        reply = self.session.query(cmd)
        states = [self._parsed(parse_bool, x, cmd) for x in reply.split(",")]
        if len(states) != len(chans):
            raise InstrumentError(
                f"switch answered {len(states)} state(s) for {len(chans)} relay(s): {reply!r}",
                resource=self.session.resource,
                command=cmd,
                role=self.session.role,
            )
        return states

    @contextlib.contextmanager
    def routed(self, channels: Iterable[int]) -> Iterator[None]:
        """Close ``channels`` for the ``with`` body; open them again on every exit path."""
        chans = list(channels)
        self.close(chans)
        try:
            yield
        finally:
            self.open(chans)


class Dmm(_Driver):
    role = "dmm"

    @property
    def input_ohm(self) -> float:
        return float(self.settings["input_ohm"])

    def dc_volts(self, range_v: float | None = None) -> float:
        """One DC voltage reading; ``range_v=None`` lets the meter choose (DEFault)."""
        cmd = self.profile.render("measure_dc_volts", range_v="DEF" if range_v is None else range_v)
        value = self._parsed(parse_number, self.session.query(cmd), cmd)
        self.session.check_errors(cmd)
        return value


class Supply(_SwitchedOutputs):
    role = "supply"

    def configure(self, voltage_v: float, current_limit_a: float, output: int = 1) -> None:
        o = self._output_no(output)
        if not 0 <= voltage_v <= self.settings["max_voltage_v"]:
            raise self._err(
                f"{voltage_v:g} V outside 0-{self.settings['max_voltage_v']:g} V",
                "fix voltage_v in the fixture file",
            )
        if not 0 < current_limit_a <= self.settings["max_current_a"]:
            raise self._err(
                f"current limit {current_limit_a:g} A outside 0-"
                f"{self.settings['max_current_a']:g} A",
                "fix current_limit_a in the fixture",
            )
        self._set(("voltage", o), "set_voltage", output=o, voltage_v=voltage_v)
        self._set(("current", o), "set_current_limit", output=o, current_a=current_limit_a)

    def current_a(self, output: int = 1) -> float:
        return self._ask(parse_number, "measure_current", output=self._output_no(output))

    def voltage_v(self, output: int = 1) -> float:
        return self._ask(parse_number, "measure_voltage", output=self._output_no(output))

    def tripped(self, output: int = 1) -> bool:
        return self._ask(parse_bool, "query_tripped", output=self._output_no(output))

    def safe_off(self) -> bool:
        """Best effort: every output off and read back.  Never raises; True when all are off."""
        return self._outputs_off(int(self.settings["outputs"]))
