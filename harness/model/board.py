"""The board description: what a board is made of, as immutable objects.

A board has channels; a channel is a chain of stages from its input connector to its
output connector.  Every component is a :class:`Part` (value, tolerance band,
designator); transistor and op-amp parameters are :class:`Spread` ranges
(min / typ / max) as data sheets give them.

Pure data: the board-file reader that builds these objects is ``harness.io.board``.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Literal

from harness.values import Toleranced

#: Reverse beta when the transistor data gives none: small-signal silicon NPN parts have a
#: beta_R of a few (from memory: SPICE models of 2N3904-class parts carry BR of about 0.7-6;
#: Sedra & Smith, *Microelectronic Circuits*, BJT chapter, on the reverse-active mode, also
#: from memory).  It matters only in saturation.
BETA_R_DEFAULT = 3.0

# --- value objects ------------------------------------------------------------------------------


@dataclass(frozen=True)
class Part(Toleranced):
    """One component: value with tolerance and its designator (``R104``) for repair reports."""

    ref: str = ""
    kind: Literal["resistor", "capacitor", "voltage", "other"] = "other"


@dataclass(frozen=True)
class Spread:
    """A parameter known as a range (data-sheet min / typ / max)."""

    min: float
    typ: float
    max: float

    def __post_init__(self) -> None:
        if not (self.min <= self.typ <= self.max):
            raise ValueError(f"min <= typ <= max does not hold: {self.min}, {self.typ}, {self.max}")


@dataclass(frozen=True)
class Transistor:
    """A small-signal BJT.  ``is_a`` sets V_BE at any current (V_BE = V_T ln(I_C/I_S));
    ``vbe_v``, when given, is the data-sheet V_BE range the model checks that against.

    ``beta_r`` is the reverse beta of the Ebers-Moll model (how hard a saturated collector is
    pulled towards the emitter); absent, the model takes :data:`BETA_R_DEFAULT`.  The Early
    voltage is ``early_v`` (a range, drawn in the Monte Carlo) or ``vaf_v`` (one value); either
    way :attr:`vaf_v` is the typical value, None for no Early effect."""

    name: str
    polarity: Literal["npn"]
    beta: Spread
    is_a: Spread
    vce_sat_v: Spread
    vaf_v: float | None = None
    vbe_v: Spread | None = None
    beta_r: Spread | None = None
    early_v: Spread | None = None


@dataclass(frozen=True)
class OpAmp:
    """An op-amp's properties that matter for gain and clipping."""

    name: str
    headroom_v: Spread  # output cannot come closer than this to either rail
    gbw_hz: float = 1e6
    open_loop_gain: float = 1e5
    output_current_a: float = 0.02  # most it can drive before current limiting
    quiescent_a: Spread = field(default_factory=lambda: Spread(0.5e-3, 1e-3, 2e-3))


@dataclass(frozen=True)
class CommonEmitter:
    """Common-emitter stage, voltage-divider bias: R1 from the supply to the base, R2 from the
    base to ground, RC collector resistor, RE unbypassed emitter resistor in series with
    RE_BYP, which CE bypasses; C_IN and C_OUT are the coupling capacitors."""

    name: str
    transistor: Transistor
    r1: Part
    r2: Part
    rc: Part
    re: Part
    re_bypassed: Part | None = None
    c_e: Part | None = None
    c_in: Part | None = None
    c_out: Part | None = None
    kind: Literal["common_emitter"] = "common_emitter"

    @property
    def inverting(self) -> bool:
        return True


@dataclass(frozen=True)
class EmitterFollower:
    """Emitter follower.  ``dc_coupled`` means its base sits on the previous stage's
    collector (no divider, no input capacitor); otherwise R1/R2 bias it through C_IN."""

    name: str
    transistor: Transistor
    re: Part
    r1: Part | None = None
    r2: Part | None = None
    c_in: Part | None = None
    c_out: Part | None = None
    dc_coupled: bool = False
    kind: Literal["emitter_follower"] = "emitter_follower"

    @property
    def inverting(self) -> bool:
        return False


@dataclass(frozen=True)
class OpAmpInverting:
    """Inverting op-amp stage: gain −R_F/R_IN; input impedance R_IN."""

    name: str
    opamp: OpAmp
    r_in: Part
    r_f: Part
    c_in: Part | None = None
    c_out: Part | None = None
    kind: Literal["opamp_inverting"] = "opamp_inverting"

    @property
    def inverting(self) -> bool:
        return True


@dataclass(frozen=True)
class OpAmpNonInverting:
    """Non-inverting op-amp stage: gain 1 + R_F/R_G; R_BIAS sets the input impedance and
    the DC path of the input behind C_IN; C_G in series with R_G makes the DC gain one."""

    name: str
    opamp: OpAmp
    r_g: Part
    r_f: Part
    r_bias: Part | None = None
    c_in: Part | None = None
    c_g: Part | None = None
    c_out: Part | None = None
    kind: Literal["opamp_noninverting"] = "opamp_noninverting"

    @property
    def inverting(self) -> bool:
        return False


Stage = CommonEmitter | EmitterFollower | OpAmpInverting | OpAmpNonInverting
STAGE_KINDS: dict[str, type] = {
    "common_emitter": CommonEmitter,
    "emitter_follower": EmitterFollower,
    "opamp_inverting": OpAmpInverting,
    "opamp_noninverting": OpAmpNonInverting,
}
#: Every component field a stage kind may carry, in one fixed order: fault hypotheses and
#: the simulated bench's designator list are built in it.
PART_FIELDS: tuple[str, ...] = (
    "r1",
    "r2",
    "rc",
    "re",
    "re_bypassed",
    "c_e",
    "c_in",
    "c_out",
    "r_in",
    "r_f",
    "r_g",
    "r_bias",
    "c_g",
)


def stage_parts(stage: Stage) -> Iterator[tuple[str, Part]]:
    """(field, part) of every component fitted on ``stage``, in :data:`PART_FIELDS` order."""
    for name in PART_FIELDS:
        part = getattr(stage, name, None)
        if isinstance(part, Part):
            yield name, part


@dataclass(frozen=True)
class Channel:
    name: str
    input: str
    output: str
    stages: tuple[Stage, ...]
    load_ohm: Part

    @property
    def inverting(self) -> bool:
        """Odd number of inverting stages: the output is the input upside down."""
        return sum(s.inverting for s in self.stages) % 2 == 1


@dataclass(frozen=True)
class Supply:
    """The board's supply rails.  ``negative`` is None for a single-supply board."""

    positive: Part
    negative: Part | None = None

    @property
    def v_pos(self) -> float:
        return self.positive.nominal

    @property
    def v_neg(self) -> float:
        return self.negative.nominal if self.negative is not None else 0.0


@dataclass(frozen=True)
class Conditions:
    """How the board is tested."""

    frequency_hz: float
    nominal_input_vrms: float
    safe_input_vrms: float
    source_ohm: float = 50.0
    extra_frequencies_hz: tuple[float, ...] = ()
    clip_criterion: Literal["thd", "compression"] = "thd"
    clip_thd_percent: float = 1.0
    clip_compression_db: float = 1.0
    #: The board's specified THD ceiling at the nominal level, where the model's own figure
    #: is no usable limit (an op-amp stage is near-ideal below clipping); None: the model's.
    thd_limit_percent: float | None = None


#: Most Monte Carlo boards a board file may ask for.  The model keeps every board's
#: figures in memory (about 1 kB each, see harness.model.limits.limits_memory_bytes) and
#: takes about 60 µs per board on a two-core machine (benchmarks/bench_memory.py), so a
#: million is about a gigabyte and a minute; 1e7 was 8.7 GB and over 300 s.
MAX_SAMPLES = 1_000_000


@dataclass(frozen=True)
class LimitPolicy:
    """How limits are made from tolerances, so a line can freeze and trace them."""

    method: Literal["monte_carlo"] = "monte_carlo"
    samples: int = 20000
    coverage: float = 0.9973
    seed: int = 1
    worst_case: bool = True


@dataclass(frozen=True)
class Board:
    name: str
    part_number: str
    revision: str
    supply: Supply
    conditions: Conditions
    policy: LimitPolicy
    channels: tuple[Channel, ...]
    source: str = "<board>"
    digest: str = ""  # sha256 of the file's bytes: ties results and limits to the exact file

    def channel(self, name: str) -> Channel:
        for ch in self.channels:
            if ch.name == name:
                return ch
        raise KeyError(name)


def iter_parts(board: Board) -> Iterator[tuple[Channel, Stage, str, Part]]:
    """(channel, stage, field, part) of every component fitted on the board's channels, in
    board order (the supply and the test load are not board parts)."""
    for ch in board.channels:
        for st in ch.stages:
            for name, part in stage_parts(st):
                yield ch, st, name, part
