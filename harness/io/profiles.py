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
from harness.instruments.scpi import DATATYPES
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
        "set_amplitude": _op(True, "output", "amplitude"),
        "set_offset": _op(True, "output", "offset_v"),
        "output_on": _op(True, "output"),
        "output_off": _op(True, "output"),
        "query_output": _op(True, "output"),
        "query_amplitude": _op(False, "output"),
    },
    "scope": {
        "input_on": _op(True, "input"),
        "input_off": _op(False, "input"),
        "set_range": _op(True, "input", "range_vpp"),
        "set_offset": _op(True, "input", "offset_v"),
        "set_coupling": _op(True, "input", "coupling"),
        "set_bandwidth_limit": _op(True, "input", "state"),
        "set_probe": _op(False, "input", "probe"),
        "set_sample_rate": _op(True, "interval_s", "sample_rate_hz"),
        "set_record_length": _op(True, "points"),
        "set_trigger": _op(True, "source", "level_v"),
        "set_data_format": _op(True, "format"),
        "single": _op(True),
        "fetch": _op(True, "input"),
    },
    "switch": {
        "close": _op(True, "channels"),
        "open": _op(True, "channels"),
        "open_all": _op(True),
        "query_closed": _op(False, "channels"),
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


ROLE_SETTINGS: dict[str, dict[str, _Setting]] = {
    "generator": {
        "amplitude_unit": _Setting(_choice("vpp", "vpk", "vrms"), doc="what {amplitude} means"),
        "calibrated_load": _Setting(_load, doc="load the amplitude setting assumes"),
        "output_ohm": _Setting(_nonneg_float, doc="the generator's source impedance"),
        "max_amplitude_vpp": _Setting(_pos_float, doc="largest setting, at calibrated load"),
        "outputs": _Setting(_pos_int, 1),
    },
    "scope": {
        "inputs": _Setting(_pos_int),
        "adc_bits": _Setting(_bits),
        "data_format": _Setting(_choice(*DATATYPES)),
        "byte_order": _Setting(_choice("big", "little"), "big"),
        "sample_rates_hz": _Setting(_list_of(_pos_float)),
        "record_lengths": _Setting(_list_of(_pos_int)),
        "ranges_vpp": _Setting(_list_of(_pos_float)),
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
    if (
        role == "scope"
        and settings["data_format"] != "float32"
        and settings["adc_bits"] > 8 * int(DATATYPES[settings["data_format"]][1])
    ):
        raise err(
            "settings.adc_bits",
            f"{settings['adc_bits']} bits do not fit {settings['data_format']} codes",
            "use int16 or float32",
            "adc_bits",
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
