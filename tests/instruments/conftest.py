"""Fixtures for the instruments tests: a fake SCPI instrument and one pyvisa-py manager."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from harness.instruments.session import resource_manager
from tests.instruments.fakeinst import FakeInstrument


@pytest.fixture(scope="session")
def rm():
    """One pyvisa-py ResourceManager for the whole run (pyvisa wants one per process)."""
    return resource_manager("@py")


@pytest.fixture
def fake() -> Iterator[FakeInstrument]:
    inst = FakeInstrument().start()
    try:
        yield inst
    finally:
        inst.stop()
