"""Acquisition policies: one small class per rule, and the registry the study file names."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
from scipy.special import erfcx, log_ndtr, ndtr

from .gp import Posterior
from .optimize import distinct_best, polish
from .worlds import FeatureSample

__all__ = [
    "Option", "Context", "Policy", "Acquisition", "RandomSearch", "SobolSearch", "PosteriorMean",
    "ConfidenceBound", "ProbabilityOfImprovement", "ExpectedImprovement", "ThompsonSampling",
    "POLICIES", "log_h", "dlog_h",
]


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


class RandomSearch(Policy):
    """Uniformly random inputs: the baseline every adaptive rule must beat."""

    rule = "random"

    def choose(self, post, t):
        return self.ctx.rng.random(self.ctx.pool.shape[1])


class SobolSearch(Policy):
    """Non-adaptive space filling: continues the replicate's scrambled Sobol' sequence."""

    rule = "sobol"

    def choose(self, post, t):
        return self.ctx.sequence[t]


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


class PosteriorMean(Acquisition):
    """Pure exploitation: the input with the lowest posterior mean."""

    rule = "mean"

    def _from_moments(self, mu, sd):
        return -mu, -np.ones_like(mu), np.zeros_like(sd)


class ConfidenceBound(Acquisition):
    """Optimistic confidence bound ``mu - width * sd`` (minimisation form; the upper bound
    of the user's objective when the study maximises).

    References
    ----------
    Srinivas, Krause, Kakade & Seeger (2010), Gaussian Process Optimization in the Bandit
    Setting, ICML (with a fixed width instead of their schedule).
    """

    rule = "lcb"
    options = {"width": Option(2.0, float, 0.0, 100.0, "multiple of the posterior sd")}

    def _from_moments(self, mu, sd):
        return -(mu - self.width * sd), -np.ones_like(mu), np.full_like(sd, self.width)


class _Improvement(Acquisition):
    """Shared incumbent: the lowest posterior mean over the evaluated inputs (the
    recommendation), which unlike the lowest observation is not biased down by noise."""

    options = {"margin": Option(0.0, float, 0.0, None, "improvement margin xi, objective units")}

    def prepare(self, post):
        self.best = float(np.min(post.mean_at_data()))


class ProbabilityOfImprovement(_Improvement):
    """Probability of improvement ``Phi((f_best - xi - mu) / sd)``, scored as its logarithm.

    References
    ----------
    Kushner (1964), A new method of locating the maximum point of an arbitrary multipeak
    curve in the presence of noise, J. Basic Engineering 86.
    """

    rule = "pi"

    def _value(self, mu, sd):
        return log_ndtr((self.best - self.margin - mu) / sd)

    def _from_moments(self, mu, sd):
        z = (self.best - self.margin - mu) / sd
        a = log_ndtr(z)
        dz = np.exp(-0.5 * z * z - 0.5 * np.log(2 * np.pi) - a)  # phi(z) / Phi(z)
        return a, -dz / sd, -dz * z / sd


class ExpectedImprovement(_Improvement):
    """Expected improvement ``sd h(z)``, ``h(z) = phi(z) + z Phi(z)``, scored as its logarithm.

    Notes
    -----
    ``log EI = log sd + log h(z)`` is computed without underflow for any z (see
    :func:`log_h`), so the rule still ranks candidates far from the incumbent, where plain
    EI is exactly zero in floating point.

    References
    ----------
    Mockus, Tiesis & Zilinskas (1978); Jones, Schonlau & Welch (1998), J. Global Optim. 13;
    Ament et al. (2023), Unexpected Improvements to Expected Improvement for Bayesian
    Optimization, NeurIPS (the log-space evaluation).
    """

    rule = "ei"

    def _value(self, mu, sd):
        return np.log(sd) + log_h((self.best - self.margin - mu) / sd)

    def _from_moments(self, mu, sd):
        z = (self.best - self.margin - mu) / sd
        lh = log_h(z)
        a = np.log(sd) + lh
        g = dlog_h(z, lh)
        return a, -g / sd, 1.0 / sd - g * z / sd


class ThompsonSampling(Acquisition):
    """Minimise one posterior function sample, drawn pathwise (no joint draw over the pool).

    Notes
    -----
    ``g(.) = f(.) + K(., X) (K + s2 I)^-1 (y - f(X) - eps)`` with ``f`` a random-feature prior
    draw and ``eps ~ N(0, s2)`` (Matheron's rule). The features over the pool are computed
    once per campaign; each trial draws new weights, and the correction over the pool reuses
    the posterior's cached cross term, so a sample costs O(m F + n m).

    References
    ----------
    Thompson (1933), Biometrika 25; Wilson et al. (2020), Efficiently Sampling Functions from
    Gaussian Process Posteriors, ICML.
    """

    rule = "thompson"
    options = {"features": Option(512, int, 16, 8192, "spectral frequencies per sample")}

    def start(self, ctx):
        super().start(ctx)
        post = ctx.posterior
        self.sample = FeatureSample(post.kernel, post.mean, ctx.rng, self.features)
        self._pool_basis = self.sample.basis(ctx.pool)

    def prepare(self, post):
        rng = self.ctx.rng
        self.sample.redraw(rng)
        eps = np.sqrt(post.s2) * rng.standard_normal(post.n)
        r = post.y - self.sample(post.X) - eps
        self.beta = post.solve(r)
        self._pool_values = self.sample.mean + self._pool_basis @ self.sample.w + post.pool_cross(r)

    def score_pool(self, post):
        return -self._pool_values

    def score(self, post, U, *, grad=False):
        U = np.atleast_2d(U)
        g = self.sample(U) + post.kernel(U, post.X) @ self.beta
        if not grad:
            return -g
        dg = self.sample.grad(U) + np.einsum("qnd,n->qd", post.kernel.grad(U, post.X), self.beta)
        return -g, -dg


# --------------------------------------------------------------------------- log EI
_C1 = 0.5 * np.log(2.0 * np.pi)
_C2 = 0.5 * np.log(np.pi / 2.0)
_Z_ASYMPTOTIC = -1.0 / np.sqrt(np.finfo(float).eps)


def log_h(z) -> np.ndarray:
    """``log(phi(z) + z Phi(z))`` accurate for every finite z.

    Notes
    -----
    Three branches, following Ament et al. (2023), eq. (9):

    - z > -1: direct evaluation;
    - -1/sqrt(eps) < z <= -1: ``-z^2/2 - log(2 pi)/2 + log1mexp(log(erfcx(-z/sqrt2) |z|) + log(pi/2)/2)``,
      using ``Phi(z) = erfcx(-z/sqrt2) exp(-z^2/2) / 2``;
    - z <= -1/sqrt(eps): the asymptote ``-z^2/2 - log(2 pi)/2 - 2 log|z|``.
    """
    z = np.asarray(z, dtype=float)
    out = np.empty_like(z)
    hi = z > -1.0
    mid = (z <= -1.0) & (z > _Z_ASYMPTOTIC)
    lo = z <= _Z_ASYMPTOTIC
    zh = z[hi]
    out[hi] = np.log(np.exp(-0.5 * zh * zh) / np.sqrt(2 * np.pi) + zh * ndtr(zh))
    zm = z[mid]
    t = np.log(erfcx(-zm / np.sqrt(2.0)) * np.abs(zm)) + _C2
    # for z <= -1, t lies in (-0.43, 0), where log1mexp(t) = log(-expm1(t)) is the accurate
    # branch (Maechler 2012, "Accurately computing log(1 - exp(-|a|))")
    out[mid] = -0.5 * zm * zm - _C1 + np.log(-np.expm1(t))
    zl = z[lo]
    out[lo] = -0.5 * zl * zl - _C1 - 2.0 * np.log(np.abs(zl))
    return out


def dlog_h(z, lh=None) -> np.ndarray:
    """Derivative of :func:`log_h`: ``Phi(z) / h(z)``, evaluated as ``exp(log Phi - log h)``.

    ``lh`` may pass ``log_h(z)`` when the caller already has it.
    """
    z = np.asarray(z, dtype=float)
    return np.exp(log_ndtr(z) - (log_h(z) if lh is None else lh))


POLICIES: dict[str, type[Policy]] = {c.rule: c for c in (
    RandomSearch, SobolSearch, PosteriorMean, ConfidenceBound,
    ProbabilityOfImprovement, ExpectedImprovement, ThompsonSampling,
)}
