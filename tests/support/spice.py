"""Running ngspice (Debian package ``ngspice``) in batch mode for the reference checks.

A module of its own, not part of conftest.py, so tests in any folder can import it by a name
no other conftest shadows.
"""

from __future__ import annotations

import subprocess
from pathlib import Path


def run_ngspice(binary: str, netlist: str, tmp_path: Path, timeout_s: float = 60.0) -> str:
    """Run ``ngspice -b`` on a netlist text and return its stdout (raises on failure)."""
    cir = tmp_path / "check.cir"
    cir.write_text(netlist)
    proc = subprocess.run(
        [binary, "-b", str(cir)],
        capture_output=True,
        text=True,
        timeout=timeout_s,
        cwd=tmp_path,
        check=False,
    )
    if proc.returncode != 0:
        raise AssertionError(f"ngspice failed ({proc.returncode}):\n{proc.stdout}\n{proc.stderr}")
    return proc.stdout
