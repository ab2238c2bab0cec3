"""Replay every policy on every replicate, in parallel, with keyed random streams."""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import qmc

from ..columns import TRACE_COLUMNS, WORLD_COLUMNS
from ..model.kernels import make_kernel
from ..policies import POLICIES, Policy
from ..rng import stream
from ..study.spec import Prior, Study
from ..worlds import functions
from ..worlds.draws import (
    ConditionedWorld,
    FunctionWorld,
    World,
)
from ..worlds.kinds import WORLD_KINDS
from ..worlds.noise import Observer
from ..model.belief import Belief
from .campaign import run_campaign
from .trace import Trace

__all__ = ["Replicate", "make_belief", "make_world", "make_replicate", "make_policy", "make_observer",
           "replay_replicate", "replay", "replay_study", "replay_chunks", "chunk_plan",
           "history_arrays", "world_optimum", "TRACE_COLUMNS", "WORLD_COLUMNS", "connect"]



def _kernel(prior: Prior, study: Study):
    # Lengthscales are given in input units; campaigns work on the unit cube.
    return make_kernel(prior.kernel, np.asarray(prior.lengthscale) / study.space.width, prior.amplitude)


def make_belief(study: Study) -> Belief:
    b = study.belief
    return Belief(kernel=_kernel(b, study), mean=study.sign * b.mean, noise=b.noise,
                  refit_every=study.refit_every)


def make_world(study: Study, replicate: int) -> World:
    """The replicate's true objective (internal orientation, unit cube)."""
    w = study.world
    if w.function is not None:
        return FunctionWorld(functions.FUNCTIONS[w.function])
    kernel = _kernel(w.prior, study)
    if w.lengthscale_within != 1.0 or w.amplitude_within != 1.0:
        kernel = _uncertain(kernel, w, stream(study.seed, replicate, "hyper"))
    rng = stream(study.seed, replicate, "world")
    mean = study.sign * w.prior.mean
    world = WORLD_KINDS[w.method].draw(kernel, mean, rng, dict(w.method_settings))
    if study.history is not None:
        H, yH = history_arrays(study)
        world = ConditionedWorld(world, kernel, H, yH, w.noise, rng)
    return world


def history_arrays(study: Study) -> tuple[np.ndarray, np.ndarray] | None:
    """Past trials on the unit cube and in the internal orientation, or None."""
    if study.history is None:
        return None
    return study.space.to_unit(np.array(study.history.X)), study.sign * np.array(study.history.y)


def _uncertain(kernel, w, rng):
    """The replicate's own lengthscales (each input independently) and amplitude.

    ``within = f`` means log-normal around the stated value with 95 % of draws inside
    ``[value / f, value * f]``: log sd = log(f) / 1.959964 (the normal 97.5 % quantile).
    """
    z = rng.standard_normal(kernel.dim + 1)
    ls = kernel.lengthscale * np.exp(np.log(w.lengthscale_within) / 1.959964 * z[:-1])
    amp = kernel.amplitude * np.exp(np.log(w.amplitude_within) / 1.959964 * z[-1])
    return type(kernel)(ls, amp)


def _sobol(d: int, n: int, rng) -> np.ndarray:
    # Draw a power of two and keep the first n points: prefixes of a scrambled Sobol'
    # sequence keep their low discrepancy and this avoids SciPy's balance warning.
    return qmc.Sobol(d, seed=rng).random_base2(max(int(np.ceil(np.log2(max(n, 2)))), 1))[:n]


@dataclass
class Replicate:
    """Everything shared by all policies on one replicate (the paired design)."""

    index: int
    world: World
    optimum: tuple[np.ndarray, float]   # the better of two independent searches (internal orientation)
    design: np.ndarray      # (n0, d)
    sequence: np.ndarray    # (B, d)
    shocks: np.ndarray      # (B,) unit-variance noise draws, one per trial
    lost: np.ndarray        # (B,) bool: the trial is lost
    pool: np.ndarray        # (m, d)
    optimum_gap: float = 0.0   # |first search - second search| >= 0, objective units


def world_optimum(world: World, study: Study, r: int) -> tuple[np.ndarray, float, float]:
    """The world's optimum from two independent searches: location, the better value, and the gap.

    The searches use their own keyed streams ("optimum" and "optimum_check"), so their
    Sobol' points and zoom points differ. Regret uses the better of the two (a missed
    optimum makes regret too small, so never the worse one); ``gap`` = how far they
    disagreed, >= 0, in objective units: a lower bound on how far the better one may
    still be from the true optimum.
    """
    u1, v1 = world.optimum(stream(study.seed, r, "optimum"))
    if isinstance(world, FunctionWorld):
        return u1, v1, 0.0        # the published optimum: nothing to search
    u2, v2 = world.optimum(stream(study.seed, r, "optimum_check"))
    u, v = (u1, v1) if v1 <= v2 else (u2, v2)
    return u, v, abs(v1 - v2)


def make_observer(study: Study) -> Observer:
    """The study's observation model (noise shape, growth, lost trials)."""
    w = study.world
    ref = w.prior if w.prior is not None else study.belief
    return Observer(sd=w.noise, kind=w.noise_kind, settings=w.noise_settings, growth=w.noise_growth,
                    center=ref.mean, scale=ref.amplitude, lost=w.lost, sign=study.sign)


def make_replicate(study: Study, r: int) -> Replicate:
    d, c = study.space.dim, study.campaign
    B = c.horizon
    world = make_world(study, r)
    u_best, v_best, gap = world_optimum(world, study, r)
    rng = stream(study.seed, r, "design")
    sequence = _sobol(d, B, rng)
    if c.design == "sobol":
        design = sequence[: c.initial]
    elif c.design == "lhs":
        design = qmc.LatinHypercube(d, seed=rng).random(c.initial)
    else:
        design = rng.random((c.initial, d))
    shocks, lost = make_observer(study).draw(stream(study.seed, r, "noise"), B)
    pool = _sobol(d, c.pool, stream(study.seed, r, "pool"))
    return Replicate(index=r, world=world, optimum=(u_best, v_best), design=design, sequence=sequence,
                     shocks=shocks, lost=lost, pool=pool, optimum_gap=gap)


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

    belief, observer, history = make_belief(study), make_observer(study), history_arrays(study)
    c = study.campaign
    out: list[list] = [[] for _ in reps]
    for spec in study.policies:
        probe = make_policy(spec)
        horizons = c.budgets if probe.horizon_aware else (c.horizon,)
        together = lockstep and fits_lockstep(probe, belief, batch=c.batch, lost=study.world.lost)
        per: list[list[tuple[int, Trace]]] = [[] for _ in reps]
        for b in horizons:
            if together:
                rngs = [stream(study.seed, rep.index, "policy", spec.label) for rep in reps]
                traces = run_block(make_policy(spec), belief, reps, observer=observer, budget=b, rngs=rngs,
                                   history=history)
            else:
                traces = [_alone(study, spec, belief, observer, history, rep, b) for rep in reps]
            for k, trace in enumerate(traces):
                per[k].append((b, trace))
        for k in range(len(reps)):
            out[k].append((spec.label, per[k]))
    return out


def _alone(study: Study, spec, belief: Belief, observer: Observer, history, rep: Replicate, budget: int) -> Trace:
    """One campaign replayed on its own (the reference path)."""
    def observe(f, t):
        return observer(f, rep.shocks[t], rep.lost[t])

    r = rep.index
    return run_campaign(make_policy(spec), belief, rep.world, design=rep.design, sequence=rep.sequence,
                        observe=observe, budget=budget, pool=rep.pool,
                        rng=stream(study.seed, r, "policy", spec.label), batch=study.campaign.batch,
                        history=history, refit_rng=stream(study.seed, r, "refit", spec.label))


def _frame(study: Study, rep: Replicate, runs) -> pd.DataFrame:
    """The traces frame of one replicate from its campaigns ``[(label, [(budget, trace)])]``."""
    c, r = study.campaign, rep.index
    fstar = _fstar(rep, runs)
    h = study.history.size if study.history is not None else 0
    trial = np.arange(1 - h, c.horizon + 1, dtype=np.int32)   # past trials -h+1 .. 0, then 1 .. B
    frames = []
    for label, per in runs:
        cols = _compose([(b, _columns(t, trial[: h + b], fstar)) for b, t in per], trial)
        X = study.space.from_unit(cols.pop("U"))
        frame = {
            "policy": label,
            "replicate": np.full(len(trial), r, dtype=np.int32),
            "trial": trial,
            "round": np.where(trial >= 1, (trial - 1) // c.batch + 1, 0).astype(np.int32),
            "initial": (trial >= 1) & (trial <= c.initial),
            "history": trial <= 0,
        }
        frame.update({name: X[:, j] for j, name in enumerate(study.space.names)})
        frame.update({"y": study.sign * cols["y"], "f": study.sign * cols["f"],
                      "lost": ~np.isfinite(cols["y"]), "regret": cols["regret"],
                      "regret_seen": cols["regret_seen"], "rec_trial": cols["rec_trial"],
                      "horizon": cols["horizon"]})
        frames.append(pd.DataFrame(frame))
    return pd.concat(frames, ignore_index=True)


def _fstar(rep: Replicate, runs) -> float:
    """What regret is measured against: the searched optimum or any input evaluated, whichever is lower."""
    return min(rep.optimum[1], min(float(t.f.min()) for _, per in runs for _, t in per))


def _world_rows(study: Study, reps: list[Replicate], runs_per_rep) -> pd.DataFrame:
    """worlds.csv rows of some replicates: the searched optimum in the user's units and orientation,
    how far the second search disagreed, and the reference regret was measured against."""
    rows = {"replicate": np.array([rep.index for rep in reps], dtype=np.int32)}
    X = study.space.from_unit(np.array([rep.optimum[0] for rep in reps]).reshape(len(reps), study.space.dim))
    rows.update({name: X[:, j] for j, name in enumerate(study.space.names)})
    fstar = np.array([_fstar(rep, runs) for rep, runs in zip(reps, runs_per_rep)])
    best = np.array([rep.optimum[1] for rep in reps])
    rows.update({"best_value": study.sign * best, "optimum_gap": np.array([rep.optimum_gap for rep in reps]),
                 "reference": study.sign * fstar, "reference_from_trial": fstar < best})
    return pd.DataFrame(rows)


def _columns(t: Trace, trial: np.ndarray, fstar: float) -> dict[str, np.ndarray]:
    """Per-row values of one campaign: regret of the recommendation and of the best seen input."""
    seen = np.where(np.isfinite(t.y), t.f, np.inf)        # lost trials were never seen
    best = np.minimum.accumulate(seen)
    best = np.where(np.isfinite(best), best, t.f[t.rec])  # nothing seen yet: the current input
    return {"U": t.U, "y": t.y, "f": t.f, "regret": t.f[t.rec] - fstar, "regret_seen": best - fstar,
            "rec_trial": trial[t.rec]}


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

    A chunk is also a lockstep block. The default, an eighth of the replicates but at most
    64, keeps at least 8 tasks for workers to share and blocks of up to 64 in large studies
    (past that, blocks stop paying: benchmarks/bench_vs_sklearn.py), fewer when a block's
    pool cross term (replicates x trials x pool points) would pass 128 MiB.
    """
    R = study.replicates
    c = study.campaign
    history = study.history.size if study.history is not None else 0
    per_replicate = 8 * (history + c.horizon + c.batch) * max(c.pool, 1)
    size = chunk or max(1, min(64, -(-R // 8), (128 << 20) // per_replicate))
    return [list(range(s, min(s + size, R))) for s in range(0, R, size)]


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
    if cluster is None and workers == 1:
        for i, reps in tasks:
            yield i, _replay_chunk(study, reps, lockstep)
        return
    calls = (delayed(_indexed)(study, i, reps, lockstep) for i, reps in tasks)
    if cluster is None:
        try:
            yield from Parallel(n_jobs=workers, return_as="generator_unordered")(calls)
        except BaseException:
            _stop_local_workers()   # Ctrl-C, SIGTERM or an error: no worker outlives the run
            raise
        return
    client = connect(cluster) if isinstance(cluster, str) else cluster
    try:
        with parallel_config(backend="dask", wait_for_workers_timeout=60):
            n = max(1, sum(client.nthreads().values()))
            yield from Parallel(n_jobs=n, return_as="generator_unordered")(calls)
    finally:
        if isinstance(cluster, str):
            client.close()


def _workers(jobs: int) -> int:
    if jobs == -1:
        import os
        return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    return max(int(jobs), 1)


def _stop_local_workers() -> None:
    """Kill joblib's loky worker processes now (they would otherwise idle on for minutes)."""
    try:
        from joblib.externals.loky import reusable_executor
    except ImportError:  # pragma: no cover - depends on the joblib version
        return
    executor = getattr(reusable_executor, "_executor", None)
    if executor is not None:
        executor.shutdown(wait=True, kill_workers=True)


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


def _indexed(study: Study, i: int, reps: list[int], lockstep: bool = True):
    import signal
    import threading
    if threading.current_thread() is threading.main_thread():
        # A worker process: Ctrl-C reaches the whole process group, but the parent stops
        # the workers itself; a worker printing its own KeyboardInterrupt is only noise.
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    return i, _replay_chunk(study, reps, lockstep)


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
