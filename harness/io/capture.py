"""Reader for offline capture files: CSV with header ``time_s,input_v,output_v`` or ``.npz``
with arrays of those names.  Every fault is a CaptureFileError naming the file, the line
(or array) and the fix; the samples themselves are judged later by harness.measure."""

from __future__ import annotations

import csv
import io
import math
import zipfile
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from harness.errors import CaptureFileError

COLUMNS: tuple[str, ...] = ("time_s", "input_v", "output_v")
MIN_ROWS = 8


@dataclass(frozen=True, eq=False)
class Capture:
    path: str
    time_s: np.ndarray = field(repr=False)
    input_v: np.ndarray = field(repr=False)
    output_v: np.ndarray = field(repr=False)

    @property
    def n_samples(self) -> int:
        return int(self.time_s.size)


def read_capture(path: str | Path) -> Capture:
    """Read a capture by its extension (.csv or .npz)."""
    p = Path(path)
    if not p.exists():
        raise CaptureFileError(str(p), None, "no such file", hint="check the path")
    if p.is_dir():
        raise CaptureFileError(str(p), None, "is a directory, not a capture file")
    suffix = p.suffix.lower()
    if suffix == ".npz":
        return _read_npz(p)
    if suffix in (".csv", ".txt"):
        return _read_csv(p)
    raise CaptureFileError(
        str(p), None, f"unknown capture format {suffix!r}", hint="use .csv or .npz"
    )


def _finish(path: str, cols: dict[str, np.ndarray], where: str) -> Capture:
    lengths = {k: v.size for k, v in cols.items()}
    if len(set(lengths.values())) != 1:
        desc = ", ".join(f"{k}={n}" for k, n in lengths.items())
        raise CaptureFileError(path, where, f"arrays of different lengths ({desc})")
    n = next(iter(lengths.values()))
    if n < MIN_ROWS:
        raise CaptureFileError(
            path, where, f"only {n} samples; at least {MIN_ROWS} needed", hint="capture more"
        )
    return Capture(path, cols["time_s"], cols["input_v"], cols["output_v"])


def _npz_columns(p: Path, loaded: Any) -> dict[str, np.ndarray]:
    """The three named arrays of an open archive, checked."""
    with loaded as data:
        missing = [c for c in COLUMNS if c not in data.files]
        if missing:
            raise CaptureFileError(
                str(p),
                None,
                f"missing array(s) {', '.join(missing)} (found {', '.join(data.files) or 'none'})",
                hint=f"save arrays named {', '.join(COLUMNS)}",
            )
        cols = {}
        for c in COLUMNS:
            a = np.asarray(data[c])
            if a.ndim != 1 or a.dtype.kind not in "fiu":
                raise CaptureFileError(
                    str(p), f"array {c}", f"must be a 1-D numeric array, got {a.dtype}{a.shape}"
                )
            if not np.isfinite(a).all():
                i = int(np.flatnonzero(~np.isfinite(a))[0])
                raise CaptureFileError(str(p), f"array {c}[{i}]", f"value {a[i]} is not finite")
            cols[c] = a.astype(np.float32 if a.dtype == np.float32 else np.float64)
    return cols


def _read_npz(p: Path) -> Capture:
    try:
        # our own handle: numpy leaves the file open when the archive turns out broken
        with p.open("rb") as fh:
            loaded = np.load(fh, allow_pickle=False)
            if not isinstance(loaded, np.lib.npyio.NpzFile):  # a bare .npy array
                raise CaptureFileError(
                    str(p),
                    None,
                    "a single .npy array, not an .npz archive of named arrays",
                    hint=f"save with numpy.savez(path, {', '.join(f'{c}=...' for c in COLUMNS)})",
                )
            cols = _npz_columns(p, loaded)
    except CaptureFileError:
        raise
    except (
        OSError,
        ValueError,
        EOFError,
        zipfile.BadZipFile,
        NotImplementedError,
        zlib.error,
    ) as exc:
        raise CaptureFileError(str(p), None, f"not a readable .npz file ({exc})") from None
    return _finish(str(p), cols, "arrays")


def _read_csv(p: Path) -> Capture:
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise CaptureFileError(str(p), None, f"cannot read ({exc})") from None
    lines = text.splitlines()
    head_no = next((i for i, ln in enumerate(lines) if ln.strip() and not ln.startswith("#")), None)
    if head_no is None:
        raise CaptureFileError(str(p), None, "file is empty", hint=f"header {','.join(COLUMNS)}")
    header = [h.strip() for h in next(csv.reader([lines[head_no]]))]
    missing = [c for c in COLUMNS if c not in header]
    if missing:
        raise CaptureFileError(
            str(p),
            f"line {head_no + 1}",
            f"header {','.join(header)!r} lacks {', '.join(missing)}",
            hint=f"first line must be {','.join(COLUMNS)}",
        )
    idx = [header.index(c) for c in COLUMNS]
    if not any(ln.strip() and not ln.lstrip().startswith("#") for ln in lines[head_no + 1 :]):
        raise CaptureFileError(str(p), None, "no data rows after the header")
    body = "\n".join(lines[head_no + 1 :])
    try:
        arr = np.loadtxt(
            io.StringIO(body), delimiter=",", comments="#", usecols=idx, ndmin=2, dtype=np.float64
        )
    except ValueError:
        _locate_bad_line(p, lines, head_no, header, idx)
        raise  # pragma: no cover - _locate_bad_line always raises
    if arr.size == 0:
        raise CaptureFileError(str(p), None, "no data rows after the header")
    cols = {c: np.ascontiguousarray(arr[:, j]) for j, c in enumerate(COLUMNS)}
    for c, a in cols.items():
        if not np.isfinite(a).all():
            row = int(np.flatnonzero(~np.isfinite(a))[0])
            line = _data_line_number(lines, head_no, row)
            raise CaptureFileError(
                str(p), f"line {line}, column {c}", f"value {a[row]} is not finite (NaN/inf)"
            )
    return _finish(str(p), cols, "columns")


def _data_line_number(lines: list[str], head_no: int, row: int) -> int:
    seen = -1
    for i in range(head_no + 1, len(lines)):
        s = lines[i].strip()
        if s and not s.startswith("#"):
            seen += 1
            if seen == row:
                return i + 1
    return len(lines)


def _locate_bad_line(
    p: Path, lines: list[str], head_no: int, header: list[str], idx: list[int]
) -> None:
    """Slow path, only after a parse failure: find the first bad line and say what is wrong."""
    for i in range(head_no + 1, len(lines)):
        s = lines[i].strip()
        if not s or s.startswith("#"):
            continue
        fields = next(csv.reader([lines[i]]))
        if len(fields) < len(header):
            raise CaptureFileError(
                str(p), f"line {i + 1}", f"{len(fields)} fields where the header has {len(header)}"
            )
        for c, j in zip(COLUMNS, idx, strict=True):
            try:
                v = float(fields[j])
            except ValueError:
                raise CaptureFileError(
                    str(p), f"line {i + 1}, column {c}", f"{fields[j].strip()!r} is not a number"
                ) from None
            if not math.isfinite(v):
                raise CaptureFileError(
                    str(p), f"line {i + 1}, column {c}", f"value {v} is not finite (NaN/inf)"
                )
    raise CaptureFileError(str(p), None, "cannot parse the data rows")


def write_capture_csv(path: str | Path, time_s, input_v, output_v) -> None:
    """Write a capture CSV (used by tests and by users preparing offline data)."""
    arr = np.column_stack([time_s, input_v, output_v])
    np.savetxt(path, arr, delimiter=",", header=",".join(COLUMNS), comments="", fmt="%.12g")
