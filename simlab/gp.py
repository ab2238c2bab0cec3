"""Gaussian-process posterior with incremental Cholesky updates over a fixed candidate pool."""

from __future__ import annotations

import warnings
from contextlib import contextmanager

import numpy as np
from scipy.linalg import cho_solve, solve_triangular

from .kernels import Kernel

__all__ = ["Posterior", "NUGGET"]

NUGGET = 1e-10  # relative diagonal added to every Gram matrix for round-off (common practice)
_MAX_JITTER = 1e-2  # relative; beyond this the model would no longer be the one the study asked for


class Posterior:
    """The belief after n trials, kept in factored form and updated one trial at a time.

    Parameters
    ----------
    kernel : Kernel
        Prior covariance (unit-cube inputs).
    mean : float
        Constant prior mean.
    noise : float
        Observation noise standard deviation (0 allowed).
    pool : ndarray of shape (m, d), optional
        Candidate inputs whose posterior mean and variance are kept current.
    capacity : int
        Largest number of trials this posterior will hold (buffers are allocated once).

    Notes
    -----
    Rasmussen & Williams (2006), Algorithm 2.1, with ``K + s2 I = L L^T``:

    - ``z = L^-1 (y - m)``, ``alpha = L^-T z``
    - mean ``mu(x) = m + k(x)^T alpha = m + v^T z`` with ``v = L^-1 k(x)``
    - variance ``var(x) = k(x, x) - v^T v``
    - ``log p(y) = -z^T z / 2 - sum(log diag L) - n log(2 pi) / 2``

    Adding trial n+1 appends one row to L: ``l = L^-1 k(X, x)``, ``d = sqrt(k(x,x) + s2 - l^T l)``;
    one element to z: ``(y - m - l^T z) / d``; and one row to the pool cross term
    ``V = L^-1 K(X, pool)``: ``(k(x, pool) - l^T V) / d``. That is O(n^2 + n m) per trial, and
    pool moments are then running sums (O(m)).
    """

    def __init__(self, kernel: Kernel, mean: float, noise: float, *, pool=None, capacity: int = 64):
        self.kernel = kernel
        self.mean = float(mean)
        self.noise = float(noise)
        self.jitter = 0.0  # relative, raised only when a factorisation fails
        d = kernel.dim
        self.pool = np.empty((0, d)) if pool is None else np.ascontiguousarray(pool, dtype=float)
        m = self.pool.shape[0]
        self._cap = max(int(capacity), 1)
        self._X = np.empty((self._cap, d))
        self._y = np.empty(self._cap)
        self._L = np.zeros((self._cap, self._cap))
        self._z = np.empty(self._cap)
        self._V = np.empty((self._cap, m))
        self._pool_mu = np.full(m, self.mean)
        self._pool_vsq = np.zeros(m)
        self._alpha = None  # cached (K + s2 I)^-1 (y - m), cleared by every update
        self.version = 0    # bumped by refit(): policies caching kernel-derived state compare it
        self.n = 0

    # ------------------------------------------------------------------ state
    @property
    def s2(self) -> float:
        """Diagonal added to the Gram matrix: noise variance plus nugget and jitter."""
        return self.noise**2 + (NUGGET + self.jitter) * self.kernel.variance

    @property
    def X(self) -> np.ndarray:
        return self._X[: self.n]

    @property
    def y(self) -> np.ndarray:
        return self._y[: self.n]

    @property
    def L(self) -> np.ndarray:
        return self._L[: self.n, : self.n]

    def _grow(self, extra: int):
        need = self.n + extra
        if need <= self._cap:
            return
        cap = max(need, 2 * self._cap)
        for name in ("_X", "_V"):
            old = getattr(self, name)
            new = np.empty((cap, old.shape[1]))
            new[: self.n] = old[: self.n]
            setattr(self, name, new)
        for name in ("_y", "_z"):
            old = getattr(self, name)
            new = np.empty(cap)
            new[: self.n] = old[: self.n]
            setattr(self, name, new)
        L = np.zeros((cap, cap))
        L[: self.n, : self.n] = self.L
        self._L, self._cap = L, cap

    # ------------------------------------------------------------------ updates
    def add(self, x, y: float) -> None:
        """Condition on one more observation ``y`` at ``x`` (shape (d,))."""
        x = np.asarray(x, dtype=float).reshape(-1)
        self._alpha = None
        self._grow(1)
        n = self.n
        k = self.kernel(self._X[:n], x[None, :])[:, 0]
        l = solve_triangular(self._L[:n, :n], k, lower=True, check_finite=False) if n else k
        d2 = self.kernel.variance + self.s2 - l @ l
        if not d2 > 1e-3 * NUGGET * self.kernel.variance:
            # The new row is (numerically) a copy of an old one: refactor with more jitter.
            self._X[n], self._y[n] = x, y
            self.n += 1
            self._refactor(escalate=True)
            return
        dd = np.sqrt(d2)
        self._X[n], self._y[n] = x, y
        self._L[n, :n] = l
        self._L[n, n] = dd
        self._z[n] = (y - self.mean - l @ self._z[:n]) / dd
        if self.pool.shape[0]:
            row = (self.kernel(x[None, :], self.pool)[0] - l @ self._V[:n]) / dd
            self._V[n] = row
            self._pool_mu += row * self._z[n]
            self._pool_vsq += row * row
        self.n += 1

    def add_many(self, X, y) -> None:
        """Condition on several observations at once (one factorisation)."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        y = np.asarray(y, dtype=float).reshape(-1)
        self._grow(len(y))
        self._X[self.n : self.n + len(y)] = X
        self._y[self.n : self.n + len(y)] = y
        self.n += len(y)
        self._refactor(escalate=False)

    def refit(self, kernel: Kernel, mean: float, noise: float) -> None:
        """Replace the hyperparameters and refactor the data held so far (O(n^3 + n^2 m))."""
        self.kernel, self.mean, self.noise, self.jitter = kernel, float(mean), float(noise), 0.0
        self.version += 1
        if self.n:
            self._refactor(escalate=False)
        else:
            self._pool_mu = np.full(self.pool.shape[0], self.mean)
            self._pool_vsq = np.zeros(self.pool.shape[0])

    @contextmanager
    def fantasies(self):
        """Observations added inside this block are forgotten when it ends.

        Appending rows leaves the first n rows of the factor untouched, so forgetting
        them only restores n and the running pool sums. If an addition had to raise the
        jitter, the factor is rebuilt once with the raised jitter instead.
        """
        n, jitter = self.n, self.jitter
        mu, vsq = self._pool_mu.copy(), self._pool_vsq.copy()
        try:
            yield self
        finally:
            self.n, self._alpha = n, None
            if self.jitter != jitter:
                self._refactor(escalate=False)
            else:
                self._pool_mu, self._pool_vsq = mu, vsq

    def _refactor(self, *, escalate: bool) -> None:
        """Factor from scratch, raising the jitter tenfold until the Cholesky succeeds."""
        n = self.n
        self._alpha = None
        K = self.kernel(self._X[:n])
        if escalate:
            self.jitter = max(10.0 * self.jitter, 1e-8)
        while True:
            try:
                L = np.linalg.cholesky(K + self.s2 * np.eye(n))
                break
            except np.linalg.LinAlgError:
                if self.jitter >= _MAX_JITTER:
                    raise np.linalg.LinAlgError(
                        f"Gram matrix not positive definite even with jitter {self.jitter:g} x variance")
                self.jitter = max(10.0 * self.jitter, 1e-8)
                escalate = True
        if escalate:
            # One wording for every occurrence, so a study reports it once, not once per trial.
            warnings.warn("a Gaussian-process factorisation needed extra diagonal jitter (repeated or "
                          "near-identical inputs with little noise); the belief is smoothed slightly there",
                          RuntimeWarning, stacklevel=3)
        self._L[:n, :n] = L
        self._L[:n, n:] = 0.0
        self._z[:n] = solve_triangular(L, self._y[:n] - self.mean, lower=True, check_finite=False)
        if self.pool.shape[0]:
            V = solve_triangular(L, self.kernel(self._X[:n], self.pool), lower=True, check_finite=False)
            self._V[:n] = V
            self._pool_mu = self.mean + V.T @ self._z[:n]
            self._pool_vsq = (V * V).sum(0)

    # ------------------------------------------------------------------ queries
    def pool_moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and standard deviation over the pool, each of shape (m,)."""
        var = np.maximum(self.kernel.variance - self._pool_vsq, 0.0)
        return self._pool_mu.copy(), np.sqrt(var)

    def alpha(self) -> np.ndarray:
        """``(K + s2 I)^-1 (y - m)``, shape (n,)."""
        if self.n == 0:
            return np.zeros(0)
        if self._alpha is None:
            self._alpha = solve_triangular(self.L, self._z[: self.n], lower=True, trans="T", check_finite=False)
        return self._alpha

    def moments(self, Xq, *, grad: bool = False):
        """Posterior mean and sd at arbitrary inputs.

        Parameters
        ----------
        Xq : ndarray of shape (q, d)
        grad : bool
            Also return gradients with respect to the inputs.

        Returns
        -------
        mu, sd : ndarray of shape (q,)
        dmu, dsd : ndarray of shape (q, d), only if ``grad``
        """
        Xq = np.atleast_2d(np.asarray(Xq, dtype=float))
        n = self.n
        if n == 0:
            q = Xq.shape[0]
            mu, sd = np.full(q, self.mean), np.full(q, self.kernel.amplitude)
            return (mu, sd, np.zeros_like(Xq), np.zeros_like(Xq)) if grad else (mu, sd)
        Kq = self.kernel(self.X, Xq)                                      # (n, q)
        v = solve_triangular(self.L, Kq, lower=True, check_finite=False)  # (n, q)
        mu = self.mean + v.T @ self._z[:n]
        var = np.maximum(self.kernel.variance - np.einsum("nq,nq->q", v, v), 0.0)
        sd = np.sqrt(var)
        if not grad:
            return mu, sd
        dK = self.kernel.grad(Xq, self.X)                                 # (q, n, d)
        dmu = np.einsum("qnd,n->qd", dK, self.alpha())
        w = solve_triangular(self.L, v, lower=True, trans="T", check_finite=False)  # K^-1 k(x)
        dvar = -2.0 * np.einsum("qnd,nq->qd", dK, w)
        with np.errstate(divide="ignore", invalid="ignore"):
            dsd = np.where(sd[:, None] > 0, dvar / (2.0 * sd[:, None]), 0.0)
        return mu, sd, dmu, dsd

    def mean_at_data(self) -> np.ndarray:
        """Posterior mean at the evaluated inputs: ``m + L z - s2 alpha`` (no new solves of K)."""
        n = self.n
        if n == 0:
            return np.zeros(0)
        return self.mean + self.L @ self._z[:n] - self.s2 * self.alpha()

    def recommend(self) -> int:
        """Index of the evaluated input with the lowest posterior mean."""
        return int(np.argmin(self.mean_at_data()))

    def solve(self, r) -> np.ndarray:
        """``(K + s2 I)^-1 r`` for a vector r of shape (n,)."""
        if self.n == 0:
            return np.zeros(0)
        return cho_solve((self.L, True), r, check_finite=False)

    def pool_cross(self, r) -> np.ndarray:
        """``K(pool, X) (K + s2 I)^-1 r`` over the pool in O(n m) using the cached cross term.

        ``r`` may be a vector (n,), giving (m,), or a matrix (n, S) of S right-hand sides,
        giving (m, S) (one batched solve: many posterior samples at once).
        """
        if self.n == 0:
            return np.zeros((self.pool.shape[0],) + np.shape(r)[1:])
        w = solve_triangular(self.L, r, lower=True, check_finite=False)
        return self._V[: self.n].T @ w

    def log_marginal_likelihood(self) -> float:
        """``log p(y | X)`` under the prior (Rasmussen & Williams 2006, Algorithm 2.1)."""
        n = self.n
        z = self._z[:n]
        return float(-0.5 * z @ z - np.log(np.diag(self.L)).sum() - 0.5 * n * np.log(2.0 * np.pi))
