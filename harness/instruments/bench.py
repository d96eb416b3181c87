"""Open a whole station: one session and driver per role, identities checked.

``connect(station)`` is the only entry the run layer needs; it opens every instrument
the station file names, refuses to go on when a required role is missing or an
instrument is not the expected one, and closes what it opened if anything fails.

The instruments that drive the board (:data:`SOURCE_ROLES`) are opened first, and the
``on_open`` hook runs on each instrument as soon as it answers, before the next one is
opened: the run layer puts every source in its safe state there
(:func:`harness.run.safety.connect_safe`).  When one instrument fails, the remaining
sources are still opened and handed to the hook, so a connect that fails part-way leaves
nothing it could reach driving the board.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from types import TracebackType
from typing import Any

import pyvisa

from harness.errors import StationFileError
from harness.instruments.config import StationConfig
from harness.instruments.drivers import Dmm, Generator, Scope, Supply, Switch
from harness.instruments.scpi import Identity
from harness.instruments.session import Session

__all__ = ["REQUIRED_ROLES", "SOURCE_ROLES", "Instruments", "connect"]

log = logging.getLogger("harness.instruments")

REQUIRED_ROLES = ("generator", "scope")
#: Instruments that can drive the board: opened first, in this order.
SOURCE_ROLES = ("generator", "supply", "switch")


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
    #: Runs first on close (the run layer's safe state of every source); without it the
    #: generator output is switched off.
    on_close: Callable[[Instruments], Any] | None = None
    #: What ``on_close`` returned the last time (the run layer: role -> output state).
    closing_states: Any = None

    def drivers(self) -> dict[str, Any]:
        """role -> driver of every instrument the station has."""
        out: dict[str, Any] = {"generator": self.generator, "scope": self.scope}
        for role in ("switch", "dmm", "supply"):
            if getattr(self, role) is not None:
                out[role] = getattr(self, role)
        return out

    def close(self) -> None:
        """Every source safe (best effort, see ``on_close``), then close every session."""
        try:
            if self.on_close is not None:
                self.closing_states = self.on_close(self)
            else:
                self.generator.safe_off()
        except Exception as exc:  # closing must go on: log, the caller reports the state
            log.error("making the sources safe on close failed: %s", exc)
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


def connect(
    station: StationConfig,
    *,
    rm: pyvisa.ResourceManager | None = None,
    on_open: Callable[[str, Any], None] | None = None,
) -> Instruments:
    """Open and identify every instrument of ``station``, sources first; returns its
    drivers.  ``on_open(role, driver)`` runs on each as soon as it answers (see the module
    doc); when any instrument fails, the sources not yet reached are still opened and given
    to ``on_open`` (best effort), then everything is closed and the first error raised."""
    for role in REQUIRED_ROLES:
        if role not in station.instruments:
            raise StationFileError(
                station.path,
                f"instrument.{role}",
                f"the station has no {role}",
                hint=f"add an [instrument.{role}] table",
            )
    sessions: dict[str, Session] = {}
    drivers: dict[str, Any] = {}
    order = [r for r in SOURCE_ROLES if r in station.instruments]
    order += [r for r in station.instruments if r not in order]

    def open_role(role: str) -> None:
        cfg = station.instruments[role]
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
        if on_open is not None:
            on_open(role, drivers[role])

    try:
        for role in order:
            open_role(role)
    except BaseException:
        if on_open is not None:
            for role in order:
                if role in SOURCE_ROLES and role not in sessions:
                    try:  # reach every source we can, to leave it safe
                        open_role(role)
                    except Exception as exc:
                        log.error("%s not reached to switch it off: %s", role, exc)
        for s in sessions.values():
            s.close()
        raise
    return Instruments(
        generator=drivers["generator"],
        scope=drivers["scope"],
        switch=drivers.get("switch"),
        dmm=drivers.get("dmm"),
        supply=drivers.get("supply"),
        identities={r: s.identity for r, s in sessions.items() if s.identity is not None},
        sessions=sessions,
    )
