"""What a station and its instruments are, as data: the validated profile of each instrument
(its SCPI text per operation) and where each one answers.

The files are read by ``harness.io.profiles`` and ``harness.io.station``; the drivers and
``bench.connect`` take these objects and never read a file.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from harness.errors import ProfileError
from harness.instruments.scpi import format_number

__all__ = ["InstrumentConfig", "Profile", "StationConfig"]


@dataclass(frozen=True)
class Profile:
    """A validated instrument profile; ``settings`` hold clean values with defaults applied."""

    name: str
    role: str
    settings: Mapping[str, Any]
    commands: Mapping[str, str]
    description: str = ""
    path: str | None = None
    placeholders: Mapping[str, frozenset[str]] = field(default_factory=dict, repr=False)

    def has(self, op: str) -> bool:
        return op in self.commands

    def render(self, op: str, **params: Any) -> str:
        """The SCPI text of ``op`` with numbers formatted as SCPI wants (base units)."""
        try:
            text = self.commands[op]
        except KeyError:
            raise ProfileError(
                self.path,
                f"commands.{op}",
                f"no operation {op!r} in this {self.role} profile",
                hint=f'add {op} = "..." under [commands]',
            ) from None
        values = {k: v if isinstance(v, str) else format_number(v) for k, v in params.items()}
        missing = self.placeholders.get(op, frozenset()) - values.keys()
        if missing:  # a driver bug, not a user one: load-time checks make this unreachable
            raise ProfileError(self.path, f"commands.{op}", f"no value for {sorted(missing)}")
        return text.format_map(values)


@dataclass(frozen=True)
class InstrumentConfig:
    role: str
    resource: str
    profile: Profile
    expect_idn: str | None = None
    timeout_ms: int = 5000
    retries: int = 1


@dataclass(frozen=True)
class StationConfig:
    name: str
    instruments: Mapping[str, InstrumentConfig]
    visa_library: str = "@py"
    timeout_ms: int = 5000
    retries: int = 1
    path: str | None = None

    def get(self, role: str) -> InstrumentConfig | None:
        return self.instruments.get(role)
