"""Pure SCPI / IEEE 488.2 codecs shared by the drivers and the simulated bench.

No sockets, no VISA: bytes and text in, values out, so the client (``session``) and the
server (``harness.sim``) frame and parse exactly the same way and the tests can check
each rule against the standard's own examples.

References:
- IEEE Std 488.2-1992 §8.7.9 definite-length arbitrary block response data:
  ``#`` + one non-zero digit *n* + *n* digits of byte count + the bytes.
- IEEE 488.2 §10.14 ``*IDN?``: four comma-separated fields (clause number unverified).
- SCPI-99 vol. 2 ch. 21 ``SYSTem:ERRor?``: ``<code>,"<text>"``, ``0,"No error"`` when empty.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from harness.errors import MalformedReply

__all__ = [
    "DATATYPES",
    "NO_ERROR",
    "Identity",
    "channel_list",
    "decode_values",
    "encode_block",
    "encode_values",
    "format_number",
    "ladder_values",
    "parse_ascii_values",
    "parse_block",
    "parse_block_header",
    "parse_bool",
    "parse_error_reply",
    "parse_idn",
    "parse_number",
    "parse_preamble",
]

#: Element types a waveform block may carry, with their numpy kind.  SCPI ``FORMat:DATA``
#: names them INTeger,8 / INTeger,16 / REAL,32.
DATATYPES: dict[str, str] = {
    "int8": "i1",
    "int16": "i2",
    "uint8": "u1",
    "uint16": "u2",
    "float32": "f4",
}

#: SCPI ``FORMat:DATA`` argument for each element type (SCPI-99 vol. 2 ch. 9).
SCPI_FORMAT: dict[str, str] = {"int8": "INTeger,8", "int16": "INTeger,16", "float32": "REAL,32"}

NO_ERROR = 0

#: Largest payload a definite-length header can describe: nine digits of count.
_MAX_BLOCK = 999_999_999


# --- definite-length arbitrary blocks (IEEE 488.2 §8.7.9) -----------------------------------


def encode_block(data: bytes) -> bytes:
    """Frame ``data`` as a definite-length block ``#<n><count><data>``.

    The response-message terminator (LF) is NOT included: it belongs to the message,
    not to the block, and the sender appends it once after the last response unit.
    """
    count = len(data)
    if count > _MAX_BLOCK:
        raise ValueError(f"block of {count} bytes exceeds the 9-digit definite-length limit")
    digits = str(count).encode("ascii")
    return b"#" + str(len(digits)).encode("ascii") + digits + bytes(data)


def parse_block_header(buf: bytes) -> tuple[int, int]:
    """Read the header of a definite-length block at the start of ``buf``.

    Returns ``(header_len, payload_len)``.  Raises :class:`MalformedReply` for anything
    that is not ``#`` + digit 1-9 + that many digits; ``#0`` (indefinite length) is
    refused because over a byte stream it cannot be delimited from the terminator.
    """
    if len(buf) < 2:
        raise MalformedReply(f"block header truncated: {bytes(buf[:16])!r}")
    if buf[0:1] != b"#":
        raise MalformedReply(f"block does not start with '#': {bytes(buf[:16])!r}")
    nd = buf[1:2]
    if nd == b"0":
        raise MalformedReply(
            "indefinite-length block '#0' cannot be delimited on a stream",
            hint="set the instrument to definite-length blocks",
        )
    if not (b"1" <= nd <= b"9"):
        raise MalformedReply(f"block header digit count is not 1-9: {bytes(buf[:16])!r}")
    n = int(nd)
    digits = bytes(buf[2 : 2 + n])
    if len(digits) < n:
        raise MalformedReply(f"block header truncated: {bytes(buf[:16])!r}")
    if not digits.isdigit():
        raise MalformedReply(f"block byte count is not decimal: {bytes(buf[: 2 + n])!r}")
    return 2 + n, int(digits)


def parse_block(buf: bytes) -> tuple[bytes, int]:
    """Split one definite-length block off the start of ``buf``.

    Returns ``(payload, consumed)``; ``consumed`` counts header and payload but not the
    terminator that may follow.  A buffer shorter than the header promises raises
    :class:`MalformedReply` (the block was cut off).
    """
    header_len, count = parse_block_header(buf)
    end = header_len + count
    if len(buf) < end:
        raise MalformedReply(
            f"block cut short: header promises {count} bytes, {len(buf) - header_len} arrived"
        )
    return bytes(buf[header_len:end]), end


def _dtype(datatype: str, big_endian: bool) -> np.dtype:
    try:
        kind = DATATYPES[datatype]
    except KeyError:
        raise ValueError(
            f"unknown block datatype {datatype!r}; expected one of {sorted(DATATYPES)}"
        ) from None
    return np.dtype((">" if big_endian else "<") + kind)


def encode_values(
    values: Sequence[float] | np.ndarray, datatype: str, *, big_endian: bool = True
) -> bytes:
    """Numbers as a framed block of ``datatype`` (``FORMat:BORDer NORMal`` = big-endian)."""
    arr = np.asarray(values).astype(_dtype(datatype, big_endian), copy=False)
    return encode_block(arr.tobytes())


def decode_values(payload: bytes, datatype: str, *, big_endian: bool = True) -> np.ndarray:
    """Block payload bytes to a numpy array in native byte order.

    A payload that is not a whole number of elements raises :class:`MalformedReply`.
    """
    dt = _dtype(datatype, big_endian)
    if len(payload) % dt.itemsize:
        raise MalformedReply(
            f"block of {len(payload)} bytes is not a whole number of {datatype} elements"
        )
    return np.frombuffer(payload, dtype=dt).astype(dt.newbyteorder("="))


# --- replies in text ------------------------------------------------------------------------

_ERROR_RE = re.compile(r'^\s*([+-]?\d+)\s*,\s*"(.*)"\s*$', re.DOTALL)


def parse_error_reply(text: str) -> tuple[int, str]:
    """``-113,"Undefined header"`` -> ``(-113, "Undefined header")``.

    The text is IEEE 488.2 string response data: doubled quotes inside stand for one.
    Anything else raises :class:`MalformedReply`.
    """
    m = _ERROR_RE.match(text)
    if not m:
        raise MalformedReply(f'error-queue reply is not <code>,"<text>": {text!r}')
    return int(m.group(1)), m.group(2).replace('""', '"')


@dataclass(frozen=True)
class Identity:
    """The four ``*IDN?`` fields (IEEE 488.2 §10.14, clause number unverified)."""

    maker: str
    model: str
    serial: str
    firmware: str

    def __str__(self) -> str:
        return f"{self.maker},{self.model},{self.serial},{self.firmware}"

    def matches(self, expected: str) -> bool:
        """True when each comma-separated field of ``expected`` equals the same field here.

        ``expected`` may give fewer than four fields (``"maker,model"``); an empty field
        matches anything.  Comparison ignores case and surrounding spaces, because makers
        differ in the case of the same model name between firmware versions.
        """
        mine = (self.maker, self.model, self.serial, self.firmware)
        fields = [f.strip() for f in expected.split(",")]
        if len(fields) > 4:
            return False
        return all(
            not want or want.casefold() == have.strip().casefold()
            for want, have in zip(fields, mine, strict=False)
        )


def parse_idn(text: str) -> Identity:
    """``maker,model,serial,firmware`` -> :class:`Identity`; other shapes are malformed."""
    fields = [f.strip() for f in text.strip().split(",")]
    if len(fields) != 4:
        raise MalformedReply(f"*IDN? reply has {len(fields)} fields, expected 4: {text!r}")
    return Identity(*fields)


#: SCPI-99 vol. 1 §7.2.1.5 (from memory): 9.91E37 stands for "not a number", 9.9E37 for
#: infinity; instruments send them for overloaded or invalid measurements.
_SCPI_NAN = 9.91e37
_SCPI_INF = 9.9e37


def parse_number(text: str) -> float:
    """A numeric reply (NR1/NR2/NR3, as IEEE 488.2 §8.7.2-8.7.4) to a float.

    SCPI's 9.91E37 becomes NaN and ±9.9E37 ±inf.  Non-numeric text raises
    :class:`MalformedReply`.
    """
    s = text.strip()
    try:
        x = float(s)
    except ValueError:
        raise MalformedReply(f"reply is not a number: {text!r}") from None
    if not math.isfinite(x) and s.lower().lstrip("+-") in ("inf", "infinity", "nan"):
        # Python accepts these words, SCPI does not send them.
        raise MalformedReply(f"reply is not a SCPI number: {text!r}")
    if math.isclose(x, _SCPI_NAN, rel_tol=1e-6):
        return math.nan
    if math.isclose(abs(x), _SCPI_INF, rel_tol=1e-6):
        return math.copysign(math.inf, x)
    return x


def parse_ascii_values(text: str) -> np.ndarray:
    """Comma-separated numeric response data (IEEE 488.2 §8.7.2-8.7.4) as float64."""
    s = text.strip()
    if not s:
        return np.zeros(0)
    out = np.empty(s.count(",") + 1)
    for i, item in enumerate(s.split(",")):
        out[i] = parse_number(item)
    if not np.all(np.isfinite(out)):
        raise MalformedReply("waveform text holds an overload or not-a-number value")
    return out


def parse_preamble(text: str, fields: Mapping[str, int]) -> dict[str, float]:
    """A waveform preamble reply: comma-separated fields, picked by position.

    ``fields`` maps a field name (``x_increment``, ``y_reference``, ...) to its position
    (0 = first).  Every named field must be there and be a finite number; the increments
    must be positive.  Anything else raises :class:`MalformedReply` naming the field.
    """
    items = [t.strip().strip('"') for t in text.strip().split(",")]
    out: dict[str, float] = {}
    for name, pos in sorted(fields.items(), key=lambda kv: kv[1]):
        if pos >= len(items) or not items[pos]:
            raise MalformedReply(
                f"preamble has {len(items)} field(s), no field {pos} ({name}): {text[:80]!r}",
                hint=f"check preamble_fields.{name} in the profile",
            )
        try:
            x = float(items[pos])
        except ValueError:
            x = math.nan
        if not math.isfinite(x) or abs(x) >= 9.9e37:
            raise MalformedReply(
                f"preamble field {pos} ({name}) is not a number: {items[pos][:20]!r}",
                hint=f"check preamble_fields.{name} in the profile",
            )
        if name in ("x_increment", "y_increment") and not x > 0:
            raise MalformedReply(
                f"preamble field {pos} ({name}) must be positive, not {items[pos][:20]!r}",
                hint=f"check preamble_fields.{name} in the profile",
            )
        if name == "points" and (x < 1 or not x.is_integer()):
            raise MalformedReply(f"preamble field {pos} (points) is not a count: {items[pos]!r}")
        out[name] = x
    return out


def parse_bool(text: str) -> bool:
    """A boolean reply: ``1``/``0`` (SCPI returns NR1) or ``ON``/``OFF``."""
    s = text.strip().upper()
    if s in ("1", "ON", "+1"):
        return True
    if s in ("0", "OFF", "+0"):
        return False
    raise MalformedReply(f"reply is not a boolean (1/0/ON/OFF): {text!r}")


# --- parameters in text ---------------------------------------------------------------------


def format_number(x: float | int | bool) -> str:
    """A number as SCPI decimal numeric program data: plain or exponent form, base units.

    Never a unit suffix or SI prefix (``M`` would be milli to SCPI, ``MHZ`` mega).
    Twelve significant digits, enough for any setting and short on the wire.
    """
    if isinstance(x, bool):
        return "1" if x else "0"
    if isinstance(x, int | np.integer):
        return str(int(x))
    xf = float(x)
    if not math.isfinite(xf):
        raise ValueError(f"cannot send {xf!r} to an instrument")
    if xf == 0.0:
        return "0"
    if xf.is_integer() and abs(xf) < 1e12:
        return str(int(xf))
    s = f"{xf:.12G}"
    if "E" in s:
        mant, exp = s.split("E")
        s = f"{mant}E{int(exp)}"
    return s


def ladder_values(steps: tuple[float, ...], lo: float, hi: float) -> tuple[float, ...]:
    """A setting ladder (1-2-5 and the like, common practice): every mantissa of ``steps``
    times a power of ten between ``lo`` and ``hi`` (inclusive)."""
    out = []
    for k in range(math.floor(math.log10(lo)) - 1, math.ceil(math.log10(hi)) + 1):
        for m in steps:
            x = float(f"{m * 10.0**k:.6g}")
            if lo * (1 - 1e-9) <= x <= hi * (1 + 1e-9):
                out.append(x)
    if not out:
        raise ValueError("holds no value between min and max")
    return tuple(sorted(out))


def channel_list(channels: Iterable[int]) -> str:
    """Relay or input numbers as the body of a SCPI channel list: ``1,2,5`` (in ``(@...)``)."""
    items = [int(c) for c in channels]
    if not items:
        raise ValueError("empty channel list")
    if any(c < 1 for c in items):
        raise ValueError(f"channel numbers start at 1: {items}")
    return ",".join(str(c) for c in items)


def format_text(settings: Mapping[str, Any], fmt: str) -> str | None:
    """What ``{format}`` is for element type ``fmt`` (or ``ascii``): the profile's own name,
    else the SCPI-99 ``FORMat:DATA`` argument; None where neither exists."""
    names = settings.get("format_names") or {}
    if fmt in names:
        return str(names[fmt])
    if fmt == "ascii":
        return "ASCii"
    return SCPI_FORMAT.get(fmt)
