"""Who owns a running run, and is that process still alive?

A run left 'running' after a crash or power cut must be found and marked aborted, but
several station processes may share one database, so a live process's run must never be
touched.  A pid alone is not enough: after a reboot (the usual sequel to a power cut) pids
start again from small numbers and an unrelated process may hold the old one.  So each run
stores its owner's host, pid and a *start token*: the kernel's boot id plus the process
start time in clock ticks (``/proc/<pid>/stat`` field 22, proc(5)).  Same pid with a
different token is a different process.  Without /proc, psutil's create time is used when
psutil is installed; otherwise the owner is assumed alive (never abort what we cannot see).
"""

from __future__ import annotations

import os
import socket
import sys
from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True)
class Owner:
    """The process that began a run."""

    host: str
    pid: int
    start_token: str | None


def _boot_id() -> str:
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip()
    except OSError:
        return "noboot"


def _proc_stat(pid: int) -> tuple[str, str] | None:
    """(state, starttime) from /proc/<pid>/stat, or None if there is no such process.

    The command name (field 2) may hold spaces and parentheses, so split after the last
    ')' (proc(5)); state is field 3, starttime field 22.
    """
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return None
    fields = text[text.rindex(")") + 2 :].split()
    return fields[0], fields[19]


def has_proc() -> bool:
    return Path(f"/proc/{os.getpid()}/stat").exists()


def start_token(pid: int) -> str | None:
    """The token naming this incarnation of ``pid``; None if it cannot be known."""
    if has_proc():
        stat = _proc_stat(pid)
        if stat is None:
            return None
        return f"{_boot_id()}:{stat[1]}"
    try:
        import psutil
    except ImportError:
        return None
    try:
        return f"psutil:{psutil.Process(pid).create_time():.3f}"
    except psutil.Error:
        return None


def this_owner() -> Owner:
    pid = os.getpid()
    return Owner(socket.gethostname(), pid, start_token(pid))


def owner_alive(owner: Owner) -> bool | None:
    """True if the process is alive, False if gone, None if it cannot be told.

    Only a process on this host can be checked; a zombie (killed, not yet reaped) is gone.
    """
    if owner.host != socket.gethostname():
        return None
    if owner.pid == os.getpid():
        return owner.start_token is None or owner.start_token == start_token(owner.pid)
    if has_proc():
        stat = _proc_stat(owner.pid)
        if stat is None or stat[0] in ("Z", "X"):
            return False
        if owner.start_token is None:
            return True
        return f"{_boot_id()}:{stat[1]}" == owner.start_token
    try:
        import psutil
    except ImportError:
        psutil = None
    if psutil is not None:
        try:
            token = f"psutil:{psutil.Process(owner.pid).create_time():.3f}"
        except psutil.NoSuchProcess:
            return False
        except psutil.Error:
            return None
        return owner.start_token is None or token == owner.start_token
    if sys.platform != "win32":  # os.kill(pid, 0) terminates the process on Windows
        try:
            os.kill(owner.pid, 0)
        except ProcessLookupError:
            return False
        except PermissionError:
            return True
        return True
    return None
