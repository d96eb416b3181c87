"""What the run layer asks of each instrument, as typed roles.

The run drives a generator, a scope and optionally a switch, a DMM and a supply.  Each
role is a :class:`typing.Protocol` listing exactly the methods and attributes the run
layer calls (SafeGenerator, SupplyGuard, GroupScope, the steps, the station's safe state),
with the types the drivers of :mod:`harness.instruments.drivers` return.  The drivers
satisfy them structurally (checked by mypy below and by tests/run/test_roles.py), and so
may any other object that answers the same calls: nothing in the run probes an instrument
for optional spellings.

:class:`InstrumentSet` is the open station as the run sees it (what
:func:`harness.instruments.bench.connect` returns): the five roles, the identities and the
sessions' recovery counters.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import TYPE_CHECKING, Protocol, runtime_checkable

if TYPE_CHECKING:
    from harness.instruments.drivers import Acquisition, InputSetup, Timebase
    from harness.instruments.scpi import Identity

__all__ = [
    "DmmRole",
    "GeneratorRole",
    "InstrumentSet",
    "OpenStation",
    "Recoveries",
    "Routes",
    "ScopeRole",
    "Source",
    "SupplyRole",
    "SwitchRole",
]


@runtime_checkable
class GeneratorRole(Protocol):
    """A sine source.  Levels are rms volts at the board input, ``load_ohm`` the load the
    level is meant across (the run always passes infinity: the open-circuit level)."""

    def configure_sine(self, frequency_hz: float, output: int = 1) -> float:
        """Set a sine at ``frequency_hz``; returns the frequency the generator reports."""
        ...

    def set_level(self, vrms: float, *, load_ohm: float = ..., output: int = 1) -> float: ...

    def level_readback_vrms(self, *, load_ohm: float = ..., output: int = 1) -> float | None:
        """The amplitude read back from the instrument, None where its profile cannot."""
        ...

    def output(self, on: bool, output: int = 1) -> None: ...

    def is_on(self, output: int = 1) -> bool:
        """The output state as the instrument reports it (read back)."""
        ...

    def safe_off(self) -> bool:
        """Every output off, each read back; never raises; True when all read off."""
        ...


@runtime_checkable
class ScopeRole(Protocol):
    """A digitiser: what it offers, input set-up, timebase, trigger, one acquisition."""

    @property
    def bits(self) -> int:
        """Bits per sample of the records it returns, in the acquisition mode in force."""
        ...

    @property
    def ranges_vpp(self) -> tuple[float, ...]: ...

    @property
    def sample_rates_hz(self) -> tuple[float, ...]: ...

    @property
    def record_lengths(self) -> tuple[int, ...]: ...

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
        """Set an input up; the returned set-up holds what the scope read back."""
        ...

    def configure_timebase(self, sample_rate_hz: float, points: int) -> Timebase:
        """Ask for a timebase; returns the rate and length the scope reports."""
        ...

    def configure_trigger(self, source: int | str, level_v: float = 0.0) -> None: ...

    def acquire(self, inputs: Iterable[int], points: int | None = None) -> Acquisition: ...


@runtime_checkable
class SwitchRole(Protocol):
    """A relay matrix; channels are channel-list numbers."""

    def close(self, channels: Iterable[int]) -> None: ...

    def open(self, channels: Iterable[int]) -> None: ...

    def open_all(self) -> None: ...


@runtime_checkable
class DmmRole(Protocol):
    def dc_volts(self, range_v: float | None = None) -> float:
        """One DC reading (``range_v`` None: the meter's own range); SCPI's overload
        value comes back as a number that is not finite."""
        ...


@runtime_checkable
class SupplyRole(Protocol):
    """A bench supply with switched, read-back outputs."""

    def configure(self, voltage_v: float, current_limit_a: float, output: int = 1) -> None: ...

    def output(self, on: bool, output: int = 1) -> None: ...

    def is_on(self, output: int = 1) -> bool: ...

    def current_a(self, output: int = 1) -> float: ...

    def tripped(self, output: int = 1) -> bool: ...

    def safe_off(self) -> bool: ...


@runtime_checkable
class Source(Protocol):
    """What every source role (generator, supply) has for the station's safe state."""

    def safe_off(self) -> bool: ...


@runtime_checkable
class Routes(Protocol):
    """What the switch role has for the station's safe state."""

    def open_all(self) -> None: ...

    def watch(self, channels: Iterable[int]) -> None: ...


class Recoveries(Protocol):
    """A session's recovery counters (harness.instruments.session.Session)."""

    @property
    def reconnects(self) -> int: ...

    @property
    def troubles(self) -> int: ...


class InstrumentSet(Protocol):
    """The open station as the run sees it (harness.instruments.bench.Instruments).

    ``sessions`` may be empty (instruments that are not behind sessions): the run then
    counts no recoveries."""

    @property
    def generator(self) -> GeneratorRole: ...

    @property
    def scope(self) -> ScopeRole: ...

    @property
    def switch(self) -> SwitchRole | None: ...

    @property
    def dmm(self) -> DmmRole | None: ...

    @property
    def supply(self) -> SupplyRole | None: ...

    @property
    def identities(self) -> Mapping[str, Identity | str]: ...

    @property
    def sessions(self) -> Mapping[str, Recoveries]: ...


class OpenStation(InstrumentSet, Protocol):
    """A station held open for a session (the production line): closing it makes every
    source safe first and says what each source read back as (``closing_states``)."""

    @property
    def closing_states(self) -> object: ...

    def close(self) -> None: ...


def recoveries(instruments: InstrumentSet) -> int:
    """Every recovery so far on the station's sessions (a reconnect or a timeout)."""
    return sum(int(s.reconnects) + int(s.troubles) for s in instruments.sessions.values())


if TYPE_CHECKING:  # mypy proves the drivers fill their roles (no code at run time)
    from harness.instruments.bench import Instruments
    from harness.instruments.drivers import Dmm, Generator, Scope, Supply, Switch
    from harness.instruments.session import Session

    def _drivers_fill_their_roles(
        g: Generator, s: Scope, sw: Switch, d: Dmm, p: Supply, i: Instruments, se: Session
    ) -> None:
        roles: tuple[
            GeneratorRole, ScopeRole, SwitchRole, DmmRole, SupplyRole, OpenStation, Recoveries
        ] = (g, s, sw, d, p, i, se)
        del roles
