"""One process per station: an exclusive OS file lock per instrument resource.

Two processes driving the same instruments switch each other's generator and supply off
and store a good board as FAIL.  Before a session connects, it takes an exclusive
``flock`` (POSIX advisory lock, Linux flock(2)) on one lock file per VISA resource of the
station, held until the session ends.  The kernel releases it when the process ends in
any way (SIGKILL and an out-of-memory kill included), so a crash never leaves a station
locked.  A second process asking for a held resource gets :class:`StationBusy` at once,
naming who holds it (pid, host, command, since when) — it never waits.

Lock files live in ``$STAGEPROOF_LOCK_DIR`` if set, else ``/run/lock/stageproof`` (the
Filesystem Hierarchy Standard 3.0 §3.15.2 place for lock files, where writable), else
``stageproof-locks`` in the system temporary folder.  The folder is made sticky and
world-writable like ``/tmp``, so stations run by different users still see each other.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import re
import socket
import sys
import tempfile
import time
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from harness.errors import StationBusy, StationFileError

if TYPE_CHECKING:
    from harness.instruments.config import StationConfig

__all__ = ["StationLock", "lock_dir", "lock_path", "normalise_resource", "station_lock"]

ENV_DIR = "STAGEPROOF_LOCK_DIR"


def lock_dir() -> Path:
    """Where the lock files go (see the module doc)."""
    env = os.environ.get(ENV_DIR, "").strip()
    if env:
        return Path(env)
    run_lock = Path("/run/lock")
    if run_lock.is_dir() and os.access(run_lock, os.W_OK | os.X_OK):
        return run_lock / "stageproof"
    return Path(tempfile.gettempdir()) / "stageproof-locks"


def normalise_resource(resource: str) -> str:
    """One spelling per instrument: VISA resource names are case-insensitive, board 0 is
    the default board and ``::INSTR`` the default class (VPP-4.3, from memory for the
    clause), so ``tcpip0::h::inst0::instr`` and ``TCPIP::H::INST0`` lock the same file."""
    text = resource.strip().upper()
    text = re.sub(r"^(TCPIP|GPIB|USB|VXI|PXI)0::", r"\1::", text)
    return re.sub(r"::INSTR$", "", text)


def lock_path(resource: str, folder: Path | None = None) -> Path:
    """The lock file of one resource: a readable name plus a digest (no two collide)."""
    norm = normalise_resource(resource)
    digest = hashlib.sha256(norm.encode()).hexdigest()[:12]
    readable = re.sub(r"[^A-Za-z0-9.]+", "_", norm).strip("_")[:80]
    return (folder or lock_dir()) / f"{readable}-{digest}.lock"


def _command_text() -> str:
    """The command line of this process, as the holder's description shows it."""
    argv = list(sys.argv)
    head = Path(argv[0]).name if argv else "python"
    if head in ("main.py", "__main__.py", "stageproof"):
        head = "stageproof"
    text = " ".join([head, *argv[1:]])
    text = "".join(c if c.isprintable() else "?" for c in text)
    return text if len(text) <= 300 else text[:297] + "..."


def _holder_text(raw: str) -> str:
    """What a lock file says about its holder, as one line."""
    try:
        info = json.loads(raw)
    except ValueError:
        info = None
    if not isinstance(info, dict):
        return "another process (it has not written its name yet)"
    parts = [f"pid {info.get('pid', '?')} on host {info.get('host', '?')}"]
    if info.get("command"):
        parts.append(f"running `{info['command']}`")
    if info.get("since"):
        parts.append(f"since {info['since']}")
    text = ", ".join(str(p) for p in parts)
    return "".join(c if c.isprintable() else "?" for c in text)


class StationLock:
    """The held locks of one session; :meth:`release` (or leaving the ``with``) frees them."""

    def __init__(self, station_name: str, held: list[tuple[str, Path, int]]) -> None:
        self.station_name = station_name
        self._held = held

    @property
    def resources(self) -> list[str]:
        return [r for r, _, _ in self._held]

    def release(self) -> None:
        held, self._held = self._held, []
        for _res, path, fd in held:
            # Unlink while still holding the lock: a process that opened the old file now
            # sees a different inode behind the path and tries again (see _take).
            with contextlib.suppress(OSError):
                if os.fstat(fd).st_ino == os.stat(path).st_ino:
                    path.unlink()
            with contextlib.suppress(OSError):
                os.close(fd)

    def __enter__(self) -> StationLock:
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def _make_dir(folder: Path) -> None:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StationFileError(
            None,
            None,
            f"cannot create the station lock folder {folder}: {exc.strerror or exc}",
            hint=f"set {ENV_DIR} to a writable folder shared by every station process",
        ) from exc
    with contextlib.suppress(OSError):  # shared by users, like /tmp (best effort)
        os.chmod(folder, 0o1777)


def _take(resource: str, role: str, folder: Path, info: dict[str, Any]) -> tuple[Path, int]:
    """Lock one resource's file, or raise StationBusy naming the holder."""
    path = lock_path(resource, folder)
    for _attempt in range(20):
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o666)
        except PermissionError:
            fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)  # another user's file: lock it
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            try:
                raw = os.pread(fd, 4096, 0).decode("utf-8", "replace")
            finally:
                os.close(fd)
            raise StationBusy(
                f"station busy: {resource} ({role}) is in use by {_holder_text(raw)}",
                hint="wait for that session to end or stop it; the lock is released when its "
                "process ends, even after a crash",
            ) from None
        try:
            same = os.fstat(fd).st_ino == os.stat(path).st_ino
        except FileNotFoundError:
            same = False
        if not same:  # the holder unlinked it as we opened it: take the new file
            os.close(fd)
            continue
        with contextlib.suppress(OSError):
            os.chmod(path, 0o666)
            os.ftruncate(fd, 0)
            os.pwrite(fd, json.dumps({**info, "role": role}).encode(), 0)
        return path, fd
    raise StationBusy(f"station busy: the lock of {resource} ({role}) keeps changing hands")


def take_lock(resources: Iterable[tuple[str, str]], station_name: str = "") -> StationLock:
    """Lock every (resource, role) pair, in a fixed order; all or none."""
    folder = lock_dir()
    _make_dir(folder)
    info = {
        "pid": os.getpid(),
        "host": socket.gethostname(),
        "command": _command_text(),
        "since": time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime()),
        "station": station_name,
    }
    held: list[tuple[str, Path, int]] = []
    seen: set[str] = set()
    try:
        for resource, role in sorted(resources, key=lambda rr: normalise_resource(rr[0])):
            norm = normalise_resource(resource)
            if norm in seen:
                continue
            seen.add(norm)
            path, fd = _take(resource, role, folder, info)
            held.append((resource, path, fd))
    except BaseException:
        StationLock(station_name, held).release()
        raise
    return StationLock(station_name, held)


@contextlib.contextmanager
def station_lock(station: StationConfig) -> Iterator[StationLock]:
    """Hold the lock of every instrument of ``station`` for the block."""
    pairs = [(cfg.resource, role) for role, cfg in station.instruments.items()]
    lock = take_lock(pairs, station.name or "")
    try:
        yield lock
    finally:
        lock.release()
