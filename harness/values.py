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

_UNIT_SUFFIX = re.compile(r"(ohms?|Ω|F|V|A|Hz|s)$")
_RKM = re.compile(r"^(\d*)([pnuµμmRrEkKMGT])(\d*)$")
_PLAIN = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_PREFIXED = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([pnuµμmkKMGT])$")


def parse_quantity(text: str | float | int) -> float:
    """Read a value written as a number, an SI-prefixed number (``4.7k``) or an RKM code.

    ``4k7`` = 4700, ``R47`` = 0.47, ``2M2`` = 2.2e6, ``4n7`` = 4.7e-9, ``470R`` = 470,
    ``10u`` = 1e-5.  A trailing unit (``ohm``, ``Ω``, ``F``, ``V``, ``A``, ``Hz``) is ignored.
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
    s = raw.replace(" ", "").replace("_", "")
    if not s:
        raise ValueParseError(raw, "empty value", hint="write a number such as 4k7 or 4700")
    if s not in {"F", "V", "A", "s"}:
        s = _UNIT_SUFFIX.sub("", s) or s
    if _PLAIN.match(s):
        return float(s)
    m = _PREFIXED.match(s)
    if m:
        return float(f"{m.group(1)}e{_EXPONENTS[m.group(2)]}")
    sign = ""
    if s[:1] in "+-":
        sign, s = s[0], s[1:]
    m = _RKM.match(s)
    if m and (m.group(1) or m.group(3)):
        whole, letter, frac = m.groups()
        return float(f"{sign}{whole or '0'}.{frac or '0'}e{_EXPONENTS[letter]}")
    raise ValueParseError(
        raw,
        "not a number, an SI-prefixed number or an IEC 60062 code",
        hint="write e.g. 4700, 4.7k, 4k7, R47, 2M2, 100n or 4u7",
    )


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
    if len(parts) == 2:
        return parts[0], parts[1]
    if len(parts) == 1:
        # IEC 60062 code with trailing tolerance letter: 4K7J, 470RF, 2M2K
        m = re.match(r"^(\d*[RKMG]\d*)([BCDFGJKM])$", s)
        if m and _RKM.match(m.group(1)):
            return m.group(1), m.group(2)
        return s, None
    raise ValueParseError(text, "expected a value and an optional tolerance, e.g. '4k7 1%'")


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
