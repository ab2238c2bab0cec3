"""Where trials fail: a Gaussian-process classifier of success, Laplace approximation (logistic likelihood)."""

from __future__ import annotations

import numpy as np

from ..lazy import linalg, special
from .kernels import Kernel

__all__ = ["FailureBelief", "ModeNotFound", "logistic_gaussian_mean"]

# The logistic sigmoid written as a sum of five error functions,
#     sigmoid(x) ~ sum_i c_i (1 + erf(lambda_i x)) / 2,
# after Williams & Barber (1998), Appendix A. These are scikit-learn's constants
# (sklearn/gaussian_process/_gpc.py, LAMBDAS and COEFS), found there by least squares at
# x = 0, 0.6, 2, 3.5, 4.5, inf; copied digit for digit so that simlab's probabilities are
# scikit-learn's (tests/unit/test_classify.py recomputes them from that recipe). On the real
# line the sum is within 4.4e-4 of the sigmoid (measured on a grid of step 1e-3 over [-10, 10]).
_LAMBDAS = np.array([0.41, 0.4, 0.37, 0.44, 0.39])
_COEFS = np.array([-1854.8214151, 3516.89893646, 221.29346712, 128.12323805, -2010.49422654])
# The printed coefficients sum to 1 - 1e-8, not 1. The constant term is written as 1/2 instead
# of sum(c) / 2 so that a zero latent mean gives exactly 1/2 and q(-mu) = 1 - q(mu); the two
# forms differ by 5e-9.


class ModeNotFound(RuntimeError):
    """Newton's iteration for the posterior mode did not converge within its iteration cap."""


def logistic_gaussian_mean(mean, var, *, grad: bool = False):
    """Approximate ``E[sigmoid(f)]`` for ``f ~ N(mean, var)``, elementwise.

    Parameters
    ----------
    mean, var : array_like, broadcastable
        Mean and variance (>= 0) of the latent value.

    grad : bool
        Also return the partial derivatives with respect to ``mean`` and ``var`` (of the sum, before
        clipping).

    Returns
    -------
    ndarray
        The averaged logistic, clipped to [0, 1]; with ``grad``, (value, d/dmean, d/dvar).

    Notes
    -----
    With ``sigmoid(x) ~ 1/2 + sum_i c_i erf(lambda_i x) / 2`` (Williams & Barber 1998, Appendix A;
    scikit-learn's coefficients) each term integrates in closed form against the Gaussian,
    ``E[erf(lambda f)] = erf(lambda mean / sqrt(1 + 2 lambda^2 var))``, so

        q = 1/2 + 1/2 sum_i c_i erf(lambda_i mean / sqrt(1 + 2 lambda_i^2 var)).

    This is the approximation scikit-learn's ``GaussianProcessClassifier.predict_proba`` uses
    (Rasmussen & Williams 2006, Algorithm 3.2, line 7, leaves the integral to the implementer).
    Its error against the exact integral is at most that of the sum against the sigmoid,
    4.4e-4, and smaller where the variance is large.

    References
    ----------
    Williams, C. K. I. & Barber, D. (1998). Bayesian classification with Gaussian processes.
    IEEE Transactions on Pattern Analysis and Machine Intelligence 20(12), 1342-1351.
    """
    mean, var = np.broadcast_arrays(np.asarray(mean, dtype=float), np.asarray(var, dtype=float))
    lam = _LAMBDAS.reshape((-1,) + (1,) * mean.ndim)
    coef = _COEFS.reshape(lam.shape)
    root = np.sqrt(1.0 + 2.0 * lam**2 * var)
    a = lam * mean / root
    terms = coef * special.erf(a)
    # The coefficients are large and of both signs, so rounding can step a hair outside [0, 1].
    value = np.clip(0.5 + 0.5 * terms.sum(axis=0), 0.0, 1.0)
    if not grad:
        return value
    # d erf(a) = 2 / sqrt(pi) exp(-a^2) da, with da/dmean = lam / root and da/dvar = -a lam^2 / root^2
    bell = coef * np.exp(-a * a) / np.sqrt(np.pi)
    return value, (bell * lam / root).sum(axis=0), (-bell * a * lam**2 / root**2).sum(axis=0)


class FailureBelief:
    """The belief about where trials work: a latent Gaussian process ``f`` with the logistic
    likelihood ``P(worked | f) = sigmoid(f)``, its posterior approximated by Laplace's method.

    Parameters
    ----------
    kernel : Kernel
        Prior covariance of the latent function (fixed hyperparameters), e.g.
        ``make_kernel("matern52", 0.3, 1.5)``; inputs on the unit cube.
    X : array_like of shape (n, d)
        Inputs of the trials so far (n may be 0; repeated rows are allowed).
    worked : array_like of shape (n,)
        1 (or True) where the trial worked, 0 (or False) where it failed.
    prior_mean : float, default 0.0
        Constant prior mean of ``f``; 0 gives a prior chance of success of 1/2 everywhere.
    tol : float, default 1e-9
        Newton's iteration stops when no latent value at the data moves by more than ``tol``.
    max_iter : int, default 100
        Cap on Newton steps; :class:`ModeNotFound` is raised if ``tol`` is not met by then.

    Attributes
    ----------
    mode : ndarray of shape (n,)
        The posterior mode of ``f`` at the data, ``f_hat``.
    log_marginal_likelihood : float
        Laplace's approximation to ``log p(worked | X)`` (R&W eq. 3.32); 0 without data.
    n_iter : int
        Newton steps taken.

    Notes
    -----
    The mode is found by Rasmussen & Williams (2006), Algorithm 3.1: Newton's method on
    ``Psi(f) = log p(y | f) - (f - m)' K^-1 (f - m) / 2`` written through the well-conditioned
    ``B = I + W^1/2 K W^1/2`` (eigenvalues >= 1), so a singular ``K`` (repeated inputs, long
    lengthscales) needs no jitter. A step that lowers ``Psi`` is halved until it does not
    (backtracking; Nocedal & Wright 2006, section 3.1, from memory): the logistic likelihood is
    log-concave, so full steps are the rule, but halving guards large amplitudes. Predictions
    follow Algorithm 3.2: latent mean ``m + k*' (y - pi_hat)``, variance
    ``k(x*, x*) - v'v`` with ``v = L \\ (W^1/2 k*)``, then :func:`logistic_gaussian_mean`.
    A constant prior mean ``m`` enters as in R&W section 2.7 (from memory): the iteration runs on
    ``f - m``.

    References
    ----------
    Rasmussen, C. E. & Williams, C. K. I. (2006). Gaussian Processes for Machine Learning.
    MIT Press, sections 3.4.1-3.4.4, Algorithms 3.1 and 3.2, equation 3.32.
    """

    def __init__(self, kernel: Kernel, X, worked, *, prior_mean: float = 0.0,
                 tol: float = 1e-9, max_iter: int = 100):
        X, y = _check_data(kernel, X, worked)
        if not np.isfinite(prior_mean):
            raise ValueError(f"prior_mean must be finite; got {prior_mean!r}")
        if not tol > 0:
            raise ValueError(f"tol must be positive; got {tol!r}")
        if int(max_iter) < 1:
            raise ValueError(f"max_iter must be at least 1; got {max_iter!r}")
        self.kernel, self.X, self.worked = kernel, X, y
        self.prior_mean = float(prior_mean)
        if len(y) == 0:
            self.mode, self.n_iter, self.log_marginal_likelihood = np.empty(0), 0, 0.0
            self._grad = self._w_sqrt = self._L = None
            return
        K = kernel(X)
        self.mode, self.n_iter = _newton_mode(K, y, self.prior_mean, tol=tol, max_iter=int(max_iter))
        # Everything the predictions need, at the mode (Algorithm 3.2, lines 2-3)
        pi = special.expit(self.mode)
        self._grad = y - pi                                  # d log p(y | f) / df at f_hat
        self._w_sqrt = np.sqrt(pi * (1.0 - pi))              # W^1/2, W = -d^2 log p / df^2
        self._L = _b_factor(K, self._w_sqrt)                 # L L' = B
        # Eq. 3.32: -1/2 (f - m)' K^-1 (f - m) + log p(y | f) - 1/2 log|B|, with
        # K^-1 (f_hat - m) = grad log p(y | f_hat) at the mode (eq. 3.17)
        self.log_marginal_likelihood = float(
            -0.5 * self._grad @ (self.mode - self.prior_mean)
            + _log_likelihood(y, self.mode)
            - np.log(np.diag(self._L)).sum())

    def latent(self, U, *, grad: bool = False):
        """Mean and variance of the approximate posterior of ``f`` at U (q, d): two arrays (q,); with
        ``grad`` also their gradients with respect to U, two arrays (q, d)."""
        U = _check_inputs(self.kernel, U, "U")
        prior_var = self.kernel.diag(U)                      # stationary: constant, no gradient
        if self._L is None:
            mean = np.full(len(U), self.prior_mean)
            return (mean, prior_var) if not grad else (mean, prior_var, np.zeros(U.shape), np.zeros(U.shape))
        Ks = self.kernel(self.X, U)                          # (n, q)
        mean = self.prior_mean + Ks.T @ self._grad           # Algorithm 3.2, line 4
        v = linalg.solve_triangular(self._L, self._w_sqrt[:, None] * Ks, lower=True)   # line 5
        var = prior_var - np.einsum("ij,ij->j", v, v)        # line 6
        if not grad:
            return mean, np.maximum(var, 0.0)
        dK = self.kernel.grad(U, self.X)                     # (q, n, d): d k(u, x_i) / du
        dmean = np.einsum("qnd,n->qd", dK, self._grad)
        # var = k** - v'v with v = L^-1 W^1/2 k*, so d var = -2 (L^-T v)' W^1/2 dk*
        back = linalg.solve_triangular(self._L, v, lower=True, trans="T") * self._w_sqrt[:, None]   # (n, q)
        dvar = -2.0 * np.einsum("nq,qnd->qd", back, dK)
        return mean, np.maximum(var, 0.0), dmean, np.where((var > 0)[:, None], dvar, 0.0)

    def success_probability(self, U, *, grad: bool = False):
        """Chance that a trial at each row of U (q, d) works, averaged over the latent posterior: (q,);
        with ``grad`` also its gradient (q, d)."""
        if not grad:
            return logistic_gaussian_mean(*self.latent(U))
        mean, var, dmean, dvar = self.latent(U, grad=True)
        q, dq_dmean, dq_dvar = logistic_gaussian_mean(mean, var, grad=True)
        return q, dq_dmean[:, None] * dmean + dq_dvar[:, None] * dvar

    def draw_latent(self, U, prior, rng) -> np.ndarray:
        """One draw of the approximate posterior of ``f`` at U (q, d), pathwise: ``prior`` is a random-feature
        draw of the latent prior (a ``simlab.worlds.draws.FeatureSample`` with the prior mean; ranked at U in
        float32), corrected through the data. Laplace's posterior is that of a regression on the pseudo-targets
        ``f_hat + W^-1 (y - pi)`` with noise variance ``W^-1`` (R&W 2006, section 3.4.2: the mean and
        covariance of eqs. 3.21 and 3.24), so Matheron's rule applies (Wilson et al. 2020, ICML), through
        ``(K + W^-1)^-1 = W^1/2 B^-1 W^1/2``; ``rng`` draws the pseudo-noise."""
        f = prior.values32(U)
        if self._L is None:
            return f
        w = self._w_sqrt
        z = rng.standard_normal(len(self.worked))
        # W^1/2 (pseudo-target - f0(X) - eps), with W^1/2 eps = z ~ N(0, I); (y - pi) / W^1/2 stays finite
        # as pi -> y (it tends to 0)
        right = w * (self.mode - prior(self.X)) + self._grad / np.maximum(w, 1e-300) - z
        alpha = w * linalg.cho_solve((self._L, True), right, check_finite=False)
        return f + self.kernel(U, self.X) @ alpha

    def __repr__(self):
        return (f"FailureBelief({self.kernel!r}, n={len(self.worked)}, worked={int(self.worked.sum())}, "
                f"log_marginal_likelihood={self.log_marginal_likelihood:.6g})")


# --------------------------------------------------------------------------- helpers
def _check_inputs(kernel, X, name) -> np.ndarray:
    X = np.asarray(X, dtype=float)
    if X.ndim != 2:
        raise ValueError(f"{name} must be a 2-D array of shape (n, d); got shape {X.shape}")
    if kernel.dim not in (1, X.shape[1]):
        raise ValueError(f"{name} must have {kernel.dim} columns (one per kernel lengthscale); "
                         f"got {X.shape[1]}")
    if not np.isfinite(X).all():
        raise ValueError(f"{name} must be finite; got NaN or infinity")
    return X


def _check_data(kernel, X, worked) -> tuple[np.ndarray, np.ndarray]:
    X = np.asarray(X, dtype=float)
    if X.size == 0 and np.size(worked) == 0:
        return X.reshape(0, kernel.dim), np.empty(0)
    X = _check_inputs(kernel, X, "X")
    y = np.asarray(worked)
    if y.shape != (len(X),):
        raise ValueError(f"worked must have shape ({len(X)},), one outcome per row of X; got {y.shape}")
    y = y.astype(float)
    if not np.isin(y, (0.0, 1.0)).all():
        raise ValueError("worked must hold 1 (the trial worked) or 0 (it failed); "
                         f"got {np.unique(y[~np.isin(y, (0.0, 1.0))])[:3]}")
    return X, y


def _log_likelihood(y, f) -> float:
    """sum_i log sigmoid(t_i f_i), t = 2y - 1 (R&W eq. 3.15), without overflow."""
    return float(-np.logaddexp(0.0, -(2.0 * y - 1.0) * f).sum())


def _b_factor(K, w_sqrt) -> np.ndarray:
    """Lower Cholesky factor of B = I + W^1/2 K W^1/2 (Algorithm 3.1, line 5)."""
    B = w_sqrt[:, None] * K * w_sqrt[None, :]
    B[np.diag_indices_from(B)] += 1.0
    return linalg.cholesky(B, lower=True)


def _newton_mode(K, y, m, *, tol, max_iter) -> tuple[np.ndarray, int]:
    """Posterior mode of f (Algorithm 3.1) and the number of Newton steps taken."""
    n = len(y)
    f, a = np.full(n, m), np.zeros(n)                      # start at the prior mean; a = K^-1 (f - m)

    def psi(f, a):                                         # the objective, Algorithm 3.1 line 10
        return -0.5 * a @ (f - m) + _log_likelihood(y, f)

    value, step = psi(f, a), np.inf
    for it in range(1, max_iter + 1):
        pi = special.expit(f)
        W = pi * (1.0 - pi)                                # line 4
        w_sqrt = np.sqrt(W)
        L = _b_factor(K, w_sqrt)                           # line 5
        b = W * (f - m) + (y - pi)                         # line 6
        c = linalg.cho_solve((L, True), w_sqrt * (K @ b))  # line 7: B^-1 W^1/2 K b
        a_new = b - w_sqrt * c
        f_new = K @ a_new + m                              # line 8
        new_value = psi(f_new, a_new)
        for _ in range(30):                                # backtracking: halve until Psi does not fall
            if new_value >= value - 1e-12 * (1.0 + abs(value)):
                break
            a_new, f_new = 0.5 * (a + a_new), 0.5 * (f + f_new)
            new_value = psi(f_new, a_new)
        step = np.abs(f_new - f).max()
        f, a, value = f_new, a_new, new_value
        if step <= tol:
            return f, it
    raise ModeNotFound(f"Newton's iteration for the classifier's posterior mode did not converge in "
                       f"{max_iter} steps: the last step moved a latent value by {step:.3g} (tol = {tol:g})")
