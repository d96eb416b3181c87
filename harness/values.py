"""Component values as people write them: RKM codes, SI prefixes, tolerances, E-series.

Parsing is pure (text in, numbers out) so the model, the loaders and the tests share it.
References: IEC 60062:2016 (RKM code, tolerance letters), IEC 60063:2015 (E-series).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from harness.errors import ValueParseError

#: SI / RKM multipliers.  IEC 60062 writes resistors with R K M G T (``4K7``) and
#: capacitors with p n u m (``4n7``); lower-case ``k`` is accepted as kilo.  ``m`` is
#: milli and ``M`` is mega, never the other way round.
_MULTIPLIERS: dict[str, float] = {
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "µ": 1e-6,
    "μ": 1e-6,
    "m": 1e-3,
    "R": 1.0,
    "r": 1.0,
    "E": 1.0,
    "k": 1e3,
    "K": 1e3,
    "M": 1e6,
    "G": 1e9,
    "T": 1e12,
}

_EXPONENTS: dict[str, int] = {k: round(math.log10(v)) for k, v in _MULTIPLIERS.items()}

#: Tolerance letters of IEC 60062:2016 (symmetric ones only).
TOLERANCE_LETTERS: dict[str, float] = {
    "B": 0.001,
    "C": 0.0025,
    "D": 0.005,
    "F": 0.01,
    "G": 0.02,
    "J": 0.05,
    "K": 0.10,
    "M": 0.20,
}

#: Unit symbols of the SI (BIPM, The International System of Units, 9th ed. 2019, §2.3.4
#: Table 4: Ω F V A Hz; Table 2: s) and the quantity each measures.  Symbols are
#: case-sensitive (§5.2): ``Hz``, never ``hz``; ``ohm`` is the unit's name, in any case.
#: (Clause and table numbers from memory.)
UNITS: dict[str, str] = {
    "Ω": "resistance",
    "F": "capacitance",
    "V": "voltage",
    "A": "current",
    "Hz": "frequency",
    "s": "time",
}
#: An example of each quantity written correctly, for hints.
_EXAMPLES: dict[str, str] = {
    "Ω": '"6k8", "6.8k" or "6.8 kΩ"',
    "F": '"2u2", "2.2u" or "2.2 µF"',
    "V": '"12", "12 V" or "150 mV"',
    "A": '"0.015", "15m" or "15 mA"',
    "Hz": '"1000", "1k" or "1 kHz"',
    "s": '"0.5" or "500 ms"',
    "": "a plain number such as 100 or 1e5",
}
#: Multiplier letters that make no sense for a quantity (IEC 60062:2016 writes resistors
#: with R K M G T and capacitors with p n µ m): 6.8u on a resistor is 6.8 µΩ, 4k7 on a
#: capacitor 4700 F; both are a value meant for the other part.
_IMPLAUSIBLE: dict[str, frozenset[str]] = {
    "Ω": frozenset("pnuµμ"),
    "F": frozenset("RrEkKMGT"),
}
_PREFIX = "pnuµμmkKMGT"
_WITH_UNIT = re.compile(
    rf"^(?P<num>\S*?)(?P<space> ?)(?P<prefix>[{_PREFIX}]?)"
    r"(?P<unit>Ω|\u2126|[oO][hH][mM][sS]?|F|V|A|Hz|s)$"
)
_RKM = re.compile(r"^(\d*)([pnuµμmRrEkKMGT])(\d*)$")
_PLAIN = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_PREFIXED = re.compile(rf"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)([{_PREFIX}])$")
_WRONG_CASE = re.compile(r"(?:\d|[pnuµμmkKMGT])(hz|HZ|hZ|v|a|f)$")


def _unit_symbol(text: str) -> str:
    return "Ω" if text in ("Ω", "\u2126") or text.lower().startswith("ohm") else text


def _number(s: str, raw: str) -> tuple[float, str | None]:
    """A number without unit: (value, multiplier letter or None)."""
    if _PLAIN.match(s):
        return float(s), None
    m = _PREFIXED.match(s)
    if m:
        return float(f"{m.group(1)}e{_EXPONENTS[m.group(2)]}"), m.group(2)
    sign = ""
    if s[:1] in "+-":
        sign, s = s[0], s[1:]
    m = _RKM.match(s)
    if m and (m.group(1) or m.group(3)):
        whole, letter, frac = m.groups()
        return float(f"{sign}{whole or '0'}.{frac or '0'}e{_EXPONENTS[letter]}"), letter
    hint = "write e.g. 4700, 4.7k, 4k7, R47, 2M2, 100n or 4u7"
    if _WRONG_CASE.search(raw):
        hint = "unit symbols are case-sensitive (SI Brochure): write Hz, V, A or F"
    raise ValueParseError(
        raw, "not a number, an SI-prefixed number or an IEC 60062 code", hint=hint
    )


def parse_quantity(text: str | float | int, unit: str | None = None) -> float:
    """Read a value written as a number, an SI-prefixed number (``4.7k``) or an RKM code.

    ``4k7`` = 4700, ``R47`` = 0.47, ``2M2`` = 2.2e6, ``4n7`` = 4.7e-9, ``470R`` = 470,
    ``10u`` = 1e-5.  A unit symbol may follow (``6.8uF``, ``4.7 kΩ``, ``15 mA``, ``1kohm``),
    separated by at most one space as the SI writes it (SI Brochure §5.4.3); no other space
    is allowed inside a value (``"6k8 5"`` is refused, not read as 6850).

    ``unit`` is what the value measures: ``"Ω"``, ``"F"``, ``"V"``, ``"A"``, ``"Hz"``,
    ``"s"``, or ``""`` for a plain number.  A unit symbol of another quantity is refused
    (``6.8uF`` for a resistor), and so is a multiplier that belongs to the other kind of
    part (``6.8u`` for a resistor, ``4k7`` for a capacitor).  None checks nothing.
    """
    if isinstance(text, bool):
        raise ValueParseError(str(text), "a value must be a number, not true/false")
    if isinstance(text, int | float):
        value = float(text)
        if not math.isfinite(value):
            raise ValueParseError(str(text), "value is not finite")
        return value
    if not isinstance(text, str):
        raise ValueParseError(repr(text), "expected a number or a text such as '4k7'")
    raw = text.strip()
    s = re.sub(r"(?<=\d)_(?=\d)", "", raw)  # digit grouping, 4_700
    if not s:
        raise ValueParseError(raw, "empty value", hint="write a number such as 4k7 or 4700")
    written: str | None = None
    m = _WITH_UNIT.match(s)
    if m and m.group("num") and (m.group("num")[-1:].isdigit() or not m.group("prefix")):
        num, prefix, written = m.group("num"), m.group("prefix"), _unit_symbol(m.group("unit"))
        if prefix and not _PLAIN.match(num):
            raise ValueParseError(
                raw, "a multiplier is written twice", hint=f"write e.g. {_EXAMPLES[written]}"
            )
        s = num + prefix
    if any(ch.isspace() for ch in s):
        raise ValueParseError(
            raw,
            "has a space inside the value",
            hint="write the value without spaces (a tolerance goes after one space: "
            '"6k8 5%"); one space may only separate a number from its unit: "6.8 kΩ"',
        )
    value, letter = _number(s, raw)
    if unit is None:
        return value
    example = _EXAMPLES.get(unit, "")
    if written is not None and written != unit:
        expected = f"a {UNITS[unit]} in {unit}" if unit else "a plain number (no unit)"
        raise ValueParseError(
            raw,
            f"unit {written} is a {UNITS[written]}, where {expected} is expected",
            hint=f"write e.g. {example}",
        )
    if letter is not None and letter in _IMPLAUSIBLE.get(unit, frozenset()):
        shown = f"{format_si(value)}{unit}".replace("u", "µ")
        raise ValueParseError(
            raw,
            f"would be {shown}: {letter!r} does not make a {UNITS[unit]} of a real part "
            "(is it the value of another component?)",
            hint=f"write e.g. {example}",
        )
    return value


_TOL_SYM = re.compile(r"^(?:±|\+/-|\+-)?(\d+\.?\d*|\.\d+)%$")
_TOL_ASYM = re.compile(r"^\+(\d+\.?\d*)%/-(\d+\.?\d*)%$|^-(\d+\.?\d*)%/\+(\d+\.?\d*)%$")


def parse_tolerance(text: str | float | int) -> tuple[float, float]:
    """Read a tolerance; returns (minus, plus) as positive fractions.

    Accepts ``1%``, ``±5%``, ``+80%/-20%``, an IEC 60062 letter (``F`` = ±1 %) or a
    bare fraction (0.01).  A tolerance of 100 % or more is refused: the part could then
    be absent or reversed, which no limit can describe.
    """
    if isinstance(text, bool):
        raise ValueParseError(str(text), "a tolerance must be a percentage such as '1%'")
    if isinstance(text, int | float):
        minus = plus = float(text)
    elif isinstance(text, str):
        s = text.strip().replace(" ", "")
        if s.upper() in TOLERANCE_LETTERS and len(s) == 1:
            minus = plus = TOLERANCE_LETTERS[s.upper()]
        elif m := _TOL_SYM.match(s):
            minus = plus = float(m.group(1)) / 100.0
        elif m := _TOL_ASYM.match(s):
            if m.group(1) is not None:
                plus, minus = float(m.group(1)) / 100.0, float(m.group(2)) / 100.0
            else:
                minus, plus = float(m.group(3)) / 100.0, float(m.group(4)) / 100.0
        else:
            raise ValueParseError(
                text, "not a tolerance", hint="write e.g. '1%', '±5%', '+80%/-20%' or 'J'"
            )
    else:
        raise ValueParseError(repr(text), "not a tolerance", hint="write e.g. '1%'")
    for frac in (minus, plus):
        if not math.isfinite(frac) or frac < 0:
            raise ValueParseError(str(text), "tolerance must be zero or positive")
        if frac >= 1.0:
            raise ValueParseError(
                str(text), "tolerance of 100 % or more", hint="use a tolerance under 100 %"
            )
    return minus, plus


def split_value_tolerance(text: str) -> tuple[str, str | None]:
    """Split ``"4k7 1%"``, ``"4k7 ±1%"`` or the IEC form ``"4K7J"`` into value and tolerance."""
    s = text.strip()
    parts = s.split()
    if len(parts) >= 2 and _is_tolerance(parts[-1]):
        # "4k7 1%", "4.7 kΩ 1%": the last word is the tolerance, the rest the value
        return " ".join(parts[:-1]), parts[-1]
    if len(parts) == 2 and not _WITH_UNIT.match(s):
        return parts[0], parts[1]  # "6k8 5": a tolerance without %, refused as such
    if len(parts) == 2:
        return s, None  # "4.7 kΩ": a value with its unit
    if len(parts) == 1:
        # IEC 60062 code with trailing tolerance letter: 4K7J, 470RF, 2M2K
        m = re.match(r"^(\d*[RKMG]\d*)([BCDFGJKM])$", s)
        if m and _RKM.match(m.group(1)):
            return m.group(1), m.group(2)
        return s, None
    raise ValueParseError(text, "expected a value and an optional tolerance, e.g. '4k7 1%'")


def _is_tolerance(word: str) -> bool:
    try:
        parse_tolerance(word)
    except ValueParseError:
        return "%" in word  # a malformed percentage is still meant as the tolerance
    return not word.replace(".", "").isdigit()  # a bare 0.05 is a value, not a tolerance


@dataclass(frozen=True)
class Toleranced:
    """A component value with its tolerance band: nominal × (1 − minus … 1 + plus)."""

    nominal: float
    tol_minus: float = 0.0
    tol_plus: float = 0.0

    @property
    def low(self) -> float:
        return self.nominal * (1.0 - self.tol_minus)

    @property
    def high(self) -> float:
        return self.nominal * (1.0 + self.tol_plus)

    def __str__(self) -> str:
        if self.tol_minus == self.tol_plus:
            return f"{format_si(self.nominal)} ±{self.tol_plus * 100:g}%"
        return f"{format_si(self.nominal)} +{self.tol_plus * 100:g}%/-{self.tol_minus * 100:g}%"


def format_si(value: float, digits: int = 3) -> str:
    """Format with an SI prefix (``4.7k``, ``100n``) for tables and messages."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g}"
    prefixes = [
        (1e12, "T"),
        (1e9, "G"),
        (1e6, "M"),
        (1e3, "k"),
        (1.0, ""),
        (1e-3, "m"),
        (1e-6, "u"),
        (1e-9, "n"),
        (1e-12, "p"),
    ]
    mag = abs(value)
    for scale, prefix in prefixes:
        if mag >= scale * 0.9995:
            return f"{value / scale:.{digits}g}{prefix}"
    return f"{value:.{digits}g}"


# --- preferred values (IEC 60063:2015) --------------------------------------------------------

E12: tuple[float, ...] = (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2)
E24: tuple[float, ...] = tuple(
    sorted((*E12, 1.1, 1.3, 1.6, 2.0, 2.4, 3.0, 3.6, 4.3, 5.1, 6.2, 7.5, 9.1))
)


def e96() -> tuple[float, ...]:
    """E96 mantissas: each is round(100·10^(i/96))/100 (IEC 60063)."""
    return tuple(round(100 * 10 ** (i / 96)) / 100 for i in range(96))


def nearest_preferred(value: float, series: tuple[float, ...] = E24) -> float:
    """The preferred value nearest to ``value`` on a log scale."""
    if value <= 0:
        raise ValueError("preferred values are positive")
    decade = math.floor(math.log10(value))
    best = min(
        (m * 10.0 ** (decade + d) for m in series for d in (-1, 0, 1)),
        key=lambda c: abs(math.log(c / value)),
    )
    return float(f"{best:.3g}")
