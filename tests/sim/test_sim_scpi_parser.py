"""The SCPI parser of the simulated instruments, checked rule by rule against the standards.

Sources: SCPI-99 vol. 1 ch. 6 (program headers: long/short form, optional nodes, numeric
suffixes, the header path rule of §6.2.4) and ch. 7 (parameters, MINimum/MAXimum/DEFault);
IEEE 488.2-1992 ch. 7 (decimal numeric data and suffix multipliers, Table 7-1), §6.1.6
(a parser error discards the rest of the message), §6.3.2.2 / §6.3.2.3 (query
INTERRUPTED / UNTERMINATED), §11.5.1 (event status bits); SCPI-99 vol. 2 ch. 21 (error
queue, codes and texts).  Clause numbers are from memory unless a test says otherwise.
"""

from __future__ import annotations

import threading

import pytest

from harness.sim.faults import InstrumentFault
from harness.sim.scpi import (
    Bool,
    ChannelList,
    Choice,
    Command,
    Ctx,
    Num,
    ScpiDevice,
    ScpiFailure,
    parse_channel_list,
    parse_numeric,
    suffix_multiplier,
)


class Toy(ScpiDevice):
    """A tiny instrument declared as data, to test the tree without any physics."""

    IDN = ("stageproof-sim", "TOY-1")
    FREQ = Num("HZ", 1.0, 1e6, 1000.0)

    def reset(self) -> None:
        self.freq = {1: 1000.0, 2: 1000.0}
        self.volt = 0.1
        self.on = {1: False, 2: False}
        self.shape = "SINusoid"
        self.routes: tuple[int, ...] = ()

    def _freq(self, ctx: Ctx, v: float) -> None:
        self.freq[ctx.index("SOURce", 2)] = v

    def _freq_q(self, ctx: Ctx, which: str | None) -> str:
        n = ctx.index("SOURce", 2)
        return {"MINimum": "1", "MAXimum": "1000000"}.get(which or "", repr(self.freq[n]))

    def _volt(self, ctx: Ctx, v: float) -> None:
        self.volt = v

    def _volt_q(self, ctx: Ctx) -> str:
        return repr(self.volt)

    def _outp(self, ctx: Ctx, on: bool) -> None:
        self.on[ctx.index("OUTPut", 2)] = on

    def _outp_q(self, ctx: Ctx) -> str:
        return "1" if self.on[ctx.index("OUTPut", 2)] else "0"

    def _shape(self, ctx: Ctx, s: str) -> None:
        self.shape = s

    def _route(self, ctx: Ctx, chans: tuple[int, ...]) -> None:
        self.routes = chans

    def _fail_q(self, ctx: Ctx) -> str:
        raise ScpiFailure(-221, "always")

    COMMANDS = (
        Command("[SOURce#:]FREQuency[:CW]", _freq, (FREQ,)),
        Command(
            "[SOURce#:]FREQuency[:CW]?", _freq_q, (Choice(("MINimum", "MAXimum"), optional=True),)
        ),
        Command(
            "[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]",
            _volt,
            (Num("V", 0.001, 10.0, 0.1),),
        ),
        Command("[SOURce#:]VOLTage[:LEVel][:IMMediate][:AMPLitude]?", _volt_q),
        Command("OUTPut#[:STATe]", _outp, (Bool(),)),
        Command("OUTPut#[:STATe]?", _outp_q),
        Command("[SOURce#:]FUNCtion[:SHAPe]", _shape, (Choice(("SINusoid", "SQUare")),)),
        Command("ROUTe:CLOSe", _route, (ChannelList(),)),
        Command("TEST:FAIL?", _fail_q),
    )


@pytest.fixture
def toy() -> Toy:
    return Toy()


def errors(dev: ScpiDevice) -> list[int]:
    out = []
    while True:
        code = int(dev.handle(b"SYST:ERR?").split(b",")[0])
        if code == 0:
            return out
        out.append(code)


HEADER_FORMS = [
    # (message, what it must set) -- SCPI-99 vol. 1 §6.2.1-6.2.5
    ("SOURce1:FREQuency:CW 2000", 2000.0),  # long form, every node
    ("SOUR1:FREQ:CW 2000", 2000.0),  # short form
    ("sour:freq:cw 2000", 2000.0),  # case-insensitive
    ("FrEqUeNcY 2000", 2000.0),  # optional nodes left out, mixed case
    ("FREQ 2000", 2000.0),
    (":FREQ:CW 2000", 2000.0),  # leading colon = root
    ("SOURCE:FREQUENCY 2000", 2000.0),  # suffix omitted = 1
    ("SOUR1:FREQ 2 KHZ", 2000.0),  # unit with multiplier
]


@pytest.mark.parametrize(("message", "expected"), HEADER_FORMS)
def test_header_forms_accepted(toy: Toy, message: str, expected: float) -> None:
    """Long form, short form, case and optional nodes (SCPI-99 vol. 1 §6.2, from memory)."""
    assert toy.handle(message) is None
    assert toy.freq[1] == expected
    assert errors(toy) == []


@pytest.mark.parametrize(
    "message",
    [
        "FREQU 1000",
        "FREQUENC 1000",
        "SOUR:FRE 1000",
        "SOURC:FREQ 1000",
        "FREQ:CWX 1000",
        "VOLTAGES 1",
    ],
)
def test_neither_long_nor_short_form_is_113(toy: Toy, message: str) -> None:
    """Only the long or the short form is a mnemonic: FREQU is -113 Undefined header
    (SCPI-99 vol. 1 §6.2.1, from memory for the clause)."""
    toy.handle(message)
    assert errors(toy) == [-113]
    assert toy.freq[1] == 1000.0


def test_numeric_suffix_selects_the_instance(toy: Toy) -> None:
    """OUTPut2 addresses output 2, OUTPut = OUTPut1 (SCPI-99 vol. 1 §6.2.5); out of range
    is -114 Header suffix out of range."""
    assert toy.handle("OUTP2 ON;:OUTP2?") == b"1\n"
    assert toy.handle("OUTP?;OUTPut1:STATe?") == b"0;0\n"
    toy.handle("OUTP3 ON")
    assert errors(toy) == [-114]
    toy.handle("ROUTe2:CLOSe (@1)")  # ROUTe takes no suffix
    assert errors(toy) == [-113]


def test_header_path_rule(toy: Toy) -> None:
    """After ``SOUR2:FREQ 5`` a unit without a leading colon stays in SOURce2; ':' returns
    to the root; a common command leaves the path alone (SCPI-99 vol. 1 §6.2.4, IEEE
    488.2 §A.1)."""
    toy.handle("SOUR2:FREQ 5;VOLT 0.5;*CLS;FREQ:CW 7")
    assert toy.freq == {1: 1000.0, 2: 7.0}
    assert toy.volt == 0.5
    toy.handle("OUTP2:STAT ON;STAT?")
    assert errors(toy) == []
    # FREQ's parent is the root, so OUTP resolves there
    toy.handle("FREQ 10;OUTP ON")
    assert toy.on[1] is True
    # under ROUTe, FREQ is not a command: -113, and the path does not fall back
    toy.handle("ROUT:CLOS (@1);FREQ 20")
    assert errors(toy) == [-113]
    assert toy.freq[1] == 10.0
    toy.handle("ROUT:CLOS (@1);:FREQ 20")
    assert toy.freq[1] == 20.0


def test_queries_in_one_message_answer_in_one_line(toy: Toy) -> None:
    """Several queries: one response message, units separated by ';', LF at the end
    (IEEE 488.2 §8.4.1, from memory)."""
    assert toy.handle("*IDN?;FREQ?;:VOLT?") == b"stageproof-sim,TOY-1,0001,0.1;1000.0;0.1\n"


@pytest.mark.parametrize(
    ("token", "unit", "expected"),
    [
        # IEEE 488.2 §7.7.3 Table 7-1 (from memory), with its MHZ / MOHM exceptions to M = milli
        ("100 MV", "V", 0.1),
        ("100mV", "V", 0.1),
        ("1.5 V", "V", 1.5),
        ("2 KHZ", "HZ", 2000.0),
        ("2khz", "HZ", 2000.0),
        ("3 HZ", "HZ", 3.0),
        ("1 MHZ", "HZ", 1e6),  # M + HZ is mega, the exception
        ("1 MAHZ", "HZ", 1e6),  # MA is mega
        ("1 MOHM", "OHM", 1e6),  # the other exception
        ("250 UV", "V", 250e-6),
        ("5 NS", "S", 5e-9),
        ("20 MA", "A", 20e-3),  # M + A: milliampere (the unit A follows the multiplier)
        ("1.25E3", "HZ", 1250.0),
        ("+.5e-1", None, 0.05),
        ("1 E 3", "HZ", 1000.0),  # white space allowed around E (IEEE 488.2 §7.7.2.2)
    ],
)
def test_unit_suffix_table(token: str, unit: str | None, expected: float) -> None:
    assert parse_numeric(token, unit) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("token", "unit", "code"),
    [
        ("1 KV", "HZ", -131),
        ("1 K", "HZ", -131),
        ("1 XYZ", "V", -131),
        ("1 V", None, -131),
        ("1.2.3", "V", -102),
        ("FOO", "V", -104),
    ],
)
def test_bad_numbers(token: str, unit: str | None, code: int) -> None:
    with pytest.raises(ScpiFailure) as info:
        parse_numeric(token, unit)
    assert info.value.code == code


def test_suffix_multiplier_needs_matching_unit() -> None:
    assert suffix_multiplier("MHZ", "V") is None
    assert suffix_multiplier("", None) == 1.0
    assert suffix_multiplier("mv", "v") == pytest.approx(1e-3)


def test_min_max_def(toy: Toy) -> None:
    """MINimum / MAXimum / DEFault as numeric values (SCPI-99 vol. 1 §7.2.1.1)."""
    toy.handle("FREQ MAX")
    assert toy.freq[1] == 1e6
    toy.handle("FREQ minimum")
    assert toy.freq[1] == 1.0
    toy.handle("FREQ DEF")
    assert toy.freq[1] == 1000.0
    assert toy.handle("FREQ? MAX") == b"1000000\n"
    assert errors(toy) == []


@pytest.mark.parametrize(
    ("message", "code"),
    [
        ("FREQ", -109),  # missing parameter
        ("FREQ 1,2", -108),  # parameter not allowed
        ("FREQ 2E6", -222),  # data out of range
        ("FUNC TRIangle", -224),  # illegal parameter value
        ("FUNC SINU", -224),  # neither long nor short form of a choice
        ("OUTP MAYBE", -224),
        ("FREQ 1 KV", -131),  # invalid suffix
        ("FREQ1000", -113),  # no space: FREQ with suffix 1000 is no header here
        ("FREQ 1.2.3", -102),  # syntax error
        ("FREQ ,", -102),
        ("ROUT:CLOS 1", -102),  # channel list without (@...)
        ("ROUT:CLOS (@1,x)", -224),
        ("*FOO", -113),
        ('FREQ "abc', -102),  # unterminated string
        ("TEST:FAIL?", -221),  # execution error in a query
    ],
)
def test_error_codes(toy: Toy, message: str, code: int) -> None:
    """Standard negative codes (SCPI-99 vol. 2 ch. 21)."""
    toy.handle(message)
    assert errors(toy) == [code]


def test_failed_query_still_answers_so_clients_do_not_hang(toy: Toy) -> None:
    assert toy.handle("TEST:FAIL?") == b"9.91E37\n"


def test_error_queue_fifo_texts_overflow_and_cls(toy: Toy) -> None:
    """FIFO order, ``<code>,"<text>"``, ``0,"No error"`` when empty; when full the newest
    entry becomes -350 Queue overflow; *CLS empties it (SCPI-99 vol. 2 §21.8, from memory for the
    clause)."""
    assert toy.handle("SYST:ERR?") == b'0,"No error"\n'
    toy.handle("FREQU 1")
    toy.handle("FREQ 1,2")
    assert toy.handle("SYSTem:ERRor:NEXT?").startswith(b'-113,"Undefined header')
    assert toy.handle("SYST:ERR?").startswith(b'-108,"Parameter not allowed')
    for _ in range(40):
        toy.handle("FREQU 1")
    codes = errors(toy)
    assert len(codes) == Toy.ERROR_QUEUE_SIZE
    assert codes[-1] == -350 and set(codes[:-1]) == {-113}
    toy.handle("FREQU 1")
    toy.handle("*CLS")
    assert errors(toy) == []


def test_command_error_discards_rest_of_message_execution_error_does_not(toy: Toy) -> None:
    """IEEE 488.2 §6.1.6: after a parser (command) error the rest of the message is
    ignored; an execution error (-2xx) stops only its own unit."""
    toy.handle("FREQU 5;VOLT 2")
    assert toy.volt == 0.1
    toy.handle("FREQ 9E9;:VOLT 2")
    assert toy.volt == 2.0
    assert errors(toy) == [-113, -222]


def test_garbage_and_non_utf8_never_raise(toy: Toy) -> None:
    for junk in (
        b"\xff\xfe\x00garbage",
        b"\x00\x01\x02",
        b"FREQ \x80",
        "FRÉQ 1".encode(),
        b";;;",
        b":::",
        b"*",
        b"?",
        b"(((",
        b"#9abc",
        b"FREQ (@" + b"9" * 50 + b")",
    ):
        assert toy.handle(junk) is None
    codes = errors(toy)
    assert codes and all(-199 <= c <= -100 for c in codes)
    assert toy.handle("*IDN?").startswith(b"stageproof-sim")


def test_query_interrupted_and_unterminated(toy: Toy) -> None:
    """IEEE 488.2 message exchange: a new message while a reply is unread -> -410; a read
    with nothing to read -> -420 (IEEE 488.2 §6.3.2, from memory)."""
    toy.write("FREQ?")
    toy.write("VOLT?")
    assert toy.read() == b"0.1\n"
    assert toy.read() is None
    assert errors(toy) == [-410, -420]


def test_event_status_register_bits(toy: Toy) -> None:
    """*ESR? reports CME (bit 5, 32) after a command error, EXE (bit 4, 16) after an
    execution error, PON (bit 7, 128) after power-on, and clears on read (IEEE 488.2
    §11.5.1.1)."""
    assert int(toy.handle("*ESR?")) & 128
    toy.handle("FREQU 1")
    toy.handle("FREQ 9E9")
    assert int(toy.handle("*ESR?")) == 32 | 16
    assert int(toy.handle("*ESR?")) == 0
    toy.handle("*OPC")
    assert int(toy.handle("*ESR?")) == 1
    toy.handle("FREQU 1")
    assert int(toy.handle("*STB?")) & 4  # error queue not empty (SCPI-99 vol. 1 §9.2)


def test_channel_lists() -> None:
    """SCPI-99 vol. 1 §8.3.2 channel lists: entries and ranges."""
    assert parse_channel_list("(@1,2,101:103)") == (1, 2, 101, 102, 103)
    assert parse_channel_list("(@ 5 )") == (5,)
    assert parse_channel_list("(@103:101)") == (103, 102, 101)
    with pytest.raises(ScpiFailure):
        parse_channel_list("(@1:999999)")


def test_instrument_faults_in_process(toy: Toy) -> None:
    """Injected faults act on the aimed command only, as many times as asked."""
    toy.inject(InstrumentFault("generator", "no_reply", on="FREQ", count=1))
    assert toy.handle("FREQ?") is None
    assert toy.handle("FREQ?") == b"1000.0\n"
    toy.inject(InstrumentFault("generator", "queue_error", value=-222, on="VOLTage"))
    toy.handle("VOLT 1")
    toy.handle("FREQ 5")
    toy.handle("VOLT 2")
    assert errors(toy) == [-222, -222]
    toy.clear_faults()
    toy.inject(InstrumentFault("generator", "queue_error", after=toy.command_count + 2))
    toy.handle("FREQ 5")
    toy.handle("FREQ 5")
    assert errors(toy) == []
    toy.handle("FREQ 5")
    assert errors(toy) == [-222]


def test_shared_state_under_lock_with_many_threads(toy: Toy) -> None:
    """Concurrent messages never corrupt the queue or interleave replies."""
    bad: list[bytes] = []

    def worker() -> None:
        for _ in range(200):
            r = toy.handle("*IDN?;FREQ?")
            if r != b"stageproof-sim,TOY-1,0001,0.1;1000.0\n":
                bad.append(r or b"")

    threads = [threading.Thread(target=worker) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert bad == []
