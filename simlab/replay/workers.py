"""How many workers this machine offers: standard library only, so that the command line can warn
about ``--jobs`` before the engine (pandas, SciPy) is imported."""

from __future__ import annotations

import os


def cores() -> int:
    """The cores this process may run on (its CPU affinity where the system has one)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):   # not on Linux
        return os.cpu_count() or 1


def workers(jobs: int) -> int:
    """Worker processes for ``--jobs``: -1 means every core."""
    return cores() if jobs == -1 else max(int(jobs), 1)
