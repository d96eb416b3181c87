"""Store fixtures shared by the report and CLI tests: stores built through the store's own API."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from harness.store import open_store
from tests.support.builders import add_run


@pytest.fixture(scope="session")
def _db_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("report-db") / "results.db"
    with open_store(path) as store:
        add_run(store, "SN0001", verdict="PASS")
        add_run(store, "SN0002", verdict="FAIL", gain_db=18.2, records=False)
    return path


@pytest.fixture
def db_path(_db_template: Path, tmp_path: Path) -> Path:
    """A store with one passing board with raw records and one failing board without
    (built once per session, copied per test so a test may change its copy)."""
    path = tmp_path / "results.db"
    shutil.copyfile(_db_template, path)
    return path
