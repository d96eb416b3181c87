"""Memory: every input that says how big it is gets checked before anything that size is
allocated, and captures are read without multiplying their size.

Cases from the field: ``limits --samples 1000000000`` took 24 GB and was killed; the board
file's own maximum (1e7 boards) ran past 300 s and 8.7 GB; ``analyze`` needed about ten
times a CSV's size; a 7 MB ``.npz`` claiming 7.2 GB reached 4.8 GB; a scope block header
claiming about a gigabyte was read in full while the harness expected 20,000 points.

Memory is measured with the standard library's tracemalloc (numpy registers its array
buffers with it), with bounds generous enough for any machine: the point is "megabytes, not
gigabytes".  No timing is asserted.  Formats: .npy headers as numpy.lib.format writes them
(magic, version, a dict with descr/fortran_order/shape); zip members as the zipfile module
(PKWARE APPNOTE) stores them; definite-length blocks as IEEE 488.2 §8.7.9.
"""

from __future__ import annotations

import os
import tracemalloc
import zipfile
from pathlib import Path

import numpy as np
import pytest

from harness.cli.main import main
from harness.errors import BoardFileError, CaptureFileError, MalformedReply, MemoryBudgetError
from harness.instruments.session import Session, resource_manager
from harness.io.board import load_board
from harness.io.capture import read_capture, write_capture_csv
from harness.io.profiles import load_profile
from harness.model import compute_limits
from harness.model.board import MAX_SAMPLES
from harness.model.limits import limits_memory_bytes
from harness.run.runner import check_limits_memory
from tests.instruments.fakeinst import FakeInstrument

pytestmark = pytest.mark.reliability

REPO = Path(__file__).resolve().parents[2]
BOARD = REPO / "limits" / "demo-twin-preamp.toml"
MB = 1 << 20


class Peak:
    """Peak traced allocation inside the block, in bytes."""

    def __enter__(self) -> Peak:
        tracemalloc.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.bytes = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()


def test_limits_samples_beyond_memory_are_refused_in_one_line(capsys) -> None:
    with Peak() as peak:
        code = main(["limits", str(BOARD), "--samples", "1000000000"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert "--samples: 1000000000 Monte Carlo boards need about" in err[0]
    assert "boards or fewer" in err[0]
    assert peak.bytes < 64 * MB


def test_the_memory_estimate_bounds_the_measured_peak() -> None:
    """The estimate the refusal rests on is an upper bound of what the Monte Carlo really
    takes (tracemalloc peak), and a lower budget refuses with the count that fits."""
    board = load_board(BOARD)
    n = 50_000
    with Peak() as peak:
        compute_limits(board, samples=n)
    estimate = limits_memory_bytes(board, n)
    print(f"{n} boards: peak {peak.bytes / MB:.1f} MiB, estimate {estimate / MB:.1f} MiB")
    assert peak.bytes <= estimate
    with pytest.raises(MemoryBudgetError, match="use 1000 boards or fewer"):
        check_limits_memory(board, n, budget=limits_memory_bytes(board, 1500))


def test_board_file_maximum_is_lowered_and_fits(tmp_path) -> None:
    """10,000,000 boards in the file is refused at load (file, field, line); the new maximum
    is estimated at about a gigabyte."""
    text = BOARD.read_text()
    assert "samples = 20000" in text
    path = tmp_path / "big.toml"
    path.write_text(text.replace("samples = 20000", "samples = 10000000", 1))
    with pytest.raises(BoardFileError) as info:
        load_board(path)
    line = next(i for i, s in enumerate(path.read_text().splitlines(), 1) if "10000000" in s)
    assert f"limits.samples (line {line}): must be a whole number from 100 to {MAX_SAMPLES}" in (
        str(info.value)
    )
    assert limits_memory_bytes(load_board(BOARD), MAX_SAMPLES) < 2 * 1024 * MB


def test_csv_capture_is_read_without_multiplying_its_size(tmp_path) -> None:
    """400,000 rows (about 15 MB of text): the reader's peak stays under three times the
    file (it was about nine times: text, lines, joined body, a StringIO copy)."""
    n = 400_000
    t = np.arange(n) / 100_000.0
    x = np.sin(2 * np.pi * 1000.0 * t)
    path = tmp_path / "big.csv"
    write_capture_csv(path, t, x, -10.0 * x)
    size = os.path.getsize(path)
    with Peak() as peak:
        cap = read_capture(path)
    print(f"CSV {size / MB:.1f} MiB read with a peak of {peak.bytes / MB:.1f} MiB")
    assert cap.n_samples == n and cap.output_v[n // 4] == pytest.approx(-10.0 * x[n // 4])
    assert peak.bytes < 3 * size


def _npy_header(shape: tuple[int, ...], dtype: str = "<f8") -> bytes:
    """An .npy version 1.0 header (numpy.lib.format: magic, version, little-endian length,
    the dict padded with spaces to a multiple of 64 and ending in LF)."""
    d = f"{{'descr': '{dtype}', 'fortran_order': False, 'shape': {shape}, }}"
    pad = 64 - (10 + len(d) + 1) % 64
    body = (d + " " * pad + "\n").encode("latin1")
    return b"\x93NUMPY\x01\x00" + len(body).to_bytes(2, "little") + body


def _write_npz(path: Path, claimed: int, data: bytes, compress: int = zipfile.ZIP_STORED):
    ok = np.zeros(16)
    with zipfile.ZipFile(path, "w", compression=compress) as zf:
        zf.writestr("time_s.npy", _npy_header((claimed,)) + data)
        for name in ("input_v", "output_v"):
            with zf.open(f"{name}.npy", "w") as fh:
                np.lib.format.write_array(fh, ok)


def test_npz_whose_header_claims_more_than_it_holds_is_refused(tmp_path, capsys) -> None:
    """A 1 MB member whose header claims 1e9 float64 samples (8 GB)."""
    path = tmp_path / "liar.npz"
    _write_npz(path, 1_000_000_000, b"\0" * MB)
    with Peak() as peak, pytest.raises(CaptureFileError, match="header claims 1000000000"):
        read_capture(path)
    assert peak.bytes < 16 * MB
    assert main(["analyze", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "array time_s" in err[0]


def test_npz_that_would_expand_far_beyond_its_file_is_refused(tmp_path) -> None:
    """Zeros deflate about 1000:1 (zlib, RFC 1951): a consistent member of 50 million
    float64 (400 MB) in a file under 1 MB.  Refused from the zip directory and the .npy
    header, before the 400 MB are allocated."""
    n = 50_000_000
    path = tmp_path / "bomb.npz"
    chunk = bytes(8 * MB)
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        with zf.open("time_s.npy", "w", force_zip64=True) as fh:
            fh.write(_npy_header((n,)))
            left = 8 * n
            while left:
                part = chunk[: min(left, len(chunk))]
                fh.write(part)
                left -= len(part)
        for name in ("input_v", "output_v"):
            with zf.open(f"{name}.npy", "w") as fh:
                np.lib.format.write_array(fh, np.zeros(16))
    assert os.path.getsize(path) < 2 * MB
    with Peak() as peak, pytest.raises(CaptureFileError, match="more than 50 times its size"):
        read_capture(path)
    assert peak.bytes < 16 * MB


def test_scope_block_longer_than_expected_is_refused_unread() -> None:
    """A fetch answered with a valid 40 MB block when 20,000 int8 points are expected: the
    header's count is refused before the payload is read; the session resynchronises."""
    claimed = 40 * MB
    reply = f"#8{claimed}".encode() + bytes(claimed) + b"\n"
    fake = FakeInstrument().start()
    try:
        fake.replies["FETCh:ARRay:VOLTage? (@1)"] = reply
        fake.replies["VALUE?"] = "7"
        rm = resource_manager("@py")
        with Session(fake.resource, load_profile("scpi-scope"), rm=rm, timeout_ms=2000) as s:
            with Peak() as peak, pytest.raises(MalformedReply, match="promises 41943040 bytes"):
                s.query_block("FETCh:ARRay:VOLTage? (@1)", "int8", max_points=20_000, retry=False)
            assert peak.bytes < 8 * MB
            assert s.query("VALUE?") == "7"
    finally:
        fake.stop()
