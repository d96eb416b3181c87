"""Board files written by the tests (invented values; handbook examples reproduce the book's)."""

from __future__ import annotations

from pathlib import Path

from harness.io.board import load_board
from harness.model.board import Board

HEAD = """
[board]
name = "test board"
part_number = "T-1"

[supply]
positive_v = "{vcc} 0%"
{negative}

[conditions]
frequency_hz = 1000
nominal_input_vrms = {nominal}
safe_input_vrms = 5
source_ohm = {source}
load_ohm = "{load} 0%"

[limits]
samples = 1000
seed = 3

[tolerances]
resistor = "1%"
capacitor = "10%"

[transistor.q]
polarity = "npn"
beta = {{ min = {bmin}, typ = {beta}, max = {bmax} }}
is_a = {{ min = {ismin}, typ = {is_a}, max = {ismax} }}
vce_sat_v = {{ min = 0.05, typ = 0.1, max = 0.2 }}

[opamp.u]
headroom_v = {{ min = 1.0, typ = 1.5, max = 2.0 }}
open_loop_gain = 1e5
output_current_a = 0.02
"""

CE_STAGE = """
[[channel]]
name = "X"
  [[channel.stage]]
  kind = "common_emitter"
  name = "gain"
  transistor = "q"
  r1 = "{r1}"
  r2 = "{r2}"
  rc = "{rc}"
  re = "{re}"
  {bypass}
  c_in = "10u"
  c_out = "10u"
"""


def board_text(
    stages: str = CE_STAGE,
    *,
    vcc: float = 12.0,
    negative: str = "",
    nominal: float = 0.01,
    source: float = 50.0,
    load: str = "1G",
    beta: float = 200,
    spread: float = 0.0,
    is_a: float = 1e-14,
    r1: str = "68k",
    r2: str = "15k",
    rc: str = "4k7",
    re: str = "1k",
    bypass: str = "",
    **extra: str,
) -> str:
    """A one-channel board; ``spread`` widens beta and I_S around their typical values."""
    head = HEAD.format(
        vcc=vcc,
        negative=negative,
        nominal=nominal,
        source=source,
        load=load,
        beta=beta,
        bmin=beta * (1 - spread),
        bmax=beta * (1 + spread),
        is_a=is_a,
        ismin=is_a * (1 - spread),
        ismax=is_a * (1 + spread),
    )
    return head + stages.format(r1=r1, r2=r2, rc=rc, re=re, bypass=bypass, **extra)


def write_board(tmp_path: Path, text: str, name: str = "board.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def make_board(tmp_path: Path, **kw) -> Board:
    return load_board(write_board(tmp_path, board_text(**kw)))


def four_channel_board_text() -> str:
    """The demo twin preamp with its two channels fitted twice (channels C and D copy A and
    B with their own designators and connectors): a board whose scope needs five inputs."""
    text = (Path(__file__).resolve().parents[2] / "limits" / "demo-twin-preamp.toml").read_text()
    head, sep, channels = text.partition("[[channel]]")
    copy = (
        channels.replace('name = "A"', 'name = "C"')
        .replace('name = "B"', 'name = "D"')
        .replace('ref = "R1', 'ref = "R3')
        .replace('ref = "C1', 'ref = "C3')
        .replace('ref = "R2', 'ref = "R4')
        .replace('ref = "C2', 'ref = "C4')
    )
    for old, new in (("J1", "J5"), ("J2", "J6"), ("J3", "J7"), ("J4", "J8")):
        copy = copy.replace(f'"{old}"', f'"{new}"')
    return head + sep + channels.rstrip() + "\n\n" + sep + copy
