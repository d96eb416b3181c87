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

from harness.errors import ConnectionLost, InstrumentError, MalformedReply, StageproofError
from harness.instruments.scpi import DATATYPES, SCPI_FORMAT, channel_list, parse_bool, parse_number
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


def amplitude_setting(
    level_vrms: float, *, load_ohm: float, unit: str, calibrated_load_ohm: float, output_ohm: float
) -> float:
    """The generator setting that puts ``level_vrms`` across a load of ``load_ohm``.

    The generator is an EMF behind ``output_ohm``; the level at a load Z_L is
    EMF·Z_L/(Z_L + R_out).  Its display assumes ``calibrated_load_ohm``: the setting is the
    level that EMF would give across that load, so a generator calibrated for 50 Ω whose
    output is 50 Ω has EMF = 2 × setting (common practice), and a high-Z-calibrated one
    EMF = setting.  ``math.inf`` stands for high impedance.
    """
    if level_vrms < 0 or not math.isfinite(level_vrms):
        raise ValueError(f"level must be a finite rms value >= 0, not {level_vrms}")
    emf = level_vrms * (1.0 + output_ohm / load_ohm)  # V·(Z_L+R)/Z_L, Z_L=inf -> V
    setting_rms = emf / (1.0 + output_ohm / calibrated_load_ohm)
    return setting_rms * _RMS_TO[unit]


def level_at_load(
    setting: float, *, load_ohm: float, unit: str, calibrated_load_ohm: float, output_ohm: float
) -> float:
    """Inverse of :func:`amplitude_setting`: rms volts across ``load_ohm`` for a setting."""
    emf = setting / _RMS_TO[unit] * (1.0 + output_ohm / calibrated_load_ohm)
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
        super()._replay()

    def configure_sine(self, frequency_hz: float, output: int = 1) -> None:
        o = self._output_no(output)
        if not frequency_hz > 0:
            raise ValueError(f"frequency must be > 0 Hz, not {frequency_hz}")
        self._set(("function", o), "set_function", output=o)
        self._set(("frequency", o), "set_frequency", output=o, frequency_hz=frequency_hz)

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
        """Set the level so the DUT input (``load_ohm``) sees ``vrms``; returns the setting."""
        o = self._output_no(output)
        setting = self.amplitude_for(vrms, load_ohm=load_ohm)
        setting_vpp = setting / _RMS_TO[self.settings["amplitude_unit"]] * _RMS_TO["vpp"]
        if setting_vpp > self.settings["max_amplitude_vpp"] * (1 + 1e-9):
            raise self._err(
                f"{vrms:g} Vrms into {load_ohm:g} ohm needs {setting_vpp:g} Vpp, above the "
                f"generator's {self.settings['max_amplitude_vpp']:g} Vpp",
                "lower the level or check calibrated_load/output_ohm in the profile",
            )
        self._set(("amplitude", o), "set_amplitude", output=o, amplitude=setting)
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
        of :meth:`set_level`); None when the profile has no ``query_amplitude``."""
        if not self.profile.has("query_amplitude"):
            return None
        return level_at_load(
            self.amplitude_setting(output),
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
    range_vpp: float  # full scale at the probe tip
    offset_v: float  # centre of the range at the probe tip
    probe: float
    coupling: str
    bandwidth_limit: bool


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


class Scope(_Driver):
    """Digitiser: input set-up, timebase, trigger, single acquisition, block fetch.

    Scaling (profile settings): int codes -> volts = offset + code·range/2**adc_bits with
    codes from -2**(bits-1) to 2**(bits-1)-1; float32 blocks are volts as sent.  When the
    profile has ``set_probe`` the instrument works in probe-tip volts; otherwise the driver
    divides range and offset by the probe factor on the way out and multiplies the data.
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
    def bits(self) -> int:
        return int(self.settings["adc_bits"])

    @property
    def sample_rates_hz(self) -> tuple[float, ...]:
        return tuple(self.settings["sample_rates_hz"])

    @property
    def record_lengths(self) -> tuple[int, ...]:
        return tuple(self.settings["record_lengths"])

    @property
    def ranges_vpp(self) -> tuple[float, ...]:
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
        """Switch ``input`` on with the smallest range covering ``range_vpp`` (tip volts)."""
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
        self._set(("range", n), "set_range", input=n, range_vpp=tip_range / div)
        self._set(("offset", n), "set_offset", input=n, offset_v=offset_v / div)
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

    def configure_timebase(self, sample_rate_hz: float, points: int) -> None:
        try:
            rate = _pick(self.sample_rates_hz, sample_rate_hz, "sample rate")
        except ValueError:
            raise self._err(
                f"sample rate {sample_rate_hz:g} S/s not offered",
                f"use one of {list(self.sample_rates_hz)}",
            ) from None
        if int(points) not in self.record_lengths:
            raise self._err(
                f"record length {points} not offered", f"use one of {list(self.record_lengths)}"
            )
        self._set(("rate",), "set_sample_rate", interval_s=1.0 / rate, sample_rate_hz=rate)
        self._set(("points",), "set_record_length", points=int(points))
        self._rate_hz, self._points = rate, int(points)

    def configure_trigger(self, source: int | str, level_v: float = 0.0) -> None:
        """Trigger on scope input ``source`` (an int) or a named source (``EXTernal``)."""
        if isinstance(source, int):
            src = self.settings["trigger_input_source"].format(input=self._input_no(source))
        else:
            src = source
        self._set(("trigger",), "set_trigger", source=src, level_v=level_v)

    def _ensure_format(self) -> None:
        if not self._format_sent:
            self._set(
                ("format",), "set_data_format", format=SCPI_FORMAT[self.settings["data_format"]]
            )
            self._format_sent = True

    def adc_limits(self, setup: InputSetup) -> tuple[float, float]:
        """Tip volts of the lowest and highest code: a sample there may be clipped."""
        half = 2 ** (self.bits - 1)
        lsb = setup.range_vpp / 2**self.bits
        return setup.offset_v - half * lsb, setup.offset_v + (half - 1) * lsb

    def _to_volts(self, data: np.ndarray, setup: InputSetup) -> np.ndarray:
        if self.settings["data_format"] == "float32":
            v = data.astype(np.float64)
            return v if self._instrument_probe else v * setup.probe
        lsb = setup.range_vpp / 2**self.bits  # tip volts per code
        return setup.offset_v + data.astype(np.float64) * lsb

    def acquire(self, inputs: Iterable[int]) -> Acquisition:
        """Single acquisition, wait with ``*OPC?``, fetch each input as a binary block.

        A connection lost part way (power cycle) restarts the whole acquisition once after
        the session has reconnected and replayed the settings.
        """
        wanted = [self._input_no(i) for i in inputs]
        for n in wanted:
            if n not in self._inputs:
                raise self._err(f"scope input {n} not configured", "call configure_input first")
        if self._rate_hz is None or self._points is None:
            raise self._err("timebase not configured", "call configure_timebase first")
        try:
            return self._acquire_once(wanted)
        except ConnectionLost as exc:
            log.warning("%s acquisition lost (%s); repeating once", self.session.resource, exc)
            return self._acquire_once(wanted)

    def _acquire_once(self, wanted: list[int]) -> Acquisition:
        assert self._rate_hz is not None and self._points is not None
        self._ensure_format()
        record_s = self._points / self._rate_hz
        self.session.configure("single")
        self.session.wait_complete(record_s + self.settings["acquire_margin_s"], retry=False)
        fmt = self.settings["data_format"]
        big = self.settings["byte_order"] == "big"
        # transfer time at the slowest expected rate (~10 MB/s) on top of the I/O timeout
        nbytes = self._points * np.dtype(DATATYPES[fmt]).itemsize
        tmo = self.session.timeout_ms + int(nbytes / 10e6 * 1000)
        volts: dict[int, np.ndarray] = {}
        limits: dict[int, tuple[float, float]] = {}
        for n in wanted:
            cmd = self.profile.render("fetch", input=n)
            data = self.session.query_block(
                cmd, fmt, big_endian=big, timeout_ms=tmo, retry=False, max_points=self._points
            )
            if len(data) != self._points:
                self.session.check_errors(cmd)  # an instrument refusal explains it best
                raise MalformedReply(
                    f"input {n} returned {len(data)} points, {self._points} configured",
                    resource=self.session.resource,
                    command=cmd,
                    role=self.session.role,
                )
            setup = self._inputs[n]
            volts[n] = self._to_volts(data, setup)
            limits[n] = self.adc_limits(setup)
        # an error the scope queued during the acquisition must stop the run here, before
        # the record is analysed and stored as if it were sound
        self.session.check_errors(self.profile.render("fetch", input=wanted[-1]))
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

    def _settle(self) -> None:
        if self.settings["settle_s"] > 0:
            time.sleep(self.settings["settle_s"])

    def close(self, channels: Iterable[int]) -> None:
        chans = list(channels)
        if chans:
            self._set(("route", tuple(chans)), "close", channels=channel_list(chans))
            self._settle()

    def open(self, channels: Iterable[int]) -> None:
        chans = list(channels)
        if chans:
            self._state.pop(("route", tuple(chans)), None)
            self.session.configure("open", channels=channel_list(chans))
            self._settle()

    def open_all(self) -> None:
        self._state = {k: v for k, v in self._state.items() if k[0] != "route"}
        self.session.configure("open_all")
        self._settle()

    def is_closed(self, channels: Iterable[int]) -> list[bool]:
        cmd = self.profile.render("query_closed", channels=channel_list(channels))
        reply = self.session.query(cmd)
        return [self._parsed(parse_bool, x, cmd) for x in reply.split(",")]

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
