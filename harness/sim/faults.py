"""Instrument faults the simulated bench can inject, and their command-line syntax.

Syntax (one ``--fault`` each)::

    ROLE:KIND[=VALUE][@OPERATION][,count=N][,after=N]

``ROLE`` is generator, scope, switch, dmm or supply.  ``OPERATION`` aims the fault at a
command: an operation name of the instrument profile (``fetch``, ``set_amplitude``,
``identify``) or any mnemonic of the header (``FETCh``, ``FREQ``, ``*IDN?``).  ``count``:
how many times it fires (default: every time); ``after``: only once this many commands
have been executed.  Kinds:

- ``no_reply``: the query is executed but never answered (default target: any query);
- ``drop_mid_block``: the connection closes halfway through a binary block;
- ``bad_block_header``: the block header is replaced by ``#9abc``;
- ``queue_error[=CODE]``: CODE (default -222) is queued after the command;
- ``slow[=SECONDS]``: the reply waits SECONDS (default 1) more;
- ``power_cycle[=SECONDS]``: every connection drops, the instrument returns to its
  power-on state and refuses connections for SECONDS (default 0.5).

Examples: ``scope:no_reply@fetch,count=1``, ``generator:queue_error=-222@set_amplitude``,
``supply:power_cycle=0.3,after=20``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from harness.errors import FaultSpecError

__all__ = ["FAULT_KINDS", "ROLES", "InstrumentFault", "parse_instrument_fault"]

ROLES: tuple[str, ...] = ("generator", "scope", "switch", "dmm", "supply")

#: Kind -> default value (None: the kind takes no value).
FAULT_KINDS: dict[str, float | None] = {
    "no_reply": None,
    "drop_mid_block": None,
    "bad_block_header": None,
    "queue_error": -222.0,
    "slow": 1.0,
    "power_cycle": 0.5,
}


@dataclass(frozen=True)
class InstrumentFault:
    """One injected instrument misbehaviour (see the module doc for the meaning)."""

    role: str
    kind: str
    on: str | None = None
    count: int | None = None
    after: int = 0
    value: float | None = None

    def __post_init__(self) -> None:
        spec = f"{self.role}:{self.kind}"
        if self.role not in ROLES:
            raise FaultSpecError(
                spec,
                f"unknown instrument role {self.role!r}",
                hint=f"use one of: {', '.join(ROLES)}",
            )
        if self.kind not in FAULT_KINDS:
            raise FaultSpecError(
                spec,
                f"unknown instrument fault {self.kind!r}",
                hint=f"use one of: {', '.join(FAULT_KINDS)}",
            )
        if self.count is not None and self.count < 1:
            raise FaultSpecError(spec, f"fault count must be at least 1 (got {self.count})")
        if self.after < 0:
            raise FaultSpecError(spec, f"fault 'after' must be >= 0 (got {self.after})")
        if self.value is None and FAULT_KINDS[self.kind] is not None:
            object.__setattr__(self, "value", FAULT_KINDS[self.kind])
        if self.value is not None and FAULT_KINDS[self.kind] is None:
            raise FaultSpecError(spec, f"fault {self.kind} takes no value")
        if self.kind in ("slow", "power_cycle") and not 0 <= (self.value or 0) <= 3600:
            raise FaultSpecError(
                spec, f"{self.kind} needs seconds from 0 to 3600 (got {self.value})"
            )
        if self.kind == "queue_error" and not float(self.value or 0).is_integer():
            raise FaultSpecError(
                spec, f"queue_error needs an integer error code (got {self.value})"
            )

    @property
    def spec(self) -> str:
        """The command-line text of this fault (parses back to an equal fault)."""
        text = f"{self.role}:{self.kind}"
        if self.value is not None and self.value != FAULT_KINDS[self.kind]:
            text += f"={self.value:g}"
        if self.on:
            text += f"@{self.on}"
        if self.count is not None:
            text += f",count={self.count}"
        if self.after:
            text += f",after={self.after}"
        return text


_SPEC = re.compile(
    r"^(?P<role>[a-z]+):(?P<kind>[a-z_]+)(?:=(?P<value>[-+0-9.eE]+))?"
    r"(?:@(?P<on>[A-Za-z0-9_:*?]+))?(?P<opts>(?:,[a-z]+=\d+)*)$"
)


def is_instrument_fault(text: str) -> bool:
    """True when ``text`` starts with an instrument role and a colon (not a component fault)."""
    head = text.strip().split(":", 1)[0].lower()
    return ":" in text and head in ROLES


def parse_instrument_fault(text: str) -> InstrumentFault:
    """``"scope:no_reply@fetch,count=1"`` -> :class:`InstrumentFault`."""
    spec = text.strip()
    m = _SPEC.match(spec)
    if not m:
        raise FaultSpecError(
            spec,
            "not an instrument fault",
            hint="write ROLE:KIND[=VALUE][@OPERATION][,count=N][,after=N], "
            "e.g. scope:no_reply@fetch,count=1",
        )
    opts: dict[str, int] = {}
    for item in filter(None, m.group("opts").split(",")):
        key, val = item.split("=")
        if key not in ("count", "after"):
            raise FaultSpecError(
                spec,
                f"unknown fault option {key!r} in {text!r}",
                hint="options are count=N and after=N",
            )
        opts[key] = int(val)
    value = None
    if m.group("value") is not None:
        try:
            value = float(m.group("value"))
        except ValueError:
            raise FaultSpecError(
                spec, f"fault value {m.group('value')!r} is not a number"
            ) from None
    return InstrumentFault(
        role=m.group("role"),
        kind=m.group("kind"),
        on=m.group("on"),
        count=opts.get("count"),
        after=opts.get("after", 0),
        value=value,
    )
