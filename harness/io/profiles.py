"""Instrument profiles: the SCPI text of every operation a role's driver uses, as data.

A profile is a TOML file (see README, "Stations and instrument profiles") with three
tables: ``[profile]`` (name, role, description), ``[settings]`` (facts about the
instrument the driver needs: units, ranges, formats) and ``[commands]`` (operation name
-> SCPI text with ``{placeholders}`` the driver fills).  Everything is checked when the
file is loaded, so a typo fails before the bench is touched: unknown section, setting or
operation; a required operation missing; a placeholder the driver does not provide; a
setting of the wrong type.  Each error names the file, the field (and its line) and the fix.
"""

from __future__ import annotations

import math
import re
import string
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Any

from harness.errors import ProfileError
from harness.instruments.config import Profile
from harness.instruments.scpi import DATATYPES, format_text, ladder_values
from harness.io.packaged import PROFILE_DIR
from harness.io.toml import read_toml

__all__ = [
    "DEFAULT_PROFILE_DIRS",
    "ROLES",
    "command_text",
    "load_profile",
    "profile_from_dict",
]

#: Where profile names are looked up: the profiles shipped in fixtures/instruments/.
DEFAULT_PROFILE_DIRS: tuple[Path, ...] = (PROFILE_DIR,)


@dataclass(frozen=True)
class _Op:
    required: bool
    provides: frozenset[str]  # placeholders the driver fills for this operation


def _op(required: bool, *names: str) -> _Op:
    return _Op(required, frozenset(names))


_COMMON_OPS: dict[str, _Op] = {
    "identify": _op(True),
    "reset": _op(False),
    "clear_status": _op(True),
    "error_query": _op(True),
    "wait_complete": _op(True),
}

#: Per role: operation -> (required?, placeholders the driver provides).
ROLE_OPS: dict[str, dict[str, _Op]] = {
    "generator": {
        "set_function": _op(True, "output"),
        "set_frequency": _op(True, "output", "frequency_hz"),
        "query_frequency": _op(True, "output"),
        "set_amplitude": _op(True, "output", "amplitude"),
        "query_amplitude": _op(False, "output"),
        "set_amplitude_unit": _op(False, "output"),
        "set_load": _op(False, "output", "load"),
        "query_load": _op(False, "output"),
        "set_offset": _op(True, "output", "offset_v"),
        "output_on": _op(True, "output"),
        "output_off": _op(True, "output"),
        "query_output": _op(True, "output"),
    },
    "scope": {
        "input_on": _op(True, "input"),
        "input_off": _op(False, "input"),
        # vertical: by full-scale range or by volts per division (settings.vertical)
        "set_range": _op(False, "input", "range_vpp"),
        "query_range": _op(False, "input"),
        "set_scale": _op(False, "input", "scale_v_div"),
        "query_scale": _op(False, "input"),
        "set_offset": _op(True, "input", "offset_v", "position_div"),
        "set_coupling": _op(True, "input", "coupling"),
        "set_bandwidth_limit": _op(True, "input", "state"),
        "set_probe": _op(False, "input", "probe"),
        # horizontal: by sample rate, by time per division or by record time
        "set_sample_rate": _op(False, "interval_s", "sample_rate_hz"),
        "set_time_scale": _op(False, "time_s_div"),
        "set_record_time": _op(False, "record_s"),
        "set_record_length": _op(True, "points"),
        "query_sample_interval": _op(True),
        "query_record_length": _op(True),
        "set_trigger": _op(True, "source", "level_v"),
        "set_data_format": _op(True, "format"),
        "set_high_resolution": _op(False, "state"),
        "single": _op(True),
        "query_acquire_state": _op(False),
        "query_preamble": _op(False, "input"),
        "fetch": _op(True, "input", "start", "stop", "count"),
    },
    "switch": {
        "close": _op(True, "channels"),
        "open": _op(True, "channels"),
        "open_all": _op(True),
        "query_closed": _op(True, "channels"),  # open_all is read back with it
    },
    "dmm": {
        "measure_dc_volts": _op(True, "range_v"),
    },
    "supply": {
        "set_voltage": _op(True, "output", "voltage_v"),
        "set_current_limit": _op(True, "output", "current_a"),
        "output_on": _op(True, "output"),
        "output_off": _op(True, "output"),
        "query_output": _op(True, "output"),
        "measure_current": _op(True, "output"),
        "measure_voltage": _op(True, "output"),
        "query_tripped": _op(True, "output"),
    },
}
for _ops in ROLE_OPS.values():
    _ops.update(_COMMON_OPS)

ROLES: tuple[str, ...] = tuple(ROLE_OPS)


# --- settings validators: each returns the clean value or raises ValueError(reason) ---------


def _pos_float(v: Any) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v) or v <= 0:
        raise ValueError("must be a positive number")
    return float(v)


def _nonneg_float(v: Any) -> float:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v) or v < 0:
        raise ValueError("must be a number >= 0")
    return float(v)


def _pos_int(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 1:
        raise ValueError("must be a whole number >= 1")
    return v


def _choice(*allowed: str) -> Callable[[Any], str]:
    def check(v: Any) -> str:
        if not isinstance(v, str) or v.lower() not in allowed:
            raise ValueError(f"must be one of {', '.join(repr(a) for a in allowed)}")
        return v.lower()

    return check


def _load(v: Any) -> float:
    """``"high_z"`` -> inf, or a load in ohms."""
    if isinstance(v, str) and v.lower() in ("high_z", "highz", "inf"):
        return math.inf
    try:
        return _pos_float(v)
    except ValueError:
        raise ValueError('must be "high_z" or a load in ohms (e.g. 50)') from None


def _list_of(item: Callable[[Any], Any]) -> Callable[[Any], tuple[Any, ...]]:
    def check(v: Any) -> tuple[Any, ...]:
        if not isinstance(v, list) or not v:
            raise ValueError("must be a non-empty list")
        out = []
        for i, x in enumerate(v):
            try:
                out.append(item(x))
            except ValueError as exc:
                raise ValueError(f"item {i} ({x!r}) {exc}") from None
        return tuple(sorted(out))

    return check


def _bits(v: Any) -> int:
    n = _pos_int(v)
    if n > 24:
        raise ValueError("must be 1-24 bits")
    return n


def _template(v: Any) -> str:
    if not isinstance(v, str) or "{input}" not in v:
        raise ValueError('must be text containing "{input}", e.g. "INTernal{input}"')
    command_text(v)
    return v


def _bool(v: Any) -> bool:
    if not isinstance(v, bool):
        raise ValueError("must be true or false")
    return v


def _text(v: Any) -> str:
    if not isinstance(v, str):
        raise ValueError("must be text")
    return v


def _nonneg_int(v: Any) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 0:
        raise ValueError("must be a whole number >= 0")
    return v


def _index_base(v: Any) -> int:
    if isinstance(v, bool) or v not in (0, 1):
        raise ValueError("must be 0 (first point is 0) or 1 (first point is 1)")
    return int(v)


#: Fields a preamble may carry; waveform volts = (code - y_reference) * y_increment + y_origin,
#: time of point i = x_origin + i * x_increment (common practice for benchtop scopes).
PREAMBLE_FIELDS: tuple[str, ...] = (
    "points",
    "x_increment",
    "x_origin",
    "y_increment",
    "y_origin",
    "y_reference",
)
#: Preamble fields the preamble-driven scaling cannot do without.
PREAMBLE_REQUIRED: tuple[str, ...] = ("x_increment", "y_increment", "y_origin", "y_reference")
#: The fixed set of scaling conventions; profile text never holds an expression.
SCALINGS: tuple[str, ...] = ("range_and_bits", "per_division", "preamble")


def _field_map(v: Any) -> dict[str, int]:
    if not isinstance(v, dict):
        raise ValueError("must be a table of field = position (0 = first field of the reply)")
    out: dict[str, int] = {}
    for k, i in v.items():
        if k not in PREAMBLE_FIELDS:
            raise ValueError(
                f"names unknown preamble field {k!r}; known fields: {', '.join(PREAMBLE_FIELDS)}"
            )
        if isinstance(i, bool) or not isinstance(i, int) or i < 0:
            raise ValueError(f"field {k} must be a position >= 0, not {i!r}")
        out[k] = i
    if len(set(out.values())) != len(out):
        raise ValueError("gives two fields the same position")
    return out


_LADDERS = {"1-2-5": (1.0, 2.0, 5.0), "1-2.5-5": (1.0, 2.5, 5.0), "decade": (1.0,)}


def _ladder_or_list(v: Any) -> tuple[float, ...]:
    """A list of values, or ``{ ladder = "1-2-5", min = 1e-6, max = 10 }``."""
    if isinstance(v, list):
        return _list_of(_pos_float)(v)
    if isinstance(v, dict):
        unknown = set(v) - {"ladder", "min", "max"}
        if unknown:
            raise ValueError(f"has unknown key {sorted(unknown)[0]!r}; use ladder, min, max")
        name = v.get("ladder")
        steps = _LADDERS.get(name) if isinstance(name, str) else None
        if steps is None:
            raise ValueError(f"ladder must be one of {', '.join(repr(k) for k in _LADDERS)}")
        lo, hi = _pos_float(v.get("min")), _pos_float(v.get("max"))
        if lo > hi:
            raise ValueError("min must not exceed max")
        return ladder_values(steps, lo, hi)
    raise ValueError('must be a list or a table { ladder = "1-2-5", min = ..., max = ... }')


def _format_names(v: Any) -> dict[str, str]:
    if not isinstance(v, dict) or not all(isinstance(x, str) and x for x in v.values()):
        raise ValueError('must be a table of data format = text, e.g. { uint8 = "BYTE" }')
    for k in v:
        if k not in DATATYPES and k != "ascii":
            raise ValueError(
                f"names unknown data format {k!r}; known: {', '.join(DATATYPES)}, ascii"
            )
    return dict(v)


def command_text(text: str) -> str:
    """Refuse a control character in text that goes to an instrument (ValueError).

    A line feed (or CR, or any other C0 or C1 control, or DEL) inside an operation's text
    would end the command there and start another one that no check of the harness sees
    ("...AMPLitude {amplitude}\nSOURce1:VOLTage 5" sets 5 V behind the level cap).  One
    operation is one program message line (IEEE 488.2 §7.5: LF terminates it)."""
    for i, ch in enumerate(text):
        code = ord(ch)
        if code < 0x20 or 0x7F <= code <= 0x9F:
            raise ValueError(
                f"has a control character U+{code:04X} at character {i + 1}: one operation "
                "is one command line, and a line break would start a command no check sees"
            )
    return text


@dataclass(frozen=True)
class _Setting:
    check: Callable[[Any], Any]
    default: Any = None  # None = required
    doc: str = ""


_FORMATS = tuple(DATATYPES)

ROLE_SETTINGS: dict[str, dict[str, _Setting]] = {
    "generator": {
        "amplitude_unit": _Setting(
            _choice("vpp", "vpk", "vrms", "dbm"), doc="what {amplitude} means"
        ),
        "calibrated_load": _Setting(_load, doc="load the amplitude setting assumes"),
        "output_ohm": _Setting(_nonneg_float, doc="the generator's source impedance"),
        "max_amplitude_vpp": _Setting(_pos_float, doc="largest setting, at calibrated load"),
        "outputs": _Setting(_pos_int, 1),
        "frequency_resolution_hz": _Setting(_nonneg_float, 0.0),
        "amplitude_tolerance_rel": _Setting(_pos_float, 0.002),
    },
    "scope": {
        "inputs": _Setting(_pos_int),
        "adc_bits": _Setting(_bits),
        "data_format": _Setting(_choice(*_FORMATS)),
        "byte_order": _Setting(_choice("big", "little"), "big"),
        "transfer": _Setting(_choice("block", "ascii"), "block"),
        "format_names": _Setting(_format_names, MappingProxyType({})),
        "vertical": _Setting(_choice("range", "per_division"), "range"),
        "divisions": _Setting(_pos_int, 8),
        "ranges_vpp": _Setting(_list_of(_pos_float), ()),
        "scales_v_div": _Setting(_ladder_or_list, ()),
        "horizontal": _Setting(
            _choice("sample_rate", "per_division", "record_time"), "sample_rate"
        ),
        "horizontal_divisions": _Setting(_pos_int, 10),
        "time_scales_s_div": _Setting(_ladder_or_list, ()),
        "sample_rates_hz": _Setting(_ladder_or_list),
        "record_lengths": _Setting(_list_of(_pos_int)),
        "scaling": _Setting(_choice(*SCALINGS), "range_and_bits"),
        "preamble_fields": _Setting(_field_map, MappingProxyType({})),
        "code_reference": _Setting(_nonneg_int, -1),
        "max_points_per_read": _Setting(_nonneg_int, 0),
        "index_base": _Setting(_index_base, 1),
        "acquire_done": _Setting(_choice("opc", "poll"), "opc"),
        "done_reply": _Setting(_text, ""),
        "poll_interval_s": _Setting(_nonneg_float, 0.005),
        "high_resolution": _Setting(_bool, False),
        "high_resolution_bits": _Setting(_nonneg_int, 0),
        "high_resolution_format": _Setting(_choice("", *_FORMATS), ""),
        "readback_tolerance_rel": _Setting(_pos_float, 1e-4),
        "trigger_input_source": _Setting(_template, "INTernal{input}"),
        "acquire_margin_s": _Setting(_nonneg_float, 2.0),
    },
    "switch": {
        "settle_s": _Setting(_nonneg_float, 0.0),
        "channels": _Setting(_pos_int, 0),
    },
    "dmm": {
        "input_ohm": _Setting(_pos_float, 10e6),
    },
    "supply": {
        "outputs": _Setting(_pos_int, 1),
        "max_voltage_v": _Setting(_pos_float),
        "max_current_a": _Setting(_pos_float),
    },
}

_FORMATTER = string.Formatter()


def _placeholders(text: str) -> set[str]:
    """Names in ``{braces}``; raises ValueError on unbalanced braces or format specs."""
    names: set[str] = set()
    for _lit, name, spec, conv in _FORMATTER.parse(text):
        if name is None:
            continue
        if not name.isidentifier():
            raise ValueError(f"placeholder {{{name}}} is not a name")
        if spec or conv:
            raise ValueError(f"placeholder {{{name}}} may not carry a format; the driver formats")
        names.add(name)
    return names


def _line_of(raw: bytes, key: str) -> int | None:
    m = re.search(rb"(?m)^[ \t]*" + re.escape(key.encode()) + rb"[ \t]*=", raw)
    return raw[: m.start()].count(b"\n") + 1 if m else None


def profile_from_dict(doc: Mapping[str, Any], path: str | None = None, raw: bytes = b"") -> Profile:
    """Validate a parsed profile document (see module docstring)."""

    def err(loc: str, reason: str, hint: str | None = None, key: str | None = None) -> ProfileError:
        line = _line_of(raw, key) if key and raw else None
        return ProfileError(path, f"{loc} (line {line})" if line else loc, reason, hint=hint)

    unknown = set(doc) - {"profile", "settings", "commands"}
    if unknown:
        section = sorted(unknown)[0]
        raise err(
            section, f"unknown section [{section}]", "use only [profile], [settings], [commands]"
        )
    head = doc.get("profile")
    if not isinstance(head, dict):
        raise err("profile", "missing [profile] table", "add [profile] with name and role")
    for k in sorted(set(head) - {"name", "role", "description"}):
        raise err(f"profile.{k}", f"unknown key {k!r}", "allowed: name, role, description", k)
    name = head.get("name")
    if not isinstance(name, str) or not name:
        raise err("profile.name", "missing or not text", 'add name = "my-profile"', "name")
    role = head.get("role")
    if not isinstance(role, str) or role not in ROLE_OPS:
        raise err(
            "profile.role", f"unknown role {role!r}", f"use one of {', '.join(ROLES)}", "role"
        )
    desc = head.get("description", "")
    if not isinstance(desc, str):
        raise err("profile.description", "must be text", key="description")

    # settings
    raw_settings = doc.get("settings", {})
    if not isinstance(raw_settings, dict):
        raise err("settings", "must be a table [settings]")
    spec = ROLE_SETTINGS[role]
    settings: dict[str, Any] = {}
    for k, v in raw_settings.items():
        if k not in spec:
            raise err(
                f"settings.{k}",
                f"unknown setting {k!r} for role {role}",
                f"known settings: {', '.join(sorted(spec))}",
                k,
            )
        try:
            settings[k] = spec[k].check(v)
        except ValueError as exc:
            raise err(f"settings.{k}", f"{v!r} {exc}", key=k) from None
    for k, s in spec.items():
        if k not in settings:
            if s.default is None:
                raise err(
                    f"settings.{k}",
                    "required setting missing",
                    f"add {k} = ... under [settings]" + (f" ({s.doc})" if s.doc else ""),
                )
            settings[k] = s.default

    # commands
    cmds = doc.get("commands")
    if not isinstance(cmds, dict):
        raise err("commands", "missing [commands] table", "add [commands] with the SCPI text")
    ops = ROLE_OPS[role]
    placeholders: dict[str, frozenset[str]] = {}
    for op, text in cmds.items():
        if op not in ops:
            raise err(
                f"commands.{op}",
                f"unknown operation {op!r} for role {role}",
                f"known operations: {', '.join(sorted(ops))}",
                op,
            )
        if not isinstance(text, str) or not text.strip():
            raise err(f"commands.{op}", "must be non-empty SCPI text", key=op)
        try:
            command_text(text)
        except ValueError as exc:
            raise err(
                f"commands.{op}", str(exc), "write the command on one line, no escapes", op
            ) from None
        try:
            names = _placeholders(text)
        except ValueError as exc:
            raise err(
                f"commands.{op}", str(exc), "write {name} with no format, {{ for a brace", op
            ) from None
        extra = names - ops[op].provides
        if extra:
            offered = ", ".join("{" + p + "}" for p in sorted(ops[op].provides)) or "none"
            raise err(
                f"commands.{op}",
                f"placeholder {{{sorted(extra)[0]}}} is not provided by the {role} driver",
                f"placeholders for {op}: {offered}",
                op,
            )
        placeholders[op] = frozenset(names)
    for op, o in ops.items():
        if o.required and op not in cmds:
            raise err(
                f"commands.{op}",
                "required operation missing",
                f'add {op} = "<SCPI text>" under [commands]',
            )
    if role == "scope":
        _check_scope(settings, placeholders, err)
    if (
        role == "generator"
        and settings["amplitude_unit"] == "dbm"
        and not math.isfinite(settings["calibrated_load"])
    ):
        raise err(
            "settings.calibrated_load",
            "dBm needs a finite load: power into high impedance is not defined",
            "set calibrated_load = 50 (or the load the generator's dBm assumes)",
            "calibrated_load",
        )
    return Profile(
        name=name,
        role=role,
        settings=MappingProxyType(settings),
        commands=MappingProxyType(dict(cmds)),
        description=desc,
        path=path,
        placeholders=MappingProxyType(placeholders),
    )


def _check_scope(
    settings: dict[str, Any],
    placeholders: Mapping[str, frozenset[str]],
    err: Callable[..., ProfileError],
) -> None:
    """Cross-field rules of a scope profile: each mode names the operations it needs."""

    def need(op: str, why: str, key: str) -> None:
        if op not in placeholders:
            raise err(
                f"commands.{op}", f"required by {why}", f'add {op} = "..." under [commands]', key
            )

    def have(key: str, why: str, example: str) -> None:
        if not settings[key]:
            raise err(f"settings.{key}", f"required by {why}", f"add {key} = {example}", key)

    vertical, horizontal = settings["vertical"], settings["horizontal"]
    if vertical == "range":
        have("ranges_vpp", 'vertical = "range"', "[0.2, 2, 20]")
        need("set_range", 'vertical = "range"', "vertical")
        need("query_range", 'vertical = "range" (the range is read back)', "vertical")
    else:
        have(
            "scales_v_div",
            'vertical = "per_division"',
            '{ ladder = "1-2-5", min = 1e-3, max = 10 }',
        )
        need("set_scale", 'vertical = "per_division"', "vertical")
        need("query_scale", 'vertical = "per_division" (the scale is read back)', "vertical")
    if horizontal == "sample_rate":
        need("set_sample_rate", 'horizontal = "sample_rate"', "horizontal")
    elif horizontal == "per_division":
        have(
            "time_scales_s_div",
            'horizontal = "per_division"',
            '{ ladder = "1-2-5", min = 1e-6, max = 10 }',
        )
        need("set_time_scale", 'horizontal = "per_division"', "horizontal")
    else:
        need("set_record_time", 'horizontal = "record_time"', "horizontal")
    if settings["scaling"] == "preamble":
        need("query_preamble", 'scaling = "preamble"', "scaling")
        missing = [f for f in PREAMBLE_REQUIRED if f not in settings["preamble_fields"]]
        if missing:
            raise err(
                "settings.preamble_fields",
                f"preamble-driven scaling needs the field(s) {', '.join(missing)}",
                "add their positions in the preamble reply, e.g. y_increment = 3",
                "preamble_fields",
            )
    fmt = settings["data_format"]
    if fmt != "float32" and settings["adc_bits"] > 8 * int(DATATYPES[fmt][1]):
        raise err(
            "settings.adc_bits",
            f"{settings['adc_bits']} bits do not fit {fmt} codes",
            "use a 16-bit format or float32",
            "adc_bits",
        )
    if settings["transfer"] == "block" and format_text(settings, fmt) is None:
        raise err(
            "settings.format_names",
            f"no text for data format {fmt!r} in {{format}}",
            f'add format_names = {{ {fmt} = "..." }} (what set_data_format sends)',
            "format_names",
        )
    if settings["max_points_per_read"]:
        got = placeholders.get("fetch", frozenset())
        if "start" not in got or not got & {"stop", "count"}:
            raise err(
                "commands.fetch",
                "max_points_per_read needs a fetch that names the points it reads",
                "use {start} with {stop} or {count} in fetch",
                "fetch",
            )
    if settings["acquire_done"] == "poll":
        need("query_acquire_state", 'acquire_done = "poll"', "acquire_done")
        if not settings["done_reply"].strip():
            raise err(
                "settings.done_reply",
                'required by acquire_done = "poll"',
                'add done_reply = "..." (the reply of query_acquire_state once acquired)',
                "done_reply",
            )
    if settings["high_resolution"]:
        need("set_high_resolution", "high_resolution = true", "high_resolution")
        bits, hfmt = settings["high_resolution_bits"], settings["high_resolution_format"] or fmt
        if not 1 <= bits <= 24:
            raise err(
                "settings.high_resolution_bits",
                "required by high_resolution = true (1-24 bits)",
                "add high_resolution_bits = 12",
                "high_resolution_bits",
            )
        if hfmt != "float32" and bits > 8 * int(DATATYPES[hfmt][1]):
            raise err(
                "settings.high_resolution_format",
                f"{bits} bits do not fit {hfmt} codes",
                'add high_resolution_format = "uint16"',
                "high_resolution_format",
            )


def _find(name: str, dirs: Iterable[Path]) -> Path | None:
    for d in dirs:
        p = Path(d) / f"{name}.toml"
        if p.is_file():
            return p
    return None


def load_profile(
    name_or_path: str | Path,
    search_dirs: Iterable[Path] | None = None,
    *,
    base_dir: Path | None = None,
    role: str | None = None,
) -> Profile:
    """Load a profile by name (``scpi-scope``) or path (``benches/my-scope.toml``).

    A name is looked up in ``search_dirs`` (default: the shipped fixtures/instruments); a
    path is taken relative to ``base_dir`` (the station file's folder).  ``role`` checks the
    profile is for it.
    """
    dirs = tuple(search_dirs) if search_dirs is not None else DEFAULT_PROFILE_DIRS
    ref = str(name_or_path)
    looks_like_path = isinstance(name_or_path, Path) or ref.endswith(".toml") or "/" in ref
    if looks_like_path:
        p = Path(ref)
        if not p.is_absolute() and base_dir is not None:
            p = Path(base_dir) / p
    else:
        found = _find(ref, dirs)
        if found is None:
            raise ProfileError(
                ref,
                None,
                "no profile of that name",
                hint=f"put {ref}.toml in one of: "
                + ", ".join(str(d) for d in dirs)
                + " or give a path",
            )
        p = found
    doc, raw = read_toml(p, ProfileError)
    prof = profile_from_dict(doc, str(p), raw)
    if role is not None and prof.role != role:
        raise ProfileError(
            str(p),
            "profile.role",
            f"is {prof.role!r}, expected {role!r}",
            hint=f"use a {role} profile here",
        )
    return prof
