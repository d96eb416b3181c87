"""Open a whole station: one session and driver per role, identities checked.

``connect(station)`` is the only entry the run layer needs; it opens every instrument
the station file names, refuses to go on when a required role is missing or an
instrument is not the expected one, and closes what it opened if anything fails.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from types import TracebackType

import pyvisa

from harness.errors import StationFileError
from harness.instruments.drivers import Dmm, Generator, Scope, Supply, Switch
from harness.instruments.scpi import Identity
from harness.instruments.session import Session
from harness.io.station import StationConfig

__all__ = ["REQUIRED_ROLES", "Instruments", "connect"]

log = logging.getLogger("harness.instruments")

REQUIRED_ROLES = ("generator", "scope")


@dataclass
class Instruments:
    """The drivers of one open station; ``close()`` (or ``with``) releases them all."""

    generator: Generator
    scope: Scope
    switch: Switch | None = None
    dmm: Dmm | None = None
    supply: Supply | None = None
    identities: dict[str, Identity] = field(default_factory=dict)
    sessions: dict[str, Session] = field(default_factory=dict)

    def close(self) -> None:
        """Generator output off (best effort), then close every session."""
        self.generator.safe_off()
        for role, s in self.sessions.items():
            try:
                s.close()
            except OSError as exc:  # never let one close hide the others
                log.error("closing %s failed: %s", role, exc)

    def __enter__(self) -> Instruments:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


_DRIVERS = {"generator": Generator, "scope": Scope, "switch": Switch, "dmm": Dmm, "supply": Supply}


def connect(station: StationConfig, *, rm: pyvisa.ResourceManager | None = None) -> Instruments:
    """Open and identify every instrument of ``station``; returns its drivers."""
    for role in REQUIRED_ROLES:
        if role not in station.instruments:
            raise StationFileError(
                station.path,
                f"instrument.{role}",
                f"the station has no {role}",
                hint=f"add an [instrument.{role}] table",
            )
    sessions: dict[str, Session] = {}
    drivers: dict[str, object] = {}
    try:
        for role, cfg in station.instruments.items():
            s = Session(
                cfg.resource,
                cfg.profile,
                role,
                visa_library=station.visa_library,
                timeout_ms=cfg.timeout_ms,
                retries=cfg.retries,
                expect_idn=cfg.expect_idn,
                rm=rm,
            )
            sessions[role] = s
            s.open()
            drivers[role] = _DRIVERS[role](s)
    except BaseException:
        for s in sessions.values():
            s.close()
        raise
    return Instruments(
        generator=drivers["generator"],  # type: ignore[arg-type]
        scope=drivers["scope"],  # type: ignore[arg-type]
        switch=drivers.get("switch"),  # type: ignore[arg-type]
        dmm=drivers.get("dmm"),  # type: ignore[arg-type]
        supply=drivers.get("supply"),  # type: ignore[arg-type]
        identities={r: s.identity for r, s in sessions.items() if s.identity is not None},
        sessions=sessions,
    )
