"""The HTML reports render in a real browser (Debian's chromium, headless).

Checks: the inline script ran (body data-loaded="yes", so no script error stopped it), the
plots are in the rendered DOM (data-svg-count), and the screenshot is not one flat colour.
The PNG is decoded here with zlib per the PNG specification (W3C PNG 2nd edition, §9
filtering), so no imaging library is needed.
"""

from __future__ import annotations

import re
import struct
import subprocess
import zlib
from pathlib import Path

import pytest

from harness.report import write_board_report, write_summary_report
from tests.support.cdp import FLAGS

pytestmark = pytest.mark.browser


def _chromium(binary: str, tmp: Path, page: Path, *extra: str) -> subprocess.CompletedProcess:
    profile = tmp / f"profile-{len(list(tmp.glob('profile-*')))}"
    return subprocess.run(
        [binary, *FLAGS, f"--user-data-dir={profile}", *extra, page.resolve().as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def _png_rows(data: bytes) -> tuple[int, int, int, list[bytes]]:
    """Width, height, bytes per pixel and the unfiltered scanlines of an 8-bit PNG."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    pos, idat, width = 8, b"", 0
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        kind = data[pos + 4 : pos + 8]
        body = data[pos + 8 : pos + 8 + length]
        if kind == b"IHDR":
            width, height, depth, colour = struct.unpack(">IIBB", body[:10])
            assert depth == 8, "only 8-bit PNGs are decoded here"
            bpp = {0: 1, 2: 3, 4: 2, 6: 4}[colour]
        elif kind == b"IDAT":
            idat += body
        pos += 12 + length
    raw = zlib.decompress(idat)
    stride = width * bpp
    rows: list[bytes] = []
    prev = bytearray(stride)
    for y in range(height):
        f = raw[y * (stride + 1)]
        line = bytearray(raw[y * (stride + 1) + 1 : (y + 1) * (stride + 1)])
        for i in range(stride):
            a = line[i - bpp] if i >= bpp else 0
            b = prev[i]
            c = prev[i - bpp] if i >= bpp else 0
            if f == 1:
                line[i] = (line[i] + a) & 0xFF
            elif f == 2:
                line[i] = (line[i] + b) & 0xFF
            elif f == 3:
                line[i] = (line[i] + (a + b) // 2) & 0xFF
            elif f == 4:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                pred = a if pa <= pb and pa <= pc else (b if pb <= pc else c)
                line[i] = (line[i] + pred) & 0xFF
        rows.append(bytes(line))
        prev = line
    return width, height, bpp, rows


def _check_page(chromium: str, tmp_path: Path, page: Path, min_svgs: int) -> Path:
    shot = tmp_path / f"{page.stem}.png"
    proc = _chromium(
        chromium,
        tmp_path,
        page,
        f"--screenshot={shot}",
        "--window-size=1200,2000",
        "--enable-logging=stderr",
        "--v=0",
    )
    assert shot.exists(), f"no screenshot: {proc.stderr[-2000:]}"
    console = [line for line in proc.stderr.splitlines() if "CONSOLE" in line]
    assert not [line for line in console if "Uncaught" in line or "Error" in line], console
    dom = _chromium(chromium, tmp_path, page, "--dump-dom").stdout
    body = re.search(r"<body[^>]*>", dom)
    assert body, "no <body> in the dumped DOM"
    assert 'data-loaded="yes"' in body.group(0), "inline script did not run to the end"
    count = re.search(r'data-svg-count="(\d+)"', body.group(0))
    assert count and int(count.group(1)) >= min_svgs
    assert dom.count("<polyline") + dom.count("<rect") > min_svgs
    width, height, bpp, rows = _png_rows(shot.read_bytes())
    assert (width, height) == (1200, 2000)
    pixels = {row[i : i + 3] for row in rows[::20] for i in range(0, len(row), bpp * 7)}
    assert len(pixels) > 10, "screenshot is (nearly) a single colour"
    return shot


def test_board_report_renders(chromium, db_path, tmp_path) -> None:
    page, _ = write_board_report(db_path, tmp_path / "board.html", serial="SN0001")
    _check_page(chromium, tmp_path, page, min_svgs=8)


def test_summary_report_renders(chromium, db_path, tmp_path) -> None:
    page, s = write_summary_report(db_path, tmp_path / "summary.html")
    _check_page(chromium, tmp_path, page, min_svgs=len(s.measurements))
