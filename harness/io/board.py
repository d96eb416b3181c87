"""Board files: read and validate a board description into :class:`~harness.model.board.Board`.

``board_from_dict`` checks a parsed TOML document and raises
:class:`~harness.errors.BoardFileError` naming the channel, stage and field of any mistake;
``load_board`` reads the file and, by default, checks that the nominal design can work.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Mapping
from dataclasses import fields
from pathlib import Path
from typing import Any, Literal, TypeVar

from harness.errors import BoardFileError, ValueParseError
from harness.io.toml import FieldReader, read_toml
from harness.model.board import (
    MAX_SAMPLES,
    STAGE_KINDS,
    Board,
    Channel,
    CommonEmitter,
    Conditions,
    EmitterFollower,
    LimitPolicy,
    OpAmp,
    OpAmpInverting,
    OpAmpNonInverting,
    Part,
    Spread,
    Stage,
    Supply,
    Transistor,
)
from harness.values import parse_quantity, parse_tolerance, split_value_tolerance

_T = TypeVar("_T")


class _Reader(FieldReader):
    """The shared field reader plus the board's own field types: quantities written as
    component values (``4k7``), data-sheet spreads and toleranced parts."""

    allowed_hint = "allowed fields here"

    def __init__(self, path: str, doc: Any = None, raw: bytes | None = None) -> None:
        super().__init__(path, BoardFileError, doc=doc, raw=raw)

    def quantity(
        self,
        data: Mapping[str, Any],
        key: str,
        where: str,
        default: float | None = None,
        *,
        unit: str,
        positive: bool = True,
        line_at: tuple[Any, str] | None = None,
    ) -> float:
        """A number, an SI-prefixed number or an RKM code (``4k7``) of the quantity ``unit``
        measures ("" for a plain number), see harness.values.parse_quantity.  ``line_at``
        (table, key) says where the value is written when ``data`` is not the file's own."""
        if key not in data:
            return self.absent(key, where, default, "<number>")
        loc = self.located(f"{where}.{key}", *(line_at or (data, key)))
        try:
            value = parse_quantity(data[key], unit)
        except ValueParseError as exc:
            raise self.fail(loc, f"{exc.reason} ({data[key]!r})", exc.hint) from None
        if positive and not value > 0:
            raise self.fail(loc, f"must be greater than zero (got {value:g})")
        return value

    def spread(
        self,
        data: Mapping[str, Any],
        key: str,
        where: str,
        *,
        unit: str,
        required: bool = True,
        positive: bool = True,
    ) -> Spread | None:
        loc = f"{where}.{key}"
        if key not in data:
            if not required:
                return None
            raise self.fail(
                loc, "missing field", hint=f"add {key} = {{ min = .., typ = .., max = .. }}"
            )
        value = data[key]
        if not isinstance(value, Mapping):
            v = self.quantity(data, key, where, unit=unit, positive=positive)
            return Spread(v, v, v)
        self.known(value, {"min", "typ", "max"}, loc)
        nums = {}
        for k in ("min", "typ", "max"):
            if k in value:
                nums[k] = self.quantity(value, k, loc, unit=unit, positive=positive)
        if "typ" not in nums:
            if "min" in nums and "max" in nums:
                nums["typ"] = (
                    math.sqrt(nums["min"] * nums["max"])
                    if positive
                    else (nums["min"] + nums["max"]) / 2
                )
            else:
                raise self.fail(loc, "needs typ, or both min and max")
        lo, typ, hi = nums.get("min", nums["typ"]), nums["typ"], nums.get("max", nums["typ"])
        if not lo <= typ <= hi:
            raise self.fail(loc, f"needs min <= typ <= max (got {lo:g}, {typ:g}, {hi:g})")
        return Spread(lo, typ, hi)

    def required_part(
        self,
        data: Mapping[str, Any],
        key: str,
        where: str,
        default_tol: str | None,
        kind: Literal["resistor", "capacitor", "voltage", "other"],
        *,
        allow_zero: bool = False,
    ) -> Part:
        """The component ``key``, which must be there."""
        part = self.part(data, key, where, default_tol, kind, allow_zero=allow_zero)
        assert part is not None  # part() raises for a missing required component
        return part

    def part(
        self,
        data: Mapping[str, Any],
        key: str,
        where: str,
        default_tol: str | None,
        kind: Literal["resistor", "capacitor", "voltage", "other"],
        *,
        required: bool = True,
        allow_zero: bool = False,
    ) -> Part | None:
        """The component ``key`` (None when optional and absent)."""
        loc = f"{where}.{key}"
        if key not in data:
            if required:
                raise self.fail(loc, "missing component", hint=f'add {key} = "<value> <tolerance>"')
            return None
        raw = data[key]
        at = self.located(loc, data, key)  # where complaints about the value point
        unit = _PART_UNITS[kind]
        ref = ""
        tol_text: Any = None
        if isinstance(raw, Mapping):
            self.known(raw, {"value", "tol", "ref"}, loc)
            if "value" not in raw:
                raise self.fail(f"{loc}.value", "missing field")
            value_text: Any = raw["value"]
            tol_text = raw.get("tol")
            ref = str(raw.get("ref", ""))
        elif isinstance(raw, str):
            try:
                value_text, tol_text = split_value_tolerance(raw)
            except ValueParseError as exc:
                raise self.fail(at, f"{exc.reason} ({raw!r})", exc.hint) from None
        else:
            value_text = raw
        try:
            value = parse_quantity(value_text, unit)
        except ValueParseError as exc:
            what = f"{key} is a {kind}: " if exc.reason.startswith(("unit ", "would be")) else ""
            raise self.fail(at, f"{what}{exc.reason} ({value_text!r})", exc.hint) from None
        if value < 0 or (value == 0 and not allow_zero):
            what = "resistance" if kind == "resistor" else "value"
            raise self.fail(
                at,
                f"{what} must be greater than zero (got {value:g})",
                hint="remove the component if it is not fitted",
            )
        if tol_text is None:
            tol_text = default_tol
        if tol_text is None:
            raise self.fail(
                at,
                "no tolerance given",
                hint=f'write e.g. {key} = "{value_text} 1%" or set a default in [tolerances]',
            )
        try:
            minus, plus = parse_tolerance(tol_text)
        except ValueParseError as exc:
            raise self.fail(at, f"{exc.reason} ({tol_text!r})", exc.hint) from None
        return Part(nominal=value, tol_minus=minus, tol_plus=plus, ref=ref or loc, kind=kind)


#: The unit each kind of part is written in (SI symbols, see harness.values.UNITS).
_PART_UNITS: dict[str, str | None] = {
    "resistor": "Ω",
    "capacitor": "F",
    "voltage": "V",
    "other": None,
}


def _file_fields(cls: type) -> set[str]:
    """A stage table's fields are its dataclass's (``kind`` too), so the two cannot drift."""
    return {f.name for f in fields(cls)}


_CE_FIELDS = _file_fields(CommonEmitter)
_EF_FIELDS = (_file_fields(EmitterFollower) - {"dc_coupled"}) | {"coupling"}  # coupling = "dc"
_INV_FIELDS = _file_fields(OpAmpInverting)
_NONINV_FIELDS = _file_fields(OpAmpNonInverting)


def _transistor(rd: _Reader, name: str, data: Any, where: str) -> Transistor:
    if not isinstance(data, Mapping):
        raise rd.fail(where, "must be a table")
    rd.known(
        data,
        {"polarity", "beta", "is_a", "vce_sat_v", "vaf_v", "early_v", "beta_r", "vbe_v", "note"},
        where,
    )
    polarity = rd.text(data, "polarity", where, default="npn").lower()
    if polarity != "npn":
        raise rd.fail(
            f"{where}.polarity",
            f"polarity {polarity!r} is not supported",
            hint='describe NPN stages (polarity = "npn")',
        )
    vaf = rd.quantity(data, "vaf_v", where, default=0.0, unit="V", positive=False) or None
    early = rd.spread(data, "early_v", where, unit="V", required=False)
    if early is not None:
        if vaf is not None:
            raise rd.fail(
                f"{where}.early_v",
                "both early_v and vaf_v give the Early voltage",
                hint="keep early_v (a range) and remove vaf_v",
            )
        vaf = early.typ
    return Transistor(
        name=name,
        polarity="npn",
        beta=rd.spread(data, "beta", where, unit=""),  # type: ignore[arg-type]
        is_a=rd.spread(data, "is_a", where, unit="A"),  # type: ignore[arg-type]
        vce_sat_v=rd.spread(data, "vce_sat_v", where, unit="V"),  # type: ignore[arg-type]
        vaf_v=vaf,
        vbe_v=rd.spread(data, "vbe_v", where, unit="V", required=False),
        beta_r=rd.spread(data, "beta_r", where, unit="", required=False),
        early_v=early,
    )


def _opamp(rd: _Reader, name: str, data: Any, where: str) -> OpAmp:
    if not isinstance(data, Mapping):
        raise rd.fail(where, "must be a table")
    rd.known(
        data,
        {"headroom_v", "gbw_hz", "open_loop_gain", "output_current_a", "quiescent_a", "note"},
        where,
    )
    q = rd.spread(data, "quiescent_a", where, unit="A", required=False)
    return OpAmp(
        name=name,
        headroom_v=rd.spread(data, "headroom_v", where, unit="V"),  # type: ignore[arg-type]
        gbw_hz=rd.quantity(data, "gbw_hz", where, default=1e6, unit="Hz"),
        open_loop_gain=rd.quantity(data, "open_loop_gain", where, default=1e5, unit=""),
        output_current_a=rd.quantity(data, "output_current_a", where, default=0.02, unit="A"),
        quiescent_a=q or Spread(0.5e-3, 1e-3, 2e-3),
    )


def _stage(
    rd: _Reader,
    data: Any,
    where: str,
    transistors: Mapping[str, Transistor],
    opamps: Mapping[str, OpAmp],
    tol_r: str | None,
    tol_c: str | None,
) -> Stage:
    if not isinstance(data, Mapping):
        raise rd.fail(where, "a stage must be a table")
    kind = rd.text(data, "kind", where)
    if kind not in STAGE_KINDS:
        raise rd.fail(
            f"{where}.kind",
            f"unknown stage kind {kind!r}",
            hint=f"use one of: {', '.join(STAGE_KINDS)}",
        )
    name = rd.text(data, "name", where)
    where = f"{where}({name})"

    def r(key: str) -> Part:
        return rd.required_part(data, key, where, tol_r, "resistor")

    def r_maybe(key: str, required: bool = False) -> Part | None:
        return rd.part(data, key, where, tol_r, "resistor", required=required)

    def c(key: str) -> Part | None:
        return rd.part(data, key, where, tol_c, "capacitor", required=False)

    def named(key: str, defined: Mapping[str, _T], what: str) -> _T:
        """The device the stage names in ``key``, defined in a [<key>.<name>] table."""
        ref = rd.text(data, key, where)
        if ref not in defined:
            raise rd.fail(
                f"{where}.{key}",
                f"no {what} named {ref!r}",
                hint=f"define it in {'an' if what[0] in 'aeiou' else 'a'} [{key}.<name>] table",
            )
        return defined[ref]

    def transistor() -> Transistor:
        return named("transistor", transistors, "transistor")

    def opamp() -> OpAmp:
        return named("opamp", opamps, "op-amp")

    if kind == "common_emitter":
        rd.known(data, _CE_FIELDS, where)
        ce = CommonEmitter(
            name=name,
            transistor=transistor(),
            r1=r("r1"),
            r2=r("r2"),
            rc=r("rc"),
            re=rd.required_part(data, "re", where, tol_r, "resistor", allow_zero=True),
            re_bypassed=r_maybe("re_bypassed"),
            c_e=c("c_e"),
            c_in=c("c_in"),
            c_out=c("c_out"),
        )
        if ce.re.nominal == 0 and ce.re_bypassed is None:
            raise rd.fail(
                f"{where}.re",
                "resistance must be greater than zero (got 0)",
                hint="re may be 0 only when re_bypassed carries the bias current",
            )
        if ce.c_e is not None and ce.re_bypassed is None:
            raise rd.fail(
                f"{where}.c_e",
                "bypass capacitor without re_bypassed",
                hint="give re_bypassed, the emitter resistance c_e bypasses",
            )
        stage: Stage = ce
    elif kind == "emitter_follower":
        rd.known(data, _EF_FIELDS, where)
        coupling = rd.text(data, "coupling", where, default="dc").lower()
        if coupling not in {"dc", "ac"}:
            raise rd.fail(
                f"{where}.coupling",
                f"unknown coupling {coupling!r}",
                hint='use "dc" (base on the previous collector) or "ac"',
            )
        if coupling == "dc":
            # a DC-coupled base sits on the previous collector: a bias divider or an input
            # capacitor written here would be silently left out of every limit
            given = [k for k in ("r1", "r2", "c_in") if k in data]
            if given:
                explicit = "coupling" in data
                raise rd.fail(
                    f"{where}.{given[0]}",
                    f"{', '.join(given)} given on a DC-coupled follower"
                    + ("" if explicit else ' (coupling defaults to "dc")'),
                    hint='set coupling = "ac" to bias the base with r1, r2 and c_in, or remove '
                    + ", ".join(given),
                )
        stage = EmitterFollower(
            name=name,
            transistor=transistor(),
            re=r("re"),
            r1=r_maybe("r1", coupling == "ac"),
            r2=r_maybe("r2", coupling == "ac"),
            c_in=c("c_in"),
            c_out=c("c_out"),
            dc_coupled=coupling == "dc",
        )
    elif kind == "opamp_inverting":
        rd.known(data, _INV_FIELDS, where)
        stage = OpAmpInverting(
            name=name,
            opamp=opamp(),
            r_in=r("r_in"),
            r_f=r("r_f"),
            c_in=c("c_in"),
            c_out=c("c_out"),
        )
    else:
        rd.known(data, _NONINV_FIELDS, where)
        stage = OpAmpNonInverting(
            name=name,
            opamp=opamp(),
            r_g=r("r_g"),
            r_f=r("r_f"),
            r_bias=r_maybe("r_bias"),
            c_in=c("c_in"),
            c_g=c("c_g"),
            c_out=c("c_out"),
        )
    return stage


_TOP_FIELDS = {
    "board",
    "supply",
    "conditions",
    "limits",
    "tolerances",
    "transistor",
    "opamp",
    "channel",
}


def board_from_dict(
    data: Mapping[str, Any], path: str = "<board>", raw: bytes | None = None
) -> Board:
    """Validate a parsed board document and build the :class:`Board`.

    ``raw`` is the file's bytes, hashed into ``Board.digest`` so every limit and result can
    name the exact board file it came from.
    """
    rd = _Reader(path, data, raw)
    rd.known(data, _TOP_FIELDS, "")
    head = rd.table(data, "board", missing_at="", wrong_hint="")
    rd.known(head, {"name", "part_number", "revision", "note"}, "board")

    tolerances = rd.table(data, "tolerances", required=False, wrong_hint="")
    rd.known(tolerances, {"resistor", "capacitor"}, "tolerances")
    tol_r = tolerances.get("resistor")
    tol_c = tolerances.get("capacitor")
    for key, tol in (("resistor", tol_r), ("capacitor", tol_c)):
        if tol is not None:
            try:
                parse_tolerance(tol)
            except ValueParseError as exc:
                raise rd.fail(f"tolerances.{key}", exc.reason, exc.hint) from None

    sup = rd.table(data, "supply", missing_at="", wrong_hint="")
    rd.known(sup, {"positive_v", "negative_v"}, "supply")
    positive = rd.part(sup, "positive_v", "supply", "0%", "voltage")
    negative = None
    if "negative_v" in sup:
        try:
            neg_value, neg_tol = split_value_tolerance(str(sup["negative_v"]))
            neg = parse_quantity(neg_value, "V")
            minus, plus = parse_tolerance(neg_tol or "0%")
        except ValueParseError as exc:
            loc = rd.located("supply.negative_v", sup, "negative_v")
            raise rd.fail(loc, f"{exc.reason} ({sup['negative_v']!r})", exc.hint) from None
        if not neg < 0:
            raise rd.fail("supply.negative_v", "the negative rail must be below zero")
        negative = Part(
            nominal=neg, tol_minus=minus, tol_plus=plus, ref="supply.negative_v", kind="voltage"
        )
    supply = Supply(positive=positive, negative=negative)  # type: ignore[arg-type]

    cond = rd.table(data, "conditions", missing_at="", wrong_hint="")
    rd.known(
        cond,
        {
            "frequency_hz",
            "nominal_input_vrms",
            "safe_input_vrms",
            "source_ohm",
            "extra_frequencies_hz",
            "clip_criterion",
            "clip_thd_percent",
            "clip_compression_db",
            "thd_limit_percent",
            "load_ohm",
        },
        "conditions",
    )
    extra = cond.get("extra_frequencies_hz", [])
    if not isinstance(extra, list):
        raise rd.fail("conditions.extra_frequencies_hz", "must be a list of frequencies")
    extra_hz = tuple(
        rd.quantity(
            {f"extra_frequencies_hz[{i}]": f},
            f"extra_frequencies_hz[{i}]",
            "conditions",
            unit="Hz",
            line_at=(cond, "extra_frequencies_hz"),
        )
        for i, f in enumerate(extra)
    )
    criterion = rd.text(cond, "clip_criterion", "conditions", default="thd").lower()
    if criterion not in {"thd", "compression"}:
        raise rd.fail(
            "conditions.clip_criterion",
            f"unknown criterion {criterion!r}",
            hint='use "thd" or "compression"',
        )
    conditions = Conditions(
        frequency_hz=rd.quantity(cond, "frequency_hz", "conditions", unit="Hz"),
        nominal_input_vrms=rd.quantity(cond, "nominal_input_vrms", "conditions", unit="V"),
        safe_input_vrms=rd.quantity(cond, "safe_input_vrms", "conditions", unit="V"),
        source_ohm=rd.quantity(
            cond, "source_ohm", "conditions", default=50.0, unit="Ω", positive=False
        ),
        extra_frequencies_hz=extra_hz,
        clip_criterion=criterion,  # type: ignore[arg-type]
        clip_thd_percent=rd.quantity(cond, "clip_thd_percent", "conditions", default=1.0, unit=""),
        clip_compression_db=rd.quantity(
            cond, "clip_compression_db", "conditions", default=1.0, unit=""
        ),
        thd_limit_percent=(
            rd.quantity(cond, "thd_limit_percent", "conditions", unit="")
            if "thd_limit_percent" in cond
            else None
        ),
    )
    if conditions.nominal_input_vrms > conditions.safe_input_vrms:
        raise rd.fail(
            "conditions.nominal_input_vrms",
            "nominal input is above the safe input level",
            hint="lower nominal_input_vrms or check safe_input_vrms",
        )
    if conditions.clip_thd_percent >= 100:
        raise rd.fail("conditions.clip_thd_percent", "must be under 100 %")
    if conditions.thd_limit_percent is not None and conditions.thd_limit_percent >= 100:
        raise rd.fail("conditions.thd_limit_percent", "must be under 100 %")
    board_load = rd.required_part(cond, "load_ohm", "conditions", tol_r or "0%", "resistor")

    lim = rd.table(data, "limits", required=False, wrong_hint="")
    rd.known(lim, {"method", "samples", "coverage", "seed", "worst_case"}, "limits")
    method = rd.text(lim, "method", "limits", default="monte_carlo")
    if method != "monte_carlo":
        raise rd.fail("limits.method", f"unknown method {method!r}", hint='use "monte_carlo"')
    samples = lim.get("samples", 20000)
    if (
        not isinstance(samples, int)
        or isinstance(samples, bool)
        or not 100 <= samples <= MAX_SAMPLES
    ):
        raise rd.fail(
            rd.located("limits.samples", lim, "samples"),
            f"must be a whole number from 100 to {MAX_SAMPLES}",
            hint="20000 boards give limits to a few parts in a thousand; more only costs time",
        )
    coverage = rd.quantity(lim, "coverage", "limits", default=0.9973, unit="")
    if not 0.5 <= coverage < 1.0:
        raise rd.fail("limits.coverage", "must be a fraction from 0.5 to below 1 (e.g. 0.9973)")
    seed = lim.get("seed", 1)
    if not isinstance(seed, int) or isinstance(seed, bool) or seed < 0:
        raise rd.fail("limits.seed", "must be a whole number >= 0")
    worst = lim.get("worst_case", True)
    if not isinstance(worst, bool):
        raise rd.fail("limits.worst_case", "must be true or false")
    policy = LimitPolicy(
        method="monte_carlo", samples=samples, coverage=coverage, seed=seed, worst_case=worst
    )

    transistors: dict[str, Transistor] = {}
    tdata = data.get("transistor", {})
    if not isinstance(tdata, Mapping):
        raise rd.fail("transistor", "must be tables [transistor.<name>]")
    for tname, tval in tdata.items():
        transistors[tname] = _transistor(rd, tname, tval, f"transistor.{tname}")
    opamps: dict[str, OpAmp] = {}
    odata = data.get("opamp", {})
    if not isinstance(odata, Mapping):
        raise rd.fail("opamp", "must be tables [opamp.<name>]")
    for oname, oval in odata.items():
        opamps[oname] = _opamp(rd, oname, oval, f"opamp.{oname}")

    chans = data.get("channel")
    if not isinstance(chans, list) or not chans:
        raise rd.fail("channel", "no channels", hint="add at least one [[channel]] table")
    channels: list[Channel] = []
    seen: set[str] = set()
    for where, ch in rd.tables(chans, "channel", wrong_hint=""):
        rd.known(ch, {"name", "input", "output", "stage", "load_ohm"}, where)
        cname = rd.text(ch, "name", where)
        where = f"channel.{cname}"
        if cname in seen:
            raise rd.fail(where, "two channels share this name")
        seen.add(cname)
        stages_data = ch.get("stage")
        if not isinstance(stages_data, list) or not stages_data:
            raise rd.fail(f"{where}.stage", "a channel needs at least one [[channel.stage]]")
        stages = tuple(
            _stage(rd, s, f"{where}.stage[{j}]", transistors, opamps, tol_r, tol_c)
            for j, s in enumerate(stages_data)
        )
        names = [s.name for s in stages]
        if len(set(names)) != len(names):
            raise rd.fail(f"{where}.stage", "two stages share a name")
        if isinstance(stages[0], EmitterFollower) and stages[0].dc_coupled:
            raise rd.fail(
                f"{where}.stage[0]",
                "the first stage cannot be DC-coupled to a previous stage",
                hint='use coupling = "ac" with r1, r2 and c_in',
            )
        for j, s in enumerate(stages[1:], start=1):
            if (
                isinstance(s, EmitterFollower)
                and s.dc_coupled
                and not isinstance(stages[j - 1], CommonEmitter)
            ):
                raise rd.fail(
                    f"{where}.stage[{j}]({s.name}).coupling",
                    "a DC-coupled follower must follow a common-emitter stage",
                    hint='use coupling = "ac"',
                )
            if isinstance(s, EmitterFollower) and s.dc_coupled and stages[j - 1].c_out is not None:
                raise rd.fail(
                    f"{where}.stage[{j - 1}]({stages[j - 1].name}).c_out",
                    "the previous stage has c_out but the follower is DC-coupled",
                    hint='remove c_out or set coupling = "ac" on the follower',
                )
        needs_neg = any(isinstance(s, OpAmpInverting | OpAmpNonInverting) for s in stages)
        if needs_neg and supply.negative is None:
            raise rd.fail(
                f"{where}.stage",
                "op-amp stages need a split supply",
                hint="add negative_v to [supply]",
            )
        load = rd.part(ch, "load_ohm", where, tol_r or "0%", "resistor", required=False)
        channels.append(
            Channel(
                name=cname,
                input=rd.text(ch, "input", where, default="IN"),
                output=rd.text(ch, "output", where, default="OUT"),
                stages=stages,
                load_ohm=load or board_load,
            )
        )

    digest = hashlib.sha256(raw).hexdigest() if raw is not None else ""
    return Board(
        name=rd.text(head, "name", "board"),
        part_number=rd.text(head, "part_number", "board", default="-"),
        revision=rd.text(head, "revision", "board", default="-"),
        supply=supply,
        conditions=conditions,
        policy=policy,
        channels=tuple(channels),
        source=path,
        digest=digest,
    )


def load_board(path: str | Path, *, validate: bool = True) -> Board:
    """Read and validate a board description (see README, "Board files").

    With ``validate`` the nominal design is checked too (each transistor active at rest, each
    channel able to drive its load), so an unworkable board fails here with the file and field.
    """
    from harness.model import validate_board

    doc, raw = read_toml(path, BoardFileError)
    board = board_from_dict(doc, str(path), raw)
    if validate:
        validate_board(board)
    return board


def load_stored_board(text: str | None, path: str, *, validate: bool = True) -> Board:
    """The board a stored run was tested against: the board file's text kept in the run
    (schema 2 on), else the file at its recorded path (runs stored before that)."""
    if text is None:
        try:
            return load_board(path, validate=validate)
        except BoardFileError as exc:
            raise BoardFileError(
                path,
                None,
                f"this run was stored before board files were kept in the database, and the "
                f"file cannot be read ({exc.reason})",
                hint="pass --board FILE with the board file the run was tested against",
            ) from None
    import tomllib

    raw = text.encode("utf-8")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise BoardFileError(f"{path} (stored copy)", None, f"TOML syntax: {exc}") from None
    board = board_from_dict(doc, str(path), raw)
    if validate:
        from harness.model import validate_board

        validate_board(board)
    return board


def read_board_text(path: str | Path, digest: str) -> str | None:
    """The board file's text when it still holds the bytes ``digest`` names (sha256)."""
    try:
        raw = Path(path).read_bytes()
    except OSError:
        return None
    if digest and hashlib.sha256(raw).hexdigest() != digest:
        return None
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError:
        return None
