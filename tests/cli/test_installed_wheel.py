"""The wheel, installed non-editable into a fresh virtual environment, runs from a folder
outside the checkout: ``stageproof demo``, ``stageproof limits`` and ``stageproof sim serve``
on a four-channel board (whose scope needs a profile derived from the shipped one).

The wheel is built from a copy of the files a build reads (pyproject.toml, README, LICENSE,
harness/, limits/, fixtures/), so the checkout is left untouched; the virtual environment
sees the system's site-packages for numpy, scipy and the rest (``venv
--system-site-packages``), but ``harness`` must come from the wheel.
"""

from __future__ import annotations

import importlib.metadata
import json
import os
import shutil
import signal
import subprocess
import sys
import time
import tomllib
import zipfile
from pathlib import Path

import pytest

from tests.support.boards import four_channel_board_text

pytestmark = pytest.mark.wheel

REPO = Path(__file__).resolve().parents[2]
SOURCES = ("pyproject.toml", "README.md", "LICENSE", "harness", "limits", "fixtures")


def _setuptools_builds_here() -> bool:
    """Whether this interpreter's setuptools meets the build-system floor (then the build
    needs no index: --no-build-isolation)."""
    try:
        major = int(importlib.metadata.version("setuptools").split(".")[0])
    except importlib.metadata.PackageNotFoundError:
        return False
    return major >= 77


def _env() -> dict[str, str]:
    """The environment without anything that would import the checkout instead."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env["PYTHONNOUSERSITE"] = "1"
    return env


def _run(args: list[str], cwd: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run(
        args, cwd=cwd, env=_env(), capture_output=True, text=True, timeout=timeout, check=False
    )


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """bin/ of a fresh virtual environment with the wheel installed."""
    root = tmp_path_factory.mktemp("wheel")
    src = root / "src"
    src.mkdir()
    for name in SOURCES:
        p = REPO / name
        if p.is_dir():
            shutil.copytree(
                p, src / name, symlinks=True, ignore=shutil.ignore_patterns("__pycache__")
            )
        else:
            shutil.copy2(p, src / name)
    dist = root / "dist"
    build = [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(dist)]
    if _setuptools_builds_here():
        build.append("--no-build-isolation")
    done = _run([*build, str(src)], cwd=root, timeout=300)
    assert done.returncode == 0, done.stderr
    (wheel,) = dist.glob("stageproof-*.whl")

    venv = root / "venv"
    made = _run(
        [sys.executable, "-m", "venv", "--system-site-packages", "--without-pip", str(venv)],
        cwd=root,
    )
    assert made.returncode == 0, made.stderr
    py = venv / "bin" / "python"
    inst = _run(
        [
            sys.executable,
            "-m",
            "pip",
            "--python",
            str(py),
            "install",
            "--quiet",
            "--no-deps",
            "--no-index",
            str(wheel),
        ],
        cwd=root,
    )
    assert inst.returncode == 0, inst.stderr
    return venv / "bin"


def test_wheel_carries_each_data_file_and_every_module(installed: Path) -> None:
    """One copy in the repository, all of it in the wheel: the shipped folders are the
    top-level ones, and no module is left out."""
    (wheel,) = (installed.parent.parent / "dist").glob("stageproof-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    for folder in ("limits", "fixtures"):
        for f in (REPO / folder).rglob("*.toml"):
            assert f"harness/data/{folder}/{f.relative_to(REPO / folder)}" in names, f
    for f in (REPO / "harness").rglob("*.py"):
        assert f.relative_to(REPO).as_posix() in names, f
    assert "harness/py.typed" in names


def test_installed_commands_run_outside_the_checkout(installed: Path, tmp_path: Path) -> None:
    work = tmp_path / "elsewhere"
    work.mkdir()
    where = _run([str(installed / "python"), "-c", "import harness; print(harness.__file__)"], work)
    assert Path(where.stdout.strip()).is_relative_to(installed.parent), where.stdout

    demo = _run([str(installed / "stageproof"), "demo", "--db", "demo.db"], work, timeout=180)
    assert demo.returncode == 0, demo.stdout + demo.stderr
    assert "DEMO-0001" in demo.stdout and "PASS" in demo.stdout and "FAIL" in demo.stdout

    board = work / "four-channel.toml"
    board.write_text(four_channel_board_text())
    limits = _run([str(installed / "stageproof"), "limits", str(board), "--json"], work)
    assert limits.returncode == 0, limits.stderr
    assert sorted(json.loads(limits.stdout)["channels"]) == ["A", "B", "C", "D"]

    serve = subprocess.Popen(
        [str(installed / "stageproof"), "sim", "serve", str(board)],
        cwd=work,
        env=_env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + 30
        while not (work / "fixture-sim.toml").exists():
            assert serve.poll() is None, serve.communicate()
            assert time.monotonic() < deadline, "sim serve wrote no files"
            time.sleep(0.1)
        check = _run(
            [
                str(installed / "python"),
                "-c",
                "from harness.io.station import load_station; "
                "print(load_station('station-sim.toml').get('scope').profile.settings['inputs'])",
            ],
            work,
        )
        assert check.returncode == 0, check.stderr
        assert check.stdout.strip() == "5"
        with open(work / "station-sim.toml", "rb") as f:
            station = tomllib.load(f)
        assert Path(station["instrument"]["scope"]["profile"]).name == "scpi-scope-5.toml"
    finally:
        serve.send_signal(signal.SIGINT)
        _out, err = serve.communicate(timeout=30)
    assert serve.returncode == 0, err
    assert "Traceback" not in err
