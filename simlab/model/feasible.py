"""What a campaign believes about its limits: one Gaussian process per measured [[limit]] and a
Gaussian-process classifier of where trials fail, combined into the chance that an input is feasible
(respects every limit and works), and the recommendation drawn from inputs believed feasible."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lazy import optimize, special
from .classify import FailureBelief, logistic_gaussian_mean
from .gp import Posterior
from .kernels import Kernel

__all__ = ["LimitModel", "FailureModel", "FeasibleBelief", "FAIL_AMPLITUDE", "success_prior_mean"]

# The classifier's latent amplitude (logistic scale). At 3 the prior chance of success spans about
# 0.05-0.95 within one prior sd of the mean, so a few trials on either side of a boundary make it
# sharp; a choice of ours, not a fitted value (the failing worlds' own latent has no logistic scale).
FAIL_AMPLITUDE = 3.0
# Where a limit's posterior sd is below this share of its prior amplitude, the chance is read as a
# step (the input is measured: Phi(z) with z = +-inf), and the gradient of the sd is left out.
_SD_FLOOR = 1e-9


@dataclass(frozen=True)
class LimitModel:
    """The belief's prior for one limit: kernel on the unit cube, mean, noise (user units), and the
    bound: feasible where ``sign * (value - bound) <= 0``."""

    kernel: Kernel
    mean: float
    noise: float
    bound: float
    sign: float


@dataclass(frozen=True)
class FailureModel:
    """The classifier's prior: latent kernel and constant mean (see :func:`success_prior_mean`)."""

    kernel: Kernel
    mean: float


def success_prior_mean(share: float, amplitude: float = FAIL_AMPLITUDE) -> float:
    """The classifier's prior latent mean m for which the prior chance of success,
    ``E[sigmoid(f)]`` with ``f ~ N(m, amplitude^2)``, is ``1 - share`` (the study's failing share).

    scipy's brentq on :func:`logistic_gaussian_mean`, increasing in m: the root is bracketed by
    +-(10 + 10 amplitude), where the chance is within 1e-4 of 0 and 1 for shares in (0.001, 0.999).
    """
    target = 1.0 - share
    edge = 10.0 + 10.0 * amplitude
    return float(optimize.brentq(lambda m: float(logistic_gaussian_mean(m, amplitude**2)) - target, -edge, edge,
                                 xtol=1e-12))


class FeasibleBelief:
    """A campaign's belief about feasibility, updated after each trial beside the objective's posterior.

    Parameters
    ----------
    limits : sequence of LimitModel
        One Gaussian process each, fed the measured value of every trial that worked.
    failure : FailureModel or None
        The classifier of hidden failures (:class:`simlab.model.classify.FailureBelief`), refitted after
        each trial on every trial that worked or failed; None when trials cannot fail.
    pool : ndarray of shape (m, d)
        The campaign's candidate pool (the limits' pool moments come from their posteriors).
    capacity : int
        Trials the limits' posteriors make room for.
    chance : float
        ``[target] feasible_chance``: the recommendation is an input believed feasible at least this surely.

    Notes
    -----
    The chance that an input is feasible is the product of ``Phi((bound - mu_j) / sd_j)`` over the
    limits (``Phi((mu_j - bound) / sd_j)`` for a lower bound), each limit's posterior taken as
    independent of the others and of the objective (Gardner et al. 2014, *Bayesian optimization with
    inequality constraints*, ICML, eq. 4 and section 3; Gelbart, Snoek & Adams 2014, UAI), times the
    classifier's chance of success. Everything is kept as a logarithm (``log_ndtr``), so a chance of
    1e-300 still ranks.
    """

    def __init__(self, limits, failure: FailureModel | None, *, pool, capacity: int, chance: float):
        self.limits = tuple(limits)
        self.posts = [Posterior(lm.kernel, lm.mean, lm.noise, pool=pool, capacity=capacity) for lm in self.limits]
        self.failure = failure
        self.pool = pool
        self.chance = float(chance)
        d = pool.shape[1]
        self._tried, self._worked = np.empty((0, d)), np.empty(0, dtype=bool)
        self.classifier = FailureBelief(failure.kernel, self._tried, self._worked, prior_mean=failure.mean) \
            if failure is not None else None
        self._pool_log: np.ndarray | None = None

    # ------------------------------------------------------------------ updates
    def add(self, u, *, worked: bool, values=None) -> None:
        """Learn from one trial: whether it worked and, if it did, its measured limit values (J,)."""
        u = np.asarray(u, dtype=float)
        if self.failure is not None:
            self._tried = np.vstack([self._tried, u[None, :]])
            self._worked = np.append(self._worked, bool(worked))
            self.classifier = FailureBelief(self.failure.kernel, self._tried, self._worked,
                                            prior_mean=self.failure.mean)
        if worked and values is not None:
            for post, v in zip(self.posts, np.asarray(values, dtype=float)):
                post.add(u, float(v))
        self._pool_log = None

    # ------------------------------------------------------------------ chances
    def log_chance(self, U, *, grad: bool = False, worked: bool = False):
        """log P(feasible) at inputs U (q, d): (q,); with ``grad`` also its gradient (q, d).

        ``worked``: U are inputs whose trials worked. Failure is a property of the input (a trial that
        worked there works again), so their chance of success is 1 and only the limits count; the
        classifier, whose logistic likelihood treats outcomes as noisy, would put it below 1."""
        U = np.atleast_2d(np.asarray(U, dtype=float))
        total = np.zeros(len(U))
        g = np.zeros(U.shape) if grad else None
        for lm, post in zip(self.limits, self.posts):
            if grad:
                mu, sd, dmu, dsd = post.moments(U, grad=True)
            else:
                mu, sd = post.moments(U)
            z, floored = self._z(lm, mu, sd)
            log_phi = special.log_ndtr(z)
            total += log_phi
            if grad:
                # d log Phi(z) = phi(z) / Phi(z) dz, z = -sign (mu - bound) / sd
                ratio = np.exp(-0.5 * z * z - 0.5 * np.log(2.0 * np.pi) - log_phi)
                sd_f = np.maximum(sd, _SD_FLOOR * lm.kernel.amplitude)
                dz = -lm.sign * dmu / sd_f[:, None] - np.where(floored, 0.0, z / sd_f)[:, None] * dsd
                g += np.where(np.isfinite(ratio), ratio, 0.0)[:, None] * dz
        if self.classifier is not None and not worked:
            if grad:
                q, dq = self.classifier.success_probability(U, grad=True)
            else:
                q = self.classifier.success_probability(U)
            q = np.maximum(q, 1e-300)
            total += np.log(q)
            if grad:
                g += dq / q[:, None]
        return total if not grad else (total, g)

    def pool_log_chance(self) -> np.ndarray:
        """log P(feasible) over the pool (m,), kept until the next trial."""
        if self._pool_log is None:
            total = np.zeros(len(self.pool))
            for lm, post in zip(self.limits, self.posts):
                mu, sd = post.pool_moments()
                total += special.log_ndtr(self._z(lm, mu, sd)[0])
            if self.classifier is not None:
                total += np.log(np.maximum(self.classifier.success_probability(self.pool), 1e-300))
            self._pool_log = total
        return self._pool_log

    def sample_pool(self, rng: np.random.Generator, features: int) -> np.ndarray:
        """One joint posterior sample of every limit and of the classifier's latent over the pool:
        (m,) bool, where the sampled limits all hold and the sampled latent says a trial works
        (sigmoid(f) >= 1/2, i.e. f >= 0). For Thompson sampling with sampled limits.

        Each limit is drawn pathwise (Matheron's rule, Wilson et al. 2020, ICML): a random-feature prior
        draw g0 corrected by ``K(., X) (K + s2 I)^-1 (y - g0(X) - eps)``; the classifier's latent the same
        way (:meth:`simlab.model.classify.FailureBelief.draw_latent`).
        """
        from ..worlds.draws import FeatureSample

        ok = np.ones(len(self.pool), dtype=bool)
        for lm, post in zip(self.limits, self.posts):
            draw = FeatureSample(lm.kernel, lm.mean, rng, features)
            g = draw.values32(self.pool)       # float32 over the pool: off by ~1e-6 sd, only at the bound itself
            if post.n:
                eps = np.sqrt(post.s2) * rng.standard_normal(post.n)
                g = g + post.pool_cross(post.y - draw(post.X) - eps)
            ok &= lm.sign * (g - lm.bound) <= 0
        c = self.classifier
        if c is not None:
            f = c.draw_latent(self.pool, FeatureSample(c.kernel, c.prior_mean, rng, features), rng)
            ok &= f >= 0.0
        return ok

    @staticmethod
    def _z(lm: LimitModel, mu, sd):
        floor = _SD_FLOOR * lm.kernel.amplitude
        floored = sd < floor
        return -lm.sign * (mu - lm.bound) / np.maximum(sd, floor), floored

    # ------------------------------------------------------------------ what the campaign ships
    def trusted(self, X) -> np.ndarray:
        """Which evaluated inputs X (n, d), trials that worked, are believed to respect every limit at
        least ``chance`` surely, (n,) bool."""
        if len(X) == 0:
            return np.zeros(0, dtype=bool)
        return self.log_chance(X, worked=True) >= np.log(self.chance)

    def recommend(self, post: Posterior) -> int:
        """Index of the evaluated input to ship: the lowest posterior mean among those believed to respect
        every limit at least ``chance`` surely (they worked, so they do not fail); when none is, the one
        most likely feasible (its chance is then below
        the bar, and the campaign may well end infeasible: the traces say so)."""
        X = post.X                                   # trials that worked and were observed
        log_chance = self.log_chance(X, worked=True)
        ok = log_chance >= np.log(self.chance)
        if not ok.any():
            return int(np.argmax(log_chance))
        return int(np.argmin(np.where(ok, post.mean_at_data(), np.inf)))
