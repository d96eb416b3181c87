"""Reading the project's TOML files at the edge, with errors that name the file and line.

The model and the analysis never read files; the layers above call these readers and
hand the parsed, validated objects down.  :class:`FieldReader` is the one walker of a parsed
document that every loader (board, fixture, station, profile) builds its checks on, so a
missing field or a typo is reported the same way whatever the file.
"""

from __future__ import annotations

import tomllib
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from harness.errors import BoardFileError, InputFileError


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
        return tomllib.loads(text), raw
    except tomllib.TOMLDecodeError as exc:
        raise error(str(p), None, f"TOML syntax: {exc}", hint="fix the line named") from None


class FieldReader:
    """Walks a parsed TOML mapping; each complaint is the loader's ``error`` class (a subclass
    of InputFileError) naming the file, the dotted field (``channel[0].route``) and the fix.

    Loaders subclass it for their own field types (board components, switch routes) and keep
    their cross-field rules with their data.
    """

    #: How the hint that lists the allowed fields begins (each loader keeps its wording).
    allowed_hint = "allowed here"

    def __init__(self, path: str | None, error: type[InputFileError] = InputFileError) -> None:
        self.path = path
        self.error = error

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


def load_board(path: str | Path, *, validate: bool = True):
    """Read and validate a board description (see README, "Board files").

    With ``validate`` the nominal design is checked too (each transistor active at rest, each
    channel able to drive its load), so an unworkable board fails here with the file and field.
    """
    from harness.model.board import board_from_dict

    doc, raw = read_toml(path, BoardFileError)
    board = board_from_dict(doc, str(path), raw)
    if validate:
        from harness.model import validate_board

        validate_board(board)
    return board
