"""Station files: which instruments a bench has, where they answer and what they must be.

A station file (TOML) has a ``[station]`` table (name, visa_library, timeout_ms, retries)
and one ``[instrument.<role>]`` table per instrument with its VISA ``resource`` string,
its ``profile`` (a name or a path relative to the station file) and ``expect_idn``, the
leading ``*IDN?`` fields the instrument there must report.  Everything is validated on
load; the profiles are loaded (and validated) too, so a bad station fails before any I/O.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping
from pathlib import Path
from types import MappingProxyType
from typing import Any

from harness.errors import ProfileError, StationFileError
from harness.instruments.config import InstrumentConfig, StationConfig
from harness.io.profiles import ROLES, load_profile
from harness.io.toml import FieldReader, read_toml

__all__ = [
    "load_station",
    "station_from_dict",
    "validate_resource",
]

_HOST = r"[A-Za-z0-9_.\-]+|\[[0-9A-Fa-f:.]+\]"

#: VISA resource-name forms (VPP-4.3 "resource names", from memory for the clause).
#: Each pattern is matched case-insensitively against the whole string.
_RESOURCE_FORMS: tuple[tuple[str, re.Pattern[str]], ...] = (
    (
        "TCPIP[board]::host::port::SOCKET",
        re.compile(rf"TCPIP\d*::(?P<host>{_HOST})::(?P<port>\d+)::SOCKET", re.I),
    ),
    (
        "TCPIP[board]::host::hislip<n>[,port]::INSTR",
        re.compile(rf"TCPIP\d*::(?P<host>{_HOST})::hislip\d+(,(?P<port>\d+))?(::INSTR)?", re.I),
    ),
    (
        "TCPIP[board]::host[::device]::INSTR (VXI-11)",
        re.compile(rf"TCPIP\d*::(?P<host>{_HOST})(::(?!hislip)[A-Za-z0-9_,\[\]]+)?::INSTR", re.I),
    ),
    (
        "USB[board]::vendor id::product id::serial[::interface]::INSTR",
        re.compile(
            r"USB\d*::(0x[0-9A-F]{1,4}|\d+)::(0x[0-9A-F]{1,4}|\d+)::[^:]+(::\d+)?"
            r"(::INSTR|::RAW)?",
            re.I,
        ),
    ),
    (
        "ASRL<n>::INSTR or ASRL/dev/<port>::INSTR (serial)",
        re.compile(r"ASRL(\d+|/dev/[A-Za-z0-9_/\-.]+|COM\d+)(::INSTR)?", re.I),
    ),
    (
        "GPIB[board]::primary[::secondary]::INSTR",
        re.compile(r"GPIB\d*::(?P<pad>\d+)(::(?P<sad>\d+))?(::INSTR)?", re.I),
    ),
)


def validate_resource(
    resource: Any, *, path: str | None = None, location: str | None = None
) -> str:
    """Return ``resource`` if it has one of the VISA forms, else raise StationFileError."""
    forms = "; ".join(f for f, _ in _RESOURCE_FORMS)
    if not isinstance(resource, str) or not resource.strip():
        raise StationFileError(
            path, location, "resource must be a VISA resource string", hint=f"use one of: {forms}"
        )
    res = resource.strip()
    for _form, pat in _RESOURCE_FORMS:
        m = pat.fullmatch(res)
        if not m:
            continue
        g = m.groupdict()
        if g.get("port") is not None and not 1 <= int(g["port"]) <= 65535:
            raise StationFileError(path, location, f"port {g['port']} out of 1-65535 in {res!r}")
        if g.get("pad") is not None and not 0 <= int(g["pad"]) <= 30:
            raise StationFileError(
                path, location, f"GPIB primary address {g['pad']} out of 0-30 in {res!r}"
            )
        return res
    hint = f"use one of: {forms}"
    if (
        res.upper().startswith("TCPIP")
        and "::" in res
        and not res.upper().endswith(("::SOCKET", "::INSTR"))
    ):
        hint = "a raw socket needs the ::SOCKET suffix, e.g. TCPIP::127.0.0.1::5025::SOCKET"
    raise StationFileError(path, location, f"{res!r} is not a VISA resource string", hint=hint)


#: Longest wait for one reply.  Acquisitions get their own timeout from the record length,
#: so this bounds only ordinary commands; a longer wait would keep a board driven while a
#: lost instrument says nothing.
MAX_TIMEOUT_MS = 30_000
#: Most reconnect-and-retry attempts after a lost connection (each waits up to a timeout).
MAX_RETRIES = 10


def _int(v: Any, lo: int, path: str | None, loc: str, hint: str, hi: int | None = None) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < lo:
        raise StationFileError(path, loc, f"{v!r} must be a whole number >= {lo}", hint=hint)
    if hi is not None and v > hi:
        raise StationFileError(path, loc, f"{v!r} is above the maximum {hi}", hint=hint)
    return v


_TIMEOUT_HINT = (
    f"milliseconds per I/O, 1-{MAX_TIMEOUT_MS} (e.g. 5000); acquisitions get their own "
    "timeout from the record length"
)
_RETRIES_HINT = f"reconnect attempts after a lost connection, 0-{MAX_RETRIES} (e.g. 1)"


def station_from_dict(
    doc: Mapping[str, Any],
    path: str | None = None,
    *,
    base_dir: Path | None = None,
    search_dirs: Iterable[Path] | None = None,
) -> StationConfig:
    """Validate a parsed station document; loads every profile it names."""
    rd = FieldReader(path, StationFileError)
    rd.known(
        doc,
        {"station", "instrument"},
        "",
        reason="unknown section [{key}]",
        hint="use [station] and [instrument.<role>]",
    )
    st = rd.table(doc, "station", required=False, wrong_hint="")
    rd.known(
        st,
        {"name", "visa_library", "timeout_ms", "retries"},
        "station",
        reason="unknown key {key!r}",
        hint="allowed: name, visa_library, timeout_ms, retries",
    )
    name = st.get("name", Path(path).stem if path else "station")
    if not isinstance(name, str):
        raise rd.fail("station.name", "must be text")
    lib = st.get("visa_library", "@py")
    if not isinstance(lib, str) or not lib.strip():
        raise rd.fail(
            "station.visa_library",
            "must be text",
            hint='"@py" for pyvisa-py, "@ivi" or a path to a VISA library',
        )
    timeout_ms = _int(
        st.get("timeout_ms", 5000), 1, path, "station.timeout_ms", _TIMEOUT_HINT, MAX_TIMEOUT_MS
    )
    retries = _int(st.get("retries", 1), 0, path, "station.retries", _RETRIES_HINT, MAX_RETRIES)
    insts = doc.get("instrument", {})
    if not isinstance(insts, dict) or not insts:
        raise rd.fail(
            "instrument",
            "no [instrument.<role>] tables",
            hint="add [instrument.generator] and [instrument.scope]",
        )
    out: dict[str, InstrumentConfig] = {}
    seen: dict[str, str] = {}
    for role, t in insts.items():
        loc = f"instrument.{role}"
        if role not in ROLES:
            raise rd.fail(loc, f"unknown role {role!r}", hint=f"use one of {', '.join(ROLES)}")
        if not isinstance(t, dict):
            raise rd.fail(loc, "must be a table")
        rd.known(
            t,
            {"resource", "profile", "expect_idn", "timeout_ms", "retries"},
            loc,
            reason="unknown key {key!r}",
            hint="allowed: resource, profile, expect_idn, timeout_ms, retries",
        )
        res = validate_resource(t.get("resource"), path=path, location=f"{loc}.resource")
        if res.lower() in seen:
            raise rd.fail(
                f"{loc}.resource",
                f"same resource as instrument.{seen[res.lower()]}",
                hint="each role needs its own instrument or socket",
            )
        seen[res.lower()] = role
        pref = t.get("profile")
        if not isinstance(pref, str) or not pref:
            raise rd.fail(
                f"{loc}.profile",
                "missing profile",
                hint=f'profile = "scpi-{role}" or a path to a .toml',
            )
        try:
            prof = load_profile(pref, search_dirs, base_dir=base_dir, role=role)
        except ProfileError as exc:
            raise rd.fail(f"{loc}.profile", str(exc)) from exc
        idn = t.get("expect_idn")
        if idn is not None and (
            not isinstance(idn, str) or not idn.strip() or len(idn.split(",")) > 4
        ):
            raise rd.fail(
                f"{loc}.expect_idn",
                f"{idn!r} must be the first 1-4 *IDN? fields",
                hint='e.g. expect_idn = "maker,model"',
            )
        out[role] = InstrumentConfig(
            role=role,
            resource=res,
            profile=prof,
            expect_idn=idn,
            timeout_ms=_int(
                t.get("timeout_ms", timeout_ms),
                1,
                path,
                f"{loc}.timeout_ms",
                _TIMEOUT_HINT,
                MAX_TIMEOUT_MS,
            ),
            retries=_int(
                t.get("retries", retries), 0, path, f"{loc}.retries", _RETRIES_HINT, MAX_RETRIES
            ),
        )
    return StationConfig(
        name=name,
        instruments=MappingProxyType(out),
        visa_library=lib.strip(),
        timeout_ms=timeout_ms,
        retries=retries,
        path=path,
    )


def load_station(path: str | Path, search_dirs: Iterable[Path] | None = None) -> StationConfig:
    """Read and validate a station file (see README, "Stations and instrument profiles")."""
    p = Path(path)
    doc, _raw = read_toml(p, StationFileError)
    return station_from_dict(doc, str(p), base_dir=p.parent, search_dirs=search_dirs)
