"""What a study will cost before it runs: real pieces timed here (a chunk, the report) and the run's shape."""

from __future__ import annotations

import functools
import os
import tempfile
import time
from dataclasses import dataclass

from .runner import chunk_plan
from .workers import cores, stop_local_workers, workers as _workers
from ..study.spec import Study

__all__ = ["Estimate", "measure", "process_age", "worker_startup"]


@dataclass(frozen=True)
class Estimate:
    """Timed pieces of a study, and the wall time of ``simlab run`` and ``simlab sweep`` built from them.

    Attributes
    ----------
    per_replicate : float
        Seconds per replicate of the first chunk, replayed as a worker replays it: world,
        world optimum, design and every policy's campaigns, as one lockstep block.
    timed : int
        Replicates timed.
    startup : float
        Seconds from the interpreter's start to simlab ready to replay (imports); paid once by
        the command and once more by its worker processes, which start together.
    report : float
        Seconds to write the decision CSVs, figures and report.html (mostly figures: nearly
        independent of the number of replicates).
    others : float
        Other runnable processes sharing the machine's cores while the chunk was timed
        (from the CPU share this process got; 0 on an idle machine). On a shared machine a
        second worker does not get a core of its own: see ``_slowdown``.
    """

    per_replicate: float
    timed: int
    startup: float
    report: float
    others: float = 0.0

    def run(self, study: Study, jobs: int) -> float:
        """Wall seconds of ``simlab run STUDY --jobs jobs`` (report included)."""
        return self.startup + self._replay(study, jobs) + self.report

    def sweep(self, study: Study, jobs: int) -> float:
        """Wall seconds of ``simlab sweep STUDY --jobs jobs``: every cell replays ``[sweep] replicates``
        (their world optima included) with the same workers."""
        sw = study.sweep
        cells = len(sw.lengthscale) * len(sw.amplitude)
        cell = study.with_replicates(sw.replicates)
        return self.startup + cells * self._replay(cell, jobs, start=False) + self._start_workers(cell, jobs)

    def _replay(self, study: Study, jobs: int, *, start: bool = True) -> float:
        plan = chunk_plan(study)
        workers = min(_workers(jobs), len(plan))
        costs = [self.per_replicate * len(c) for c in plan]
        span = _makespan(costs, workers) * _slowdown(workers, self.others, cores())
        return span + (self._start_workers(study, jobs) if start else 0.0)

    def _start_workers(self, study: Study, jobs: int) -> float:
        # worker processes start together, each importing simlab: timed for real (first use)
        workers = min(_workers(jobs), len(chunk_plan(study)))
        return worker_startup(workers) if workers > 1 else 0.0


@functools.cache
def worker_startup(workers: int) -> float:
    """Seconds for ``workers`` joblib worker processes to start and import simlab's runner, as
    a run's workers do. Timed, not derived from the command's own start-up: the workers
    spawn interpreters, import joblib and then simlab together: two took 3.9-4.9 s where the
    command imported simlab in 1.5 s (2-core machine, other work running; measured once, by
    hand). The workers are stopped afterwards."""
    from joblib import Parallel, delayed

    t0 = time.perf_counter()
    Parallel(n_jobs=workers)(delayed(_import_runner)() for _ in range(workers))
    seconds = time.perf_counter() - t0
    stop_local_workers()
    return seconds


def _import_runner() -> None:
    import simlab.replay.runner  # noqa: F401


def _makespan(costs: list[float], workers: int) -> float:
    """Finish time of tasks handed out in order to whichever worker is free first (as joblib does)."""
    free = [0.0] * max(workers, 1)
    for c in costs:
        i = min(range(len(free)), key=free.__getitem__)
        free[i] += c
    return max(free)


def _slowdown(workers: int, others: float, cores: int) -> float:
    """How much slower each of ``workers`` processes runs than the one process that was timed.

    Fair sharing (`common practice`: Linux's scheduler gives runnable processes of equal
    priority equal CPU time): with ``others`` other runnable processes on ``cores`` cores, each
    of w processes gets min(1, cores / (w + others)) of a core. The chunk was timed at w = 1.
    """
    share = lambda w: min(1.0, cores / (w + others))   # noqa: E731
    return share(1) / share(max(workers, 1))


def _others(cpu: float, wall: float, cores: int) -> float:
    """Other runnable processes implied by getting ``cpu`` seconds of CPU in ``wall`` seconds:
    the inverse of ``_slowdown``'s share, min(1, cores / (1 + others)); 0 when a whole core was had."""
    share = cpu / wall if wall > 0 else 1.0
    return max(cores / share - 1.0, 0.0) if share < 0.95 else 0.0


def process_age() -> float:
    """Seconds since this interpreter started (from Linux's /proc; 0 where there is none)."""
    try:
        with open("/proc/self/stat", encoding="ascii") as f:
            fields = f.read().rsplit(")", 1)[1].split()
        with open("/proc/uptime", encoding="ascii") as f:
            uptime = float(f.read().split()[0])
        return max(uptime - int(fields[19]) / os.sysconf("SC_CLK_TCK"), 0.0)
    except (OSError, ValueError, IndexError):   # not Linux: start-up is left out of the estimate
        return 0.0


def measure(study: Study, *, replicates: int = 4) -> Estimate:
    """Time whole chunks (the first ones, as workers replay them) until ``replicates``
    replicates are timed (a prefix of the first chunk if it is larger), then the report on
    their traces, in a temporary folder. Costs about that many replicates plus one report.
    """
    import pandas as pd
    import pyarrow.parquet  # noqa: F401  (imported by every run: part of its start-up)

    from .. import api  # noqa: F401
    from .runner import _replay_chunk
    startup = process_age()
    blocks, n = [], 0
    for chunk in chunk_plan(study):
        blocks.append(chunk[: replicates - n] if not blocks else chunk)
        n += len(blocks[-1])
        if n >= replicates:
            break
    frames = []
    t0, c0 = time.perf_counter(), time.process_time()
    for block in blocks:
        frame = _replay_chunk(study, block)
        frame.attrs.clear()   # the chunk's worlds rows and warnings; pandas cannot concat frames in attrs
        frames.append(frame)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    per = wall / n
    traces = pd.concat(frames, ignore_index=True)
    traces["policy"] = pd.Categorical(traces["policy"], categories=list(study.labels))
    from ..report.outputs import write_outputs
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="simlab-check-") as tmp:
        write_outputs(tmp, study, traces)
    report = time.perf_counter() - t0
    return Estimate(per_replicate=per, timed=n, startup=startup, report=report, others=_others(cpu, wall, cores()))
