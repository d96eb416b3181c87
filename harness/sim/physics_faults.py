"""Component faults for the simulated board, and their text form.

Why faults live in the physics: the repair clues a technician reads off a failed board
(gain low, one half-cycle clipping early, a stage dead) must come out of the same circuit
equations as a good board, not be painted on afterwards.

Text form ``<ref>:<kind>[=<value>]``:

=====================  ==========================  =============================================
kind                   ref                         effect
=====================  ==========================  =============================================
drift=<factor>         designator (R104, C101)     value × factor
open                   designator                  resistor → 1 TΩ; capacitor removed
short                  designator                  resistor → 1 mΩ; capacitor → 1 mΩ resistor
open_bypass            stage (A.gain) or C102      the emitter bypass capacitor removed
low_beta=<beta>        stage (A.gain)              the stage transistor's β_F = <beta>
shorted_junction=be|ce stage (A.gain)              1 mΩ across base-emitter or collector-emitter
oscillate=<Hz>[,<Vpk>] stage (A.buffer)            a parasitic oscillation at the stage output
                                                   (default 0.5 V peak there)
hum=<Hz>[,<Vpk>]       channel (A)                 mains hum coupled into the channel input:
                                                   the fundamental and its 2nd and 3rd
                                                   harmonics at 1, 1/2, 1/4 (default 20 mV pk)
=====================  ==========================  =============================================

The last two add a signal and leave the circuit's parts alone (:mod:`harness.sim.world`
adds them to the waveforms).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from harness.errors import FaultSpecError
from harness.model.board import Board, CommonEmitter, EmitterFollower, Part, iter_parts

FaultKind = Literal[
    "drift", "open", "short", "open_bypass", "low_beta", "shorted_junction", "oscillate", "hum"
]
FAULT_KINDS: tuple[str, ...] = (
    "drift",
    "open",
    "short",
    "open_bypass",
    "low_beta",
    "shorted_junction",
    "oscillate",
    "hum",
)
#: Faults that add a signal (frequency, peak volts) instead of changing a part.
SIGNAL_KINDS = frozenset({"oscillate", "hum"})
#: Peak level of a signal fault given without one: at the stage output / channel input.
DEFAULT_SIGNAL_VPK = {"oscillate": 0.5, "hum": 0.02}
_NEEDS_VALUE = {"drift", "low_beta", "shorted_junction", "oscillate", "hum"}
_STAGE_KINDS = {"low_beta", "shorted_junction"}
OPEN_OHM = 1e12
SHORT_OHM = 1e-3


@dataclass(frozen=True)
class Fault:
    """One component fault.  ``value``: factor (drift), β (low_beta), "be"/"ce"
    (shorted_junction), None otherwise."""

    kind: FaultKind
    ref: str
    value: float | str | None = None
    level_vpk: float | None = None  # oscillate / hum: peak volts (None: the default)

    def __post_init__(self) -> None:
        spec = self.spec
        if self.kind not in FAULT_KINDS:
            raise FaultSpecError(
                spec,
                f"unknown fault kind {self.kind!r}",
                hint=f"use one of: {', '.join(FAULT_KINDS)}",
            )
        if not self.ref:
            raise FaultSpecError(spec, "no designator", hint="write e.g. R104:drift=1.3")
        if self.kind in _NEEDS_VALUE and self.value is None:
            example = {"drift": "=1.3", "low_beta": "=40", "shorted_junction": "=be"}[self.kind]
            raise FaultSpecError(
                spec, f"{self.kind} needs a value", hint=f"write {self.ref}:{self.kind}{example}"
            )
        if self.kind not in _NEEDS_VALUE and self.value is not None:
            raise FaultSpecError(
                spec, f"{self.kind} takes no value", hint=f"write {self.ref}:{self.kind}"
            )
        if self.kind == "shorted_junction":
            if self.value not in ("be", "ce"):
                raise FaultSpecError(
                    spec,
                    f"junction {self.value!r} unknown",
                    hint="use shorted_junction=be or shorted_junction=ce",
                )
        elif self.kind in SIGNAL_KINDS:
            for what, v in (("frequency", self.value), ("level", self.level_vpk)):
                if v is None and what == "level":
                    continue
                if isinstance(v, str | bool) or not math.isfinite(float(v)) or float(v) <= 0:  # type: ignore[arg-type]
                    raise FaultSpecError(
                        spec,
                        f"{what} must be a positive number (got {v!r})",
                        hint=f"write e.g. {self.ref}:{self.kind}=400000,0.2 (Hz, V peak)",
                    )
        elif self.kind in {"drift", "low_beta"}:
            if isinstance(self.value, str | bool):
                raise FaultSpecError(spec, "value must be a number")
            v = float(self.value)  # type: ignore[arg-type]
            if not math.isfinite(v) or v <= 0:
                raise FaultSpecError(
                    spec,
                    f"value must be a positive number (got {v:g})",
                    hint="a drift factor such as 1.3, a β such as 40",
                )

    @property
    def spec(self) -> str:
        """The text form, e.g. ``R104:drift=1.3``, ``A.buffer:oscillate=400000,0.2``."""
        if self.value is None:
            tail = ""
        elif self.kind in SIGNAL_KINDS and isinstance(self.value, float):
            tail = f"={self.value:g}"
        else:
            tail = f"={self.value}"
        if self.level_vpk is not None:
            tail += f",{self.level_vpk:g}"
        return f"{self.ref}:{self.kind}{tail}"

    def __str__(self) -> str:
        return self.spec

    @property
    def signal_vpk(self) -> float:
        """Peak level of a signal fault (the default where none was given)."""
        return self.level_vpk if self.level_vpk is not None else DEFAULT_SIGNAL_VPK[self.kind]


def parse_fault(text: str, board: Board | None = None) -> Fault:
    """Read ``R104:drift=1.3``, ``C102:open``, ``A.gain:low_beta=40``,
    ``A.gain:shorted_junction=be``.  With ``board``, the designator is checked too."""
    raw = text.strip() if isinstance(text, str) else repr(text)
    if not isinstance(text, str) or ":" not in raw:
        raise FaultSpecError(
            raw,
            "expected <designator>:<kind>[=<value>]",
            hint="write e.g. R104:drift=1.3, C102:open or A.gain:low_beta=40",
        )
    ref, _, rest = raw.rpartition(":")
    kind, eq, value_text = rest.partition("=")
    ref, kind, value_text = ref.strip(), kind.strip().lower(), value_text.strip()
    if kind not in FAULT_KINDS:
        raise FaultSpecError(
            raw, f"unknown fault kind {kind!r}", hint=f"use one of: {', '.join(FAULT_KINDS)}"
        )
    value: float | str | None = None
    level: float | None = None
    if eq:
        if not value_text:
            raise FaultSpecError(raw, "empty value after '='")
        if kind in SIGNAL_KINDS:
            freq_text, comma, level_text = value_text.partition(",")
            try:
                value = float(freq_text)
                level = float(level_text) if comma else None
            except ValueError:
                raise FaultSpecError(
                    raw,
                    f"value {value_text!r} is not <Hz>[,<V peak>]",
                    hint=f"write e.g. {ref}:{kind}=400000,0.2",
                ) from None
        elif kind == "shorted_junction":
            value = value_text.lower()
        else:
            try:
                value = float(value_text)
            except ValueError:
                raise FaultSpecError(
                    raw, f"value {value_text!r} is not a number", hint="write e.g. R104:drift=1.3"
                ) from None
    fault = Fault(kind, ref, value, level)  # type: ignore[arg-type]
    if board is not None:
        check_fault(board, fault)
    return fault


def component_parts(board: Board) -> dict[str, Part]:
    """Designator → Part of every resistor and capacitor fitted on the board's channels
    (the test load and the supply are not board parts)."""
    return {part.ref: part for _ch, _st, _field, part in iter_parts(board)}


def component_refs(board: Board) -> list[str]:
    """Designators of every resistor and capacitor, sorted naturally (R101 < R102 < R1010)."""

    def key(ref: str) -> tuple:
        head = ref.rstrip("0123456789")
        tail = ref[len(head) :]
        return (head, int(tail) if tail else -1, ref)

    return sorted(component_parts(board), key=key)


def stage_refs(board: Board) -> list[str]:
    """``<channel>.<stage>`` of every stage (the refs of stage faults)."""
    return [f"{ch.name}.{st.name}" for ch in board.channels for st in ch.stages]


def check_fault(board: Board, fault: Fault) -> None:
    """Raise FaultSpecError unless ``fault`` names something on ``board`` it can apply to."""
    parts = component_parts(board)
    stages = {f"{ch.name}.{st.name}": st for ch in board.channels for st in ch.stages}
    spec = fault.spec
    if fault.kind == "hum":
        names = [ch.name for ch in board.channels]
        if fault.ref not in names:
            raise FaultSpecError(
                spec,
                f"no channel {fault.ref!r} on this board",
                hint=f"use one of: {', '.join(names)}",
            )
        return
    if fault.kind == "oscillate":
        if fault.ref not in stages:
            raise FaultSpecError(
                spec,
                f"no stage {fault.ref!r} on this board",
                hint=f"use one of: {', '.join(stages)}",
            )
        return
    if fault.kind in _STAGE_KINDS or (fault.kind == "open_bypass" and fault.ref in stages):
        st = stages.get(fault.ref)
        if st is None:
            raise FaultSpecError(
                spec,
                f"no stage {fault.ref!r} on this board",
                hint=f"use one of: {', '.join(stages)}",
            )
        if not isinstance(st, CommonEmitter | EmitterFollower):
            raise FaultSpecError(
                spec,
                f"stage {fault.ref!r} has no transistor",
                hint="transistor faults apply to common-emitter and follower stages",
            )
        if fault.kind == "open_bypass" and (not isinstance(st, CommonEmitter) or st.c_e is None):
            raise FaultSpecError(spec, f"stage {fault.ref!r} has no emitter bypass capacitor")
        return
    if fault.ref not in parts:
        if fault.ref in stages:
            raise FaultSpecError(
                spec,
                f"{fault.kind} applies to a designator, not a stage",
                hint=f"use one of: {', '.join(component_refs(board))}",
            )
        raise FaultSpecError(
            spec,
            f"no component {fault.ref!r} on this board",
            hint=f"valid designators: {', '.join(component_refs(board))}; "
            f"stages: {', '.join(stages)}",
        )
    if fault.kind == "open_bypass" and parts[fault.ref].kind != "capacitor":
        raise FaultSpecError(
            spec,
            f"{fault.ref} is not a capacitor",
            hint="open_bypass removes a bypass capacitor; use open for a resistor",
        )
