"""SCPI / IEEE 488.2 codecs against the standards' own rules and examples."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from harness.errors import MalformedReply
from harness.instruments.scpi import (
    Identity,
    channel_list,
    decode_values,
    encode_block,
    encode_values,
    format_number,
    parse_block,
    parse_block_header,
    parse_bool,
    parse_error_reply,
    parse_idn,
    parse_number,
)

# IEEE 488.2 §8.7.9 block of REAL,32 BORDer NORMal [1, -0.5, 0.25, 2] (IEEE 754 bit patterns),
# read back identically by pyvisa 1.16.2 query_binary_values on loopback.
EXAMPLE = bytes.fromhex("233231363F800000BF0000003E80000040000000") + b"\n"


def test_block_example_real32_big_endian():
    """IEEE 488.2 §8.7.9 definite-length block: '#', digit n, n digits of count, bytes.
    Byte-exact example (21 bytes with LF); float bit patterns are IEEE 754."""
    block = encode_values([1.0, -0.5, 0.25, 2.0], "float32", big_endian=True)
    assert block + b"\n" == EXAMPLE
    assert len(EXAMPLE) == 21
    payload, consumed = parse_block(EXAMPLE)
    assert consumed == 20 and EXAMPLE[consumed:] == b"\n"
    assert decode_values(payload, "float32").tolist() == [1.0, -0.5, 0.25, 2.0]


@pytest.mark.parametrize(
    ("data", "header"),
    [(b"", b"#10"), (b"x" * 9, b"#19"), (b"x" * 10, b"#210"), (b"x" * 1000, b"#41000")],
)
def test_block_header_digit_count(data, header):
    """IEEE 488.2 §8.7.9: the first digit gives the number of count digits (1-9);
    an empty block is '#10'."""
    block = encode_block(data)
    assert block.startswith(header) and block.endswith(data)
    assert parse_block_header(block) == (len(header), len(data))


@pytest.mark.parametrize(
    "bad",
    [b"", b"#", b"216abc", b"#0abc\n", b"#A16", b"#21", b"#2x6" + b"\0" * 16, b"#216" + b"\0" * 5],
)
def test_bad_blocks_are_malformed(bad):
    """IEEE 488.2 §8.7.9: no '#', a digit outside 1-9, non-decimal count or a short payload
    are not definite-length blocks; '#0' (indefinite, §8.7.10) cannot be delimited on a
    stream (it ends only with END, which a socket has not), so it is refused too."""
    with pytest.raises(MalformedReply):
        parse_block(bad)


@given(st.binary(max_size=3000))
def test_block_round_trip(data):
    """Every framed payload reads back whole, leaving the terminator (IEEE 488.2 §8.7.9)."""
    framed = encode_block(data) + b"\n"
    payload, consumed = parse_block(framed)
    assert payload == data and framed[consumed:] == b"\n"


@pytest.mark.parametrize("datatype", ["int8", "int16", "float32"])
@pytest.mark.parametrize("big", [True, False])
def test_values_round_trip_and_byte_order(datatype, big):
    """numpy dtypes '>i2' etc. (numpy.dtype byte-order prefixes): big-endian is SCPI
    FORMat:BORDer NORMal, little-endian SWAPped (SCPI-99 vol. 2 FORMat:BORDer)."""
    vals = np.array([-100, -1, 0, 1, 100])
    payload, _ = parse_block(encode_values(vals, datatype, big_endian=big))
    assert decode_values(payload, datatype, big_endian=big).tolist() == vals.tolist()
    if datatype == "int16":
        assert payload[:2] == (b"\xff\x9c" if big else b"\x9c\xff")  # -100 two's complement


def test_ragged_payload_is_malformed():
    with pytest.raises(MalformedReply, match="whole number"):
        decode_values(b"\x00\x01\x02", "int16")


@pytest.mark.parametrize(
    ("reply", "code", "text"),
    [
        ('0,"No error"', 0, "No error"),
        ('-113,"Undefined header"', -113, "Undefined header"),
        ('-222,"Data out of range;FREQ 1E9"', -222, "Data out of range;FREQ 1E9"),
        ('+0,"No error"\n', 0, "No error"),
        ('-350,"Queue overflow"', -350, "Queue overflow"),
        ('-102,"Syntax error; ""FREQU"""', -102, 'Syntax error; "FREQU"'),
    ],
)
def test_error_reply(reply, code, text):
    """SCPI-99 SYSTem:ERRor? reply <code>,"<text>" with SCPI-99 vol. 2 ch. 21 codes (from memory);
    doubled quotes inside string data stand for one (IEEE 488.2 §8.7.8)."""
    assert parse_error_reply(reply) == (code, text)


@pytest.mark.parametrize("reply", ["", "No error", "-113", "-113,Undefined header", 'x,"a"'])
def test_error_reply_malformed(reply):
    with pytest.raises(MalformedReply):
        parse_error_reply(reply)


def test_idn_four_fields():
    """IEEE 488.2 §10.14 (clause number from memory): *IDN? gives maker, model,
    serial, firmware separated by commas."""
    ident = parse_idn("stageproof-sim,DIG-4,SN042,1.2.3\n")
    assert ident == Identity("stageproof-sim", "DIG-4", "SN042", "1.2.3")
    assert str(ident) == "stageproof-sim,DIG-4,SN042,1.2.3"
    for bad in ("stageproof-sim,DIG-4,SN042", "a,b,c,d,e", ""):
        with pytest.raises(MalformedReply, match="fields"):
            parse_idn(bad)


@pytest.mark.parametrize(
    ("expected", "ok"),
    [
        ("stageproof-sim,DIG-4", True),
        ("STAGEPROOF-SIM,dig-4", True),
        ("stageproof-sim", True),
        ("stageproof-sim,SIG-1", False),
        (",,SN042", True),
        (",,SN043", False),
        ("stageproof-sim,DIG-4,SN042,1.2.3,x", False),
    ],
)
def test_identity_matches_leading_fields(expected, ok):
    assert Identity("stageproof-sim", "DIG-4", "SN042", "1.2.3").matches(expected) is ok


@pytest.mark.parametrize(
    ("x", "text"),
    [
        (1000.0, "1000"),
        (1e-3, "0.001"),
        (1e-7, "1E-7"),
        (1.5e6, "1500000"),
        (2e13, "2E13"),
        (-3.3, "-3.3"),
        (0.0, "0"),
        (5, "5"),
        (True, "1"),
        (2.8284271247461903, "2.82842712475"),
    ],
)
def test_format_number_plain_si(x, text):
    """SCPI-99 vol. 1 ch. 7 decimal numeric data: plain or exponent form.  No suffixes:
    'M' is milli to SCPI (IEEE 488.2 §7.7.3, from memory), so base units with exponents only."""
    s = format_number(x)
    assert s == text
    assert not any(c.isalpha() and c != "E" for c in s)
    assert math.isclose(float(s), float(x), rel_tol=1e-11)


def test_format_number_refuses_nan():
    with pytest.raises(ValueError):
        format_number(math.nan)


def test_parse_number_and_scpi_nan():
    """IEEE 488.2 §8.7.2-8.7.4 NR1/NR2/NR3; SCPI-99 vol. 1 §7.2.1.5: 9.91E37 is NaN and
    9.9E37 infinity (from memory)."""
    assert parse_number("+1.00000E+03\n") == 1000.0
    assert parse_number("-12") == -12.0
    assert math.isnan(parse_number("9.91E37"))
    assert parse_number("-9.9E37") == -math.inf
    for bad in ("", "ON", "nan", "1,2"):
        with pytest.raises(MalformedReply):
            parse_number(bad)


def test_parse_bool_and_channel_list():
    """SCPI-99: boolean queries answer NR1 1/0; channel lists are (@1,2,...)."""
    assert parse_bool("1") and not parse_bool("0") and parse_bool("ON")
    with pytest.raises(MalformedReply):
        parse_bool("maybe")
    assert channel_list([101, 102]) == "101,102"
    with pytest.raises(ValueError):
        channel_list([])
