"""The measured quantities: one registry of what each stored measurement is.

Why a module of its own, below every layer: the run names and stores a measurement, the
store checks its unit, the reports and the console show it, the diagnosis reads it as
evidence, and the limit model computes the limit it is decided against.  Each of them looks
the quantity up here, so a quantity has one stored name, one unit, one label and one key per
use, and nothing guesses by prefix.

Each :class:`Quantity` says:

``name``      the stored measurement name (the ``name`` column of a measurement row);
``unit``      the stored unit (SI symbols; ``V rms`` for an rms voltage);
``label``     how a person is shown it;
``limit``     the field of the channel's limits it is decided against (``None``: no limit;
              for a DC test point, the key in the operating-point limits);
``evidence``  the diagnosis key it becomes (``None``: not diagnosis evidence);
``sweep``     the column of a sweep point holding the same quantity (``None``: none);
``fmt``       the format of its value on screens;
``log``       its spread is relative: the diagnosis scores it in dB;
``words``     its value is shown in words from the row's detail, not as a number;
``board``     board-wide: stored with an empty channel.

Two families are named by a pattern: a DC test point ``dc.<stage>.<quantity>`` (a voltage
decided against the operating-point limit of the same key) and a gain at an extra frequency
``gain@<f>Hz``.  :func:`lookup` finds any stored name, family members included.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace


@dataclass(frozen=True)
class Quantity:
    """One measured quantity (see the module docstring for the fields)."""

    name: str
    unit: str
    label: str
    limit: str | None = None
    evidence: str | None = None
    sweep: str | None = None
    fmt: str = ".5g"
    log: bool = False
    words: bool = False
    board: bool = False

    def limit_key(self) -> str:
        """The limit field the quantity is decided against (an error for one with none)."""
        if self.limit is None:
            raise ValueError(f"{self.label} is decided against no limit")
        return self.limit

    def sweep_field(self) -> str:
        """The sweep-point column holding the quantity (an error for one sweeps lack)."""
        if self.sweep is None:
            raise ValueError(f"sweep points hold no {self.label}")
        return self.sweep

    def show(self, value: float | None, *, unit: bool = True) -> str:
        """The value as a screen shows it (``-`` for none), with the unit unless told not."""
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return "-"
        text = format(value, self.fmt)
        return f"{text} {self.unit}" if unit and self.unit else text


GAIN = Quantity("gain", "dB", "gain", "gain_db", "gain_db", "gain_db", fmt=".3f", log=True)
THD = Quantity(
    "thd",
    "%",
    "THD at nominal level",
    "thd_percent",
    "thd_percent",
    "thd_percent",
    fmt=".4g",
    log=True,
)
PHASE = Quantity("phase", "deg", "phase", "phase_deg", fmt=".1f")
CLIP_INPUT = Quantity(
    "clip_input",
    "V rms",
    "clipping threshold",
    "clip_input_vrms",
    "clip_input_vrms",
    fmt=".4g",
    log=True,
)
CLIP_SIDE = Quantity("clip_side", "", "clipping side", "clip_side", "clip_side", words=True)
CONDITION = Quantity("condition", "", "channel condition", words=True)
SUPPLY_CURRENT = Quantity(
    "supply_current",
    "A",
    "supply current",
    "supply_current_a",
    "supply_current_a",
    fmt=".4g",
    board=True,
)
LOW_CORNER = Quantity("low_corner", "Hz", "low -3 dB corner", "low_corner_hz", fmt=".3g")
MIDBAND_GAIN = Quantity("midband_gain", "dB", "mid-band gain", fmt=".3f")

#: Every quantity with a fixed name, by stored name.
QUANTITIES: dict[str, Quantity] = {
    q.name: q
    for q in (
        GAIN,
        THD,
        PHASE,
        CLIP_INPUT,
        CLIP_SIDE,
        CONDITION,
        SUPPLY_CURRENT,
        LOW_CORNER,
        MIDBAND_GAIN,
    )
}

#: Diagnosis keys that are bounds of the clipping threshold rather than a value: the search
#: ended without a crossing, above (not met up to) or below (already met at) a level.
CLIP_ABOVE_EVIDENCE = "clip_above_vrms"
CLIP_BELOW_EVIDENCE = "clip_below_vrms"
#: The bench's THD floor of the nominal record, kept beside the THD as evidence.
THD_FLOOR_EVIDENCE = "thd_floor_percent"

DC_PREFIX = "dc."
_FREQ_PREFIX = "gain@"
_FREQ_SUFFIX = "Hz"


def dc_point(point: str) -> Quantity:
    """The DC test point ``point`` (``"<stage>.<quantity>"``, e.g. ``"Q1.collector_v"``)."""
    return Quantity(f"{DC_PREFIX}{point}", "V", f"{point} (DC)", point, point, fmt=".4g")


def gain_at(frequency_hz: float) -> Quantity:
    """The gain at an extra frequency (decided against no limit: it is a record)."""
    return replace(
        GAIN,
        name=f"{_FREQ_PREFIX}{frequency_hz:g}{_FREQ_SUFFIX}",
        label=f"gain at {frequency_hz:g} Hz",
        limit=None,
        evidence=f"{GAIN.evidence}@{frequency_hz:g}",
        sweep=None,
    )


def frequency_of(name: str) -> float | None:
    """The frequency of a ``gain@<f>Hz`` name, or ``None`` for any other name."""
    if not (name.startswith(_FREQ_PREFIX) and name.endswith(_FREQ_SUFFIX)):
        return None
    try:
        f = float(name[len(_FREQ_PREFIX) : -len(_FREQ_SUFFIX)])
    except ValueError:
        return None
    return f if math.isfinite(f) and f > 0 else None


def lookup(name: str) -> Quantity | None:
    """The quantity stored as ``name``, family members included; ``None`` if unknown."""
    q = QUANTITIES.get(name)
    if q is not None:
        return q
    if name.startswith(DC_PREFIX) and len(name) > len(DC_PREFIX):
        return dc_point(name[len(DC_PREFIX) :])
    f = frequency_of(name)
    return gain_at(f) if f is not None else None


def by_evidence(evidence: str) -> Quantity | None:
    """The quantity a diagnosis key names (the channel prefix removed), if any."""
    for q in QUANTITIES.values():
        if q.evidence == evidence:
            return q
    if "@" in evidence:
        head, _, f = evidence.partition("@")
        if head == GAIN.evidence:
            try:
                return gain_at(float(f))
            except ValueError:
                return None
    return None


#: Diagnosis keys of linear quantities scored in dB: their spread is relative (a gain is
#: stored in dB already, so it is scored as it is).
DB_SCORED_EVIDENCE: frozenset[str] = frozenset(
    {q.evidence for q in QUANTITIES.values() if q.log and q.unit != "dB" and q.evidence}
    | {CLIP_ABOVE_EVIDENCE, CLIP_BELOW_EVIDENCE}
)
#: Diagnosis keys of board-wide quantities (no channel prefix).
BOARD_EVIDENCE: frozenset[str] = frozenset(
    q.evidence for q in QUANTITIES.values() if q.board and q.evidence
)
