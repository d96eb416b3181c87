"""Fixture files: how a board's connectors reach the station's instruments.

A fixture file (TOML, see README "Fixture files") says which generator output drives the
board inputs, which scope inputs see each channel's input and output connector (directly or
through switch routes), the probe factors, the DC test points the DMM reads (each tied to a
model operating-point quantity) and the supply's voltage and current limit.

``load_fixture`` validates the file against the board it is used with, so a fixture that
names a channel or stage the board does not have fails before any instrument is touched.
``check_station`` then checks that the station has every role the fixture needs.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.errors import FixtureFileError, StationFileError
from harness.io.toml import FieldReader, read_toml
from harness.model.board import Board, CommonEmitter, EmitterFollower

#: Operating-point quantities per stage family (the keys of model.operating_point()).
BJT_QUANTITIES = ("collector_v", "emitter_v", "base_v")
OPAMP_QUANTITIES = ("output_v",)
#: A switch channel number in a SCPI channel list: 1..9999 is what the sim and most
#: switches accept; anything else is almost certainly a typo.
MAX_SWITCH_CHANNEL = 9999


@dataclass(frozen=True)
class SupplyConnection:
    """The bench supply feeding the board: outputs, set voltages and the current limit."""

    output: int
    voltage_v: float
    current_limit_a: float
    negative_output: int | None = None
    negative_voltage_v: float | None = None


@dataclass(frozen=True)
class ChannelConnection:
    """Where one board channel's input and output connectors reach the scope."""

    board_channel: str
    input_scope: int
    output_scope: int
    input_probe: float = 1.0
    output_probe: float = 1.0
    route: tuple[int, ...] = ()


@dataclass(frozen=True)
class TestPoint:
    """A DC test point read with the DMM; ``key`` is the model operating-point key."""

    __test__ = False  # not a pytest class, despite the name

    name: str
    board_channel: str
    stage: str
    quantity: str
    route: tuple[int, ...] = ()

    @property
    def key(self) -> str:
        return f"{self.stage}.{self.quantity}"


@dataclass(frozen=True)
class FixtureConfig:
    """A validated fixture file."""

    name: str
    board_part_number: str
    path: str
    digest: str
    generator_output: int
    channels: tuple[ChannelConnection, ...]
    test_points: tuple[TestPoint, ...] = ()
    supply: SupplyConnection | None = None

    @property
    def needs_switch(self) -> bool:
        return any(c.route for c in self.channels) or any(t.route for t in self.test_points)

    @property
    def relays(self) -> tuple[int, ...]:
        """Every switch relay the fixture routes, so the safe state can read each back."""
        return tuple(
            sorted(
                {r for c in self.channels for r in c.route}
                | {r for t in self.test_points for r in t.route}
            )
        )

    @property
    def needs_dmm(self) -> bool:
        return bool(self.test_points)

    @property
    def needs_supply(self) -> bool:
        return self.supply is not None

    def required_roles(self) -> tuple[str, ...]:
        """Station roles this fixture needs, in the order a sequence uses them."""
        roles = ["generator", "scope"]
        if self.needs_supply:
            roles.append("supply")
        if self.needs_switch:
            roles.append("switch")
        if self.needs_dmm:
            roles.append("dmm")
        return tuple(roles)

    def connection(self, channel: str) -> ChannelConnection:
        for c in self.channels:
            if c.board_channel == channel:
                return c
        raise KeyError(channel)

    def groups(self) -> tuple[tuple[ChannelConnection, ...], ...]:
        """Channels the scope can see at once, in fixture order.

        Channels go in one group when their output scope inputs differ from each other and
        from every input probe in the group; routes are closed together.  One acquisition
        then gives every channel of the group its output record.
        """
        groups: list[list[ChannelConnection]] = []
        for c in self.channels:
            for g in groups:
                outs = {x.output_scope for x in g}
                ins = {x.input_scope for x in g}
                if (
                    c.output_scope not in outs
                    and c.output_scope not in ins
                    and c.input_scope not in outs
                    and _route_compatible(g, c)
                ):
                    g.append(c)
                    break
            else:
                groups.append([c])
        return tuple(tuple(g) for g in groups)

    def scope_inputs_used(self) -> tuple[int, ...]:
        used = {c.input_scope for c in self.channels} | {c.output_scope for c in self.channels}
        return tuple(sorted(used))


def _route_compatible(group: list[ChannelConnection], c: ChannelConnection) -> bool:
    """Two channels with different routes to the same scope input would short each other;
    with distinct scope inputs any routes may be closed together."""
    if not c.route:
        return True
    return all(not x.route or x.output_scope != c.output_scope for x in group)


# --- loading ------------------------------------------------------------------------------


class _Reader(FieldReader):
    """The shared field reader plus the fixture's own field type, a switch route."""

    def __init__(self, path: str) -> None:
        super().__init__(path, FixtureFileError)

    def board_channel(self, data: Mapping[str, Any], where: str, board: Board) -> str:
        """The ``board_channel`` field: it must name one of ``board``'s channels."""
        names = [c.name for c in board.channels]
        cname = self.text(data, "board_channel", where)
        if cname not in names:
            raise self.fail(
                f"{where}.board_channel",
                f"board {board.part_number} has no channel {cname!r}",
                hint=f"use one of: {', '.join(names)}",
            )
        return cname

    def route(self, data: Mapping[str, Any], where: str) -> tuple[int, ...]:
        raw = data.get("route", [])
        if not isinstance(raw, list):
            raise self.fail(
                f"{where}.route",
                "must be a list of switch channel numbers",
                hint="e.g. route = [101, 102], or [] for a direct connection",
            )
        out: list[int] = []
        for i, r in enumerate(raw):
            if not isinstance(r, int) or isinstance(r, bool) or not 1 <= r <= MAX_SWITCH_CHANNEL:
                raise self.fail(
                    f"{where}.route[{i}]",
                    f"switch channel must be a whole number 1..{MAX_SWITCH_CHANNEL} (got {r!r})",
                )
            out.append(r)
        if len(set(out)) != len(out):
            raise self.fail(f"{where}.route", "a switch channel is listed twice")
        return tuple(out)


def _stage_quantities(board: Board, channel: str) -> dict[str, tuple[str, ...]]:
    out: dict[str, tuple[str, ...]] = {}
    for s in board.channel(channel).stages:
        out[s.name] = (
            BJT_QUANTITIES if isinstance(s, CommonEmitter | EmitterFollower) else OPAMP_QUANTITIES
        )
    return out


def fixture_from_dict(
    data: Mapping[str, Any],
    board: Board,
    path: str = "<fixture>",
    raw: bytes | None = None,
    *,
    scope_inputs: int | None = None,
) -> FixtureConfig:
    """Validate a parsed fixture document against ``board``.

    ``scope_inputs`` (the scope's number of inputs, from its profile) bounds the scope
    input numbers; without it any input from 1 up is accepted and ``check_station`` checks
    later.
    """
    rd = _Reader(path)
    rd.known(data, {"fixture", "supply", "generator", "channel", "test_point"}, "")
    head = rd.table(data, "fixture", required=True)
    rd.known(head, {"name", "board", "note"}, "fixture")
    name = rd.text(head, "name", "fixture")
    part = rd.text(head, "board", "fixture", default=board.part_number)
    if part != board.part_number:
        raise rd.fail(
            "fixture.board",
            f"this fixture takes board {part!r}, but the board file "
            f"{board.source} is {board.part_number!r}",
            hint="use the fixture made for this board, or correct fixture.board",
        )

    gen = rd.table(data, "generator", required=False)
    rd.known(gen, {"output", "note"}, "generator")
    gen_output = rd.whole(gen, "output", "generator", default=1, high=16)

    max_in = scope_inputs if scope_inputs is not None else 64
    chans = data.get("channel")
    if not isinstance(chans, list) or not chans:
        raise rd.fail("channel", "no channels", hint="add one [[channel]] table per board channel")
    connections: list[ChannelConnection] = []
    seen: set[str] = set()
    for where, ch in rd.tables(chans, "channel"):
        rd.known(
            ch,
            {
                "board_channel",
                "input_scope",
                "output_scope",
                "input_probe",
                "output_probe",
                "route",
                "note",
            },
            where,
        )
        cname = rd.board_channel(ch, where, board)
        if cname in seen:
            raise rd.fail(
                f"{where}.board_channel",
                f"channel {cname!r} is wired twice",
                hint="keep one [[channel]] table per board channel",
            )
        seen.add(cname)
        conn = ChannelConnection(
            board_channel=cname,
            input_scope=rd.whole(ch, "input_scope", where, high=max_in),
            output_scope=rd.whole(ch, "output_scope", where, high=max_in),
            input_probe=rd.number(
                ch, "input_probe", where, default=1.0, high=1000.0, what="probe factor"
            ),
            output_probe=rd.number(
                ch, "output_probe", where, default=1.0, high=1000.0, what="probe factor"
            ),
            route=rd.route(ch, where),
        )
        if conn.input_scope == conn.output_scope:
            raise rd.fail(
                f"{where}.output_scope",
                "input and output use the same scope input",
                hint="each channel needs one scope input on its input connector and "
                "another on its output",
            )
        connections.append(conn)
    # An output probe must not be another channel's input probe: the records would mix.
    for i, c in enumerate(connections):
        for d in connections:
            if d is not c and c.output_scope == d.input_scope:
                raise rd.fail(
                    f"channel[{i}].output_scope",
                    f"scope input {c.output_scope} is also channel {d.board_channel}'s input probe",
                    hint="use a free scope input",
                )

    tps = data.get("test_point", [])
    if not isinstance(tps, list):
        raise rd.fail("test_point", "must be [[test_point]] tables")
    points: list[TestPoint] = []
    tp_names: set[str] = set()
    for where, tp in rd.tables(tps, "test_point"):
        rd.known(tp, {"name", "board_channel", "stage", "quantity", "route", "note"}, where)
        tname = rd.text(tp, "name", where)
        if tname in tp_names:
            raise rd.fail(f"{where}.name", f"two test points are named {tname!r}")
        tp_names.add(tname)
        cname = rd.board_channel(tp, where, board)
        stages = _stage_quantities(board, cname)
        stage = rd.text(tp, "stage", where)
        if stage not in stages:
            raise rd.fail(
                f"{where}.stage",
                f"channel {cname} has no stage {stage!r}",
                hint=f"use one of: {', '.join(stages)}",
            )
        quantity = rd.text(tp, "quantity", where)
        if quantity not in stages[stage]:
            raise rd.fail(
                f"{where}.quantity",
                f"{quantity!r} is not a quantity of stage {stage!r}",
                hint=f"use one of: {', '.join(stages[stage])}",
            )
        points.append(TestPoint(tname, cname, stage, quantity, rd.route(tp, where)))

    supply = None
    if "supply" in data:
        sup = rd.table(data, "supply", required=True)
        rd.known(
            sup,
            {
                "output",
                "voltage_v",
                "current_limit_a",
                "negative_output",
                "negative_voltage_v",
                "note",
            },
            "supply",
        )
        pos = board.supply.positive
        voltage = rd.number(sup, "voltage_v", "supply", what="supply voltage")
        if not pos.low - 1e-9 <= voltage <= pos.high + 1e-9:
            raise rd.fail(
                "supply.voltage_v",
                f"{voltage:g} V is outside the board's supply "
                f"{pos} ({pos.low:g} .. {pos.high:g} V)",
                hint=f"set voltage_v = {pos.nominal:g}",
            )
        neg_out = None
        neg_v = None
        if board.supply.negative is not None:
            neg = board.supply.negative
            neg_out = rd.whole(sup, "negative_output", "supply", high=16)
            if "negative_voltage_v" in sup:
                nv = sup["negative_voltage_v"]
                if isinstance(nv, bool) or not isinstance(nv, int | float):
                    raise rd.fail("supply.negative_voltage_v", f"must be a number (got {nv!r})")
                neg_v = float(nv)
            else:
                neg_v = neg.nominal
            lo, hi = sorted((neg.low, neg.high))
            if not lo - 1e-9 <= neg_v <= hi + 1e-9:
                raise rd.fail(
                    "supply.negative_voltage_v",
                    f"{neg_v:g} V is outside the board's negative rail ({lo:g} .. {hi:g} V)",
                    hint=f"set negative_voltage_v = {neg.nominal:g}",
                )
        elif "negative_output" in sup or "negative_voltage_v" in sup:
            raise rd.fail(
                "supply.negative_output",
                "the board has a single supply rail",
                hint="remove negative_output / negative_voltage_v",
            )
        output = rd.whole(sup, "output", "supply", default=1, high=16)
        if neg_out is not None and neg_out == output:
            raise rd.fail(
                "supply.negative_output",
                "same output as the positive rail",
                hint="use the supply output wired to the negative rail",
            )
        supply = SupplyConnection(
            output=output,
            voltage_v=voltage,
            current_limit_a=rd.number(
                sup, "current_limit_a", "supply", high=10.0, what="current limit"
            ),
            negative_output=neg_out,
            negative_voltage_v=neg_v,
        )

    return FixtureConfig(
        name=name,
        board_part_number=part,
        path=path,
        digest=hashlib.sha256(raw).hexdigest() if raw is not None else "",
        generator_output=gen_output,
        channels=tuple(connections),
        test_points=tuple(points),
        supply=supply,
    )


def load_fixture(
    path: str | Path, board: Board, *, scope_inputs: int | None = None
) -> FixtureConfig:
    """Read and validate a fixture file against ``board`` (see README "Fixture files")."""
    doc, raw = read_toml(path, FixtureFileError)
    return fixture_from_dict(doc, board, str(path), raw, scope_inputs=scope_inputs)


def check_station(
    fixture: FixtureConfig,
    roles: Iterable[str],
    station_path: str | None,
    *,
    scope_inputs: int | None = None,
) -> None:
    """Check the station has every role the fixture needs and that the fixture's scope
    inputs exist on its scope.  Raises StationFileError / FixtureFileError."""
    have = set(roles)
    for role in fixture.required_roles():
        if role not in have:
            why = {
                "generator": "every test drives the board inputs",
                "scope": "every test records the board's inputs and outputs",
                "supply": "the fixture has a [supply] table",
                "switch": "the fixture has switch routes",
                "dmm": "the fixture has DC test points",
            }[role]
            raise StationFileError(
                station_path,
                f"instrument.{role}",
                f"missing role {role!r} ({why})",
                hint=f"add an [instrument.{role}] table with its resource",
            )
    if scope_inputs is not None:
        for i, c in enumerate(fixture.channels):
            for key in ("input_scope", "output_scope"):
                n = getattr(c, key)
                if not 1 <= n <= scope_inputs:
                    raise FixtureFileError(
                        fixture.path,
                        f"channel[{i}].{key}",
                        f"scope input {n} does not exist: the station's scope "
                        f"has inputs 1..{scope_inputs}",
                        hint="use an input the scope has",
                    )
