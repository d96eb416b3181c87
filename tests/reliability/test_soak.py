"""Soak: board after board in one process, memory and file descriptors must not creep.

The loop is tests/reliability/soakloop.py (harness.run's per-board function on one
simulated bench, instruments connected once).  RSS (psutil) and open file descriptors are
sampled every 10 boards; a least-squares line through the second half (after warm-up:
caches, the allocator's pools) must rise less than RSS_SLOPE_LIMIT per board and
FD_SLOPE_LIMIT per board.  Justification: a leak of one retained 1000-point record pair
(2 x 8 kB of float64) per board would show as >= 16 kB/board; the limit of 8 kB/board
allows allocator noise but not a per-board record.  Any descriptor leaked per board, even
one in 20, exceeds 0.05 FD/board.
CI: SOAK_BOARDS = 500 (``--soak`` runs 2000).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.reliability.rig import scaled
from tests.reliability.soakloop import soak

pytestmark = [pytest.mark.reliability, pytest.mark.wire]

#: README figure: boards per soak (CI 500; --soak 2000).
SOAK_BOARDS = scaled(500, 2000)
RSS_SLOPE_LIMIT = 8 * 1024  # bytes per board
FD_SLOPE_LIMIT = 0.05  # descriptors per board


def test_soak_memory_and_descriptors_flat(tmp_path: Path) -> None:
    pytest.importorskip("psutil")
    res = soak(tmp_path, SOAK_BOARDS)
    assert sum(res.statuses.values()) == SOAK_BOARDS
    assert res.statuses.get("complete", 0) == SOAK_BOARDS, res.statuses
    rss_slope, fd_slope = res.slope(1), res.slope(2)
    first, last = res.samples[0], res.samples[-1]
    print(
        f"\n{SOAK_BOARDS} boards in {res.elapsed_s:.1f} s; RSS {first[1] / 2**20:.1f} -> "
        f"{last[1] / 2**20:.1f} MiB (2nd-half slope {rss_slope / 1024:.2f} kB/board); FDs "
        f"{first[2]} -> {last[2]} (slope {fd_slope:.3f}/board)"
    )
    assert rss_slope < RSS_SLOPE_LIMIT
    assert fd_slope < FD_SLOPE_LIMIT
    assert last[2] <= first[2] + 2
