"""How many workers this machine offers (standard library only, so that the command line can warn
about ``--jobs`` before the engine, pandas and SciPy, is imported), and stopping joblib's local ones."""

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


def stop_local_workers() -> None:
    """Kill joblib's loky worker processes now (they would otherwise idle on for minutes)."""
    try:
        from joblib.externals.loky import reusable_executor
    except ImportError:  # pragma: no cover - depends on the joblib version
        return
    executor = getattr(reusable_executor, "_executor", None)
    if executor is not None:
        executor.shutdown(wait=True, kill_workers=True)
