"""The files shipped with the package exist once: ``harness/data`` holds links to the
repository's top-level ``limits/`` and ``fixtures/``, and the readers find them there."""

from __future__ import annotations

import os
from pathlib import Path

from harness.io.packaged import PROFILE_DIR, packaged
from harness.io.profiles import DEFAULT_PROFILE_DIRS, load_profile

REPO = Path(__file__).resolve().parents[2]


def test_no_data_file_is_copied_into_the_package():
    """Walking harness/ without following links finds no board, fixture or profile file."""
    copies = [
        Path(root, f)
        for root, _dirs, files in os.walk(REPO / "harness", followlinks=False)
        for f in files
        if f.endswith(".toml")
    ]
    assert copies == []


def test_shipped_folders_are_the_top_level_ones():
    assert packaged("limits").resolve() == (REPO / "limits").resolve()
    assert packaged("fixtures").resolve() == (REPO / "fixtures").resolve()
    assert DEFAULT_PROFILE_DIRS == (PROFILE_DIR,)
    assert PROFILE_DIR.resolve() == (REPO / "fixtures" / "instruments").resolve()


def test_profiles_by_name_come_from_the_shipped_folder():
    prof = load_profile("scpi-scope")
    assert Path(prof.path).resolve() == (REPO / "fixtures" / "instruments" / "scpi-scope.toml")
