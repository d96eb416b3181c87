"""Store test fixtures: the contract tests run once per backend."""

from __future__ import annotations

from pathlib import Path

import pytest


@pytest.fixture(params=["sqlite", "postgresql"])
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A fresh results database: an SQLite file, or a new database on the session's
    PostgreSQL cluster (skipped outside CI when no server can be started)."""
    if request.param == "sqlite":
        return str(tmp_path / "results.db")
    return request.getfixturevalue("pg_url")
