"""The classic rules: random and space-filling search, posterior mean, confidence bound, PI, EI, Thompson."""

from __future__ import annotations

from typing import ClassVar

import numpy as np
from ..lazy import special

from ..model.gp import matvec
from ..worlds.draws import feature_values
from ..worlds.mixed import MixedFeatureSample, feature_sample
from .base import Acquisition, Option, Policy, _best_polished, _lowest_mean_block, best_row
from .logei import dlog_h, log_h

__all__ = ["RandomSearch", "SobolSearch", "PosteriorMean", "ConfidenceBound", "ProbabilityOfImprovement",
           "ExpectedImprovement", "ThompsonSampling"]


class RandomSearch(Policy):
    """Uniformly random inputs: the baseline every adaptive rule must beat."""

    rule = "random"
    description = "uniformly random inputs (baseline)"
    lockstep = True

    def choose(self, post, t):
        if self.ctx.library:
            return self.choose_block(post, t, self.ctx.block())[0]
        return self.ctx.rng.random(self.ctx.pool.shape[1])

    def choose_block(self, st, t, block):
        if block.library is None:
            return np.stack([rng.random(st.pools.shape[2]) for rng in block.rngs])
        # a row not yet evaluated in this campaign, uniformly; any row once all are
        seen, m = block.evaluated(st), len(block.library)
        out = []
        for b, rng in enumerate(block.rngs):
            free = np.flatnonzero(~seen[b])
            rows = free if free.size else np.arange(m)
            out.append(block.library[rows[rng.integers(rows.size)]])
        return np.array(out)


class SobolSearch(Policy):
    """Non-adaptive space filling: continues the replicate's scrambled Sobol' sequence."""

    rule = "sobol"
    description = "non-adaptive space filling (scrambled Sobol' sequence)"
    lockstep = True

    def choose(self, post, t):
        return self.ctx.sequence[t]

    def choose_block(self, st, t, block):
        return block.sequences[:, t]


class PosteriorMean(Acquisition):
    """Pure exploitation: the input with the lowest posterior mean."""

    rule = "mean"
    description = "pure exploitation: lowest posterior mean"
    lockstep = True
    weights_feasibility = bound_score = True

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
    description = "optimistic confidence bound"
    lockstep = True
    weights_feasibility = bound_score = True
    options = {"width": Option(2.0, float, 0.0, 100.0, "multiple of the posterior sd")}
    small_width: ClassVar[float] = 1.0   # below this many posterior sd the bound barely explores

    @classmethod
    def caution(cls, settings, study):
        """A small width is close to pure exploitation; one width alone is one setting of the rule, not the rule."""
        width = settings["width"]
        widths = {p.options["width"] for p in study.policies if p.rule == cls.rule}
        words = []
        if width < cls.small_width:
            words.append(f"width = {width:g} posterior sd explores little: the rule is close to taking the lowest "
                         "posterior mean, and widths of about 2 to 3 are common practice")
        if len(widths) == 1:
            words.append(f"the study runs the confidence bound at this one width only ({width:g}); how well the rule "
                         "does depends on the width, so its result here is that of one setting (add, e.g., "
                         "widths 1 and 3 as further policies to see how much it matters)")
        if not words:
            return None
        text = "; ".join(words)
        return text[0].upper() + text[1:] + "."

    def _from_moments(self, mu, sd):
        return -(mu - self.width * sd), -np.ones_like(mu), np.full_like(sd, self.width)


class _Improvement(Acquisition):
    """Shared incumbent: the lowest posterior mean over the evaluated inputs (the
    recommendation), which unlike the lowest observation is not biased down by noise."""

    options = {"margin": Option(0.0, float, 0.0, None, "improvement margin xi, objective units")}
    lockstep = True
    zero_at_evaluated = True     # noise-free: no improvement is left at an evaluated input

    # The score is a positive utility (an improvement's expectation or chance), so weighting it by the chance
    # of feasibility is the published product (Gardner et al. 2014; Schonlau, Welch & Jones 1998 for PI).
    # (A confidence bound or a mean has no zero to weight from: those rules weight their bound's improvement
    # over the same incumbent, Acquisition.bound_score.)
    weights_feasibility = True

    def prepare(self, post):
        # before any observation, improvement is measured from the prior mean
        if self.weighted(post):
            # weighting by feasibility: the incumbent is the best input believed feasible (the set the
            # recommendation comes from); with none, the rule seeks feasibility alone (Gelbart et al. 2014)
            self.best = self._feasible_incumbent(post)
            return
        self.best = float(np.min(post.mean_at_data())) if post.n else post.mean

    def prepare_block(self, st):
        if st.n:
            self.best = np.min(st.means_at_data(), axis=-1, keepdims=True)
        else:
            self.best = np.full((st.size, 1), st.mean)


class ProbabilityOfImprovement(_Improvement):
    """Probability of improvement ``Phi((f_best - xi - mu) / sd)``, scored as its logarithm.

    References
    ----------
    Kushner (1964), A new method of locating the maximum point of an arbitrary multipeak
    curve in the presence of noise, J. Basic Engineering 86.
    """

    rule = "pi"
    description = "probability of improvement"
    log_score = True
    greedy_margin: ClassVar[float] = 1e-3   # margins below this × the belief's amplitude count as none

    @classmethod
    def caution(cls, settings, study):
        """PI with no margin is greedy: it prefers a near-certain tiny improvement next to the incumbent."""
        margin, amplitude = settings["margin"], study.belief.amplitude
        if margin >= cls.greedy_margin * amplitude:
            return None
        # The 0.01 rule: Lizotte (2008), Practical Bayesian Optimization, PhD thesis, University of
        # Alberta, found xi = 0.01 (scaled by the signal's size) to work well for PI; as summarised by
        # Brochu, Cora & de Freitas (2010), arXiv:1012.2599, section 2.3. Cited from memory.
        return (f"Greedy: with margin = {margin:g} probability of improvement prefers a near-certain tiny gain next "
                "to the current best over exploring, so it is a weak baseline. A margin of about 0.01 × the prior "
                f"amplitude (here {0.01 * amplitude:g} objective units) is common practice (Lizotte 2008, PhD "
                "thesis; cited from memory).")

    def _value(self, mu, sd):
        return special.log_ndtr((self.best - self.margin - mu) / sd)

    def _from_moments(self, mu, sd):
        z = (self.best - self.margin - mu) / sd
        a = special.log_ndtr(z)
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
    description = "expected improvement"
    log_score = True

    def _value(self, mu, sd):
        return np.log(sd) + log_h((self.best - self.margin - mu) / sd)

    def _pool_values(self, mu, sd, k):
        """log EI where it can be among the k best of a row, -inf where it provably cannot.

        Notes
        -----
        ``h(z) = phi(z) + z Phi(z)`` has the cheap upper bound ``phi(z) / (1 + z^2)`` for
        z < 0 (from the Mills-ratio bound ``R(t) > t / (t^2 + 1)``, Gordon 1941, Ann. Math.
        Statist. 12) and ``phi(z) + z`` for z >= 0 (``Phi <= 1``). The bound costs a few
        array passes where ``log h`` costs tens of nanoseconds a point, so log EI is
        computed exactly only at the k points of each row with the largest bound and then at
        every point whose bound reaches the k-th best exact value found: no point outside
        can be among the k best. Typically that is a few dozen of thousands.
        """
        t = self.best - self.margin - mu
        z = t / sd
        bound = np.multiply(z, z)
        bound *= -0.5
        np.maximum(bound, -600.0, out=bound)   # a larger bound where it is negligible; no subnormals
        np.exp(bound, out=bound)
        bound *= sd
        bound *= 1.0 / np.sqrt(2.0 * np.pi)
        np.minimum(z, 0.0, out=z)
        np.multiply(z, z, out=z)
        z += 1.0
        bound /= z
        np.maximum(t, 0.0, out=t)
        bound += t
        rows = np.arange(mu.shape[0])[:, None]
        if k == 1:
            first = np.argmax(bound, axis=-1)[:, None]
        elif k < bound.shape[-1]:
            first = np.argpartition(-bound, k - 1, axis=-1)[:, :k]
        else:
            return self._value(mu, sd)
        exact = self._value(mu[rows, first], sd[rows, first])
        # Each row's k best have log EI >= the least of these k exact values, so their bound
        # reaches its exponential (less a margin for rounding in the bound).
        with np.errstate(under="ignore"):
            keep = bound >= np.exp(exact.min(-1, keepdims=True)) * (1.0 - 1e-9)
        keep[rows, first] = True
        values = np.full(mu.shape, -np.inf)
        best = np.broadcast_to(self.best, mu.shape)[keep]
        values[keep] = np.log(sd[keep]) + log_h((best - self.margin - mu[keep]) / sd[keep])
        return values

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
    draw and ``eps ~ N(0, s2)`` (Matheron's rule). Each trial draws new weights on the
    campaign's frequencies; the correction over the pool reuses the posterior's cached cross
    term, so a sample costs O(r F + n m) for r screened pool points.

    The sample is ranked over the pool, its ``n_starts`` lowest distinct points are
    polished by :func:`~simlab.model.optimize.polish_block`, and the lowest polished point
    is chosen. Campaigns advance in lockstep (the one-campaign path is the same code on a
    block of one), so two choices are made cheaper than scoring the whole pool in float64:

    - Pool points whose lower bound ``mu - 5 sd`` lies above the ``n_starts``-th lowest upper
      bound ``mu + 5 sd`` are not scored (a point outside beats one of those only if one of
      the two lies 5 sd beyond its posterior mean; as for :class:`PathwiseDraws`).
    - The prior draw over the pool is ranked in float32 (NumPy's float32 cosine is about 12
      times faster here than float64's; the rounding, about 1e-6 of the prior sd, only
      reorders near-ties among starts), and the polish runs in float64.

    References
    ----------
    Thompson (1933), Biometrika 25; Wilson et al. (2020), Efficiently Sampling Functions from
    Gaussian Process Posteriors, ICML.
    """

    rule = "thompson"
    description = "Thompson sampling (one posterior sample per trial)"
    lockstep = True
    options = {
        "features": Option(512, int, 16, 8192, "spectral frequencies per sample"),
        "fill": Option("samples", str, help="how a round of several trials is filled",
                       choices=("samples", "believer", "liar", "penalize")),
    }
    few_features: ClassVar[int] = 128   # below this the prior draw is a coarse approximation
    screen: ClassVar[float] = 5.0       # posterior sd either side of the mean for the pool screen

    @classmethod
    def caution(cls, settings, study):
        """Few spectral frequencies make each sample a coarse random-feature approximation of a prior draw."""
        features = settings["features"]
        if features >= cls.few_features:
            return None
        return (f"Only {features} spectral frequencies per sample: each posterior sample is a coarse "
                "random-feature approximation of a draw from the belief, so the rule departs from Thompson "
                f"sampling; {cls.few_features} or more (the default is "
                f"{cls.options['features'].default}) is common practice.")

    def start(self, ctx):
        super().start(ctx)
        self._samples = None
        self._features(ctx.posterior, [ctx.rng])

    def _features(self, st, rngs):
        """Each replicate's frequencies (drawn from its own stream), again after a refit."""
        if getattr(self, "_samples", None) is None or self._version != st.version:
            self._samples = [feature_sample(st.kernel, st.mean, rng, self.features) for rng in rngs]
            self._mixed = isinstance(self._samples[0], MixedFeatureSample)
            if not self._mixed:
                self._omega32 = [s.omega.T.astype(np.float32) for s in self._samples]
                self._pools32 = st.pools.astype(np.float32)
            self._version = st.version

    def _draw(self, st, rngs):
        """New weights and noise per replicate; the stacked sample's parts: (omega, amp, phase, scale, beta)."""
        n = st.n
        s2 = st._s2()          # (B,): Posterior.s2 is a float
        eps = np.zeros((st.size, n))
        for b, (sample, rng) in enumerate(zip(self._samples, rngs)):
            sample.redraw(rng)
            eps[b] = np.sqrt(s2[b]) * rng.standard_normal(n)
        omega, amp, phase, scale = stacked_parts(self._samples)
        if n:
            X = st._X[:, :n]
            r = st._y[:, :n] - feature_values(omega, amp, phase, scale, st.mean, X) - eps
            beta, cross = st.solves(r), st.pool_crosses(r)
        else:
            beta, cross = np.zeros((st.size, 0)), np.zeros(st.pools.shape[:2])
        return omega, amp, phase, scale, beta, cross

    def choose_block(self, st, t, block):
        self._beta = None
        if t >= block.horizon - self.exploit_last:
            return _lowest_mean_block(st, self.n_starts, self.polish_iterations)
        self._features(st, block.rngs)
        if self._mixed:
            return self._choose_mixed(st, block)
        omega, amp, phase, scale, beta, cross = self._draw(st, block.rngs)
        B, m = st.pools.shape[:2]
        plausible = self._plausible(st)
        values = np.full((B, m), -np.inf)
        for b in range(B):
            rows = np.flatnonzero(plausible[b])
            values[b, rows] = -(self._prior32(b, rows, amp[b], phase[b]) * scale[b, 0] + cross[b, rows])
        return self._finish(st, block, values, stacked_prior(st.mean, omega, amp, phase, scale), beta)

    def _finish(self, st, block, values, prior, beta):
        """The choice from the ranked pool ``values``: a library's best row, or the best of the polished
        starts of the posterior sample ``prior(U) + K(U, X) beta`` (``prior(U) -> (g, dg)``). Keeps
        ``beta`` and ``values`` for score() and the tests."""
        fg = posterior_sample(st, prior, beta)
        chosen = (best_row(st, block, values) if block.library is not None else
                  _best_polished(st.pools, values, fg, self.n_starts, self.polish_iterations))
        self._beta, self._ranked = beta, values
        return chosen

    def _plausible(self, st) -> np.ndarray:
        """(B, m) bool: the pool points whose lower bound ``mu - 5 sd`` is not above the ``n_starts``-th
        lowest upper bound ``mu + 5 sd`` (the others are not scored; see the class notes)."""
        mu, sd = st.stacked_pool_moments()
        keep = max(self.n_starts, 1)
        if not st.n or mu.shape[1] <= keep:
            return np.ones(mu.shape, bool)
        upper = mu + self.screen * sd
        return mu - self.screen * sd <= np.partition(upper, keep - 1, axis=-1)[:, keep - 1 : keep]

    def _choose_mixed(self, st, block):
        """Over stepped or categorical inputs: the same sample, screen and polish with the mixed features
        (:class:`simlab.worlds.mixed.MixedFeatureSample`), replicate by replicate: the plausible pool
        points ranked with ``values32`` (float32, like the box path's phase table), the polish in float64."""
        n, B = st.n, st.size
        X, s2 = st._X[:, :n], st._s2()
        R = np.zeros((B, n))
        for b, (sample, rng) in enumerate(zip(self._samples, block.rngs)):
            sample.redraw(rng)
            eps = np.sqrt(s2[b]) * rng.standard_normal(n)
            if n:
                R[b] = st._y[b, :n] - sample(X[b]) - eps
        beta, cross = (st.solves(R), st.pool_crosses(R)) if n else (R, np.zeros(st.pools.shape[:2]))
        plausible = self._plausible(st)
        values = np.full(plausible.shape, -np.inf)
        for b, sample in enumerate(self._samples):
            rows = np.flatnonzero(plausible[b])
            values[b, rows] = -(sample.values32(st.pools[b, rows]) + cross[b, rows])   # ranked in float32

        return self._finish(st, block, values, samples_prior(self._samples), beta)

    def _prior32(self, b, rows, amp, phase) -> np.ndarray:
        """Replicate b's prior draw over pool rows, in float32 arithmetic, without scale or mean
        (the ranking leaves out the constant prior mean)."""
        P = self._pools32[b, rows] @ self._omega32[b]
        P -= phase.astype(np.float32)
        np.cos(P, out=P)
        return (P @ amp.astype(np.float32)).astype(float)

    # With limits, feasible = "weight" samples them too: one posterior sample of each limit and of the
    # classifier's latent with the objective's, and the sample's best pool point among those where every
    # sampled limit holds (constrained Thompson sampling, as in Eriksson & Poloczek 2021, AISTATS, SCBO,
    # from memory; here without their trust region). No polish: the pool's best feasible point is the choice.
    weights_feasibility = True

    def choose(self, post, t):
        if not self.weighted(post) or t >= self.ctx.horizon - self.exploit_last:
            return super().choose(post, t)
        rng, pool = self.ctx.rng, self.ctx.pool
        r = self._draw_one(post)
        values = self.sample.values32(pool) + post.pool_cross(r)   # the objective's sample, ranked in float32
        ok = post.feasible.sample_pool(rng, self.features)
        if ok.any():
            return pool[int(np.argmin(np.where(ok, values, np.inf)))].copy()
        # no pool point holds in this sample: the point the belief holds most likely feasible
        return pool[int(np.argmax(post.feasible.pool_log_chance()))].copy()

    def _keep_state(self, post):
        """The sample just minimised, for :meth:`score` (the snapshot): no new draw."""
        if self._beta is None:                # the final switch to the lowest mean drew nothing
            return
        self.sample = self._samples[0]
        self.beta = self._beta[0]

    def prepare(self, post):
        """A fresh sample over the whole pool (a round filled by penalizers takes this path)."""
        r = self._draw_one(post)
        self._pool_values = self.sample(self.ctx.pool) + post.pool_cross(r)

    def _draw_one(self, post):
        """One campaign's fresh posterior sample: new weights (``self.sample``), its data correction
        ``self.beta``, and the residual r it was solved from (for the pool's correction)."""
        rng = self.ctx.rng
        self._features(post, [rng])
        self.sample = self._samples[0]
        self.sample.redraw(rng)
        eps = np.sqrt(post.s2) * rng.standard_normal(post.n)
        r = post.y - self.sample(post.X) - eps
        self.beta = post.solve(r)
        return r

    def score_pool(self, post):
        return -self._pool_values

    def score(self, post, U, *, grad=False):
        U = np.atleast_2d(U)
        g = self.sample(U) + post.kernel(U, post.X) @ self.beta
        if not grad:
            return -g
        dg = self.sample.grad(U) + np.einsum("qnd,n->qd", post.kernel.grad(U, post.X), self.beta)
        return -g, -dg


# ------------------------------------------------------------------- stacked posterior samples
def stacked_parts(samples):
    """A block's random-feature samples (one :class:`~simlab.worlds.draws.FeatureSample` per replicate)
    stacked in amplitude-phase form: ``(omega (B, F, d), amp (B, F), phase (B, F), scale (B, 1))``."""
    omega = np.stack([s.omega for s in samples])
    amp, phase = (np.stack(a) for a in zip(*(s.polar() for s in samples)))
    return omega, amp, phase, np.array([[s.scale] for s in samples])


def stacked_prior(mean, omega, amp, phase, scale):
    """``prior(U) -> (g, dg)`` of a block of random-feature prior samples in amplitude-phase form
    (omega (B, F, d), amp and phase (B, F), scale (B, 1)) at U (B, q, d): values (B, q) and
    gradients (B, q, d), each replicate's from its own slices (``feature_values``'s arithmetic)."""
    def prior(U):
        P = np.matmul(U, omega.transpose(0, 2, 1))            # (B, q, F)
        P -= phase[:, None, :]
        g = mean + scale * matvec(np.cos(P), amp)
        dg = np.matmul(-scale[..., None] * amp[:, None, :] * np.sin(P), omega)
        return g, dg

    return prior


def samples_prior(samples):
    """``prior(U)`` of a list of samples with ``__call__`` and ``grad`` (mixed-space features), one
    replicate at a time."""
    def prior(U):
        return (np.stack([sample(U[b]) for b, sample in enumerate(samples)]),
                np.stack([sample.grad(U[b]) for b, sample in enumerate(samples)]))

    return prior


def posterior_sample(st, prior, beta):
    """``fg(U)`` of a block's posterior samples by Matheron's rule, ``prior(U) + K(U, X) beta`` with
    beta (B, n) each replicate's ``(K + s2 I)^-1 (y - f(X) - eps)``: values (B, q) and gradients
    (B, q, d) for :func:`~simlab.model.optimize.polish_block`."""
    X, n = st._X[:, : st.n], st.n

    def fg(U):
        g, dg = prior(U)
        if n:
            Kq, dK = st.kernel.stacked_grad(U, X)
            g = g + matvec(Kq, beta)
            dg = dg + np.stack([matvec(dj, beta) for dj in dK], axis=-1)
        return g, dg

    return fg
