"""Where the files shipped with the package are: the demo boards (``limits/``) and the
station, fixture and instrument-profile files (``fixtures/``).

They are found through :mod:`importlib.resources`, so an installed copy (a wheel, an
editable install or a source tree) finds them wherever it runs from.  The wheel carries the
repository's top-level ``limits/`` and ``fixtures/`` folders as ``harness/data/limits`` and
``harness/data/fixtures`` (symbolic links in the source tree, so each file exists once).
"""

from __future__ import annotations

import importlib.resources
from pathlib import Path

__all__ = ["PROFILE_DIR", "packaged"]


def packaged(*parts: str) -> Path:
    """The shipped file or folder ``harness/data/<parts...>``, e.g. ``packaged("limits",
    "demo-twin-preamp.toml")``; the package is installed as files, so this is a real path."""
    return Path(str(importlib.resources.files("harness").joinpath("data", *parts)))


#: The default instrument profiles, looked up by name from station files.
PROFILE_DIR = packaged("fixtures", "instruments")
