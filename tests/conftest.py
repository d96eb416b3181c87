"""Shared test fixtures.

External reference tools (ngspice, a browser) are optional on a developer machine
but mandatory in CI: where ``CI`` is set, a missing tool fails the test instead of
skipping it, so CI always runs every reference check.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from harness.io.board import load_board
from tests.support.bench import BOARD_FILE
from tests.support.spice import run_ngspice


def _require_tool(name: str, package: str) -> str:
    path = shutil.which(name)
    if path:
        return path
    msg = f"{name} not found (install Debian package {package!r}: apt-get install -y {package})"
    if os.environ.get("CI"):
        pytest.fail(f"CI must run this reference check: {msg}")
    pytest.skip(msg)


@pytest.fixture(scope="session")
def ngspice() -> str:
    """Path of the ngspice binary (Debian package ``ngspice``)."""
    return _require_tool("ngspice", "ngspice")


@pytest.fixture(scope="session")
def chromium() -> str:
    """Path of a headless-capable Chromium (Debian package ``chromium``)."""
    return _require_tool("chromium", "chromium")


@pytest.fixture
def spice(ngspice: str, tmp_path: Path):
    """Callable running a netlist through ngspice in batch mode; returns stdout."""

    def _run(netlist: str, timeout_s: float = 60.0) -> str:
        return run_ngspice(ngspice, netlist, tmp_path, timeout_s)

    return _run


@pytest.fixture(scope="session")
def board():
    """The demo twin preamp (limits/demo-twin-preamp.toml), loaded once."""
    return load_board(BOARD_FILE)


@pytest.fixture(scope="session")
def limits(board):
    from harness.model import compute_limits

    return compute_limits(board)


@pytest.fixture(scope="session")
def pg_cluster():
    """One throwaway PostgreSQL cluster for the whole session (tests/support/pg_cluster.py);
    skips with the reason outside CI, fails in CI."""
    from tests.support import pg_cluster as pgc

    try:
        cluster = pgc.start()
    except RuntimeError as exc:
        if os.environ.get("CI"):
            pytest.fail(f"CI must run the PostgreSQL tests: {exc}")
        pytest.skip(str(exc))
    yield cluster
    cluster.stop()


@pytest.fixture
def pg_url(pg_cluster) -> str:
    """URL of a fresh, empty database on the session's cluster."""
    return pg_cluster.new_database()
