"""One campaign: initial design, then trials chosen by a policy until the budget is spent."""

from __future__ import annotations

from types import SimpleNamespace
from typing import Callable

import numpy as np

from ..model.belief import Belief
from ..model.feasible import FeasibleBelief
from ..model.gp import Posterior
from ..policies import Context, Policy
from ..worlds.draws import World
from .trace import Trace, allocate, fill_round, past_trials

__all__ = ["run_campaign"]


def run_campaign(policy: Policy, belief: Belief, world: World, *, design: np.ndarray,
                 sequence: np.ndarray, observe: Callable[[float, int], float], budget: int,
                 pool: np.ndarray, rng: np.random.Generator, batch: int = 1,
                 history: tuple[np.ndarray, np.ndarray] | None = None,
                 refit_rng: np.random.Generator | None = None, library: bool = False,
                 snap: Callable[[np.ndarray], np.ndarray] | None = None, stop=None, limits=None,
                 feasible: Callable[..., FeasibleBelief] | None = None) -> Trace:
    """Replay one campaign.

    Parameters
    ----------
    design : ndarray of shape (n0, d)
        Initial space-filling inputs (count toward the budget).
    sequence : ndarray of shape (horizon, d)
        The replicate's Sobol' sequence (for the non-adaptive `sobol` policy).
    observe : callable
        ``observe(f, t)``: the observation of true value f at new trial t (shared noise
        draws for every policy on this replicate); NaN when the trial is lost.
    budget : int
        New trials in this campaign.
    pool : ndarray of shape (m, d)
        Candidate inputs the acquisition is scored on before polishing.
    rng : numpy.random.Generator
        The policy's own stream for this replicate.
    batch : int
        Trials per round: all trials of a round are chosen before any result is back.
    history : (ndarray of shape (h, d), ndarray of shape (h,)), optional
        Trials already run (unit cube, internal orientation). They come first in the trace
        and in the posterior; the budget counts new trials only.
    refit_rng : numpy.random.Generator, optional
        Stream for the random restarts of belief refits (``belief.refit_every > 0``).
    library : bool
        The pool is a [candidates] library: policies choose its rows (``Context.library``).
    snap : callable, optional
        Moves a chosen input to allowed values (``Space.snap``: stepped and categorical inputs)
        before the world, the posterior and any pending-trial rule see it.
    stop : callable, optional
        ``stop(post, h=, n=)`` starts the record of what the study's stopping rules read after
        each trial (``simlab.stopping.StopRecorder.begin`` bound to this replicate and policy),
        kept in ``Trace.stats``; None: nothing recorded.
    limits : WorldLimits, optional
        The replicate's [[limit]]s and failing region (``simlab.worlds.limits``): a trial that fails
        returns nothing (no objective, no limit values), one that works returns its measured limits.
    feasible : callable, optional
        ``feasible(pool=, capacity=)`` makes the campaign's :class:`FeasibleBelief` (with ``limits``):
        the policy reads it as ``post.feasible``, and the recommendation comes from it.
    """
    d = sequence.shape[1]
    H, yH = past_trials(history, d)
    h, n = len(yH), len(yH) + budget
    post = Posterior(belief.kernel, belief.mean, belief.noise, pool=pool, capacity=n + batch)
    policy.start(Context(pool=pool, rng=rng, sequence=sequence, horizon=budget, posterior=post, library=library))
    feas = feasible(pool=pool, capacity=n + batch) if limits is not None else None
    post.feasible = feas
    U, y, f, rec = allocate(n, d)
    failed, breaks, rec_breaks = (np.zeros(n, dtype=bool) for _ in range(3))
    rows = {np.ascontiguousarray(r).tobytes() for r in pool} if library else None   # every trial must be a row
    seen: list[int] = []                                   # trace rows the posterior has observed
    log = stop(post, h=h, n=n) if stop is not None else None
    for i in range(h):                                     # past trials, already observed
        U[i], y[i], f[i] = H[i], yH[i], world(H[i : i + 1])[0]
        post.add(H[i], yH[i])
        seen.append(i)
        rec[i] = seen[post.recommend()]
    for start in range(0, budget, batch):                  # one round of up to `batch` trials
        ts = range(start, min(start + batch, budget))
        chosen = _fill_round(policy, post, ts, design, snap)  # choose
        for t, u in zip(ts, chosen):
            if library and u.tobytes() not in rows:
                raise RuntimeError(f"policy {policy.label!r} chose an input that is not a row of the library: {u}")
            i = h + t
            U[i], f[i] = u, world(u[None, :])[0]           # evaluate
            if feas is not None and limits.fails(u)[0]:    # a failed trial returns nothing, and says so
                failed[i], y[i] = True, np.nan
                feas.add(u, worked=False)
            else:
                y[i] = observe(f[i], t)
                breaks[i] = feas is not None and limits.breaks(u)[0]   # a lost trial ran: it may still break one
            if np.isfinite(y[i]):                          # update (a lost trial teaches nothing)
                post.add(u, y[i])
                seen.append(i)
                if feas is not None:
                    feas.add(u, worked=True, values=limits.measure(u, t))
            if feas is None:                               # record
                rec[i] = seen[post.recommend()] if seen else i
            else:                                          # among the trials believed feasible
                rec[i] = seen[feas.recommend(post)] if seen else i
                rec_breaks[i] = limits.infeasible(U[rec[i]][None, :])[0]
            if log is not None:
                log.after(post, i)                         # what stopping rules read
        k = belief.refit_every
        if k and (ts.stop // k > ts.start // k):           # a multiple of k trials is complete
            _refit(post, refit_rng)
    return Trace(U=U, y=y, f=f, rec=rec, stats=log.columns(0) if log is not None else {},
                 limits={"failed": failed, "breaks": breaks, "rec_breaks": rec_breaks} if feas is not None else {})


def _refit(post: Posterior, rng: np.random.Generator) -> None:
    """Maximum-likelihood refit of the belief on the data observed so far, warm-started.

    Two starts: the current hyperparameters and one random point. With too little data
    (fewer than d + 2 observations) or a constant response the belief is left as it is.
    """
    from ..model.fit import fit_hyperparameters

    kernel = post.kernel
    if post.n < kernel.dim + 2 or np.ptp(post.y) == 0:
        return
    current = SimpleNamespace(lengthscale=kernel.lengthscale, amplitude=kernel.amplitude,
                              noise=max(post.noise, 1e-12))
    try:
        fit = fit_hyperparameters(kernel.name, post.X, post.y, restarts=2, rng=rng, start=current)
    except (ValueError, np.linalg.LinAlgError):
        return
    post.refit(type(kernel)(fit.lengthscale, fit.amplitude), fit.mean, fit.noise)


def _fill_round(policy: Policy, post: Posterior, ts: range, design: np.ndarray, snap=None) -> list[np.ndarray]:
    """Choose every trial of a round before any of its results is back (:func:`~.trace.fill_round`)."""
    def pick(t):
        u = np.asarray(design[t] if t < len(design) else policy.choose(post, t), dtype=float)
        return u if snap is None else snap(u)

    return fill_round(policy, post, ts, pick, policy.hold)
