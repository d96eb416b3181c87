"""Reliability suite settings: CI counts by default, soak counts with ``--soak``.

``pytest tests/reliability --soak`` or ``STAGEPROOF_SOAK=1 pytest tests/reliability`` scales
every count up (kills, fuzz cases, concurrent runs, soak boards).  The option is read at
configure time and published through the environment, so the test modules can size their
parametrisations and hypothesis settings when they are imported.
"""

from __future__ import annotations

import os

import pytest


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption(
        "--soak",
        action="store_true",
        default=False,
        help="reliability suite: run the long soak counts (also STAGEPROOF_SOAK=1)",
    )


def pytest_configure(config: pytest.Config) -> None:
    if config.getoption("--soak", default=False):
        os.environ["STAGEPROOF_SOAK"] = "1"


def _preload_hypothesis_patching() -> None:
    """hypothesis imports libcst to print a failing example's patch; libcst's import emits a
    DeprecationWarning (mypy_extensions.TypedDict) which, with warnings as errors, turns a
    reported failure into an INTERNALERROR that hides it.  Import it once here, quietly."""
    import contextlib
    import warnings

    with warnings.catch_warnings(), contextlib.suppress(ImportError):
        warnings.simplefilter("ignore")
        import hypothesis.extra._patching  # noqa: F401


_preload_hypothesis_patching()
