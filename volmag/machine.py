"""What this machine offers a run: the cores it may use and the free memory."""
from __future__ import annotations

import os


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the OS has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:
        return os.cpu_count() or 1


def available_memory() -> float:
    """Bytes of memory available now (Linux /proc/meminfo; else total RAM)."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024
    except OSError:
        pass
    return float(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))
