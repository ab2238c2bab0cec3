"""Information-based rules: probability of being the minimiser and max-value entropy search
(the knowledge gradient is in gradient.py)."""

from __future__ import annotations

import numpy as np
from numpy.polynomial.hermite_e import hermegauss
from ..lazy import optimize, special

from ..model.optimize import polish_block
from ..worlds.mixed import MixedFeatureSample, feature_sample
from .base import Acquisition, Option, _lowest_mean_block

__all__ = ["ProbabilityOfMinimum", "MaxValueEntropySearch", "PathwiseDraws", "max_value_information"]

# Pool points whose lower bound mu - 5 sd lies above the lowest upper bound mu + 5 sd are left
# out of pathwise draws: such a point beats the point with that upper bound only if one of the
# two lies 5 sd beyond its mean, so at most (m + 1) Phi(-5) = 6e-4 of the draws (pool m = 2048)
# can put their minimum elsewhere than they would over the whole pool.
_SCREEN = 5.0

_LOG_SQRT_2PI = 0.5 * np.log(2.0 * np.pi)
_SQRT_HALF_PI = np.sqrt(0.5 * np.pi)
_GH_NODES, _GH_WEIGHTS = hermegauss(8)   # accuracy: max_value_information's notes
_GH_WEIGHTS = _GH_WEIGHTS / np.sqrt(2.0 * np.pi)  # E[g(s)], s ~ N(0, 1)  ~  sum w_q g(s_q)


# ---------------------------------------------------------------------------------------- draws
class PathwiseDraws:
    """Many posterior function samples over the pool at once, sharing one set of frequencies.

    Parameters
    ----------
    post : Posterior
        The campaign's posterior (its kernel, prior mean and pool are used).
    pool : ndarray of shape (m, d)
    rng : numpy.random.Generator
        Draws the frequencies now and the weights and noise at every :meth:`draw`.
    n_freq : int
        Spectral frequencies F (the basis has 2F columns).

    Notes
    -----
    Matheron's rule, as for Thompson sampling, with S weight vectors stacked in a matrix:
    ``G = m + Phi W + K(pool, X) (K + s2 I)^-1 (y - m - Phi_X W - E)`` with ``W`` of shape
    (2F, S) and ``E`` of shape (n, S), both standard normal (``E`` scaled by ``sqrt(s2)``).
    The pool basis ``Phi`` is computed once per campaign in single precision
    (``FeatureSample.basis32``) and kept: the product ``Phi W`` costs ``2 m F S`` flops and
    float32 runs it three times faster, while its rounding (a few 1e-7 of the prior sd: 2e-7
    per feature, summed over 2F features with standard normal weights) is far below anything
    a count of minimisers or a sampled minimum can resolve. Pool points that cannot hold the minimum of a draw
    (see ``_SCREEN``) are left out. When the belief is refitted (``post.version`` changes)
    the frequencies are drawn again for the new kernel.

    References
    ----------
    Wilson, Borovitskiy, Terenin, Mostowsky & Deisenroth (2020), Efficiently Sampling
    Functions from Gaussian Process Posteriors, ICML. Rahimi & Recht (2007), Random Features
    for Large-Scale Kernel Machines, NeurIPS.
    """

    def __init__(self, post, pool, rng, n_freq: int):
        self.pool, self.n_freq = pool, int(n_freq)
        self._build(post, rng)

    def _build(self, post, rng):
        self.sample = feature_sample(post.kernel, post.mean, rng, self.n_freq)
        basis32 = getattr(self.sample, "basis32", None)                  # mixed-space samples have none
        self._basis = basis32(self.pool) if basis32 else self.sample.basis(self.pool).astype(np.float32)  # (m, 2F)
        self._version = post.version
        self._data = (np.empty((0, self.pool.shape[1])), None)          # the evaluated inputs' features, kept
        self._kept = None                                                # draw_kept's prior draws (W, (Phi W)^T)

    def draw_in(self, st, b: int, rng, n_samples: int, rows, *, single: bool = False):
        """``n_samples`` posterior draws minus the prior mean over pool ``rows`` of replicate b of a
        stack (its pool, data and factors), and the same draws at its evaluated inputs: ``(G, GX)``
        with G of shape (S, len(rows)), float32, one row per draw, and GX (n, S), float64.

        Solves go through the stack's kept inverse factor (``L^-T L^-1``) rather than a
        Cholesky solve, so replicate b gets the same bits whether the stack holds it alone
        or beside others (every product is on b's own slices). The draws come out draw by draw
        (``W^T Phi^T``), as :meth:`draw_kept` keeps them, so both condition through one
        :meth:`_condition`. ``single``: the correction is rounded to float32 before it is
        added to the float32 prior draws (adding float64 to float32 in place costs as much as
        the product itself; the values differ by float32 rounding, about 1e-7 of the prior sd).
        MES keeps the float64 addition.
        """
        if st.version != self._version:          # the belief was refitted: new kernel, new features
            self._build(st, rng)
        W = rng.standard_normal((self._basis.shape[1], int(n_samples)))
        return self._condition(st, b, rng, self._prior(W, rows), W, rows, single=single, fresh=True)

    def draw_kept(self, st, b: int, rng, cols: slice, rows, *, total: int):
        """:meth:`draw_in` (float32 correction) for draws ``cols`` of ``total`` prior draws made
        once, at the first call, and kept: each call conditions them on the data it is given,
        with fresh noise (Matheron's rule), so every call's draws are independent samples of
        the belief of that moment, while calls share their prior parts (common random numbers,
        as the stopping record uses them: one campaign's trials are then judged on the same
        prior functions). The product ``Phi W`` (``2 m F total`` flops) is paid once per
        campaign instead of at every call. Returns ``(G, GX)`` as :meth:`draw_in`: G (S, len(rows)),
        one row per draw (a batch of kept draws is one contiguous block), GX (n, S).
        """
        if st.version != self._version:          # the belief was refitted: new kernel, new features
            self._build(st, rng)
        if self._kept is None:
            W = rng.standard_normal((self._basis.shape[1], int(total)))
            self._kept = (W, self._prior(W, np.arange(len(self.pool))))
        W, GT = self._kept
        G = GT[cols] if len(rows) == len(self.pool) else GT[cols][:, rows]
        return self._condition(st, b, rng, G, W[:, cols], rows, single=True, fresh=False)

    def _prior(self, W, rows) -> np.ndarray:
        """Prior draws of weights W (2F, S) over pool rows, float32: (S, len(rows))."""
        Phi = self._basis if len(rows) == len(self.pool) else self._basis[rows]   # whole rows: a fast gather
        return W.T.astype(np.float32) @ Phi.T          # BLAS reads the transpose in place

    def _condition(self, st, b, rng, G, W, rows, *, single: bool, fresh: bool):
        """Prior draws G (S, rows) of weights W (2F, S), conditioned on replicate b's data: ``(G, GX)``.
        ``fresh``: G is this call's own array (else it is kept and must not change)."""
        n = st.n
        if n == 0:
            self._last = (W, np.empty((0, W.shape[1])))
            return (G if fresh else G.copy()), np.empty((0, W.shape[1]))
        X = st._X[b, :n]
        w, a, GX = self._at_data(st, b, rng, self._data_basis(X) @ W)
        self._last = (W, a)                                                    # for path()
        if 2 * len(rows) >= len(self.pool):
            V = st._V[b, :n]
            corr = w.T @ V if len(rows) == len(self.pool) else w.T @ V[:, rows]   # cached cross term, O(n m S)
        else:
            corr = a.T @ st.kernel(X, self.pool[rows])                         # few rows: O(n |rows| S)
        if single:                  # float32 sums commute: the same bits as adding to G in place
            out = corr.astype(np.float32)
            out += G
            return out, GX
        if not fresh:
            G = G.copy()
        G += corr
        return G, GX

    def _at_data(self, st, b, rng, fX):
        """Matheron's rule at replicate b's evaluated inputs for prior draws fX (n, S) there: ``w = L^-1 R``,
        ``a = (K + s2 I)^-1 R`` with ``R = y - m - fX - eps`` (fresh noise), and the posterior draws there,
        ``fX + K a``, where ``K a = (L L^T - s2 I) a = L w - s2 a`` comes from the kept factor (no kernel
        evaluation; as Stack.means_at_data)."""
        n, S = fX.shape
        L, Li, s2 = st._L[b, :n, :n], st._Li[b, :n, :n], st._s2()[b]
        R = (st._y[b, :n] - st.mean)[:, None] - fX - np.sqrt(s2) * rng.standard_normal((n, S))
        w = Li @ R                                                             # L^-1 R
        a = Li.T @ w                                                           # (K + s2 I)^-1 R
        return w, a, fX + L @ w - s2 * a

    def _data_basis(self, X) -> np.ndarray:
        """The features of the evaluated inputs X (n, 2F), kept between trials: a campaign's inputs only
        grow, so each call computes the rows it has not seen (all again if the kept rows changed)."""
        kept, old = self._data
        k = len(kept)
        if old is None or k > len(X) or not np.array_equal(kept, X[:k]):
            k, old = 0, None
        if k < len(X):
            new = self.sample.basis(X[k:])
            old = new if old is None else np.vstack([old, new])
            self._data = (X.copy(), old)     # a new tuple: copies of these draws (the stopping record's) keep their own
        return old

    def path(self, st, s: int, b: int = 0):
        """Draw s of the last :meth:`draw_in` (replicate b of stack st) as a function anywhere:
        ``fg(U) -> (values, gradients)`` for U (q, d)."""
        W, a = self._last
        self.sample.w = W[:, s].copy()
        sample, kernel, X, beta = self.sample, st.kernel, st._X[b, : st.n], a[:, s]

        def fg(U):
            U = np.atleast_2d(U)
            if not len(beta):
                return sample(U), sample.grad(U)
            return (sample(U) + kernel(U, X) @ beta,
                    sample.grad(U) + np.einsum("qnd,n->qd", kernel.grad(U, X), beta))

        return fg


def _plausible(mu, sd, n: int) -> np.ndarray:
    """Indices of the pool points (moments mu, sd) that can hold the minimum of a draw (see ``_SCREEN``)."""
    return np.arange(len(mu)) if n == 0 else np.flatnonzero(mu - _SCREEN * sd <= np.min(mu + _SCREEN * sd))


# ---------------------------------------------------------------------------------------- pbest
class ProbabilityOfMinimum(Acquisition):
    """Sample where the minimum most probably is: the pool point that most posterior draws put lowest.

    Each trial draws ``samples`` posterior functions pathwise over the pool (see
    :class:`PathwiseDraws`) and counts, for every pool point, the share of draws whose
    minimum over the pool lies there: a Monte Carlo estimate of the posterior probability
    that the point is the minimiser. The rule chooses the most probable point and, with
    ``refine = 1``, moves it to the continuous minimum of one draw that voted for it.

    Notes
    -----
    ``p(x) = P(f(x) <= f(x') for all x' in pool | data)``, estimated by ``c(x) / S`` with
    ``c(x)`` the number of draws lowest at x; its standard error is ``sqrt(p (1 - p) / S)``.
    Ties in the count (common early on, when probability is spread thin) go to the highest
    posterior sd: among equally likely locations, the one we know least about teaches most.

    A count has no gradient, so the pool point is not polished. Left there, the rule has a
    grid floor: once the posterior has concentrated it keeps choosing the same pool point,
    the one nearest the minimiser, and regret stops at the objective's change over half a
    pool spacing. ``refine = 1`` (default) instead polishes, from that point, one of the draws
    whose minimum over the pool fell there (the first; draws are exchangeable, so it is a
    random one): the result is a draw of the minimiser's location given that it lies in the
    most probable cell, so repeated trials spread within the cell and reach the continuous
    minimum. ``refine = 0`` returns the pool point.

    The frequencies are drawn once per campaign (as for Thompson sampling); the feature
    prior's covariance then differs from the kernel by about ``a^2 / sqrt(2 F)`` at any
    lag, a bias that is small beside the counting error for the default sizes.

    References
    ----------
    The distribution of the minimiser's location is what Villemonteix, Vazquez & Walter
    (2009), An informational approach to the global optimization of expensive-to-evaluate
    functions, J. Global Optim. 44, estimate from conditional simulations over a discrete
    set (as here), and what Hennig & Schuler (2012), Entropy Search for Information-Efficient
    Global Optimization, JMLR 13, reduce; both seek to lower its entropy, while this rule
    samples at its mode. Sampling: Wilson et al. (2020), ICML.
    """

    rule = "pbest"
    description = "most probable location of the minimum, from posterior samples"
    scores_anywhere = False  # scores its own candidate set only (no curve over arbitrary inputs)
    options = {
        "samples": Option(256, int, 1, 65536, "posterior draws counted per trial"),
        "features": Option(128, int, 16, 8192, "spectral frequencies shared by the draws"),
        "refine": Option(1, int, 0, 1, "1: polish a draw that voted for the chosen pool point"),
        "fill": Option("samples", str, help="how a round of several trials is filled",
                       choices=("samples", "believer", "liar")),
    }
    n_starts = 0
    lockstep = True   # the one-campaign path is the block code on a block of one

    def start(self, ctx):
        super().start(ctx)
        self._draws = None
        self._draws = _per_replicate_draws(self, ctx.posterior, [ctx.rng])

    @property
    def draws(self) -> PathwiseDraws:
        """The one campaign's draws (a block's are one per replicate)."""
        return self._draws[0]

    def _votes(self, st, b: int, rng, mu, sd) -> np.ndarray:
        """Pool index of each of replicate b's draws' minimum: shape (S,). The correction is added in
        float32 (``draw_in(single=True)``): only the argmin is read."""
        rows = _plausible(mu, sd, st.n)
        G, _ = self._draws[b].draw_in(st, b, rng, self.samples, rows, single=True)
        return rows[np.argmin(G, axis=1)]

    def probabilities(self, post) -> np.ndarray:
        """Share of the draws whose minimum over the pool lies at each pool point: shape (m,)."""
        mu, sd = post.stacked_pool_moments()
        votes = self._votes(post, 0, self.ctx.rng, mu[0], sd[0])
        return np.bincount(votes, minlength=len(self.ctx.pool)) / float(self.samples)

    def score_pool(self, post):
        return self.probabilities(post)

    # feasible = "weight": the vote shares times the chance of feasibility (a positive utility, weighted as
    # EI is), the shares smoothed by one vote each (add-one, common practice: a point no draw voted for has
    # a small, not a zero, chance of being the minimiser, so a feasible point can outrank one voted for but
    # almost surely infeasible); the winner is not refined then (its sample's path knows nothing of limits)
    weights_feasibility = True

    def choose(self, post, t):
        if not self.weighted(post) or t >= self.ctx.horizon - self.exploit_last:
            return super().choose(post, t)              # the block code on a block of one, or the final switch
        counts = self.probabilities(post) * self.samples
        score = np.log1p(counts) + post.feasible.pool_log_chance()
        return self.ctx.pool[int(np.argmax(score))].copy()

    def choose_block(self, st, t, block):
        if t >= block.horizon - self.exploit_last:
            return _lowest_mean_block(st, self.n_starts, self.polish_iterations)   # the final switch
        self._draws = _per_replicate_draws(self, st, block.rngs)
        mu, sd = st.stacked_pool_moments()
        B, m = mu.shape
        best, voter = np.empty(B, dtype=int), np.empty(B, dtype=int)
        for b, rng in enumerate(block.rngs):
            votes = self._votes(st, b, rng, mu[b], sd[b])
            counts = np.bincount(votes, minlength=m)
            tied = np.flatnonzero(counts == counts.max())
            best[b] = tied[int(np.argmax(sd[b, tied]))] if len(tied) > 1 else tied[0]
            voter[b] = np.flatnonzero(votes == best[b])[0]      # the first draw that voted for it
        start = st.pools[np.arange(B), best]                    # (B, d)
        if not self.refine or block.library is not None:       # a library's trial is one of its rows, as drawn
            return start.copy()
        U, _ = polish_block(self._voters(st, voter), start[:, None, :], iterations=self.polish_iterations)
        return U[:, 0]

    def _voters(self, st, voter):
        """``fg(U)`` of each replicate's voting draw (number ``voter[b]`` of its last ``draw_in``), stacked
        for :func:`~simlab.model.optimize.polish_block`: the same Matheron sample as Thompson sampling's."""
        from .classic import posterior_sample, samples_prior, stacked_parts, stacked_prior

        samples, betas = [], []
        for d, s in zip(self._draws, voter):
            W, a = d._last
            d.sample.w = W[:, s].copy()
            samples.append(d.sample)
            betas.append(a[:, s])
        beta = np.stack(betas)                                  # (B, n)
        if isinstance(samples[0], MixedFeatureSample):
            return posterior_sample(st, samples_prior(samples), beta)
        return posterior_sample(st, stacked_prior(st.mean, *stacked_parts(samples)), beta)


def _per_replicate_draws(rule, st, rngs) -> list[PathwiseDraws]:
    """Each replicate's pathwise draws (frequencies from its own stream), made at the first call of a
    campaign and kept (``rule._draws``)."""
    if getattr(rule, "_draws", None) is not None:   # a block's fresh policy has no start()
        return rule._draws
    return [PathwiseDraws(st, pool, rng, rule.features) for pool, rng in zip(st.pools, rngs)]


# ---------------------------------------------------------------------------------------- MES
def _inv_mills(g, log_cdf=None):
    """``phi(g) / Phi(g)`` without overflow or underflow; ``log_cdf``: ``log Phi(g)`` if already computed
    (the same values, so the same bits, and one ``log_ndtr`` fewer)."""
    return np.exp(-0.5 * g * g - _LOG_SQRT_2PI - (special.log_ndtr(g) if log_cdf is None else log_cdf))


def _b_exact(u):
    """``b(u) = Phi(u) log Phi(u) / phi(u)`` and ``log Phi(u)`` from the special functions, finite for every u.

    ``Phi/phi = sqrt(pi/2) special.erfcx(-u/sqrt2)`` for every u (no cancellation; it overflows only
    beyond u ~ 37), so ``b = sqrt(pi/2) erfcx(-u/sqrt2) log Phi(u)``, with ``log Phi`` from ``log_ndtr``,
    accurate where it is tiny. Above u = 30, where ``log Phi(u) = -Q`` to within Q^2 (Q = Phi(-u) <
    1e-197), ``b = -Q / phi = -sqrt(pi/2) erfcx(u/sqrt2)``.
    """
    logp = special.log_ndtr(u)
    out = _SQRT_HALF_PI * special.erfcx(-np.minimum(u, 30.0) / np.sqrt(2.0)) * logp
    far = u > 30.0
    if far.any():
        out[far] = -_SQRT_HALF_PI * special.erfcx(u[far] / np.sqrt(2.0))
    return out, logp


class _BTable:
    """``b(u)`` and ``b'(u) = log Phi(u) + 1 + u b(u)`` by cubic Hermite interpolation on a uniform grid.

    The noisy information spends most of its time in ``b`` at 8 Gauss-Hermite nodes per input and
    sampled minimum: ``log_ndtr`` and ``erfcx`` cost about 50 ns an element here. Interpolating the
    exact values and derivatives at 4,097 knots on [-32, 32] (spacing 1/64; the coefficients from
    SciPy's ``CubicHermiteSpline``, with ``b'' = lambda + b + u b'``, lambda = phi / Phi) costs about
    6 ns an element: the interval index is one multiplication on a uniform grid, then four gathers
    and Horner's rule. SciPy's own ``PPoly.__call__`` is not used for the evaluation because its
    general breakpoint search measured 70 ns an element, slower than the special functions.
    Accuracy: relative error at most 1.1e-11 for ``b``, absolute 7e-12 for ``b'`` (which crosses 0), over 2 million points of
    [-32, 32] (``tests/unit/test_info_rules.py``), far below the 8-node rule's 5e-8 nats. Outside the
    grid the exact forms are used.
    """

    lo, hi, size = -32.0, 32.0, 4096

    def __init__(self):
        from scipy.interpolate import CubicHermiteSpline

        k = np.linspace(self.lo, self.hi, self.size + 1)
        self.knots, self.step = k[:-1].copy(), (self.hi - self.lo) / self.size
        b, logp = _b_exact(k)
        db = logp + 1.0 + k * b
        ddb = _inv_mills(k, logp) + b + k * db
        self.b = [np.ascontiguousarray(c) for c in CubicHermiteSpline(k, b, db).c]
        self.db = [np.ascontiguousarray(c) for c in CubicHermiteSpline(k, db, ddb).c]

    def __call__(self, u, *, derivative: bool = False):
        """``b(u)``, and with ``derivative`` also ``b'(u)``, each shaped like u."""
        i = ((u - self.lo) * (1.0 / self.step)).astype(np.intp)
        np.clip(i, 0, self.size - 1, out=i)
        s = u - self.knots.take(i)
        out = [self._horner(self.b, i, s)] + ([self._horner(self.db, i, s)] if derivative else [])
        far = (u < self.lo) | (u > self.hi)
        if far.any():
            bf, logp = _b_exact(u[far])
            out[0][far] = bf
            if derivative:
                out[1][far] = logp + 1.0 + u[far] * bf
        return tuple(out) if derivative else out[0]

    @staticmethod
    def _horner(c, i, s):
        out = c[0].take(i)
        for cj in c[1:]:
            out *= s
            out += cj.take(i)
        return out


_B_TABLE = None


def _b(u, *, derivative: bool = False):
    """``b(u)`` (and ``b'(u)``) from the table (:class:`_BTable`), built at the first call."""
    global _B_TABLE
    if _B_TABLE is None:
        _B_TABLE = _BTable()
    return _B_TABLE(u, derivative=derivative)


def max_value_information(mu, sd, fstar, noise: float = 0.0, *, grad: bool = False):
    """Information an observation at each input gives about the minimum value, per sampled minimum.

    Parameters
    ----------
    mu, sd : ndarray of shape (..., q)
        Posterior mean and sd of f at the inputs (sd > 0); leading axes (replicates of a
        block) broadcast against those of fstar.
    fstar : ndarray of shape (..., K)
        Sampled values of the minimum ``min f``.
    noise : float
        Observation noise sd s; 0 gives Wang & Jegelka's noise-free form.
    grad : bool
        Also return the partial derivatives with respect to mu and sd.

    Returns
    -------
    info : ndarray of shape (..., q, K)
        Nats. Average over K for the acquisition.
    dmu, dsd : ndarray of shape (..., q, K), only if ``grad``

    Notes
    -----
    Minimisation form. Given the minimum value ``f*``, f(x) is approximated by its posterior
    truncated to ``f(x) >= f*`` (Wang & Jegelka 2017, written for maxima with
    ``gamma = (y* - mu) / sd``; negating f turns it into the form here). With
    ``gamma = (mu - f*) / sd``, ``Psi = Phi(gamma)`` and ``lambda = phi(gamma) / Phi(gamma)``:

    - noise-free (s = 0): ``I = gamma lambda / 2 - log Psi``, the entropy of the normal
      minus that of the truncated normal;
    - noisy (s > 0): the information about ``f*`` carried by ``y = f + eps``, not by f.
      With ``sy^2 = sd^2 + s^2``, ``rho = sd / sy``, ``kappa = s / sy``, the standardised
      observation ``t = (y - mu) / sy`` has density ``phi(t) Phi((gamma + rho t) / kappa) / Psi``
      given ``f >= f*`` (derived by conditioning the joint normal of (f, y) on y). Its mean
      square is ``1 - rho^2 gamma lambda``, so

      ``I = H[y] - H[y | f*] = rho^2 gamma lambda / 2 - log Psi + E[log Phi((gamma + rho t) / kappa)]``

      and the last term equals ``kappa lambda E_s[b(kappa gamma + rho s)]``, ``s ~ N(0, 1)``,
      ``b(u) = Phi(u) log Phi(u) / phi(u)`` (substitute ``u = (gamma + rho t) / kappa`` and
      complete the square). ``b`` is smooth and grows at most linearly, so an 8-node
      Gauss-Hermite rule evaluates I to within 5e-8 nats, and its derivatives to within 5e-8
      (against 80 nodes on a grid of |gamma| <= 10 and sd / s from 1e-3 to 1e3; 12 nodes:
      1e-9, at 1.5 times the cost). Rankings of the pool rest on 16 sampled minima, whose Monte
      Carlo error is many orders larger. As ``s -> 0`` the form tends to the
      noise-free one; as ``s -> inf`` it tends to 0.

    Derivatives use ``lambda' = -lambda (gamma + lambda)`` and ``b'(u) = log Phi(u) + 1 + u b(u)``.

    References
    ----------
    Wang & Jegelka (2017), Max-value Entropy Search for Efficient Bayesian Optimization,
    ICML. Nguyen, Low & Jaillet (2022), Rectified Max-Value Entropy Search for Bayesian
    Optimization, AISTATS, also write the density of a noisy observation given the optimum
    value in closed form.
    """
    mu = np.asarray(mu, dtype=float)[..., :, None]
    sd = np.asarray(sd, dtype=float)[..., :, None]
    fstar = np.asarray(fstar, dtype=float)[..., None, :]
    g = (mu - fstar) / sd
    logpsi = special.log_ndtr(g)
    lam = _inv_mills(g, logpsi)
    if noise <= 0.0:
        info = 0.5 * g * lam - logpsi
        if not grad:
            return info
        dg = -0.5 * lam * (1.0 + g * (g + lam))
        return info, dg / sd, -dg * g / sd
    s = float(noise)
    sy = np.sqrt(sd * sd + s * s)
    rho, kappa = sd / sy, s / sy
    u = (kappa * g)[..., None] + rho[..., None] * _GH_NODES          # (q, K, Q)
    bu, db = _b(u, derivative=True) if grad else (_b(u), None)
    G = (bu * _GH_WEIGHTS).sum(-1)     # a sum over the last axis: the same bits in any block
    info = 0.5 * rho**2 * g * lam - logpsi + kappa * lam * G
    if not grad:
        return info
    Eb1 = (db * _GH_WEIGHTS).sum(-1)
    Ebs = (db * (_GH_WEIGHTS * _GH_NODES)).sum(-1)
    dlam = -lam * (g + lam)
    d_g = 0.5 * rho**2 * (lam + g * dlam) - lam + kappa * (dlam * G + lam * kappa * Eb1)
    d_rho = rho * g * lam + kappa * lam * Ebs
    d_kappa = lam * G + kappa * lam * g * Eb1
    sy3 = sy**3
    dmu = d_g / sd
    dsd = -d_g * g / sd + d_rho * (s * s / sy3) - d_kappa * (s * sd / sy3)
    return info, dmu, dsd


class MaxValueEntropySearch(Acquisition):
    """Max-value entropy search: observe where the observation says most about the minimum value.

    Each trial samples ``samples`` values of the minimum ``f*`` (by default the minima of
    pathwise posterior draws over the pool and the evaluated inputs) and scores inputs by the
    average information of :func:`max_value_information`. The score is a function of the
    posterior mean and sd given the sampled minima, so pool scores and L-BFGS-B polishing use
    :meth:`_from_moments` with analytic derivatives.

    Notes
    -----
    ``a(x) = (1/K) sum_k I(mu(x), sd(x); f*_k)``. With ``noise_aware = 1`` (default) and a
    noisy belief, I is the information carried by the noisy observation y(x); with 0 it is
    the paper's noise-free form (information carried by f(x)), which overstates what a noisy
    trial at an already well-known input can teach. The Gumbel option replaces the draws by
    the paper's approximation: ``P(f* > z) ~ prod_pool Phi((mu - z) / sd)``, fitted by a
    Gumbel law for minima ``exp(-exp((z - c) / b))`` matching its quartiles, then sampled by
    inversion.

    References
    ----------
    Wang & Jegelka (2017), Max-value Entropy Search for Efficient Bayesian Optimization, ICML.
    """

    rule = "mes"
    description = "max-value entropy search"
    options = {
        "samples": Option(16, int, 1, 1024, "sampled minimum values per trial"),
        "features": Option(128, int, 16, 8192, "spectral frequencies for the draws"),
        "gumbel": Option(0, int, 0, 1, "1: sample minimum values from the Gumbel approximation"),
        "noise_aware": Option(1, int, 0, 1, "1: information carried by the noisy observation"),
    }

    # weighting by feasibility (feasible = "weight"): the information times the chance of feasibility, in
    # logarithms (the product heuristic of Gardner et al. 2014 applied to a positive utility; a constrained
    # MES proper, Perrone et al. 2019, would count the limits' information too, from memory)
    weights_feasibility = True
    positive_score = True
    lockstep = True   # the one-campaign path is the block code on a block of one

    def start(self, ctx):
        super().start(ctx)
        self._draws = None
        self._draws_for(ctx.posterior, [ctx.rng])

    def _draws_for(self, st, rngs):
        """Each replicate's pathwise draws (frequencies from its own stream), made once."""
        if not self.gumbel:
            self._draws = _per_replicate_draws(self, st, rngs)

    def choose_block(self, st, t, block):
        self._rngs, self._fstars = block.rngs, None
        return super().choose_block(st, t, block)

    def prepare_block(self, st):
        self._draws_for(st, self._rngs)
        mu, sd = st.stacked_pool_moments()
        sd = np.maximum(sd, self.sd_floor * st.kernel.amplitude)
        self.fstar = np.stack([self._gumbel_minima(mu[b], sd[b], rng) if self.gumbel else
                               self._sampled_minima(st, b, mu[b], sd[b], rng)
                               for b, rng in enumerate(self._rngs)])            # (B, K)
        self._fstars = self.fstar
        self._noise = st.noise if self.noise_aware else 0.0

    def _keep_state(self, post):
        """The sampled minima of the choice just made, for :meth:`score`: no new draw."""
        if self._fstars is not None:          # None after the final switch to the lowest mean
            self.fstar = self._fstars[0]

    def prepare(self, post):
        """One campaign's sampled minima (a round filled by penalizers takes this path)."""
        self._rngs = [self.ctx.rng]
        self.prepare_block(post)
        self.fstar = self.fstar[0]

    def _sampled_minima(self, st, b, mu, sd, rng):
        """Minima of ``samples`` pathwise draws over replicate b's plausible pool points and data."""
        rows = _plausible(mu, sd, st.n)
        G, GX = self._draws[b].draw_in(st, b, rng, self.samples, rows)
        low = G.min(1).astype(float)
        if st.n:
            low = np.minimum(low, GX.min(0))
        return st.mean + low

    def _gumbel_minima(self, mu, sd, rng):
        def cdf(z, p):  # P(f* <= z) - p under independence across the pool
            return -np.expm1(special.log_ndtr((mu - z) / sd).sum()) - p

        lo, hi = float(np.min(mu - 10.0 * sd)), float(np.min(mu + 10.0 * sd))
        q25, q50, q75 = (optimize.brentq(cdf, lo, hi, args=(p,), xtol=1e-12 * (hi - lo)) for p in (0.25, 0.5, 0.75))
        b = (q75 - q25) / (np.log(-np.log(0.25)) - np.log(-np.log(0.75)))
        c = q50 - b * np.log(np.log(2.0))
        r = rng.random(self.samples)
        return c + b * np.log(-np.log(r))

    def _pool_values(self, mu, sd, k):
        """Scores over each replicate's pool (B, m), screened replicate by replicate (:meth:`_screened`)."""
        return np.stack([self._screened(mu[b], sd[b], self.fstar[b], k) for b in range(mu.shape[0])])

    def score_pool(self, post):
        mu, sd = post.pool_moments()
        sd = self._floor(post, sd)
        if self._noise > 0.0 and (self.fill == "penalize" or self.weighted(post)):   # reordered: no screen
            return self._value(mu, sd)
        return self._screened(mu, sd, self.fstar, max(self.n_starts, 1))

    def _screened(self, mu, sd, fstar, keep):
        """Scores over one pool; with the noisy form, points that cannot be among the
        ``keep`` best keep an upper bound on their score, which lies below the best few.

        The noisy information never exceeds the noise-free one for the same (mu, sd, f*)
        (an observation corrupted by noise tells less; ``tests/unit/test_info_rules.py``
        checks it on a grid), so the noise-free scores, cheap and closed-form, bound the noisy
        ones: points are evaluated in decreasing order of the bound, in growing chunks, until
        the bound of the next falls below the ``keep``-th best noisy score found.

        The noise-free mean over the K sampled minima costs K normal log-CDFs per point, most of
        them for points far from the best. The noise-free information decreases in
        ``gamma = (mu - f*) / sd`` (its derivative is ``-lambda (1 + gamma (gamma + lambda)) / 2``,
        negative because a truncated normal's variance is positive), so the value at the largest
        sampled minimum alone bounds the mean, at one log-CDF per point. That looser bound screens
        first: the ``keep`` points it ranks best are scored exactly, their ``keep``-th best score L
        is at most the final ``keep``-th best, and only points whose loose bound exceeds L get the
        mean bound. The ``keep`` best scores are the same as with the mean bound everywhere (the
        exact scores do not depend on which bound found them); points that cannot be among them
        carry the loose or the mean bound.
        """
        if self._noise <= 0.0:
            return max_value_information(mu, sd, fstar).mean(-1)
        keep = max(keep, 1)
        out = max_value_information(mu, sd, fstar.max(-1, keepdims=True))[..., 0]    # the loose bound
        first = np.argpartition(-out, keep - 1)[:keep] if keep < len(out) else np.arange(len(out))
        exact = np.zeros(len(out), dtype=bool)
        out[first] = max_value_information(mu[first], sd[first], fstar, self._noise).mean(-1)
        exact[first] = True
        if len(first) == len(out):              # the whole pool is scored exactly
            return out
        low = out[first].min()
        rows = np.flatnonzero(~exact & (out > low))
        out[rows] = max_value_information(mu[rows], sd[rows], fstar).mean(-1)     # the mean bound where it matters
        order = rows[np.argsort(-out[rows], kind="stable")]     # the others' bound is at most low: never scored
        done, chunk = 0, 64
        while done < len(order):
            if out[order[done]] <= np.partition(out[exact], -keep)[-keep]:
                break
            idx = order[done : done + chunk]
            out[idx] = max_value_information(mu[idx], sd[idx], fstar, self._noise).mean(-1)
            exact[idx] = True
            done, chunk = done + len(idx), 2 * chunk
        return out

    def _value(self, mu, sd):
        return max_value_information(mu, sd, self.fstar, self._noise).mean(-1)

    def _from_moments(self, mu, sd):
        info, dmu, dsd = max_value_information(mu, sd, self.fstar, self._noise, grad=True)
        return info.mean(-1), dmu.mean(-1), dsd.mean(-1)
