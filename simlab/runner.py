"""Replay every policy on every replicate, in parallel, with keyed random streams."""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import qmc

from . import functions
from .campaign import Belief, Trace, run_campaign
from .kernels import make_kernel
from .policies import POLICIES, Policy
from .rng import stream
from .spec import Prior, Study
from .worlds import ConditionedWorld, FeatureWorld, FunctionWorld, GridWorld, World

__all__ = ["Replicate", "make_belief", "make_world", "make_replicate", "make_policy",
           "replay_replicate", "replay", "time_replicate", "history_arrays", "TRACE_COLUMNS"]

TRACE_COLUMNS = ("policy", "replicate", "trial", "initial", "history", "y", "f", "regret", "regret_seen",
                 "rec_trial")


def _kernel(prior: Prior, study: Study):
    # Lengthscales are given in input units; campaigns work on the unit cube.
    return make_kernel(prior.kernel, np.asarray(prior.lengthscale) / study.space.width, prior.amplitude)


def make_belief(study: Study) -> Belief:
    b = study.belief
    return Belief(kernel=_kernel(b, study), mean=study.sign * b.mean, noise=b.noise)


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
    if w.method == "grid":
        world = GridWorld(kernel, mean, rng, w.grid)
    else:
        world = FeatureWorld(kernel, mean, rng, w.features)
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
    optimum: tuple[np.ndarray, float]
    design: np.ndarray      # (n0, d)
    sequence: np.ndarray    # (B, d)
    noise: np.ndarray       # (B,)
    pool: np.ndarray        # (m, d)


def make_replicate(study: Study, r: int) -> Replicate:
    d, c = study.space.dim, study.campaign
    B = c.horizon
    world = make_world(study, r)
    optimum = world.optimum(stream(study.seed, r, "optimum"))
    rng = stream(study.seed, r, "design")
    sequence = _sobol(d, B, rng)
    if c.design == "sobol":
        design = sequence[: c.initial]
    elif c.design == "lhs":
        design = qmc.LatinHypercube(d, seed=rng).random(c.initial)
    else:
        design = rng.random((c.initial, d))
    noise = study.world.noise * stream(study.seed, r, "noise").standard_normal(B)
    pool = _sobol(d, c.pool, stream(study.seed, r, "pool"))
    return Replicate(index=r, world=world, optimum=optimum, design=design, sequence=sequence,
                     noise=noise, pool=pool)


def make_policy(spec) -> Policy:
    return POLICIES[spec.rule](spec.label, **spec.options)


def replay_replicate(study: Study, r: int, *, rep: Replicate | None = None) -> pd.DataFrame:
    """All policies on replicate r: a traces frame in the user's units and orientation.

    Regret is measured against the better of the world's optimum and every input any
    policy evaluated on this replicate, so it is never negative and stays paired.
    """
    rep = rep or make_replicate(study, r)
    belief = make_belief(study)
    history = history_arrays(study)
    traces: list[tuple[str, Trace]] = []
    for spec in study.policies:
        trace = run_campaign(make_policy(spec), belief, rep.world, design=rep.design,
                             sequence=rep.sequence, noise=rep.noise, pool=rep.pool,
                             rng=stream(study.seed, r, "policy", spec.label), history=history)
        traces.append((spec.label, trace))
    fstar = min(rep.optimum[1], min(float(t.f.min()) for _, t in traces))
    frames = []
    B, n0 = study.campaign.horizon, study.campaign.initial
    h = study.history.size if study.history is not None else 0
    trial = np.arange(1 - h, B + 1, dtype=np.int32)   # past trials -h+1 .. 0, then 1 .. B
    for label, t in traces:
        X = study.space.from_unit(t.U)
        frame = {
            "policy": label,
            "replicate": np.full(h + B, r, dtype=np.int32),
            "trial": trial,
            "initial": (trial >= 1) & (trial <= n0),
            "history": trial <= 0,
        }
        frame.update({name: X[:, j] for j, name in enumerate(study.space.names)})
        frame.update({
            "y": study.sign * t.y,
            "f": study.sign * t.f,
            "regret": t.f[t.rec] - fstar,
            "regret_seen": np.minimum.accumulate(t.f) - fstar,
            "rec_trial": trial[t.rec],
        })
        frames.append(pd.DataFrame(frame))
    return pd.concat(frames, ignore_index=True)


def _replay_chunk(study: Study, replicates: list[int]) -> pd.DataFrame:
    from threadpoolctl import threadpool_limits

    # One BLAS thread: the matrices are small (n trials), so threads cost more than they
    # save; parallelism comes from running replicates in separate workers instead.
    with threadpool_limits(1), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        frames = [replay_replicate(study, r) for r in replicates]
    out = pd.concat(frames, ignore_index=True)
    out.attrs["warnings"] = sorted({str(w.message) for w in caught})
    return out


def time_replicate(study: Study, *, replicates: int = 2) -> float:
    """Median seconds per replicate over the first few replicates, run as a worker would."""
    import time

    times = []
    for r in range(min(replicates, study.replicates)):
        t0 = time.perf_counter()
        _replay_chunk(study, [r])
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def replay(study: Study, *, jobs: int = 1, chunk: int | None = None, progress=None) -> pd.DataFrame:
    """Replay the whole study and return its traces frame (ordered by replicate, policy, trial).

    Parameters
    ----------
    jobs : int
        Worker processes (joblib); -1 for all cores. Results do not depend on it.
    chunk : int, optional
        Replicates per task; default splits the work into about 8 tasks per worker.
    progress : callable, optional
        Called with the number of campaigns finished after each task.
    """
    from joblib import Parallel, delayed

    R = study.replicates
    n_workers = jobs if jobs > 0 else max(1, (__import__("os").cpu_count() or 1))
    chunk = chunk or max(1, min(25, R // (8 * n_workers) or 1))
    tasks = [list(range(s, min(s + chunk, R))) for s in range(0, R, chunk)]
    frames, messages = [], set()
    if jobs == 1:
        results = (_replay_chunk(study, t) for t in tasks)
    else:
        results = Parallel(n_jobs=jobs, return_as="generator")(delayed(_replay_chunk)(study, t) for t in tasks)
    for t, frame in zip(tasks, results):
        frames.append(frame)
        messages.update(frame.attrs.get("warnings", ()))
        if progress is not None:
            progress(len(t) * len(study.policies))
    traces = pd.concat(frames, ignore_index=True)
    traces["policy"] = pd.Categorical(traces["policy"], categories=list(study.labels))
    traces.attrs = {"warnings": sorted(messages)}
    return traces
