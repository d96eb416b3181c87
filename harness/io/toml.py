"""Reading the project's TOML files at the edge, with errors that name the file and line.

The model and the analysis never read files; the layers above call these readers and
hand the parsed, validated objects down.  :class:`FieldReader` is the one walker of a parsed
document that every loader (board, fixture, station, profile) builds its checks on, so a
missing field or a typo is reported the same way whatever the file.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from harness.errors import InputFileError


def read_toml(
    path: str | Path, error: type[InputFileError] = InputFileError
) -> tuple[dict[str, Any], bytes]:
    """Read and parse a TOML file; returns (document, raw bytes).  Syntax errors keep
    tomllib's line and column."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise error(str(p), None, "file not found", hint="check the path") from None
    except IsADirectoryError:
        raise error(str(p), None, "is a folder, not a file") from None
    except OSError as exc:
        raise error(str(p), None, f"cannot read: {exc.strerror or exc}") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise error(
            str(p), f"byte {exc.start}", "not UTF-8 text", hint="save the file as UTF-8"
        ) from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise error(str(p), None, f"TOML syntax: {exc}", hint="fix the line named") from None
    except RecursionError:
        # tomllib parses nested arrays and inline tables recursively: a few hundred levels
        # exhaust Python's stack before any of our checks can run.
        raise error(
            str(p),
            None,
            "tables or arrays nested too deeply to read",
            hint=f"no stageproof file nests more than a few levels (limit {MAX_DEPTH})",
        ) from None
    where = _too_deep(doc)
    if where is not None:
        raise error(
            str(p),
            where,
            f"nested more than {MAX_DEPTH} levels deep",
            hint="no stageproof file nests more than a few levels: check the brackets",
        )
    return doc, raw


#: Deepest nesting of tables and arrays a project file may have (they use four at most).
MAX_DEPTH = 32


def _too_deep(doc: Any) -> str | None:
    """The dotted location where ``doc`` nests deeper than :data:`MAX_DEPTH`, or None.
    Walked with a stack of its own, so no depth can overflow Python's."""
    stack: list[tuple[Any, str, int]] = [(doc, "", 0)]
    while stack:
        node, where, depth = stack.pop()
        if depth > MAX_DEPTH:
            return where or None
        if isinstance(node, dict):
            stack.extend(
                (v, f"{where}.{k}" if where else str(k), depth + 1) for k, v in node.items()
            )
        elif isinstance(node, list):
            stack.extend((v, f"{where}[{i}]", depth + 1) for i, v in enumerate(node))
    return None


_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _toml_keys(text: str) -> list[str] | None:
    """The keys of a dotted TOML key (``a."b.c".d``); None when it is not one."""
    keys: list[str] = []
    rest = text.strip()
    while rest:
        if rest[0] in "\"'":
            end = rest.find(rest[0], 1)
            if end < 0:
                return None
            keys.append(rest[1:end])
            rest = rest[end + 1 :].lstrip()
        else:
            m = _BARE_KEY.match(rest)
            if not m:
                return None
            keys.append(m.group())
            rest = rest[m.end() :].lstrip()
        if rest.startswith("."):
            rest = rest[1:].lstrip()
        elif rest:
            return None
    return keys or None


class TomlLines:
    """The line on which each key of a TOML document is written, so an error can name it.

    tomllib gives values without positions; this scan of the text follows the table headers
    (``[a.b]``, ``[[a.b]]`` with its element count) and ``key = value`` lines and keys each
    by its path in the parsed document (``("channel", 0, "stage", 1, "rc")``).  Keys inside
    an inline table or a multi-line value are found at the line of the key that holds them.
    """

    def __init__(self, text: str) -> None:
        self.lines: dict[tuple[str | int, ...], int] = {}
        counts: dict[tuple[str | int, ...], int] = {}
        table: tuple[str | int, ...] = ()
        depth = 0  # open brackets/braces of a value continued on the next lines
        quote: str | None = None  # open multi-line string delimiter
        for number, line in enumerate(text.splitlines(), start=1):
            if quote is not None:
                if line.count(quote) % 2 == 1:
                    quote = None
                continue
            if depth > 0:
                depth = max(depth + _bracket_balance(line), 0)
                continue
            stripped = line.strip()
            if not stripped or stripped.startswith("#"):
                continue
            if stripped.startswith("[["):
                keys = _toml_keys(stripped[2 : stripped.find("]]")])
                if keys:
                    parent = self._resolve(tuple(keys[:-1]), counts)
                    arr = (*parent, keys[-1])
                    counts[arr] = counts.get(arr, -1) + 1
                    table = (*arr, counts[arr])
                    self.lines.setdefault(arr, number)
                    self.lines[table] = number
                continue
            if stripped.startswith("["):
                keys = _toml_keys(stripped[1 : stripped.find("]")])
                if keys:
                    table = self._resolve(tuple(keys), counts)
                    self.lines.setdefault(table, number)
                continue
            key_text, eq, value = _split_assignment(stripped)
            keys = _toml_keys(key_text) if eq else None
            if not keys:
                continue
            self.lines.setdefault((*table, *keys), number)
            for delim in ('"""', "'''"):
                if value.count(delim) % 2 == 1:
                    quote = delim
                    break
            else:
                depth = max(_bracket_balance(value), 0)

    @staticmethod
    def _resolve(
        keys: tuple[str, ...], counts: dict[tuple[str | int, ...], int]
    ) -> tuple[str | int, ...]:
        """A header's keys with the current element of every array of tables they pass."""
        path: tuple[str | int, ...] = ()
        for k in keys:
            path = (*path, k)
            if path in counts:
                path = (*path, counts[path])
        return path

    def line(self, path: tuple[str | int, ...]) -> int | None:
        """The line of ``path`` or of the nearest enclosing key that is written down."""
        for end in range(len(path), 0, -1):
            if path[:end] in self.lines:
                return self.lines[path[:end]]
        return None


def _split_assignment(line: str) -> tuple[str, str, str]:
    """``key = value`` split at the first ``=`` outside a quoted key."""
    quote = None
    for i, ch in enumerate(line):
        if quote:
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch == "=":
            return line[:i], "=", line[i + 1 :]
    return line, "", ""


def _bracket_balance(text: str) -> int:
    """Opened minus closed brackets and braces outside strings and comments."""
    balance, quote, i = 0, None, 0
    while i < len(text):
        ch = text[i]
        if quote:
            if ch == "\\" and quote == '"':
                i += 1
            elif ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch == "#":
            break
        elif ch in "[{":
            balance += 1
        elif ch in "]}":
            balance -= 1
        i += 1
    return balance


def document_paths(doc: Any) -> dict[int, tuple[str | int, ...]]:
    """The path of every table and array inside a parsed document, by object id, so a
    reader handed a sub-table can find where it is written (see :class:`TomlLines`)."""
    paths: dict[int, tuple[str | int, ...]] = {}

    def walk(obj: Any, path: tuple[str | int, ...]) -> None:
        if isinstance(obj, Mapping):
            paths[id(obj)] = path
            for k, v in obj.items():
                walk(v, (*path, k))
        elif isinstance(obj, list):
            paths[id(obj)] = path
            for i, v in enumerate(obj):
                walk(v, (*path, i))

    walk(doc, ())
    return paths


class FieldReader:
    """Walks a parsed TOML mapping; each complaint is the loader's ``error`` class (a subclass
    of InputFileError) naming the file, the dotted field (``channel[0].route``) and the fix.

    Loaders subclass it for their own field types (board components, switch routes) and keep
    their cross-field rules with their data.
    """

    #: How the hint that lists the allowed fields begins (each loader keeps its wording).
    allowed_hint = "allowed here"

    def __init__(
        self,
        path: str | None,
        error: type[InputFileError] = InputFileError,
        *,
        doc: Any = None,
        raw: bytes | None = None,
    ) -> None:
        self.path = path
        self.error = error
        self._doc = doc
        self._raw = raw
        self._lines: TomlLines | None = None
        self._paths: dict[int, tuple[str | int, ...]] = {}

    def line_of(self, data: Any, key: str | None = None) -> int | None:
        """The file line of ``data[key]`` (or of ``data``), when the text was given (the
        text is scanned on the first complaint only)."""
        if self._doc is None or self._raw is None:
            return None
        if self._lines is None:
            self._lines = TomlLines(self._raw.decode("utf-8", errors="replace"))
            self._paths = document_paths(self._doc)
        if id(data) not in self._paths:
            return None
        path = self._paths[id(data)]
        return self._lines.line((*path, key) if key is not None else path)

    def located(self, where: str, data: Any, key: str | None = None) -> str:
        """``where`` with its line, ``"channel.A.rc (line 42)"``, as the profile loader
        writes it; ``where`` alone when the line is unknown."""
        line = self.line_of(data, key)
        return f"{where} (line {line})" if line else where

    def fail(self, where: str | None, reason: str, hint: str | None = None) -> InputFileError:
        """The error to raise for ``where`` (the caller raises it, so the traceback ends there)."""
        return self.error(self.path, where, reason, hint=hint)

    @staticmethod
    def at(where: str, key: str) -> str:
        """Dotted location of ``key`` inside ``where`` (the top level is "")."""
        return f"{where}.{key}" if where else key

    def absent(self, key: str, where: str, default: Any, example: str) -> Any:
        """What a missing field stands for: its default, or an error saying what to add."""
        if default is None:
            raise self.fail(self.at(where, key), "missing field", hint=f"add {key} = {example}")
        return default

    def known(
        self,
        data: Mapping[str, Any],
        allowed: set[str],
        where: str,
        *,
        reason: str = "unknown field",
        hint: str | None = None,
    ) -> None:
        """Reject the first (sorted) field not in ``allowed``: a typo must not pass silently.
        ``reason`` may name the field as ``{key}``; ``hint`` replaces the list of allowed ones."""
        unknown = sorted(set(data) - allowed)
        if unknown:
            raise self.fail(
                self.at(where, unknown[0]),
                reason.format(key=unknown[0]),
                hint=hint or f"{self.allowed_hint}: {', '.join(sorted(allowed))}",
            )

    def table(
        self,
        data: Mapping[str, Any],
        key: str,
        *,
        required: bool = True,
        missing_at: str | None = None,
        wrong_hint: str = "write it as [{key}]",
    ) -> Mapping[str, Any]:
        """The top-level table ``key`` ({} when optional and absent).  A missing one is
        reported at ``missing_at`` (default: ``key``); ``wrong_hint`` "" gives no hint."""
        if key not in data:
            if required:
                raise self.fail(
                    key if missing_at is None else missing_at,
                    f"missing table [{key}]",
                    hint=f"add a [{key}] table",
                )
            return {}
        value = data[key]
        if not isinstance(value, Mapping):
            raise self.fail(key, "must be a table", hint=wrong_hint.format(key=key) or None)
        return value

    def tables(
        self, items: list[Any], key: str, *, wrong_hint: str = "write it as [[{key}]]"
    ) -> Iterator[tuple[str, Mapping[str, Any]]]:
        """(location, table) of each entry of the array of tables ``key`` (``[[key]]``)."""
        for i, item in enumerate(items):
            where = f"{key}[{i}]"
            if not isinstance(item, Mapping):
                raise self.fail(where, "must be a table", hint=wrong_hint.format(key=key) or None)
            yield where, item

    def text(
        self, data: Mapping[str, Any], key: str, where: str, default: str | None = None
    ) -> str:
        """A non-empty text, stripped."""
        if key not in data:
            return self.absent(key, where, default, '"..."')
        value = data[key]
        if not isinstance(value, str) or not value.strip():
            raise self.fail(self.at(where, key), "must be a non-empty text")
        return value.strip()

    def whole(
        self,
        data: Mapping[str, Any],
        key: str,
        where: str,
        default: int | None = None,
        *,
        low: int = 1,
        high: int,
    ) -> int:
        """A whole number from ``low`` to ``high`` (TOML booleans are not numbers)."""
        if key not in data:
            return self.absent(key, where, default, "<number>")
        value = data[key]
        loc = self.at(where, key)
        if not isinstance(value, int) or isinstance(value, bool):
            raise self.fail(loc, f"must be a whole number (got {value!r})")
        if not low <= value <= high:
            raise self.fail(loc, f"must be from {low} to {high} (got {value})")
        return value

    def number(
        self,
        data: Mapping[str, Any],
        key: str,
        where: str,
        default: float | None = None,
        *,
        low: float = 0.0,
        high: float = float("inf"),
        what: str = "value",
    ) -> float:
        """A plain number in (``low``, ``high``]; ``what`` names it in the complaint."""
        if key not in data:
            return self.absent(key, where, default, "<number>")
        value = data[key]
        loc = self.at(where, key)
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise self.fail(
                loc, f"must be a number (got {value!r})", hint="write plain SI numbers, e.g. 0.03"
            )
        v = float(value)
        if not (low < v <= high):
            raise self.fail(loc, f"{what} {v:g} is out of range ({low:g} .. {high:g})")
        return v
