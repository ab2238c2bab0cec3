"""One campaign: initial design, then trials chosen by a policy until the budget is spent."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .gp import Posterior
from .kernels import Kernel
from .policies import Context, Policy
from .worlds import World

__all__ = ["Belief", "Trace", "run_campaign"]


@dataclass(frozen=True)
class Belief:
    """The campaign's model, on the unit cube and in the internal (minimising) orientation."""

    kernel: Kernel
    mean: float
    noise: float


@dataclass
class Trace:
    """Per-trial record of one campaign, internal orientation, unit-cube inputs.

    Attributes
    ----------
    U : ndarray of shape (h + B, d)
        Evaluated inputs: h past trials (if any), then B new ones.
    y, f : ndarray of shape (h + B,)
        Observed and noise-free values.
    rec : ndarray of shape (h + B,)
        0-based row index (into these arrays) of the recommendation after each row.
    """

    U: np.ndarray
    y: np.ndarray
    f: np.ndarray
    rec: np.ndarray


def run_campaign(policy: Policy, belief: Belief, world: World, *, design: np.ndarray,
                 sequence: np.ndarray, noise: np.ndarray, pool: np.ndarray,
                 rng: np.random.Generator, history: tuple[np.ndarray, np.ndarray] | None = None) -> Trace:
    """Replay one campaign.

    Parameters
    ----------
    history : (ndarray of shape (h, d), ndarray of shape (h,)), optional
        Trials already run (unit cube, internal orientation). They come first in the trace
        and in the posterior; the budget counts new trials only.
    design : ndarray of shape (n0, d)
        Initial space-filling inputs (count toward the budget).
    sequence : ndarray of shape (B, d)
        The replicate's Sobol' sequence (for the non-adaptive `sobol` policy).
    noise : ndarray of shape (B,)
        Observation noise added at each trial, shared by every policy on this replicate.
    pool : ndarray of shape (m, d)
        Candidate inputs the acquisition is scored on before polishing.
    rng : numpy.random.Generator
        The policy's own stream for this replicate.
    """
    budget, d = len(noise), sequence.shape[1]
    H, yH = history if history is not None else (np.empty((0, d)), np.empty(0))
    h = len(yH)
    post = Posterior(belief.kernel, belief.mean, belief.noise, pool=pool, capacity=h + budget)
    policy.start(Context(pool=pool, rng=rng, sequence=sequence, horizon=budget, posterior=post))
    n = h + budget
    U, y, f, rec = np.empty((n, d)), np.empty(n), np.empty(n), np.empty(n, dtype=int)
    for i in range(n):
        t = i - h                                             # new-trial index; < 0 for past trials
        u = H[i] if t < 0 else design[t] if t < len(design) else policy.choose(post, t)  # choose
        f[i] = world(u[None, :])[0]                           # evaluate
        y[i] = yH[i] if t < 0 else f[i] + noise[t]
        post.add(u, y[i])                                     # update
        U[i], rec[i] = u, post.recommend()                    # record
    return Trace(U=U, y=y, f=f, rec=rec)
