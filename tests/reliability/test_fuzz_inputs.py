"""Fuzzing every reader of outside input: only the project's typed errors may escape.

Targets: the SCPI reply parsers and the definite-length block parser (bytes from an
instrument), the fixture, station and profile loaders and the capture-file reader (files
edited by hand).  Method: property-based testing (hypothesis): raw bytes, and mutations of
the shipped example files (delete a field, replace a value with junk).  Whatever comes in,
the reader returns a value or raises an StageproofError subclass (harness.errors); never
another exception.  Block parsing is checked against IEEE 488.2 §8.7.9 (definite length
``#<n><count><bytes>``): whenever it returns, the payload is exactly ``count`` bytes and
``consumed`` is header plus payload.  Each target runs FUZZ_CASES generated cases (README).
The readers are pure parsing of bounded input, so a per-example deadline is the hang guard.
"""

from __future__ import annotations

import copy
import math
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from harness.errors import StageproofError
from harness.instruments import scpi
from harness.io.profiles import PREAMBLE_FIELDS
from tests.reliability.rig import REPO, scaled, write_rig

pytestmark = pytest.mark.reliability

#: Generated cases per target (README "Reliability").
FUZZ_CASES = scaled(300, 5000)
#: Per-example hang guard: any single parse taking this long fails the test.
DEADLINE_MS = 2000

_SETTINGS = settings(
    max_examples=FUZZ_CASES,
    deadline=DEADLINE_MS,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)

junk = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(
        [
            "",
            " ",
            "TCPIP::127.0.0.1::0::SOCKET",
            "{input}",
            "{",
            "}",
            "{0}",
            "scpi-scope",
            "../../etc/passwd",
            "high_z",
            "int8",
            "vpp",
            "ON",
        ]
    ),
    st.lists(st.one_of(st.integers(-5, 10**6), st.floats(), st.text(max_size=3)), max_size=4),
    st.dictionaries(st.text(max_size=6), st.one_of(st.integers(), st.text(max_size=4)), max_size=3),
)


def _paths(doc: Any, prefix: tuple = ()) -> list[tuple]:
    out = [prefix] if prefix else []
    if isinstance(doc, dict):
        for k, v in doc.items():
            out += _paths(v, (*prefix, k))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            out += _paths(v, (*prefix, i))
    return out


def _mutated(doc: dict, data: st.DataObject) -> dict:
    doc = copy.deepcopy(doc)
    for _ in range(data.draw(st.integers(1, 3))):
        paths = _paths(doc)
        if not paths:
            break
        path = data.draw(st.sampled_from(paths))
        node: Any = doc
        try:
            for key in path[:-1]:
                node = node[key]
            if data.draw(st.booleans()):
                del node[path[-1]]
            else:
                node[path[-1]] = data.draw(junk)
        except (KeyError, IndexError, TypeError):
            break
    return doc


def _typed_only(fn: Any, *args: Any, **kw: Any) -> Any:
    """Call a reader: a value or an StageproofError is fine, anything else fails."""
    try:
        return fn(*args, **kw)
    except StageproofError as exc:
        assert str(exc)
        return exc


# --- bytes from an instrument ---------------------------------------------------------------


@pytest.mark.parametrize(
    "parser",
    [
        scpi.parse_error_reply,
        scpi.parse_idn,
        scpi.parse_number,
        scpi.parse_bool,
        scpi.parse_ascii_values,
    ],
    ids=lambda f: f.__name__,
)
@_SETTINGS
@given(
    raw=st.one_of(st.text(max_size=60), st.binary(max_size=60).map(lambda b: b.decode("latin-1")))
)
def test_scpi_text_replies(parser: Any, raw: str) -> None:
    out = _typed_only(parser, raw)
    if parser is scpi.parse_number and isinstance(out, float) and not math.isnan(out):
        assert math.isinf(out) or math.isfinite(out)


_preamble_field = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-(2**40), 2**40).map(str),
    st.sampled_from(["", " ", "BYTE", "9.91E37", "-9.9E37", '"1E-3"', "1e", "0", "-0.0", "nan"]),
    st.text(max_size=6),
)


@_SETTINGS
@given(
    fields=st.lists(_preamble_field, max_size=9).map(",".join)
    | st.text(max_size=80)
    | st.binary(max_size=60).map(lambda b: b.decode("latin-1")),
    positions=st.dictionaries(
        st.sampled_from(PREAMBLE_FIELDS),
        st.integers(0, 10),
        max_size=6,
    ),
)
def test_preamble_parser(fields: str, positions: dict[str, int]) -> None:
    """A preamble either parses into finite numbers for every named field (increments
    positive, points a whole count) or raises the project's MalformedReply."""
    out = _typed_only(scpi.parse_preamble, fields, positions)
    if isinstance(out, dict):
        assert set(out) == set(positions)
        assert all(math.isfinite(v) for v in out.values())
        for k in ("x_increment", "y_increment"):
            assert k not in out or out[k] > 0


_block_like = st.one_of(
    st.binary(max_size=80),
    st.builds(
        lambda n, digits, body: b"#" + n + digits + body,
        st.sampled_from([b"0", b"1", b"2", b"9", b"a", b""]),
        st.binary(max_size=10),
        st.binary(max_size=60),
    ),
    st.builds(
        lambda body, cut: scpi.encode_block(body)[:cut], st.binary(max_size=60), st.integers(0, 80)
    ),
)


@_SETTINGS
@given(raw=_block_like)
def test_block_parser(raw: bytes) -> None:
    """IEEE 488.2 §8.7.9: returned payloads are exactly the promised length."""
    out = _typed_only(scpi.parse_block, raw)
    if isinstance(out, tuple):
        payload, consumed = out
        header_len, count = scpi.parse_block_header(raw)
        assert len(payload) == count and consumed == header_len + count <= len(raw)
        for dt in scpi.DATATYPES:
            values = _typed_only(scpi.decode_values, payload, dt)
            if isinstance(values, np.ndarray):
                assert values.size * values.itemsize == len(payload)


# --- files edited by hand -------------------------------------------------------------------


@pytest.fixture(scope="module")
def rig_files(tmp_path_factory: pytest.TempPathFactory) -> Any:
    return write_rig(tmp_path_factory.mktemp("fuzzrig"))


def _write_toml(path: Path, doc: Any) -> None:
    path.write_text(_to_toml(doc))


def _to_toml(doc: dict, prefix: str = "") -> str:
    """A small TOML writer for the mutated documents (inline tables and arrays)."""
    lines: list[str] = []
    tables: list[tuple[str, Any]] = []
    for k, v in doc.items():
        is_tables = isinstance(v, list) and v and all(isinstance(x, dict) for x in v)
        if isinstance(v, dict) or is_tables:
            tables.append((k, v))
        else:
            lines.append(f"{_key(k)} = {_val(v)}")
    for k, v in tables:
        name = f"{prefix}{_key(k)}"
        if isinstance(v, dict):
            lines.append(f"\n[{name}]")
            lines.append(_to_toml(v, name + "."))
        else:
            for item in v:
                lines.append(f"\n[[{name}]]")
                lines.append(_to_toml(item, name + "."))
    return "\n".join(lines)


def _key(k: Any) -> str:
    return '"' + str(k).replace("\\", "\\\\").replace('"', '\\"') + '"'


def _val(v: Any) -> str:
    if v is None:
        return '""'
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return (
            "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf") if math.isinf(v) else repr(v)
        )
    if isinstance(v, str):
        return '"' + v.encode("unicode_escape").decode("ascii").replace('"', '\\"') + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_val(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_key(k)} = {_val(x)}" for k, x in v.items()) + "}"
    return '""'


def _load_or_error(path: Path, loader: Any, *args: Any) -> Any:
    return _typed_only(loader, path, *args)


@_SETTINGS
@given(data=st.data())
def test_mutated_fixture_file(rig_files: Any, tmp_path: Path, data: st.DataObject) -> None:
    from harness.io.board import load_board
    from harness.io.fixture import load_fixture

    board = load_board(rig_files.board)
    doc = tomllib.loads(rig_files.fixture.read_text())
    path = tmp_path / "fixture.toml"
    _write_toml(path, _mutated(doc, data))
    _load_or_error(path, load_fixture, board)


@_SETTINGS
@given(data=st.data())
def test_mutated_station_file(tmp_path: Path, data: st.DataObject) -> None:
    from harness.io.station import load_station

    doc = tomllib.loads((REPO / "fixtures" / "station-sim.toml").read_text())
    path = tmp_path / "station.toml"
    _write_toml(path, _mutated(doc, data))
    _load_or_error(path, load_station)


@pytest.mark.parametrize(
    "role",
    ["scpi-generator", "scpi-scope", "scpi-supply", "benchtop-generator", "benchtop-scope"],
)
@_SETTINGS
@given(data=st.data())
def test_mutated_profile(role: str, tmp_path: Path, data: st.DataObject) -> None:
    from harness.io.profiles import load_profile

    src = REPO / "fixtures" / "instruments" / f"{role}.toml"
    doc = tomllib.loads(src.read_text())
    path = tmp_path / f"p-{role}.toml"
    _write_toml(path, _mutated(doc, data))
    _load_or_error(path, load_profile)


@pytest.mark.parametrize("name", ["fixture.toml", "station.toml", "profile.toml"])
@_SETTINGS
@given(raw=st.binary(max_size=300))
def test_random_bytes_as_config(name: str, rig_files: Any, tmp_path: Path, raw: bytes) -> None:
    from harness.io.board import load_board
    from harness.io.fixture import load_fixture
    from harness.io.profiles import load_profile
    from harness.io.station import load_station

    path = tmp_path / name
    path.write_bytes(raw)
    if name == "fixture.toml":
        _load_or_error(path, load_fixture, load_board(rig_files.board))
    elif name == "station.toml":
        _load_or_error(path, load_station)
    else:
        _load_or_error(path, load_profile)


_csv_lines = st.lists(
    st.one_of(
        st.builds(
            lambda a, b, c: f"{a},{b},{c}",
            *[
                st.one_of(
                    st.floats(allow_nan=True, allow_infinity=True),
                    st.integers(),
                    st.sampled_from(["", "x", "1e999", "nan", '"1"', "1,2", " "]),
                )
            ]
            * 3,
        ),
        st.text(max_size=30),
        st.sampled_from(
            ["time_s,input_v,output_v", "# comment", "", "time_s,input_v", "\x00", "\r", "1,2,3,4"]
        ),
    ),
    max_size=40,
)


@_SETTINGS
@given(header=st.booleans(), lines=_csv_lines)
def test_capture_csv(tmp_path: Path, header: bool, lines: list[str]) -> None:
    from harness.io.capture import read_capture

    path = tmp_path / "cap.csv"
    body = ("time_s,input_v,output_v\n" if header else "") + "\n".join(lines)
    path.write_text(body, encoding="utf-8", errors="surrogatepass")
    out = _typed_only(read_capture, path)
    if not isinstance(out, StageproofError):
        assert out.time_s.size == out.input_v.size == out.output_v.size >= 8
        assert np.isfinite(out.output_v).all()


def _npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    import io

    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


@_SETTINGS
@given(
    kind=st.sampled_from(["valid", "truncated", "flipped", "npy", "random", "shapes"]),
    n=st.integers(0, 40),
    cut=st.integers(0, 2000),
    seed=st.integers(0, 2**32 - 1),
)
def test_capture_npz(tmp_path: Path, kind: str, n: int, cut: int, seed: int) -> None:
    from harness.io.capture import read_capture

    rng = np.random.default_rng(seed)
    arrays = {c: rng.normal(size=n) for c in ("time_s", "input_v", "output_v")}
    if kind == "shapes":
        arrays["output_v"] = rng.normal(size=(n, 2))
    raw = _npz_bytes(arrays)
    if kind == "truncated":
        raw = raw[: cut % max(len(raw), 1)]
    elif kind == "flipped" and raw:
        b = bytearray(raw)
        for i in rng.integers(0, len(b), size=4):
            b[i] ^= 0xFF
        raw = bytes(b)
    elif kind == "npy":
        import io

        buf = io.BytesIO()
        np.save(buf, rng.normal(size=n))
        raw = buf.getvalue()
    elif kind == "random":
        raw = rng.bytes(cut % 300)
    path = tmp_path / "cap.npz"
    path.write_bytes(raw)
    _typed_only(read_capture, path)
