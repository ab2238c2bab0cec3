"""Replay every policy on every replicate, in parallel: each replicate's material comes from the worlds
stage (worlds/replicate.py); this module runs the campaigns on it and builds the traces and worlds tables."""

from __future__ import annotations

import re
import warnings

import numpy as np
import pandas as pd

from ..columns import LIMIT_COLUMNS, STOP_COLUMNS
from ..policies import POLICIES, Policy
from ..rng import stream
from ..study.spec import Study
from ..model.belief import Belief
from ..model.feasible import FAIL_AMPLITUDE, FailureModel, FeasibleBelief, LimitModel, success_prior_mean
from ..model.kernels import make_kernel
from ..model.levels import mixed_kernel
from ..worlds.noise import Observer
# what the worlds stage hands on: each replicate's material (imported here for the replay's use)
from ..worlds.replicate import (Replicate, history_arrays, make_observer, make_replicate, make_world, unit_kernel,
                                world_optimum)
from .campaign import run_campaign
from .trace import Trace
from .workers import stop_local_workers as _stop_local_workers
from .workers import workers as _workers

__all__ = ["make_belief", "make_policy", "replay_replicate", "replay", "replay_study", "replay_chunks",
           "chunk_plan", "connect",
           # from worlds/replicate.py
           "Replicate", "make_replicate", "make_world", "make_observer", "history_arrays", "world_optimum"]


def make_belief(study: Study) -> Belief:
    """The policies' belief: over stepped or categorical inputs the product kernel of
    :mod:`simlab.model.levels` (stepped values rounded inside it, an exchangeable correlation
    between levels), otherwise the stationary kernel on the unit cube."""
    b, space = study.belief, study.space
    kernel = mixed_kernel(b, space) if space.discrete else unit_kernel(b, study)
    return Belief(kernel=kernel, mean=study.sign * b.mean, noise=b.noise, refit_every=study.refit_every)


def make_feasible(study: Study):
    """What makes a constrained campaign's belief about its limits (None for other studies): each limit's
    own prior, as the worlds draw it (a matched prior, like the objective's by default), and the
    classifier of failures with the prior chance of success ``1 - share``."""
    if not study.constrained:
        return None
    limits = [LimitModel(kernel=unit_kernel(lim.prior, study), mean=lim.prior.mean, noise=lim.prior.noise,
                         bound=lim.bound, sign=lim.sign) for lim in study.limits]
    fw = study.world.fails_where
    failure = None
    if fw is not None:
        kernel = make_kernel(fw.kernel, np.asarray(fw.lengthscale) / study.space.width, FAIL_AMPLITUDE)
        failure = FailureModel(kernel=kernel, mean=success_prior_mean(fw.share))

    def feasible(*, pool, capacity):
        return FeasibleBelief(limits, failure, pool=pool, capacity=capacity, chance=study.feasible_chance)

    return feasible


def make_policy(spec) -> Policy:
    return POLICIES[spec.rule](spec.label, **spec.options)


def replay_replicate(study: Study, r: int, *, rep: Replicate | None = None, lockstep: bool = True) -> pd.DataFrame:
    """All policies on replicate r: a traces frame in the user's units and orientation.

    Regret is measured against the better of the world's searched optimum (two independent
    searches, :func:`world_optimum`) and every input any policy evaluated on this
    replicate, so it is never negative and stays paired. Adding a policy can therefore
    lower f* (when it evaluates a point better than the search found) and so change the
    other policies' regret; it never changes their campaigns.

    A horizon-aware policy (one whose early choices depend on the budget) is replayed
    once per budget; its rows for trials in (previous budget, budget] come from the
    campaign planned for that budget, so every budget's row is that budget's own campaign.
    The ``horizon`` column says which campaign a row belongs to.
    """
    rep = rep or make_replicate(study, r)
    return _frame(study, rep, _campaigns(study, [rep], lockstep=lockstep)[0])


def _campaigns(study: Study, reps: list[Replicate], *, lockstep: bool = True):
    """Every policy's campaigns on each replicate: per replicate, ``[(label, [(budget, trace)])]``.

    Campaigns of a rule that can advance in lockstep run as one block over ``reps``
    (:func:`simlab.replay.lockstep.run_block`); the others run one at a time. Both give the same
    traces, so ``lockstep=False`` (every campaign alone) is the reference the tests use.
    """
    from .lockstep import fits_lockstep, run_block

    from ..stopping.record import StopRecorder, record_plan

    belief, observer, history = make_belief(study), make_observer(study), history_arrays(study)
    feasible = make_feasible(study)   # None without limits; the same priors for every campaign
    plan = record_plan(study)      # None unless a [[stop]] rule reads the posterior: then nothing is recorded
    recorder = StopRecorder(plan, study.seed) if plan is not None else None
    c = study.campaign
    out: list[list] = [[] for _ in reps]
    for spec in study.policies:
        probe = make_policy(spec)
        horizons = c.budgets if probe.horizon_aware else (c.horizon,)
        together = (lockstep and fits_lockstep(probe, belief, batch=c.batch, lost=study.world.lost)
                    and not study.constrained)      # limits and failures: one campaign at a time
        per: list[list[tuple[int, Trace]]] = [[] for _ in reps]
        for b in horizons:
            if together:
                rngs = [stream(study.seed, rep.index, "policy", spec.label) for rep in reps]
                traces = run_block(make_policy(spec), belief, reps, observer=observer, budget=b, rngs=rngs,
                                   batch=c.batch, history=history, snap=_snap(study), library=study.space.library is not None,
                                   stop=_stop_start(recorder, reps, spec.label))
            else:
                traces = [_alone(study, spec, belief, observer, history, rep, b, _stop_start(recorder, [rep], spec.label),
                                 feasible) for rep in reps]
            for k, trace in enumerate(traces):
                per[k].append((b, trace))
        for k in range(len(reps)):
            out[k].append((spec.label, per[k]))
    return out


def _stop_start(recorder, reps: list[Replicate], label: str):
    """What a campaign loop calls to start the stopping rules' record of these replicates (None: none)."""
    if recorder is None:
        return None
    replicates = [rep.index for rep in reps]
    return lambda st, *, h, n: recorder.begin(st, replicates, label, h=h, n=n)


def _alone(study: Study, spec, belief: Belief, observer: Observer, history, rep: Replicate, budget: int,
           stop=None, feasible=None) -> Trace:
    """One campaign replayed on its own (the reference path)."""
    def observe(f, t):
        return observer(f, rep.shocks[t], rep.lost[t])

    r = rep.index
    return run_campaign(make_policy(spec), belief, rep.world, design=rep.design, sequence=rep.sequence,
                        observe=observe, budget=budget, pool=rep.pool,
                        rng=stream(study.seed, r, "policy", spec.label), batch=study.campaign.batch,
                        history=history, refit_rng=stream(study.seed, r, "refit", spec.label),
                        library=study.space.library is not None, snap=_snap(study), stop=stop,
                        limits=rep.limits, feasible=feasible)


def _snap(study: Study):
    """What moves a chosen trial to allowed values, or None when every value is allowed (a box of
    reals, or a library, whose policies choose rows)."""
    space = study.space
    return space.snap if space.discrete and space.library is None else None


def _frame(study: Study, rep: Replicate, runs) -> pd.DataFrame:
    """The traces frame of one replicate from its campaigns ``[(label, [(budget, trace)])]``."""
    c, r = study.campaign, rep.index
    fstar = _fstar(rep, runs)
    penalty = rep.worst - fstar if rep.limits is not None else None
    h = study.history.size if study.history is not None else 0
    trial = np.arange(1 - h, c.horizon + 1, dtype=np.int32)   # past trials -h+1 .. 0, then 1 .. B
    frames = []
    for label, per in runs:
        cols = _compose([(b, _columns(t, trial[: h + b], fstar, penalty)) for b, t in per], trial)
        X = study.space.columns(cols.pop("U"))
        frame = {
            "policy": label,
            "replicate": np.full(len(trial), r, dtype=np.int32),
            "trial": trial,
            "round": np.where(trial >= 1, (trial - 1) // c.batch + 1, 0).astype(np.int32),
            "initial": (trial >= 1) & (trial <= c.initial),
            "history": trial <= 0,
        }
        frame.update(X)
        frame.update({"y": study.sign * cols["y"], "f": study.sign * cols["f"],
                      "lost": ~np.isfinite(cols["y"]), "regret": cols["regret"],
                      "regret_seen": cols["regret_seen"], "rec_trial": cols["rec_trial"],
                      "horizon": cols["horizon"]})
        frame.update({name: cols[name] for name in STOP_COLUMNS if name in cols})   # only with [[stop]] rules
        frame.update({name: cols[name] for name in LIMIT_COLUMNS if name in cols})  # only with limits
        frames.append(pd.DataFrame(frame))
    return pd.concat(frames, ignore_index=True)


def _fstar(rep: Replicate, runs) -> float:
    """What regret is measured against: the searched optimum or any input evaluated, whichever is lower
    (with limits: the searched feasible optimum or any feasible input evaluated)."""
    return min(rep.optimum[1], min(float(_feasible_f(t).min()) for _, per in runs for _, t in per))


def _feasible_f(t: Trace) -> np.ndarray:
    """The true values of a campaign's trials, +inf where the input breaks a limit or fails."""
    if not t.limits:
        return t.f
    return np.where(t.limits["breaks"] | t.limits["failed"], np.inf, t.f)


def _world_rows(study: Study, reps: list[Replicate], runs_per_rep) -> pd.DataFrame:
    """worlds.csv rows of some replicates: the searched optimum in the user's units and orientation,
    how far the second search disagreed, and the reference regret was measured against."""
    rows = {"replicate": np.array([rep.index for rep in reps], dtype=np.int32)}
    rows.update(study.space.columns(np.array([rep.optimum[0] for rep in reps]).reshape(len(reps), study.space.dim)))
    fstar = np.array([_fstar(rep, runs) for rep, runs in zip(reps, runs_per_rep)])
    best = np.array([rep.optimum[1] for rep in reps])
    rows.update({"best_value": study.sign * best, "optimum_gap": np.array([rep.optimum_gap for rep in reps]),
                 "optimum_searches": np.array([rep.optimum_searches for rep in reps], dtype=np.int32),
                 "optimum_spread": np.array([rep.optimum_spread for rep in reps]),
                 "reference": study.sign * fstar, "reference_from_trial": fstar < best})
    return pd.DataFrame(rows)


def _columns(t: Trace, trial: np.ndarray, fstar: float, penalty: float | None = None) -> dict[str, np.ndarray]:
    """Per-row values of one campaign: regret of the recommendation and of the best seen input.

    With limits, a row whose recommendation breaks a limit or lies where trials fail has failed
    whatever its objective: its regret is ``penalty``, the world's worst feasible regret (the searched
    worst feasible value - f*), so every regret summary counts it among the worst outcomes and never as
    a success; ``rec_breaks`` says which rows these are. The best seen input is the best feasible one.
    """
    seen = np.where(np.isfinite(t.y), _feasible_f(t), np.inf)   # lost and failed trials were never seen
    best = np.minimum.accumulate(seen)
    regret = t.f[t.rec] - fstar
    if t.limits:
        regret = np.where(t.limits["rec_breaks"], max(penalty, 0.0), np.maximum(regret, 0.0))
    regret_seen = np.where(np.isfinite(best), best - fstar, regret)   # nothing seen yet: as the recommendation
    return {"U": t.U, "y": t.y, "f": t.f, "regret": regret, "regret_seen": regret_seen,
            "rec_trial": trial[t.rec], **t.stats, **t.limits}


def _compose(parts: list[tuple[int, dict]], trial: np.ndarray) -> dict[str, np.ndarray]:
    """Rows of the campaign planned for the smallest budget >= each row's trial."""
    out = {k: np.empty((len(trial),) + v.shape[1:], dtype=v.dtype) for k, v in parts[-1][1].items()}
    out["horizon"] = np.empty(len(trial), dtype=np.int32)
    lo = trial[0] - 1                                    # the first campaign also holds the past trials
    for b, cols in parts:
        rows = np.flatnonzero((trial > lo) & (trial <= b))
        for k, v in cols.items():
            out[k][rows] = v[rows]
        out["horizon"][rows] = b
        lo = b
    return out


def _replay_chunk(study: Study, replicates: list[int], lockstep: bool = True) -> pd.DataFrame:
    from threadpoolctl import threadpool_limits

    # One BLAS thread: the matrices are small (n trials), so threads cost more than they
    # save; parallelism comes from running chunks in separate workers instead. A chunk's
    # replicates are one lockstep block.
    with threadpool_limits(1), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        reps = [make_replicate(study, r) for r in replicates]
        runs = _campaigns(study, reps, lockstep=lockstep)
        frames = [_frame(study, rep, per) for rep, per in zip(reps, runs)]
        worlds = _world_rows(study, reps, runs)
    out = pd.concat(frames, ignore_index=True)
    # the chunk's worlds.csv rows travel with it (and are taken off before the traces are used)
    out.attrs["warnings"] = sorted({str(w.message) for w in caught})
    out.attrs["worlds"] = worlds
    return out


def chunk_plan(study: Study, chunk: int | None = None) -> list[list[int]]:
    """Replicates per task. The plan depends on the study alone (never on the number of
    workers), so a resumed run cuts the work exactly as the interrupted one did.

    A chunk is also a lockstep block (one process joins small chunks into larger blocks:
    :func:`_joined`). The default, an eighth of the replicates but at most
    64, keeps at least 8 tasks for workers to share and blocks of up to 64 in large studies
    (past that, blocks stop paying: benchmarks/bench_vs_sklearn.py), fewer when a block's
    pool cross term (replicates x trials x pool points) would pass 128 MiB.
    """
    R = study.replicates
    size = chunk or max(1, min(-(-R // 8), _largest_block(study)))
    return [list(range(s, min(s + size, R))) for s in range(0, R, size)]


def _largest_block(study: Study) -> int:
    """The most replicates one lockstep block holds: 64, fewer when the block's pool cross term
    (replicates x trials x pool points) would pass 128 MiB."""
    c = study.campaign
    history = study.history.size if study.history is not None else 0
    per_replicate = 8 * (history + c.horizon + c.batch) * max(c.pool, 1)
    return max(1, min(64, (128 << 20) // per_replicate))


# Replicates a lockstep block should hold at least (where every worker still gets a block): below
# this the per-trial Python of a block (the polish's ~100 small array operations an iteration) is paid
# by few campaigns. benchmarks/studies/ei-2d.toml (40 replicates, 30 trials of EI, one job): 1.66 s in
# blocks of 5 (the plan's eighth), 1.26 s in 16, 1.16 s in 20, 1.07 s in 40.
_LEAST_BLOCK = 20


def _joined(study: Study, tasks, workers: int = 1):
    """Consecutive chunks joined into lockstep blocks of at least ``_LEAST_BLOCK`` replicates (at most
    :func:`_largest_block`, and small enough to leave every one of ``workers`` processes a block). The
    chunks stay the plan's (what a resumed run finds on disk); only the blocks that compute them grow,
    and a campaign's traces do not depend on its block."""
    total = sum(len(reps) for _, reps in tasks)
    least = min(_LEAST_BLOCK, -(-total // max(workers, 1)))
    cap, groups, size = _largest_block(study), [], 0
    for task in tasks:
        if groups and size < least and size + len(task[1]) <= cap:
            groups[-1].append(task)
            size += len(task[1])
        else:
            groups.append([task])
            size = len(task[1])
    return groups


def _replay_group(study: Study, group, lockstep: bool = True) -> list[tuple[int, pd.DataFrame]]:
    """The chunks ``group`` (``[(chunk index, replicates), ...]``) replayed as one block, handed back as
    ``[(chunk index, frame), ...]``, each frame as :func:`_replay_chunk` would have returned the chunk alone."""
    frame = _replay_chunk(study, [r for _, reps in group for r in reps], lockstep)
    if len(group) == 1:
        return [(group[0][0], frame)]
    worlds, parts = frame.attrs["worlds"], []
    for i, reps in group:
        part = frame[frame["replicate"].isin(reps)].reset_index(drop=True)
        part.attrs = {"warnings": frame.attrs["warnings"],
                      "worlds": worlds[worlds["replicate"].isin(reps)].reset_index(drop=True)}
        parts.append((i, part))
    return parts


def replay_chunks(study: Study, *, jobs: int = 1, chunk: int | None = None, skip=frozenset(),
                  cluster: str | None = None, lockstep: bool = True):
    """Yield ``(chunk index, traces frame)`` as chunks finish (in any order).

    Parameters
    ----------
    jobs : int
        Worker processes (joblib); -1 for all cores. Results do not depend on it.
    chunk : int, optional
        Replicates per chunk (default from :func:`chunk_plan`).
    skip : set of int
        Chunk indices already done (a resumed run).
    cluster : str, optional
        Address of a dask.distributed scheduler (``tcp://host:port``); the chunks then run
        on its workers through joblib's dask backend.
    lockstep : bool
        Advance a chunk's campaigns of lockstep rules together (the default); False replays
        every campaign alone. The traces are identical either way.
    """
    from joblib import Parallel, delayed, parallel_config

    tasks = [(i, reps) for i, reps in enumerate(chunk_plan(study, chunk)) if i not in skip]
    # never more workers than chunks to share: each worker is a process with its own memory
    workers = min(_workers(jobs), max(len(tasks), 1))
    # the default plan's chunks are computed in blocks of at least _LEAST_BLOCK replicates where that still
    # leaves every local worker a block (a chunk size asked for is kept as the block, as the tests of block
    # independence need; a cluster's workers are not counted here, so it gets the plan's chunks)
    join = chunk is None and lockstep and cluster is None
    groups = _joined(study, tasks, workers) if join else [[task] for task in tasks]
    workers = min(workers, max(len(groups), 1))
    if cluster is None and workers == 1:        # here, in this process (Ctrl-C stays this process's)
        for group in groups:
            yield from _replay_group(study, group, lockstep)
        return
    calls = (delayed(_indexed)(study, group, lockstep) for group in groups)
    if cluster is None:
        try:
            for parts in Parallel(n_jobs=workers, return_as="generator_unordered")(calls):
                yield from parts
        except BaseException:
            _stop_local_workers()   # Ctrl-C, SIGTERM or an error: no worker outlives the run
            raise
        return
    client = connect(cluster) if isinstance(cluster, str) else cluster
    try:
        with parallel_config(backend="dask", wait_for_workers_timeout=60):
            n = max(1, sum(client.nthreads().values()))
            for parts in Parallel(n_jobs=n, return_as="generator_unordered")(calls):
                yield from parts
    finally:
        if isinstance(cluster, str):
            client.close()


_CLUSTER_ADDRESS = re.compile(r"^(tcp|tls)://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})$")


def connect(cluster: str, *, timeout: float = 10.0):
    """A dask.distributed client of the scheduler at ``cluster`` (``tcp://HOST:PORT``).

    Raises
    ------
    StudyError
        One line for a malformed address, a missing dask installation or a scheduler that
        cannot be reached within ``timeout`` seconds.
    """
    from ..study.spec import StudyError
    m = _CLUSTER_ADDRESS.match(cluster or "")
    if m is None or not 0 < int(m.group(3)) < 65536:
        raise StudyError("--cluster", "", f"must be a scheduler address like tcp://HOST:8786 (tcp:// or tls://, "
                         f"a host and a port 1-65535); got {cluster!r}")
    try:
        from dask.distributed import Client
    except ImportError:  # pragma: no cover - depends on the installation
        raise StudyError("--cluster", "", "needs dask and distributed: pip install 'simlab[cluster]'") from None
    try:
        return Client(cluster, timeout=timeout)
    except (OSError, TimeoutError, ValueError) as exc:
        reason = " ".join(str(exc).split())[:120] or type(exc).__name__
        raise StudyError("--cluster", "", f"cannot reach a dask scheduler at {cluster} ({reason}); start one with "
                         "`dask scheduler` or check the address") from None


def _indexed(study: Study, group, lockstep: bool = True):
    """A worker's task: :func:`_replay_group`."""
    import signal
    import threading
    if threading.current_thread() is threading.main_thread():
        # A worker process: Ctrl-C reaches the whole process group, but the parent stops
        # the workers itself; a worker printing its own KeyboardInterrupt is only noise.
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    return _replay_group(study, group, lockstep)


def replay(study: Study, *, jobs: int = 1, chunk: int | None = None, progress=None,
           cluster: str | None = None, lockstep: bool = True) -> pd.DataFrame:
    """Replay the whole study and return its traces frame (ordered by replicate, policy, trial).

    ``progress`` is called with the number of campaigns finished after each chunk; other
    parameters as in :func:`replay_chunks`. Warnings raised in workers are collected in
    ``traces.attrs["warnings"]``. :func:`replay_study` also returns the worlds table.
    """
    return replay_study(study, jobs=jobs, chunk=chunk, progress=progress, cluster=cluster, lockstep=lockstep)[0]


def replay_study(study: Study, *, jobs: int = 1, chunk: int | None = None, progress=None,
                 cluster: str | None = None, lockstep: bool = True) -> tuple[pd.DataFrame, pd.DataFrame]:
    """As :func:`replay`, returning ``(traces, worlds)``: worlds has one row per replicate
    (:data:`WORLD_COLUMNS` and the optimum's inputs), as written to ``worlds.csv``."""
    frames, worlds, messages = {}, {}, set()
    for i, frame in replay_chunks(study, jobs=jobs, chunk=chunk, cluster=cluster, lockstep=lockstep):
        worlds[i] = frame.attrs.pop("worlds")
        frames[i] = frame
        messages.update(frame.attrs.get("warnings", ()))
        if progress is not None:
            progress(frame["replicate"].nunique() * len(study.policies))
    traces = pd.concat([frames[i] for i in sorted(frames)], ignore_index=True)
    traces["policy"] = pd.Categorical(traces["policy"], categories=list(study.labels))
    traces.attrs = {"warnings": sorted(messages)}
    table = pd.concat([worlds[i] for i in sorted(worlds)], ignore_index=True)
    return traces, table
