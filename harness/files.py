"""Reading the project's TOML files at the edge, with errors that name the file and line.

The model and the analysis never read files; the layers above call these readers and
hand the parsed, validated objects down.
"""

from __future__ import annotations

import tomllib
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
