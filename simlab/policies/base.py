"""The policy interface: options, per-campaign context, and the pool-then-polish acquisition base."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from ..gp import Posterior
from ..optimize import distinct_best, polish

__all__ = ["Option", "Context", "Policy", "Acquisition"]


@dataclass(frozen=True)
class Option:
    """A setting a study file may give a policy: default, type and allowed range."""

    default: Any
    kind: type = float
    low: float | None = None
    high: float | None = None
    help: str = ""


@dataclass
class Context:
    """What a policy may use during one campaign besides the posterior."""

    pool: np.ndarray            # (m, d) quasi-random candidate inputs on the unit cube
    rng: np.random.Generator    # the policy's own stream for this replicate
    sequence: np.ndarray        # (horizon, d) the replicate's Sobol' sequence (initial design prefix)
    horizon: int                # trials in the campaign
    posterior: Posterior


class Policy:
    """Chooses the next trial. Subclasses set ``rule`` and implement :meth:`choose`."""

    rule: ClassVar[str] = ""
    options: ClassVar[dict[str, Option]] = {}

    def __init__(self, label: str | None = None, **settings):
        self.label = label or self.rule
        for key, opt in self.options.items():
            setattr(self, key, settings.pop(key, opt.default))
        if settings:
            raise ValueError(f"unknown setting(s) for rule {self.rule!r}: {', '.join(settings)}; "
                             f"allowed: {', '.join(self.options) or 'none'}")
        self.ctx: Context | None = None

    def start(self, ctx: Context) -> None:
        """Called once before the first trial the policy chooses."""
        self.ctx = ctx

    def choose(self, post: Posterior, t: int) -> np.ndarray:  # pragma: no cover - abstract
        """The next input (d,) on the unit cube; t is the 0-based trial index."""
        raise NotImplementedError


class Acquisition(Policy):
    """A rule that scores inputs: scored over the pool, the best few polished by L-BFGS-B.

    Subclasses implement :meth:`score` (larger is better), or :meth:`_from_moments` when
    the score is a function of the posterior mean and sd alone.
    """

    n_starts: ClassVar[int] = 4       # pool points polished by L-BFGS-B (0: take the best pool point)
    polish_iterations: ClassVar[int] = 30
    sd_floor: ClassVar[float] = 1e-9  # relative to the prior sd; keeps z finite at evaluated inputs

    def prepare(self, post: Posterior) -> None:
        """Per-trial state (incumbent, function sample) computed before scoring."""

    def _from_moments(self, mu, sd):  # pragma: no cover - abstract
        """Score and its partial derivatives with respect to mu and sd, each (q,)."""
        raise NotImplementedError

    def _value(self, mu, sd):
        """Score alone (no derivatives); override where that is cheaper."""
        return self._from_moments(mu, sd)[0]

    def _floor(self, post, sd):
        return np.maximum(sd, self.sd_floor * post.kernel.amplitude)

    def score_pool(self, post: Posterior) -> np.ndarray:
        mu, sd = post.pool_moments()
        return self._value(mu, self._floor(post, sd))

    def score(self, post: Posterior, U, *, grad: bool = False):
        """Score at inputs U (q, d); with ``grad`` also the gradient (q, d)."""
        if not grad:
            mu, sd = post.moments(U)
            return self._value(mu, self._floor(post, sd))
        mu, sd, dmu, dsd = post.moments(U, grad=True)
        floored = sd < self.sd_floor * post.kernel.amplitude
        a, da_dmu, da_dsd = self._from_moments(mu, self._floor(post, sd))
        da_dsd = np.where(floored, 0.0, da_dsd)
        return a, da_dmu[:, None] * dmu + da_dsd[:, None] * dsd

    def choose(self, post, t):
        self.prepare(post)
        pool = self.ctx.pool
        values = self.score_pool(post)
        if self.n_starts == 0:
            return pool[int(np.argmax(values))].copy()
        starts = pool[distinct_best(pool, -values, self.n_starts)]

        def neg(U):
            a, g = self.score(post, U, grad=True)
            return -a, -g

        U, v = polish(neg, starts, maxiter=self.polish_iterations)
        return U[int(np.argmin(v))]
