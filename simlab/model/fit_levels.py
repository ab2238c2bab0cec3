"""Maximum-likelihood fits of the product kernel over levels (model/levels.py): lengthscales, amplitude,
noise, mean and one exchangeable level correlation per categorical input, and leave-one-out checks."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import cho_solve, solve_triangular
from scipy.optimize import minimize
from threadpoolctl import threadpool_limits

from .fit import (_AT_BOUND, _LOG2PI, _START_AMPLITUDE, _START_LENGTHSCALE, _START_NOISE, FitResult, LeaveOneOut,
                  default_bounds)
from .gp import NUGGET
from .kernels import KERNELS
from .levels import correlation_range

__all__ = ["MixedFit", "mixed_log_likelihood", "fit_mixed", "mixed_loo"]

# The level correlation is searched as rho = low + (1 - low) sigmoid(t), low = -1/(L-1), so every t is
# inside the open interval of positive-definite correlations (Qian, Wu & Wu 2008). |t| <= 8 reaches
# within 3.4e-4 (1 - low) of either end: closer than that, the data cannot tell the value anyway.
_T_BOUND = 8.0
_START_T = (-1.5, 2.5)    # rho from about 0.18 low + 0.82 to 0.92 of the way up: the central part


@dataclass(frozen=True)
class MixedFit(FitResult):
    """A :class:`simlab.model.fit.FitResult` with the level correlations.

    Attributes
    ----------
    level_correlation : tuple of float
        One exchangeable correlation per categorical input, each in (-1/(L-1), 1).
    levels : tuple of int
        The number of levels L of each categorical input.

    ``lengthscale`` holds the numeric inputs' lengthscales only (on their unit cube), and
    ``at_bound`` may name ``level_correlation[c]`` (the c-th categorical input).
    """

    level_correlation: tuple[float, ...] = ()
    levels: tuple[int, ...] = ()

    @property
    def hyper(self) -> dict:
        return {**super().hyper, "rho": np.asarray(self.level_correlation, dtype=float)}


def _rho_of(t, lows):
    return lows + (1.0 - lows) / (1.0 + np.exp(-t))


def _t_of(rho, lows):
    s = (np.asarray(rho, dtype=float) - lows) / (1.0 - lows)
    return np.log(s / (1.0 - s))


class _Objective:
    """Log marginal likelihood and gradient of the product kernel for one data set.

    ``K = a^2 rho_num(r) prod_c C_c[l_c, l_c'] + (s^2 + NUGGET a^2) I`` with ``C_c`` 1 on the
    diagonal and ``rho_c`` elsewhere; the pairwise squared differences and level matches are
    computed once.
    """

    def __init__(self, kernel_name: str, X, levels, counts, y):
        if kernel_name not in KERNELS:
            raise ValueError(f"kernel must be one of {', '.join(KERNELS)}; got {kernel_name!r}")
        self.X, self.levels, self.counts, self.y = _check(X, levels, counts, y)
        n, d = self.X.shape
        self.n, self.d, self.c = n, d, len(self.counts)
        self.profile = KERNELS[kernel_name](np.ones(max(d, 1)), 1.0)
        diff = self.X[:, None, :] - self.X[None, :, :]
        self.D2 = (diff * diff).reshape(n * n, d)
        self.other = [lv[:, None] != lv[None, :] for lv in self.levels.T]     # distinct levels, per input
        self.lows = np.array([correlation_range(L)[0] for L in self.counts])
        self.eye = np.eye(n)

    def factors(self, lengthscale, rho):
        """(1 / l^2, r, rho_num(r), per-input level matrices)."""
        n = self.n
        if self.d:
            inv_ls2 = 1.0 / np.asarray(lengthscale, dtype=float) ** 2
            r = np.sqrt(self.D2 @ inv_ls2).reshape(n, n)
            num = self.profile._rho(r)
        else:
            inv_ls2, r, num = np.empty(0), np.zeros((n, n)), np.ones((n, n))
        lev = [np.where(o, float(p), 1.0) for o, p in zip(self.other, rho)]
        return inv_ls2, r, num, lev

    def gram(self, lengthscale, amplitude, noise, rho):
        var = float(amplitude) ** 2
        inv_ls2, r, num, lev = self.factors(lengthscale, rho)
        R = num.copy()
        for m in lev:
            R *= m
        K = var * R
        K[np.diag_indices(self.n)] += float(noise) ** 2 + NUGGET * var   # as simlab.model.gp.Posterior
        return inv_ls2, r, num, lev, R, K

    def __call__(self, lengthscale, amplitude, mean, noise, rho, *, grad: bool, profile_mean: bool = False):
        """(lml, gradient or None, mean used); the gradient is in (log l_1..d, log amplitude, log noise,
        t_1..c, mean) with rho_c = low_c + (1 - low_c) sigmoid(t_c)."""
        n, d, c = self.n, self.d, self.c
        var, noise2 = float(amplitude) ** 2, float(noise) ** 2
        inv_ls2, r, num, lev, R, K = self.gram(lengthscale, amplitude, noise, rho)
        L = np.linalg.cholesky(K)
        if profile_mean:
            sol = cho_solve((L, True), np.column_stack([self.y, np.ones(n)]), check_finite=False)
            mean = float(sol[:, 0].sum() / sol[:, 1].sum())            # GLS mean
            alpha = sol[:, 0] - mean * sol[:, 1]
        else:
            mean = float(mean)
            alpha = cho_solve((L, True), self.y - mean, check_finite=False)
        # Rasmussen & Williams (2006), eq. 5.8
        lml = -0.5 * (self.y - mean) @ alpha - np.log(np.diag(L)).sum() - 0.5 * n * _LOG2PI
        if not grad:
            return float(lml), None, mean
        # Rasmussen & Williams (2006), eq. 5.9: d lml / d theta = 1/2 tr((alpha alpha' - K^-1) dK/dtheta)
        Linv = solve_triangular(L, self.eye, lower=True, check_finite=False)
        W = np.outer(alpha, alpha) - Linv.T @ Linv
        g = np.empty(d + 3 + c)
        if d:
            levels = np.ones((n, n))                                    # prod_c of the level matrices
            for m in lev:
                levels *= m
            M = W * (-var * self.profile._drho_over_r(r) * levels)
            g[:d] = 0.5 * (M.reshape(-1) @ self.D2) * inv_ls2
        trW = np.trace(W)
        g[d] = var * (np.einsum("ij,ij->", W, R) + NUGGET * trW)
        g[d + 1] = noise2 * trW
        rho = np.asarray(rho, dtype=float)
        s = (rho - self.lows) / (1.0 - self.lows)                      # sigmoid(t)
        for k in range(c):
            # dK/d t_k = a^2 rho_num prod_{c != k} C_c x [distinct levels of k] x d rho_k / d t_k
            rest = num.copy()
            for kk, m in enumerate(lev):
                if kk != k:
                    rest *= m
            dK = var * rest * self.other[k] * ((1.0 - self.lows[k]) * s[k] * (1.0 - s[k]))
            g[d + 2 + k] = 0.5 * np.einsum("ij,ij->", W, dK)
        g[d + 2 + c] = alpha.sum()
        return float(lml), g, mean


def _check(X, levels, counts, y):
    y = np.asarray(y, dtype=float)
    if y.ndim != 1:
        raise ValueError(f"y must have shape (n,); got {y.shape}")
    n = len(y)
    X = np.asarray(X, dtype=float).reshape(n, -1)
    levels = np.asarray(levels).reshape(n, -1)
    counts = tuple(int(L) for L in counts)
    if levels.shape[1] != len(counts):
        raise ValueError(f"levels must have one column per categorical input ({len(counts)}); got {levels.shape[1]}")
    if not (np.isfinite(X).all() and np.isfinite(y).all()):
        raise ValueError("X and y must be finite (no NaN or inf)")
    for k, L in enumerate(counts):
        if L < 2 or not np.isin(levels[:, k], np.arange(L)).all():
            raise ValueError(f"levels[:, {k}] must hold level indices 0 .. {L - 1} (L >= 2)")
    return X, levels.astype(int), counts, y


def mixed_log_likelihood(kernel_name: str, X, levels, counts, y, *, lengthscale, amplitude: float, mean: float,
                         noise: float, rho, grad: bool = False):
    """Log marginal likelihood of the product kernel over levels with a constant mean and noise.

    Parameters
    ----------
    kernel_name : str
        The stationary kernel of the numeric inputs (a key of ``KERNELS``).
    X : ndarray of shape (n, d)
        Numeric inputs (simlab passes the unit cube); d may be 0.
    levels : ndarray of shape (n, c)
        Level index (0 .. L-1) of each row for each categorical input.
    counts : sequence of int, length c
        Number of levels of each categorical input.
    y : ndarray of shape (n,)
    lengthscale : array_like of shape (d,)
    amplitude, mean, noise : float
    rho : array_like of shape (c,)
        Exchangeable level correlations, each in (-1/(L-1), 1).
    grad : bool
        Also return the gradient in (log l, log amplitude, log noise, t, mean), with
        ``rho = low + (1 - low) sigmoid(t)``.

    Notes
    -----
    ``K = amplitude^2 k_num(x, x') prod_c C_c[l_c, l_c'] + (noise^2 + NUGGET amplitude^2) I`` (the
    kernel of :class:`simlab.model.levels.MixedKernel`; Qian, Wu & Wu 2008) and
    ``log p(y) = -1/2 (y - m)' K^-1 (y - m) - 1/2 log|K| - n/2 log 2 pi`` (Rasmussen & Williams 2006,
    eqs. 5.8-5.9).
    """
    obj = _Objective(kernel_name, X, levels, counts, y)
    rho = _valid_rho(obj, rho)
    lml, g, _ = obj(np.broadcast_to(np.asarray(lengthscale, dtype=float), (obj.d,)), amplitude, mean, noise, rho,
                    grad=grad)
    return (lml, g) if grad else lml


def _valid_rho(obj, rho):
    rho = np.asarray(rho, dtype=float).reshape(-1)
    if len(rho) != obj.c:
        raise ValueError(f"rho must hold one correlation per categorical input ({obj.c}); got {len(rho)}")
    if not ((rho > obj.lows) & (rho < 1.0)).all():
        raise ValueError(f"every rho must lie in (-1/(L-1), 1); got {rho} for {obj.counts} levels")
    return rho


def fit_mixed(kernel_name: str, X, levels, counts, y, *, restarts: int = 8, rng: np.random.Generator,
              maxiter: int = 200) -> MixedFit:
    """Maximise :func:`mixed_log_likelihood` over lengthscales, amplitude, noise, level correlations and
    the mean.

    As :func:`simlab.model.fit.fit_hyperparameters` (L-BFGS-B in log lengthscales, log amplitude, log
    noise, from a data-based guess and ``restarts - 1`` random starts in the central part of the box
    of :func:`simlab.model.fit.default_bounds`; the mean profiled out in closed form), with each level
    correlation searched as ``t`` in ``rho = low + (1 - low) sigmoid(t)``, ``|t| <= 8``: inside the
    positive-definite interval (-1/(L-1), 1) everywhere, so no step of the search leaves it. The
    first start has every rho = 0.5 (or the middle of its interval if that is lower).

    References
    ----------
    Rasmussen & Williams (2006), section 5.4.1; Qian, Wu & Wu (2008), Technometrics 50, section 3.
    """
    obj = _Objective(kernel_name, X, levels, counts, y)
    n, d, c = obj.n, obj.d, obj.c
    if n < 2:
        raise ValueError(f"need at least 2 observations to fit hyperparameters; got {n}")
    if isinstance(restarts, bool) or not isinstance(restarts, (int, np.integer)) or restarts < 1:
        raise ValueError(f"restarts must be a whole number >= 1; got {restarts!r}")
    box = default_bounds(obj.X if d else np.zeros((n, 1)), obj.y)
    if not d:
        box["lengthscale"] = (np.empty(0), np.empty(0))
    sd = float(np.std(obj.y, ddof=1))
    span = np.ptp(obj.X, axis=0) if d else np.empty(0)
    span = np.where(span > 0, span, 1.0)
    lo = np.concatenate([np.log(box["lengthscale"][0]), [np.log(box["amplitude"][0]), np.log(box["noise"][0])],
                         np.full(c, -_T_BOUND)])
    hi = np.concatenate([np.log(box["lengthscale"][1]), [np.log(box["amplitude"][1]), np.log(box["noise"][1])],
                         np.full(c, _T_BOUND)])

    def unpack(t):
        return np.exp(t[:d]), float(np.exp(t[d])), float(np.exp(t[d + 1])), _rho_of(t[d + 2:], obj.lows)

    def negative(t):
        ls, amp, noise, rho = unpack(t)
        try:
            lml, g, _ = obj(ls, amp, 0.0, noise, rho, grad=True, profile_mean=True)
        except np.linalg.LinAlgError:
            return 1e25, np.zeros(len(t))       # step back (finite: L-BFGS-B cannot take inf)
        return -lml, -g[:-1]

    rho0 = np.maximum(0.5, 0.5 * (obj.lows + 1.0))
    starts = [np.clip(np.concatenate([np.log(0.5 * span), [np.log(sd), np.log(0.1 * sd)], _t_of(rho0, obj.lows)]),
                      lo, hi)]
    slo = np.concatenate([np.log(_START_LENGTHSCALE[0] * span), [np.log(_START_AMPLITUDE[0] * sd),
                                                                 np.log(_START_NOISE[0] * sd)], np.full(c, _START_T[0])])
    shi = np.concatenate([np.log(_START_LENGTHSCALE[1] * span), [np.log(_START_AMPLITUDE[1] * sd),
                                                                 np.log(_START_NOISE[1] * sd)], np.full(c, _START_T[1])])
    for _ in range(restarts - 1):
        starts.append(np.clip(rng.uniform(slo, shi), lo, hi))

    best = None
    with threadpool_limits(1):     # small matrices: BLAS threads only contend (as in fit.py)
        for t0 in starts:
            res = minimize(negative, t0, jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                           options={"maxiter": maxiter})
            if best is None or res.fun < best.fun:
                best = res
    if best.fun >= 1e24:
        raise np.linalg.LinAlgError("the Gram matrix was not positive definite at any starting point")
    t = np.clip(best.x, lo, hi)
    ls, amp, noise, rho = unpack(t)
    lml, _, mean = obj(ls, amp, 0.0, noise, rho, grad=False, profile_mean=True)
    names = ([f"lengthscale[{i}]" for i in range(d)] + ["amplitude", "noise"]
             + [f"level_correlation[{k}]" for k in range(c)])
    at_bound = tuple(nm for nm, v, a, b in zip(names, t, lo, hi) if v - a < _AT_BOUND or b - v < _AT_BOUND)
    return MixedFit(kernel=kernel_name, lengthscale=tuple(float(v) for v in ls), amplitude=amp, mean=mean,
                    noise=noise, log_likelihood=lml, at_bound=at_bound, n_starts=len(starts),
                    converged=bool(best.success), bounds=box, level_correlation=tuple(float(v) for v in rho),
                    levels=obj.counts)


def mixed_loo(kernel_name: str, X, levels, counts, y, *, lengthscale, amplitude: float, mean: float, noise: float,
              rho) -> LeaveOneOut:
    """Leave-one-out predictive distributions of the product kernel in closed form (Rasmussen &
    Williams 2006, eqs. 5.10-5.12, as :func:`simlab.model.fit.loo_log_predictive`)."""
    obj = _Objective(kernel_name, X, levels, counts, y)
    rho = _valid_rho(obj, rho)
    K = obj.gram(np.broadcast_to(np.asarray(lengthscale, dtype=float), (obj.d,)), amplitude, noise, rho)[-1]
    Kinv = cho_solve((np.linalg.cholesky(K), True), np.eye(obj.n), check_finite=False)
    alpha = Kinv @ (obj.y - mean)
    var = 1.0 / np.diag(Kinv)                                          # eq. 5.12
    mu = obj.y - alpha * var                                           # eq. 5.12
    logp = -0.5 * np.log(var) - 0.5 * (obj.y - mu) ** 2 / var - 0.5 * _LOG2PI   # eq. 5.10
    return LeaveOneOut(mean=mu, sd=np.sqrt(var), log_density=logp)
