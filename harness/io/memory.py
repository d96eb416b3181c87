"""What the machine says it can give: the memory budget every reader and computation that
is told its own size (an .npz header, a Monte Carlo count) is checked against before it
allocates."""

from __future__ import annotations

import os


def memory_budget_bytes(fraction: float = 0.5) -> int:
    """How much memory one computation may take: ``fraction`` of what the system reports
    available now (Linux /proc/meminfo MemAvailable), else of physical memory (POSIX
    sysconf), else 2 GiB."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(int(line.split()[1]) * 1024 * fraction)
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE") * fraction)
    except (AttributeError, ValueError, OSError):
        return 2 << 30
