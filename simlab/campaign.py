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
    U : ndarray of shape (B, d)
        Evaluated inputs.
    y, f : ndarray of shape (B,)
        Observed and noise-free values.
    rec : ndarray of shape (B,)
        0-based trial index of the recommendation after each trial.
    """

    U: np.ndarray
    y: np.ndarray
    f: np.ndarray
    rec: np.ndarray


def run_campaign(policy: Policy, belief: Belief, world: World, *, design: np.ndarray,
                 sequence: np.ndarray, noise: np.ndarray, pool: np.ndarray,
                 rng: np.random.Generator) -> Trace:
    """Replay one campaign.

    Parameters
    ----------
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
    budget, d = len(noise), design.shape[1]
    post = Posterior(belief.kernel, belief.mean, belief.noise, pool=pool, capacity=budget)
    policy.start(Context(pool=pool, rng=rng, sequence=sequence, horizon=budget, posterior=post))
    U, y, f, rec = np.empty((budget, d)), np.empty(budget), np.empty(budget), np.empty(budget, dtype=int)
    for t in range(budget):
        u = design[t] if t < len(design) else policy.choose(post, t)   # choose
        f[t] = world(u[None, :])[0]                                       # evaluate
        y[t] = f[t] + noise[t]
        post.add(u, y[t])                                                 # update
        U[t], rec[t] = u, post.recommend()                                # record
    return Trace(U=U, y=y, f=f, rec=rec)
