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
        Seconds per replicate in a lockstep block (world, world optimum, design and every policy's
        campaigns), fitted with ``per_block`` to two timed blocks (:func:`measure`).
    per_block : float
        Seconds a block pays once, whatever its size (0 where the fit was not positive).
    timed : int
        Replicates timed.
    startup : float
        Seconds from the interpreter's start to simlab ready to replay (imports, SciPy's statistics
        and optimisers included); paid once by the command and once more by its worker processes,
        which start together.
    report : float
        Seconds to write the decision CSVs, figures and report.html in one process (mostly
        figures: nearly independent of the number of replicates).
    figures : float
        The figures' part of ``report``, which workers share (:meth:`report_time`).
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
    per_block: float = 0.0
    figures: float = 0.0

    def run(self, study: Study, jobs: int) -> float:
        """Wall seconds of ``simlab run STUDY --jobs jobs`` (report included)."""
        return self.startup + self._replay(study, jobs) + self.report_time(jobs)

    def sweep(self, study: Study, jobs: int) -> float:
        """Wall seconds of ``simlab sweep STUDY --jobs jobs``: every cell replays ``[sweep] replicates``
        (their world optima included) with the same workers."""
        sw = study.sweep
        cells = len(sw.lengthscale) * len(sw.amplitude)
        cell = study.with_replicates(sw.replicates)
        return self.startup + cells * self._replay(cell, jobs, start=False) + self._start_workers(cell, jobs)

    def _replay(self, study: Study, jobs: int, *, start: bool = True) -> float:
        from .runner import _joined

        plan = chunk_plan(study)
        workers = min(_workers(jobs), len(plan))
        blocks = _joined(study, list(enumerate(plan)), workers)      # what the workers will compute
        workers = min(workers, len(blocks))
        costs = [self.per_block + self.per_replicate * sum(len(r) for _, r in block) for block in blocks]
        span = _makespan(costs, workers) * _slowdown(workers, self.others, cores())
        return span + (self._start_workers(study, jobs) if start else 0.0)

    def report_time(self, jobs: int) -> float:
        """The report: its tables in the command's process, its figures shared by the workers (at most
        one a figure). Figures are whole tasks of unequal length and the tables' process shares the
        cores, so w workers are counted as drawing (1 + 1/w) / 2 of the serial time, not 1/w: on the
        demo 3.6 s with two workers for 5.2 s alone (tables 1.2 s), where 1/w would say 3.2 s and
        this 4.2 s."""
        from ..report.outputs import _figure_workers

        w = max(_figure_workers(jobs), 1)
        return self.report - self.figures + self.figures * (1.0 + 1.0 / w) / 2.0

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


def _block_fit(sizes: list[int], seconds: list[float]) -> tuple[float, float]:
    """``(b, a)`` of a block's time ``a + b B`` through two timed blocks of different sizes; the mean per
    replicate and ``a = 0`` where there is one block or the line is not positive in both."""
    mean = sum(seconds) / max(sum(sizes), 1)
    if len(sizes) != 2 or sizes[0] == sizes[1]:
        return mean, 0.0
    slope = (seconds[1] - seconds[0]) / (sizes[1] - sizes[0])
    fixed = seconds[0] - sizes[0] * slope
    return (slope, fixed) if slope > 0 and fixed > 0 else (mean, 0.0)


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


def measure(study: Study, *, replicates: int = 6) -> Estimate:
    """Time the first ``replicates`` replicates as two lockstep blocks, a third of them and then the
    rest, as workers replay them, and the report on their traces (its tables, then with its
    figures), in temporary folders.

    Notes
    -----
    A block's time is fitted as ``a + b B`` for B replicates: ``b`` the replicates' own work (world,
    world optimum, design, every policy's campaigns), ``a`` what a block pays once whatever its size
    (Python around every trial's stacked arithmetic). Two blocks of different sizes give both; the
    run's blocks (:func:`simlab.replay.runner._joined`: 20-64 replicates where the study has them) then
    cost ``a + b B`` each. Timing one small block and scaling it by its replicates overstated the
    demo by 1.7x (47 s for a 28 s run): at 4 replicates a block's ``a`` is most of its time. Where the
    fit is not positive (timing noise, worlds of unequal cost) the mean per replicate is used.
    """
    import pandas as pd
    import pyarrow.parquet  # noqa: F401  (imported by every run: part of its start-up)

    from .. import api  # noqa: F401
    from ..lazy import optimize, special, stats
    from .runner import _replay_chunk
    startup = process_age()
    t0 = time.perf_counter()
    stats.qmc, special.ndtr, optimize.minimize       # first uses import them: start-up, not replicates
    startup += time.perf_counter() - t0              # (a run's process, or each of its workers, pays them once)
    order = [r for chunk in chunk_plan(study) for r in chunk][:max(int(replicates), 1)]
    cut = max(len(order) // 3, 1)
    blocks = [order[:cut], order[cut:]] if len(order) >= 3 else [order]
    frames, times = [], []
    c0, t_all = time.process_time(), time.perf_counter()
    for block in blocks:
        t0 = time.perf_counter()
        frame = _replay_chunk(study, block)
        times.append(time.perf_counter() - t0)
        frame.attrs.clear()   # the chunk's worlds rows and warnings; pandas cannot concat frames in attrs
        frames.append(frame)
    wall, cpu = time.perf_counter() - t_all, time.process_time() - c0
    n = len(order)
    per, fixed = _block_fit([len(b) for b in blocks], times)
    traces = pd.concat(frames, ignore_index=True)
    traces["policy"] = pd.Categorical(traces["policy"], categories=list(study.labels))
    from ..report.outputs import write_outputs
    with tempfile.TemporaryDirectory(prefix="simlab-check-") as tmp:
        t0 = time.perf_counter()
        write_outputs(os.path.join(tmp, "tables"), study, traces, figures=False)
        tables = time.perf_counter() - t0
        t0 = time.perf_counter()
        write_outputs(os.path.join(tmp, "all"), study, traces)
        report = time.perf_counter() - t0
    return Estimate(per_replicate=per, timed=n, startup=startup, report=report, others=_others(cpu, wall, cores()),
                    per_block=fixed, figures=max(report - tables, 0.0))
