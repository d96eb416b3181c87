"""Reader for offline capture files: CSV with header ``time_s,input_v,output_v`` or ``.npz``
with arrays of those names.  Every fault is a CaptureFileError naming the file, the line
(or array) and the fix; the samples themselves are judged later by harness.measure."""

from __future__ import annotations

import csv
import math
import warnings
import zipfile
import zlib
from collections.abc import Iterator
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


#: Most an .npz member may expand over its share of the file.  Real captures are noisy
#: floating-point samples that deflate hardly at all (ratio about 1; np.savez stores them
#: uncompressed); a member that claims 50 times the file's size is a corrupt or hostile
#: header, refused before anything of that size is allocated.
NPZ_MAX_EXPANSION = 50
NPY_MAGIC = b"\x93NUMPY"  # the .npy format's magic string (numpy.lib.format)


def _npy_header(member: Any) -> tuple[tuple[int, ...], np.dtype]:
    """Shape and dtype from the header of an .npy stream (numpy.lib.format), no data read."""
    fmt = np.lib.format
    version = fmt.read_magic(member)
    if version == (1, 0):
        shape, _fortran, dtype = fmt.read_array_header_1_0(member)
    elif version == (2, 0):
        shape, _fortran, dtype = fmt.read_array_header_2_0(member)
    else:
        raise ValueError(f".npy format version {version} is not supported")
    return tuple(int(d) for d in shape), np.dtype(dtype)


def _npz_columns(p: Path, zf: zipfile.ZipFile) -> dict[str, np.ndarray]:
    """The three named arrays of an open archive, each header checked against the bytes the
    archive holds and the memory budget before its data is read."""
    from harness.errors import MemoryBudgetError
    from harness.io.memory import memory_budget_bytes

    members = {n[:-4]: n for n in zf.namelist() if n.endswith(".npy")}
    missing = [c for c in COLUMNS if c not in members]
    if missing:
        raise CaptureFileError(
            str(p),
            None,
            f"missing array(s) {', '.join(missing)} (found {', '.join(members) or 'none'})",
            hint=f"save arrays named {', '.join(COLUMNS)}",
        )
    file_size = p.stat().st_size
    budget = memory_budget_bytes()
    total = 0
    for c in COLUMNS:
        info = zf.getinfo(members[c])
        with zf.open(info) as member:
            shape, dtype = _npy_header(member)
        claimed = math.prod(shape) * dtype.itemsize
        if dtype.hasobject or dtype.kind not in "fiu" or len(shape) != 1:
            raise CaptureFileError(
                str(p), f"array {c}", f"must be a 1-D numeric array, got {dtype}{shape}"
            )
        if claimed > info.file_size:
            raise CaptureFileError(
                str(p),
                f"array {c}",
                f"header claims {shape[0]} samples ({claimed} bytes) but the archive holds "
                f"{info.file_size} bytes for it",
                hint="the file is damaged: save the capture again",
            )
        if info.file_size > NPZ_MAX_EXPANSION * max(file_size, 1 << 20):
            raise CaptureFileError(
                str(p),
                f"array {c}",
                f"claims {info.file_size} bytes from a file of {file_size}: more than "
                f"{NPZ_MAX_EXPANSION} times its size",
                hint="the file is damaged or not a capture: save it with numpy.savez",
            )
        total += claimed
        if total > budget:
            raise MemoryBudgetError(
                str(p),
                f"the arrays need {total} bytes, {budget} may be used here",
                needed=total,
                available=budget,
                hint="analyse a shorter capture",
            )
    cols = {}
    for c in COLUMNS:
        with zf.open(members[c]) as member:
            a = np.lib.format.read_array(member, allow_pickle=False)
        if a.ndim != 1 or a.dtype.kind not in "fiu":
            raise CaptureFileError(
                str(p), f"array {c}", f"must be a 1-D numeric array, got {a.dtype}{a.shape}"
            )
        if not np.isfinite(a).all():
            i = int(np.flatnonzero(~np.isfinite(a))[0])
            raise CaptureFileError(str(p), f"array {c}[{i}]", f"value {a[i]} is not finite")
        cols[c] = a.astype(np.float32 if a.dtype == np.float32 else np.float64, copy=False)
    return cols


def _read_npz(p: Path) -> Capture:
    try:
        with p.open("rb") as fh:
            if fh.read(len(NPY_MAGIC)) == NPY_MAGIC:
                raise CaptureFileError(
                    str(p),
                    None,
                    "a single .npy array, not an .npz archive of named arrays",
                    hint=f"save with numpy.savez(path, {', '.join(f'{c}=...' for c in COLUMNS)})",
                )
            fh.seek(0)
            with zipfile.ZipFile(fh) as zf:
                cols = _npz_columns(p, zf)
    except CaptureFileError:
        raise
    except (
        OSError,
        ValueError,
        EOFError,
        KeyError,
        zipfile.BadZipFile,
        NotImplementedError,
        zlib.error,
    ) as exc:
        raise CaptureFileError(str(p), None, f"not a readable .npz file ({exc})") from None
    return _finish(str(p), cols, "arrays")


def _read_csv(p: Path) -> Capture:
    """Stream the file: the header is read line by line and the rows go straight from the
    open file into numpy's parser, so the memory needed is the arrays' (24 bytes a row)
    plus a chunk, not several copies of the text (reading it whole, splitting it into
    lines and joining them again took about ten times the file's size)."""
    try:
        fh = p.open(encoding="utf-8-sig")
    except OSError as exc:
        raise CaptureFileError(str(p), None, f"cannot read ({exc})") from None
    with fh:
        try:
            head_no, header = _csv_header(fh)
            if head_no is None:
                raise CaptureFileError(
                    str(p), None, "file is empty", hint=f"header {','.join(COLUMNS)}"
                )
            missing = [c for c in COLUMNS if c not in header]
            if missing:
                raise CaptureFileError(
                    str(p),
                    f"line {head_no + 1}",
                    f"header {','.join(header)!r} lacks {', '.join(missing)}",
                    hint=f"first line must be {','.join(COLUMNS)}",
                )
            idx = [header.index(c) for c in COLUMNS]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
                arr = np.loadtxt(
                    fh, delimiter=",", comments="#", usecols=idx, ndmin=2, dtype=np.float64
                )
        except CaptureFileError:
            raise
        except UnicodeDecodeError as exc:
            raise CaptureFileError(str(p), None, f"cannot read ({exc})") from None
        except ValueError:
            _locate_bad_line(p, head_no, header, idx)
            raise  # pragma: no cover - _locate_bad_line always raises
    if arr.size == 0:
        raise CaptureFileError(str(p), None, "no data rows after the header")
    cols = dict(zip(COLUMNS, np.ascontiguousarray(arr.T), strict=True))
    del arr
    for c, a in cols.items():
        if not np.isfinite(a).all():
            row = int(np.flatnonzero(~np.isfinite(a))[0])
            line = _data_line_number(p, head_no, row)
            raise CaptureFileError(
                str(p), f"line {line}, column {c}", f"value {a[row]} is not finite (NaN/inf)"
            )
    return _finish(str(p), cols, "columns")


def _csv_header(fh: Any) -> tuple[int | None, list[str]]:
    """(0-based line number, fields) of the first line that is neither blank nor a comment;
    the file is left positioned after it."""
    i = 0
    while True:
        line = fh.readline()
        if line == "":
            return None, []
        if line.strip() and not line.startswith("#"):
            return i, [h.strip() for h in next(csv.reader([line]))]
        i += 1


def _data_lines(p: Path, head_no: int) -> Iterator[tuple[int, str]]:
    """(1-based line number, text) of every data row after the header, streamed."""
    with p.open(encoding="utf-8-sig") as fh:
        for i, line in enumerate(fh):
            s = line.strip()
            if i > head_no and s and not s.startswith("#"):
                yield i + 1, line


def _data_line_number(p: Path, head_no: int, row: int) -> int:
    last = head_no + 1
    for seen, (number, _line) in enumerate(_data_lines(p, head_no)):
        last = number
        if seen == row:
            return number
    return last


def _locate_bad_line(p: Path, head_no: int | None, header: list[str], idx: list[int]) -> None:
    """Slow path, only after a parse failure: find the first bad line and say what is wrong."""
    for number, line in _data_lines(p, head_no or 0):
        fields = next(csv.reader([line]))
        if len(fields) < len(header):
            raise CaptureFileError(
                str(p), f"line {number}", f"{len(fields)} fields where the header has {len(header)}"
            )
        for c, j in zip(COLUMNS, idx, strict=True):
            try:
                v = float(fields[j])
            except ValueError:
                raise CaptureFileError(
                    str(p), f"line {number}, column {c}", f"{fields[j].strip()!r} is not a number"
                ) from None
            if not math.isfinite(v):
                raise CaptureFileError(
                    str(p), f"line {number}, column {c}", f"value {v} is not finite (NaN/inf)"
                )
    raise CaptureFileError(str(p), None, "cannot parse the data rows")


def write_capture_csv(path: str | Path, time_s, input_v, output_v) -> None:
    """Write a capture CSV (used by tests and by users preparing offline data)."""
    arr = np.column_stack([time_s, input_v, output_v])
    np.savetxt(path, arr, delimiter=",", header=",".join(COLUMNS), comments="", fmt="%.12g")
