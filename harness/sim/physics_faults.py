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
=====================  ==========================  =============================================
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from harness.errors import FaultSpecError
from harness.model.board import Board, CommonEmitter, EmitterFollower, Part, iter_parts

FaultKind = Literal["drift", "open", "short", "open_bypass", "low_beta", "shorted_junction"]
FAULT_KINDS: tuple[str, ...] = (
    "drift",
    "open",
    "short",
    "open_bypass",
    "low_beta",
    "shorted_junction",
)
_NEEDS_VALUE = {"drift", "low_beta", "shorted_junction"}
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
        """The text form, e.g. ``R104:drift=1.3``."""
        tail = "" if self.value is None else f"={self.value}"
        return f"{self.ref}:{self.kind}{tail}"

    def __str__(self) -> str:
        return self.spec


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
    if eq:
        if not value_text:
            raise FaultSpecError(raw, "empty value after '='")
        if kind == "shorted_junction":
            value = value_text.lower()
        else:
            try:
                value = float(value_text)
            except ValueError:
                raise FaultSpecError(
                    raw, f"value {value_text!r} is not a number", hint="write e.g. R104:drift=1.3"
                ) from None
    fault = Fault(kind, ref, value)  # type: ignore[arg-type]
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
