"""SimBench: the whole simulated bench — board physics, five instruments, their servers.

    with SimBench(board, faults=["R104:drift=1.3"]) as bench:   # starts the servers
        bench.write_station("station.toml")
        bench.write_fixture("fixture.toml")
        ...  # run stageproof against bench.resources
        bench.generator_log                                     # for the safety tests

Without ``start()`` (or the ``with``) the instruments are still usable in-process:
``bench.devices["scope"].handle(b"*IDN?")``.  Servers bind 127.0.0.1 unless ``host``
says otherwise (logged as a warning: the bench then answers anyone on that network).
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Iterable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

import tomli_w

from harness.errors import FaultSpecError, ProfileError, StationFileError
from harness.io.packaged import PROFILE_DIR
from harness.io.profiles import profile_from_dict
from harness.io.toml import read_toml
from harness.model.board import Board
from harness.sim.benchtop import BENCHTOP_SCOPE, SimBenchtopGenerator, SimBenchtopScope
from harness.sim.faults import InstrumentFault, is_instrument_fault, parse_instrument_fault
from harness.sim.instruments import (
    GeneratorEvent,
    ScopeSettings,
    SimDmm,
    SimGenerator,
    SimScope,
    SimSupply,
    SimSwitch,
    SupplyEvent,
)
from harness.sim.physics import BoardSim, Fault, parse_fault
from harness.sim.scpi import ScpiDevice
from harness.sim.server import LOOPBACK, ScpiServer
from harness.sim.world import World

__all__ = ["DIALECTS", "ROLES", "SimBench", "split_faults"]

log = logging.getLogger("harness.sim")

ROLES: tuple[str, ...] = ("generator", "scope", "switch", "dmm", "supply")
_PROFILES = {r: f"scpi-{r}" for r in ROLES}
#: The simulated bench's dialects: the profiles its station file names per role.
DIALECTS: dict[str, dict[str, str]] = {
    "default": dict(_PROFILES),
    "benchtop": {**_PROFILES, "generator": "benchtop-generator", "scope": "benchtop-scope"},
}


def split_faults(
    texts: Iterable[str | Fault | InstrumentFault], board: Board | None = None
) -> tuple[list[Fault], list[InstrumentFault]]:
    """Sort ``--fault`` texts into component faults (physics) and instrument faults."""
    component: list[Fault] = []
    instrument: list[InstrumentFault] = []
    for item in texts:
        if isinstance(item, InstrumentFault):
            instrument.append(item)
        elif isinstance(item, Fault):
            component.append(item)
        elif is_instrument_fault(item):
            instrument.append(parse_instrument_fault(item))
        else:
            component.append(parse_fault(item, board))
    return component, instrument


class SimBench:
    """The simulated bench for one board (see the module doc)."""

    def __init__(
        self,
        board: Board,
        *,
        faults: Iterable[str | Fault | InstrumentFault] = (),
        instrument_faults: Iterable[str | InstrumentFault] = (),
        latency: bool = False,
        host: str = LOOPBACK,
        port_base: int = 0,
        seed: int = 20240601,
        scope_settings: ScopeSettings | None = None,
        settling: bool | None = None,
        dialect: str = "default",
    ) -> None:
        if dialect not in DIALECTS:
            raise FaultSpecError(
                f"dialect {dialect!r}",
                "no such simulated dialect",
                hint=f"use one of: {', '.join(DIALECTS)}",
            )
        self.dialect = dialect
        self.profiles = DIALECTS[dialect]
        self.board = board
        component, inst = split_faults(faults, board)
        _, more = split_faults(instrument_faults, board)
        self.faults = tuple(component)
        self.sim = BoardSim(board, self.faults)
        # the realistic bench (latency) has a board that takes its time to settle too;
        # without latency the board is always in its periodic steady state
        self.settling = latency if settling is None else bool(settling)
        self.world = World(board, self.sim, rng_seed=seed, settling=self.settling)
        self.latency = latency
        self.host = host
        self.port_base = port_base
        inputs = max(4, len(board.channels) + 1)
        base = BENCHTOP_SCOPE if dialect == "benchtop" else ScopeSettings()
        settings = scope_settings or replace(base, inputs=inputs)
        if settings.inputs < len(board.channels) + 1:
            raise FaultSpecError(
                f"scope inputs={settings.inputs}",
                f"the board needs {len(board.channels) + 1} scope inputs",
            )
        kw = {"latency": latency}
        gen_cls, scope_cls = (
            (SimBenchtopGenerator, SimBenchtopScope)
            if dialect == "benchtop"
            else (SimGenerator, SimScope)
        )
        gen = gen_cls(self.world, serial="SIM-G001", **kw)
        scope = scope_cls(self.world, settings, serial="SIM-S001", **kw)
        switch = SimSwitch(self.world, serial="SIM-W001", **kw)
        dmm = SimDmm(self.world, switch, serial="SIM-D001", **kw)
        supply = SimSupply(self.world, serial="SIM-P001", **kw)
        self.devices: dict[str, ScpiDevice] = {
            "generator": gen,
            "scope": scope,
            "switch": switch,
            "dmm": dmm,
            "supply": supply,
        }
        self.world.drive = gen.drive
        self.world.rails = supply.rails
        self.world.closed_relays = lambda: tuple(switch.closed)
        if self.settling:
            self.world.follow_now()  # the board has sat unpowered until now
        self.servers: dict[str, ScpiServer] = {}
        for f in [*inst, *more]:
            self.devices[f.role].inject(f)

    def sleep(self, seconds: float) -> None:
        """A wait on the board's clock only (no real time passes): pass it as the harness's
        ``sleep`` to test the settling waits fast."""
        self.world.advance(seconds)

    # -- typed views ----------------------------------------------------------------------------

    @property
    def generator(self) -> SimGenerator:
        return self.devices["generator"]  # type: ignore[return-value]

    @property
    def scope(self) -> SimScope:
        return self.devices["scope"]  # type: ignore[return-value]

    @property
    def supply(self) -> SimSupply:
        return self.devices["supply"]  # type: ignore[return-value]

    @property
    def switch(self) -> SimSwitch:
        return self.devices["switch"]  # type: ignore[return-value]

    @property
    def dmm(self) -> SimDmm:
        return self.devices["dmm"]  # type: ignore[return-value]

    @property
    def generator_log(self) -> list[GeneratorEvent]:
        """Every amplitude / offset / frequency / output change, with monotonic times."""
        with self.world.lock:
            return list(self.generator.log)

    @property
    def output_history(self) -> list[tuple[float, bool]]:
        """(time, on) for every generator output state change or reset."""
        return [(e.time_s, e.value > 0) for e in self.generator_log if e.what == "output"]

    @property
    def supply_log(self) -> list[SupplyEvent]:
        with self.world.lock:
            return list(self.supply.log)

    def max_commanded_vpp(self, *, while_on: bool = False) -> float:
        """The largest amplitude ever commanded (Vpp at high Z); ``while_on``: only the
        amplitude in force while the output was on (what the board actually saw)."""
        peak, amp, on = 0.0, 0.0, False
        for e in self.generator_log:
            if e.what == "amplitude_vpp":
                amp = e.value
            elif e.what == "output":
                on = e.value > 0
            if not while_on or on:
                peak = max(peak, amp)
        return peak

    # -- faults ---------------------------------------------------------------------------------

    def inject(
        self,
        role: str,
        kind: str,
        *,
        on: str | None = None,
        count: int | None = None,
        after: int = 0,
        value: float | None = None,
    ) -> InstrumentFault:
        """Arm an instrument fault at run time, e.g. ``inject("scope", "no_reply",
        on="FETCh", count=1)``; ``after`` counts from the instrument's present total."""
        dev = self.devices.get(role)
        if dev is None:
            raise FaultSpecError(
                f"{role}:{kind}", f"no instrument {role!r}", hint=f"use one of: {', '.join(ROLES)}"
            )
        fault = InstrumentFault(
            role, kind, on=on, count=count, after=dev.command_count + after, value=value
        )
        dev.inject(fault)
        return fault

    def clear_faults(self, role: str | None = None) -> None:
        for name, dev in self.devices.items():
            if role is None or role == name:
                dev.clear_faults()

    def power_cycle(self, role: str, off_s: float = 0.5) -> None:
        """Cycle one instrument's power now (connections drop, state back to *RST)."""
        self.devices[role].power_cycle()
        if role in self.servers:
            self.servers[role].power_cycle(off_s)

    # -- servers --------------------------------------------------------------------------------

    def start(self) -> SimBench:
        if self.servers:
            return self
        if self.host not in (LOOPBACK, "localhost", "::1"):
            log.warning(
                "simulated bench listening on %s, not loopback: anyone who can reach "
                "this address can drive it",
                self.host,
            )
        try:
            for i, role in enumerate(ROLES):
                port = self.port_base + i if self.port_base else 0
                self.servers[role] = ScpiServer(
                    self.devices[role], self.host, port, name=role
                ).start()
        except OSError:
            self.stop()
            raise
        return self

    @property
    def resources(self) -> dict[str, str]:
        """role -> VISA resource string (``TCPIP::127.0.0.1::PORT::SOCKET``)."""
        return {role: srv.resource for role, srv in self.servers.items()}

    def stop(self) -> None:
        for srv in self.servers.values():
            srv.stop()
        self.servers = {}

    def __enter__(self) -> SimBench:
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()

    # -- files ----------------------------------------------------------------------------------

    def station_text(
        self, *, name: str = "sim-bench", profiles: Mapping[str, str] | None = None
    ) -> str:
        """The station file (format of fixtures/station-sim.toml) for the running servers."""
        if not self.servers:
            raise StationFileError(
                None, None, "the simulated bench is not started", hint="call start() first"
            )
        profiles = {**self.profiles, **(profiles or {})}
        lines = [
            "# Station file written by `stageproof sim serve`: the simulated bench's instruments.",
            "",
            "[station]",
            f'name = "{name}"',
            'visa_library = "@py"',
            "timeout_ms = 5000",
            "retries = 1",
        ]
        for role in ROLES:
            dev = self.devices[role]
            lines += [
                "",
                f"[instrument.{role}]",
                f'resource = "{self.servers[role].resource}"',
                f'profile = "{profiles[role]}"',
                f'expect_idn = "{dev.IDN[0]},{dev.IDN[1]}"',
            ]
        return "\n".join(lines) + "\n"

    def write_station(self, path: str | Path) -> Path:
        """Write the station file; a scope with other than four inputs gets its own profile
        (the shipped default with ``inputs`` changed) beside it."""
        p = Path(path)
        profiles: dict[str, str] = {}
        inputs = self.scope.settings.inputs
        if inputs != 4:
            name = self.profiles["scope"]
            prof = p.with_name(f"{name}-{inputs}.toml")
            prof.write_text(scope_profile_text(inputs, name))
            profiles["scope"] = str(prof.resolve())
        p.write_text(self.station_text(profiles=profiles))
        return p

    def fixture_text(self) -> str:
        """The fixture file (format of fixtures/fixture-twin-preamp.toml) for this wiring."""
        b = self.board
        i_q = float(self.sim.supply_current_a())
        limit = max(0.02, math.ceil(4 * i_q * 100) / 100)
        lines = [
            "# Fixture file written by `stageproof sim serve`: how the simulated bench is wired.",
            "# Generator output 1 drives every channel input in parallel; scope input 1 probes",
            "# the common input, inputs 2.. the channel outputs in board order; relay <c><nn>",
            "# routes test point nn of channel c to the DMM.",
            "",
            "[fixture]",
            f'name = "simulated fixture for {_esc(b.name)}"',
            f'board = "{_esc(b.part_number)}"',
            "",
            "[supply]",
            "output = 1",
            f"voltage_v = {b.supply.v_pos:g}",
            f"current_limit_a = {limit:g}       # {limit / i_q:.2g}x the simulated quiescent "
            f"current of {i_q * 1e3:.3g} mA (4x, rounded up to 10 mA, at least 20 mA)",
        ]
        if b.supply.negative is not None:
            lines += [
                "negative_output = 2           # the supply output gives the rail's magnitude",
                f"negative_voltage_v = {b.supply.v_neg:g}",
            ]
        lines += ["", "[generator]", "output = 1"]
        for k, ch in enumerate(b.channels):
            lines += [
                "",
                "[[channel]]",
                f'board_channel = "{_esc(ch.name)}"',
                "input_scope = 1",
                f"output_scope = {k + 2}",
                "input_probe = 1.0",
                "output_probe = 1.0",
                "route = []",
            ]
        for n, tp in enumerate(self.world.points, start=1):
            lines += [
                "",
                "[[test_point]]",
                f'name = "TP{n}"',
                f'board_channel = "{_esc(tp.channel)}"',
                f'stage = "{_esc(tp.stage)}"',
                f'quantity = "{tp.quantity}"',
                f"route = [{tp.relay}]",
            ]
        return "\n".join(lines) + "\n"

    def write_fixture(self, path: str | Path) -> Path:
        p = Path(path)
        p.write_text(self.fixture_text())
        return p

    def wait_listening(self, timeout_s: float = 2.0) -> None:
        """Block until every server listens again (after a power cycle)."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if all(s._listener is not None for s in self.servers.values()):
                return
            time.sleep(0.01)


def scope_profile_text(inputs: int, name: str = _PROFILES["scope"]) -> str:
    """The shipped scope profile ``name`` with ``inputs`` inputs, as a profile file: its
    document with its name and ``settings.inputs`` changed, checked by the profile loader
    before it is written, so the station written beside it always loads."""
    doc, _ = read_toml(PROFILE_DIR / f"{name}.toml", ProfileError)
    doc["profile"]["name"] = f"{name}-{inputs}"
    doc["settings"]["inputs"] = inputs
    profile_from_dict(doc)
    head = f"# Scope profile written by `stageproof sim serve`: {name}, {inputs} inputs.\n"
    return head + "\n" + tomli_w.dumps(doc)


def _esc(text: str) -> str:
    return text.replace("\\", "\\\\").replace('"', '\\"')
