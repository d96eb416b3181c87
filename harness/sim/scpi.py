"""The server side of SCPI: a table-driven command tree, parameter types and an error queue.

Each simulated instrument declares its commands as data — a header pattern such as
``[SOURce#:]FREQuency[:CW]`` (brackets: optional node, ``#``: numeric suffix allowed,
trailing ``?``: query), a handler and the parameter types with their ranges — and
:class:`ScpiDevice` does the parsing by the rules of SCPI-99 vol. 1 ch. 6-7 and IEEE 488.2
ch. 7: long or short form (the upper-case part of the mnemonic), case-insensitive, optional
nodes, numeric suffixes (default 1), ``;`` between message units with the header path rule
(a unit without a leading ``:`` continues in the subsystem of the previous one),
MINimum/MAXimum/DEFault, unit suffixes with multipliers, channel lists ``(@1,2,101:103)``
and the IEEE 488.2 common commands.  Nothing received is ever evaluated: parameters go
through the declared parsers only.

Errors go to a bounded FIFO queue read by ``SYSTem:ERRor[:NEXT]?``.  A command error
(-1xx) discards the rest of the program message, as IEEE 488.2 §6.1.6 prescribes for a
parser error; execution errors (-2xx) do not stop the following units.  A query whose
execution fails still answers (``9.91E37`` or an empty block, see :class:`ScpiFailure`)
so a client never waits for a reply that cannot come; a query whose header cannot be
parsed gets no answer, as on a real instrument.
"""

from __future__ import annotations

import math
import re
import threading
import time
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any, ClassVar

from harness.instruments.scpi import format_number
from harness.sim.faults import InstrumentFault

__all__ = [
    "ERROR_TEXT",
    "SCPI_NAN",
    "Bool",
    "ChannelList",
    "Choice",
    "Command",
    "Ctx",
    "Num",
    "Outcome",
    "ScpiDevice",
    "ScpiFailure",
    "parse_channel_list",
    "parse_numeric",
    "suffix_multiplier",
]

#: SCPI "not a number" (SCPI-99 vol. 1 §7.2.1.5, from memory), answered by a failed query.
SCPI_NAN = "9.91E37"

#: Standard texts of the SCPI error codes used here (SCPI-99 vol. 2 ch. 21).
ERROR_TEXT: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -131: "Invalid suffix",
    -161: "Invalid block data",
    -221: "Settings conflict",
    -222: "Data out of range",
    -223: "Too much data",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -350: "Queue overflow",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}

#: IEEE 488.2 §11.5.1 standard event status register bits.
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME, ESR_PON = 1, 4, 8, 16, 32, 128


class ScpiFailure(Exception):
    """Raised by parameter parsers and handlers: pushes ``code`` and stops the unit.

    ``reply`` is what a query answers anyway (``None``: the unit answers nothing).
    """

    def __init__(self, code: int, detail: str = "", *, reply: str | bytes | None = None) -> None:
        super().__init__(code, detail)
        self.code = code
        self.detail = detail
        self.reply = reply


# --- numbers and unit suffixes (IEEE 488.2 §7.7.2-7.7.3) ----------------------------------------

#: Suffix multipliers (IEEE 488.2 §7.7.3.4 Table 7-1, from memory).  ``M`` is milli and
#: ``MA`` is mega; a multiplier must be followed by a unit here (``1K`` alone is refused).
MULTIPLIERS: dict[str, float] = {
    "EX": 1e18, "PE": 1e15, "T": 1e12, "G": 1e9, "MA": 1e6, "K": 1e3,
    "M": 1e-3, "U": 1e-6, "N": 1e-9, "P": 1e-12, "F": 1e-15, "A": 1e-18,
}  # fmt: skip

#: The two historical exceptions where a leading M means mega (SCPI-99 vol. 1 §7.7.3).
SPECIAL_SUFFIXES: dict[str, tuple[str, float]] = {"MHZ": ("HZ", 1e6), "MOHM": ("OHM", 1e6)}

_NUMBER = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:\s*E\s*[+-]?\s*\d+)?)\s*([A-Z]*)$")


def suffix_multiplier(suffix: str, unit: str | None) -> float | None:
    """Factor a unit suffix stands for, or ``None`` when it does not fit ``unit``.

    ``suffix_multiplier("MV", "V") == 1e-3``; ``suffix_multiplier("MHZ", "HZ") == 1e6``;
    ``suffix_multiplier("KV", "HZ") is None``.  Case-insensitive.
    """
    s = suffix.upper()
    if not s:
        return 1.0
    if unit is None:
        return None
    unit = unit.upper()
    if s in SPECIAL_SUFFIXES:
        base, factor = SPECIAL_SUFFIXES[s]
        return factor if base == unit else None
    if s == unit:
        return 1.0
    if s.endswith(unit):
        return MULTIPLIERS.get(s[: -len(unit)])
    return None


def parse_numeric(token: str, unit: str | None = None) -> float:
    """Decimal numeric program data with an optional unit suffix to a float in base units.

    Raises :class:`ScpiFailure` -102 for a malformed number, -131 for a suffix that does
    not fit ``unit``, -104 for character data where a number belongs.
    """
    t = token.strip().upper()
    m = _NUMBER.match(t)
    if not m:
        if t[:1].isalpha():
            raise ScpiFailure(-104, f"number expected: {token[:20]}")
        raise ScpiFailure(-102, f"bad number {token[:20]}")
    mantissa = m.group(1).replace(" ", "")
    factor = suffix_multiplier(m.group(2), unit)
    if factor is None:
        raise ScpiFailure(-131, m.group(2)[:12])
    return float(mantissa) * factor


# --- parameter types ----------------------------------------------------------------------------


class Param:
    """One declared parameter: ``parse(token)`` returns the value or raises ScpiFailure."""

    optional: bool = False

    def parse(self, token: str) -> Any:  # pragma: no cover - interface
        raise NotImplementedError


@dataclass(frozen=True)
class Num(Param):
    """A numeric parameter in base unit ``unit`` (HZ, V, A, S or None), range lo..hi.

    MINimum / MAXimum / DEFault stand for ``lo`` / ``hi`` / ``default`` (SCPI-99 vol. 1
    §7.2.1.1).  ``integer`` rounds the value (IEEE 488.2 §7.7.2.3: an integer parameter
    accepts any decimal number and rounds it).
    """

    unit: str | None
    lo: float
    hi: float
    default: float | None = None
    integer: bool = False
    optional: bool = False
    keywords: tuple[str, ...] = ()  # extra character data accepted as such (e.g. AUTO)

    def parse(self, token: str) -> Any:
        t = token.strip().upper()
        if t in self.keywords:  # an instrument may give MIN/MAX/DEF a meaning of its own
            return t
        if t in ("MIN", "MINIMUM"):
            value = self.lo
        elif t in ("MAX", "MAXIMUM"):
            value = self.hi
        elif t in ("DEF", "DEFAULT"):
            if self.default is None:
                raise ScpiFailure(-224, "no default")
            value = self.default
        else:
            value = parse_numeric(t, self.unit)
            if not math.isfinite(value) or not self.lo <= value <= self.hi:
                raise ScpiFailure(-222, f"{t[:20]} outside {self.lo:g}..{self.hi:g}")
        return round(value) if self.integer else value


@dataclass(frozen=True)
class Bool(Param):
    """ON / OFF / 1 / 0 (IEEE 488.2 §7.7.2: a number is rounded, non-zero is true)."""

    optional: bool = False

    def parse(self, token: str) -> bool:
        t = token.strip().upper()
        if t == "ON":
            return True
        if t == "OFF":
            return False
        try:
            return round(parse_numeric(t)) != 0
        except ScpiFailure:
            raise ScpiFailure(-224, f"ON|OFF expected: {t[:12]}") from None


def _mnemonic_forms(pattern: str) -> tuple[str, str]:
    """``FREQuency`` -> (``FREQUENCY``, ``FREQ``): long form and the upper-case short form."""
    short = "".join(ch for ch in pattern if ch.isupper() or ch.isdigit())
    return pattern.upper(), short


@dataclass(frozen=True)
class Choice(Param):
    """Character data from a fixed set, long or short form (``SINusoid`` / ``SIN``).

    Returns the declared spelling; a choice ending in ``#`` takes a numeric suffix and
    returns ``(spelling, n)`` (``INTernal#`` accepts ``INT2``).
    """

    choices: tuple[str, ...]
    optional: bool = False

    def parse(self, token: str) -> Any:
        t = token.strip().upper()
        for choice in self.choices:
            if choice.endswith("#"):
                m = re.fullmatch(r"([A-Z]+)(\d*)", t)
                if m and m.group(1) in _mnemonic_forms(choice[:-1]):
                    return (choice[:-1], int(m.group(2) or 1))
            elif t in _mnemonic_forms(choice):
                return choice
        raise ScpiFailure(-224, t[:20])


def parse_channel_list(token: str) -> tuple[int, ...]:
    """``(@1,2,101:103)`` -> (1, 2, 101, 102, 103) (SCPI-99 vol. 1 §8.3.2 channel lists).

    Ranges run either way (``103:101``); at most 4096 channels, so a hostile range cannot
    eat memory.
    """
    t = token.strip()
    if not (t.startswith("(@") and t.endswith(")")):
        raise ScpiFailure(-102, f"channel list expected: {t[:20]}")
    body = t[2:-1].replace(" ", "")
    if not body:
        raise ScpiFailure(-224, "empty channel list")
    out: list[int] = []
    for item in body.split(","):
        m = re.fullmatch(r"(\d{1,6})(?::(\d{1,6}))?", item)
        if not m:
            raise ScpiFailure(-224, f"channel {item[:12]}")
        a = int(m.group(1))
        b = int(m.group(2)) if m.group(2) else a
        step = 1 if b >= a else -1
        if abs(b - a) + len(out) > 4096:
            raise ScpiFailure(-223, "channel list too long")
        out.extend(range(a, b + step, step))
    return tuple(out)


@dataclass(frozen=True)
class ChannelList(Param):
    optional: bool = False

    def parse(self, token: str) -> tuple[int, ...]:
        return parse_channel_list(token)


# --- header patterns ----------------------------------------------------------------------------


@dataclass(frozen=True)
class _Node:
    long: str
    short: str
    name: str  # as declared, without '#': the key of its numeric suffix in Ctx
    optional: bool
    suffix: bool

    def matches(self, mnemonic: str, suffix: int | None) -> bool:
        if suffix is not None and not self.suffix:
            return False
        return mnemonic in (self.long, self.short)


_NODE_RE = re.compile(r"\[:?([A-Za-z]+#?):?\]|:?([A-Za-z]+#?)")


def _compile(pattern: str) -> tuple[tuple[_Node, ...], bool]:
    query = pattern.endswith("?")
    body = pattern[:-1] if query else pattern
    if body.startswith("*"):  # an IEEE 488.2 common command: one fixed mnemonic
        return (_Node(body.upper(), body.upper(), body, False, False),), query
    nodes = []
    pos = 0
    while pos < len(body):
        m = _NODE_RE.match(body, pos)
        if not m:
            raise ValueError(f"bad header pattern {pattern!r} at {pos}")
        text = m.group(1) or m.group(2)
        suffix = text.endswith("#")
        name = text.rstrip("#")
        long, short = _mnemonic_forms(name)
        nodes.append(_Node(long, short, name, m.group(1) is not None, suffix))
        pos = m.end()
    return tuple(nodes), query


def _match(
    nodes: Sequence[_Node], tokens: Sequence[tuple[str, int | None]]
) -> dict[str, int] | None:
    """Match typed header tokens against pattern nodes (optional nodes may be skipped)."""

    def walk(i: int, j: int, got: dict[str, int]) -> dict[str, int] | None:
        if j == len(nodes):
            return got if i == len(tokens) else None
        node = nodes[j]
        if i < len(tokens) and node.matches(*tokens[i]):
            sfx = tokens[i][1]
            found = walk(i + 1, j + 1, {**got, node.name: 1 if sfx is None else sfx})
            if found is not None:
                return found
        if node.optional:
            return walk(i, j + 1, got)
        return None

    return walk(0, 0, {})


@dataclass(frozen=True)
class Command:
    """One entry of a command tree: header pattern, handler, declared parameters.

    ``handler(device, ctx, *values)`` returns the reply (str or bytes) for a query, None
    otherwise.  ``name`` is the operation's name (the instrument profile's, where there
    is one) used to aim injected faults.
    """

    pattern: str
    handler: Callable[..., Any]
    params: tuple[Param, ...] = ()
    name: str = ""
    block: bool = False  # the reply is an IEEE 488.2 block (fault injection aims here)
    nodes: tuple[_Node, ...] = field(init=False, repr=False, compare=False)
    query: bool = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        nodes, query = _compile(self.pattern)
        object.__setattr__(self, "nodes", nodes)
        object.__setattr__(self, "query", query)

    def header_mentions(self, word: str) -> bool:
        """True when ``word`` names this command (its name, or one header mnemonic)."""
        w = word.strip().upper().rstrip("?")
        if w == self.name.upper() or w == self.pattern.upper().rstrip("?"):
            return True
        return any(w in (n.long, n.short) for n in self.nodes)


@dataclass
class Ctx:
    """What a handler knows about the unit being executed."""

    device: ScpiDevice
    command: Command
    suffixes: dict[str, int]
    header: str
    outcome: Outcome

    def index(self, node: str, count: int) -> int:
        """Numeric suffix of ``node`` (default 1), checked against 1..count (-114)."""
        n = self.suffixes.get(node, 1)
        if not 1 <= n <= count:
            raise ScpiFailure(-114, f"{node}{n}")
        return n


@dataclass
class Outcome:
    """What one program message produced, for the transport to deliver.

    ``ready_at``: an overlapped operation (acquisition, relay settling) must finish
    before the reply goes out; ``close_after``: send this many bytes of ``reply``, then
    drop the connection (an injected fault); ``power_cycle_s``: drop every connection
    and refuse new ones for this long; ``delay_s``: wait before sending (latency, slow fault).
    """

    reply: bytes | None = None
    delay_s: float = 0.0
    ready_at: float = 0.0  # monotonic time before which the reply may not leave
    close_after: int | None = None
    power_cycle_s: float | None = None

    def wait_s(self) -> float:
        """How long the transport waits before it sends the reply."""
        return max(0.0, self.ready_at - time.monotonic()) + self.delay_s


# --- the device ---------------------------------------------------------------------------------

_COMMON_RE = re.compile(r"\*([A-Za-z]{1,12})(\?)?")
_HEADER_RE = re.compile(r"(:?)([A-Za-z][A-Za-z0-9_]*(?::[A-Za-z][A-Za-z0-9_]*)*)(\?)?")
_MNEMONIC_RE = re.compile(r"([A-Za-z_]*[A-Za-z_])(\d*)")
_PRINTABLE = re.compile(r"[^\x20-\x7e]")


def _split_outside(text: str, sep: str, *, clamp_depth: bool) -> tuple[list[str], bool]:
    """Split ``text`` on ``sep`` outside strings and parentheses; also whether a string is open.

    One scanner for message units and parameters.  ``clamp_depth``: a stray ')' is forgotten
    (units); without it the depth goes below zero and no later separator splits (parameters).
    """
    parts, cur, quote, depth = [], [], "", 0
    for ch in text:
        if quote:
            cur.append(ch)
            if ch == quote:
                quote = ""
        elif ch in "\"'":
            quote = ch
            cur.append(ch)
        elif ch == "(":
            depth += 1
            cur.append(ch)
        elif ch == ")":
            depth = max(0, depth - 1) if clamp_depth else depth - 1
            cur.append(ch)
        elif ch == sep and depth == 0:
            parts.append("".join(cur))
            cur = []
        else:
            cur.append(ch)
    parts.append("".join(cur))
    return parts, bool(quote)


def _split_units(text: str) -> list[str]:
    """Split a program message on ';' outside strings and parentheses."""
    units, unterminated = _split_outside(text, ";", clamp_depth=True)
    if unterminated:
        raise ScpiFailure(-102, "unterminated string")
    return units


def _split_params(text: str) -> list[str]:
    params, _ = _split_outside(text, ",", clamp_depth=False)
    return [p.strip() for p in params]


def _clean(text: str, limit: int = 40) -> str:
    """Printable, quote-free excerpt of received text for an error message."""
    return _PRINTABLE.sub("?", text).replace('"', "'")[:limit]


class ScpiDevice:
    """A SCPI instrument in memory: ``handle(line) -> reply | None``.

    Subclasses set ``IDN`` and ``COMMANDS`` and implement ``reset()``.  All state changes
    happen under ``self.lock`` (shared with the bench so instruments that depend on each
    other, such as the DMM and the switch, see one consistent state).  ``process`` returns
    an :class:`Outcome` for transports; ``handle`` is the in-process shortcut.
    """

    IDN: tuple[str, str] = ("stageproof-sim", "GENERIC")
    COMMANDS: ClassVar[tuple[Command, ...]] = ()
    ERROR_QUEUE_SIZE: ClassVar[int] = 16

    def __init__(
        self, *, serial: str = "0001", lock: threading.RLock | None = None, firmware: str = "0.1"
    ) -> None:
        self.lock = lock or threading.RLock()
        self.serial = serial
        self.firmware = firmware
        self.errors: deque[tuple[int, str]] = deque()
        self.esr = 0
        self.ese = 0
        self.sre = 0
        self.busy_until = 0.0  # monotonic time an overlapped operation completes
        self.latency = False
        self.command_count = 0
        self.faults: list[_Armed] = []
        self._pending: bytes | None = None  # reply not yet read (in-process message exchange)
        self._tree = self._common_commands() + tuple(self.COMMANDS)
        self.reset()
        self.esr |= ESR_PON

    # -- to be specialised ----------------------------------------------------------------------

    def reset(self) -> None:
        """*RST: the instrument's defaults (subclasses extend)."""

    def trigger(self) -> None:
        """*TRG: nothing to trigger unless a subclass says so."""
        raise ScpiFailure(-221, "nothing to trigger")

    def command_time_s(self) -> float:
        """Turnaround of one message when latency is on: 1-3 ms (common practice)."""
        return 0.001 + 0.002 * (hash((self.command_count, id(self))) % 1000) / 1000.0

    # -- error queue (SCPI-99 vol. 2 ch. 21) ----------------------------------------------------

    def push_error(self, code: int, detail: str = "") -> None:
        """Queue an error: FIFO, bounded; when full the newest entry becomes -350."""
        text = ERROR_TEXT.get(code, "Device-specific error")
        if detail:
            text = f"{text}; {_clean(detail)}"
        with self.lock:
            if len(self.errors) >= self.ERROR_QUEUE_SIZE:
                self.errors[-1] = (-350, ERROR_TEXT[-350])
            else:
                self.errors.append((code, text))
            if -199 <= code <= -100:
                self.esr |= ESR_CME
            elif -299 <= code <= -200:
                self.esr |= ESR_EXE
            elif -399 <= code <= -300 or code > 0:
                self.esr |= ESR_DDE
            elif -499 <= code <= -400:
                self.esr |= ESR_QYE

    def next_error(self) -> tuple[int, str]:
        with self.lock:
            return self.errors.popleft() if self.errors else (0, ERROR_TEXT[0])

    # -- message exchange -----------------------------------------------------------------------

    def handle(self, line: bytes | str) -> bytes | None:
        """Execute one program message; the reply (LF-terminated) or None.

        The in-process equivalent of a write followed, when the message held a query,
        by a read.  Faults that act on the connection (drop, power cycle) are applied
        to the reply only (truncated), as no connection exists here.
        """
        out = self.process(line)
        wait = out.wait_s()
        if wait > 0:
            time.sleep(wait)
        if out.reply is not None and out.close_after is not None:
            return out.reply[: out.close_after]
        return out.reply

    def write(self, line: bytes | str) -> None:
        """IEEE 488.2 message exchange, write half: an unread reply is discarded with -410."""
        with self.lock:
            if self._pending is not None:
                self._pending = None
                self.push_error(-410)
            self._pending = self.process(line).reply

    def read(self) -> bytes | None:
        """Read half: the pending reply, or None and -420 when no query was sent."""
        with self.lock:
            reply, self._pending = self._pending, None
            if reply is None:
                self.push_error(-420)
            return reply

    def process(self, line: bytes | str) -> Outcome:
        """Parse and execute one program message (without its LF terminator)."""
        if isinstance(line, bytes | bytearray):
            try:
                text = bytes(line).decode("utf-8")
            except UnicodeDecodeError:
                with self.lock:
                    self.push_error(-100, "message is not UTF-8 text")
                return Outcome()
        else:
            text = line
        text = text.rstrip("\r\n")
        outcome = Outcome()
        if self.latency:
            outcome.delay_s += self.command_time_s()
        if not text.strip():
            return outcome
        if _PRINTABLE.sub("", text.replace("\t", " ")) != text.replace("\t", " "):
            with self.lock:
                self.push_error(-102, f"invalid character in {text}")
            return outcome
        replies: list[bytes] = []
        with self.lock:
            try:
                units = _split_units(text)
            except ScpiFailure as exc:
                self.push_error(exc.code, exc.detail)
                return outcome
            path: list[tuple[str, int | None]] = []
            for unit in units:
                try:
                    path = self._unit(unit, path, replies, outcome)
                except _Abort:
                    break
        if replies and outcome.power_cycle_s is None:
            if outcome.close_after is not None:
                # close_after was the index of the block reply: halfway through its bytes
                idx = outcome.close_after
                before = sum(len(r) + 1 for r in replies[:idx])
                outcome.close_after = before + len(replies[idx]) // 2
            outcome.reply = b";".join(replies) + b"\n"
        else:
            outcome.close_after = None
        return outcome

    # -- injected faults ------------------------------------------------------------------------

    def inject(self, fault: InstrumentFault) -> None:
        """Arm an instrument fault (see :mod:`harness.sim.faults`)."""
        with self.lock:
            self.faults.append(_Armed(fault, fault.count))

    def clear_faults(self) -> None:
        with self.lock:
            self.faults.clear()

    def _apply_faults(
        self, command: Command, replies: list[bytes], start: int, outcome: Outcome
    ) -> None:
        for armed in list(self.faults):
            f = armed.fault
            if self.command_count <= f.after:
                continue
            if f.on is not None:
                if not command.header_mentions(f.on):
                    continue
            elif (
                command.name == "error_query"  # an un-aimed fault spares the error queue
                or (f.kind == "no_reply" and not command.query)
                or (f.kind in ("drop_mid_block", "bad_block_header") and not command.block)
            ):
                continue
            answered = len(replies) > start
            if f.kind in ("no_reply", "drop_mid_block", "bad_block_header") and not answered:
                continue
            if f.kind == "no_reply":
                del replies[start:]
            elif f.kind == "drop_mid_block":
                outcome.close_after = start
            elif f.kind == "bad_block_header":
                body = replies[start]
                if body[:1] == b"#" and body[1:2].isdigit():
                    body = body[2 + int(body[1:2]) :]
                replies[start] = b"#9abc" + body
            elif f.kind == "queue_error":
                self.push_error(int(f.value or -222), "injected")
            elif f.kind == "slow":
                outcome.delay_s += float(f.value or 0.0)
            elif f.kind == "power_cycle":
                outcome.power_cycle_s = float(f.value or 0.0)
                self.power_cycle()
            if armed.remaining is not None:
                armed.remaining -= 1
                if armed.remaining <= 0:
                    self.faults.remove(armed)
            if outcome.power_cycle_s is not None:
                raise _Abort

    def power_cycle(self) -> None:
        """Power-on state: *RST defaults, empty error queue, PON set (IEEE 488.2 §11.5.1)."""
        with self.lock:
            self.reset()
            self.errors.clear()
            self.esr = ESR_PON
            self.ese = self.sre = 0
            self._pending = None

    def _unit(
        self, unit: str, path: list[tuple[str, int | None]], replies: list[bytes], outcome: Outcome
    ) -> list[tuple[str, int | None]]:
        """Execute one message unit; returns the header path for the next one."""
        s = unit.strip()
        if not s:
            self.push_error(-102, "empty message unit")
            raise _Abort
        m = _COMMON_RE.match(s)
        if m:
            tokens: list[tuple[str, int | None]] = [("*" + m.group(1).upper(), None)]
            new_path = path  # common commands leave the path alone (IEEE 488.2 §A.1.1)
            query = m.group(2) is not None
            rest = s[m.end() :]
        else:
            m = _HEADER_RE.match(s)
            if not m:
                self.push_error(-102, f"header expected: {s}")
                raise _Abort
            typed = []
            for mn in m.group(2).split(":"):
                mm = _MNEMONIC_RE.fullmatch(mn)
                if not mm or len(mm.group(1)) > 12:
                    self.push_error(-113, mn)
                    raise _Abort
                typed.append((mm.group(1).upper(), int(mm.group(2)) if mm.group(2) else None))
            tokens = typed if m.group(1) else [*path, *typed]
            new_path = tokens[:-1]
            query = m.group(3) is not None
            rest = s[m.end() :]
        if rest and not rest[0].isspace():
            self.push_error(-102, f"after header: {rest}")
            raise _Abort
        header = s[: len(s) - len(rest)]
        found = self._lookup(tokens, query)
        if found is None:
            self.push_error(-113, header)
            raise _Abort
        command, suffixes = found
        raw = _split_params(rest) if rest.strip() else []
        self.command_count += 1
        try:
            values = self._params(command, raw)
        except ScpiFailure as exc:
            self.push_error(exc.code, exc.detail or header)
            if -199 <= exc.code <= -100:
                raise _Abort from None
            return new_path
        ctx = Ctx(self, command, suffixes, header, outcome)
        reply_start = len(replies)
        try:
            result = command.handler(self, ctx, *values)
        except ScpiFailure as exc:
            self.push_error(exc.code, exc.detail)
            result = exc.reply if command.query else None
            if result is None and command.query:
                result = SCPI_NAN
        if command.query and result is not None:
            replies.append(result if isinstance(result, bytes) else str(result).encode())
        self._apply_faults(command, replies, reply_start, outcome)
        return new_path

    def _lookup(
        self, tokens: list[tuple[str, int | None]], query: bool
    ) -> tuple[Command, dict[str, int]] | None:
        for command in self._tree:
            if command.query != query:
                continue
            got = _match(command.nodes, tokens)
            if got is not None:
                return command, got
        return None

    def _params(self, command: Command, raw: list[str]) -> list[Any]:
        if any(not r for r in raw):
            raise ScpiFailure(-102, "empty parameter")
        if len(raw) > len(command.params):
            raise ScpiFailure(-108, raw[len(command.params)][:20])
        values = []
        for i, param in enumerate(command.params):
            if i < len(raw):
                if not raw[i]:
                    raise ScpiFailure(-102, "empty parameter")
                values.append(param.parse(raw[i]))
            elif param.optional:
                values.append(None)
            else:
                raise ScpiFailure(-109, command.pattern)
        return values

    # -- common commands (IEEE 488.2 ch. 10) and SYSTem:ERRor -----------------------------------

    def _idn(self, ctx: Ctx) -> str:
        return f"{self.IDN[0]},{self.IDN[1]},{self.serial},{self.firmware}"

    def _rst(self, ctx: Ctx) -> None:
        self.reset()

    def _cls(self, ctx: Ctx) -> None:
        self.errors.clear()
        self.esr = 0

    def _opc(self, ctx: Ctx) -> None:
        self.esr |= ESR_OPC

    def _opc_q(self, ctx: Ctx) -> str:
        self.wait_busy(ctx)
        return "1"

    def _wai(self, ctx: Ctx) -> None:
        self.wait_busy(ctx)

    def _esr_q(self, ctx: Ctx) -> str:
        value, self.esr = self.esr, 0
        return str(value)

    def _ese(self, ctx: Ctx, value: int) -> None:
        self.ese = value

    def _ese_q(self, ctx: Ctx) -> str:
        return str(self.ese)

    def _sre(self, ctx: Ctx, value: int) -> None:
        self.sre = value & ~64

    def _sre_q(self, ctx: Ctx) -> str:
        return str(self.sre)

    def _stb_q(self, ctx: Ctx) -> str:
        # IEEE 488.2 §11.2: bit 2 error queue not empty (SCPI), bit 5 ESB, bit 6 MSS.
        stb = (4 if self.errors else 0) | (32 if self.esr & self.ese else 0)
        if stb & self.sre:
            stb |= 64
        return str(stb)

    def _tst_q(self, ctx: Ctx) -> str:
        return "0"

    def _trg(self, ctx: Ctx) -> None:
        self.trigger()

    def _err_q(self, ctx: Ctx) -> str:
        code, text = self.next_error()
        return f'{code},"{text}"'

    def _err_count_q(self, ctx: Ctx) -> str:
        return str(len(self.errors))

    def _version_q(self, ctx: Ctx) -> str:
        return "1999.0"

    def wait_busy(self, ctx: Ctx) -> None:
        """Hold this message's reply until overlapped work ends.  The wait happens in the
        transport, outside the lock, so other instruments of the bench stay responsive."""
        ctx.outcome.ready_at = max(ctx.outcome.ready_at, self.busy_until)

    def _common_commands(self) -> tuple[Command, ...]:
        cls = ScpiDevice
        reg = Num(None, 0, 255, integer=True)
        return (
            Command("*IDN?", cls._idn, name="identify"),
            Command("*RST", cls._rst, name="reset"),
            Command("*CLS", cls._cls, name="clear_status"),
            Command("*OPC", cls._opc),
            Command("*OPC?", cls._opc_q, name="wait_complete"),
            Command("*WAI", cls._wai),
            Command("*ESR?", cls._esr_q),
            Command("*ESE", cls._ese, (reg,)),
            Command("*ESE?", cls._ese_q),
            Command("*SRE", cls._sre, (reg,)),
            Command("*SRE?", cls._sre_q),
            Command("*STB?", cls._stb_q),
            Command("*TST?", cls._tst_q),
            Command("*TRG", cls._trg, name="trigger"),
            Command("SYSTem:ERRor[:NEXT]?", cls._err_q, name="error_query"),
            Command("SYSTem:ERRor:COUNt?", cls._err_count_q),
            Command("SYSTem:VERSion?", cls._version_q),
        )


@dataclass
class _Armed:
    fault: InstrumentFault
    remaining: int | None


class _Abort(Exception):
    """A command error: the rest of the program message is discarded."""


def fmt(x: float) -> str:
    """A reply number: the shared codec's plain or exponent form."""
    return format_number(float(x))
