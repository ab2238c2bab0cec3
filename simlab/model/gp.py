"""Gaussian-process beliefs with incremental Cholesky updates over fixed candidate pools.

:class:`Stack` holds the beliefs of a block of replicates that share kernel, mean and noise
and advances them together (lockstep replicates); :class:`Posterior` is the same code for
one replicate, with a one-campaign interface. Because both run the same arithmetic, a
campaign gives bit-identical results whether it is replayed alone or inside a block.
"""

from __future__ import annotations

import warnings
from contextlib import contextmanager

import numpy as np
from ..lazy import linalg

from .kernels import Kernel

__all__ = ["Stack", "Posterior", "NUGGET", "matvec", "vecmat", "rowdot"]

NUGGET = 1e-10  # relative diagonal added to every Gram matrix for round-off (common practice)
_MAX_JITTER = 1e-2  # relative; beyond this the model would no longer be the one the study asked for


# Stacked products. np.matmul on stacks calls BLAS once per slice with the slice's own shape
# and strides, and sums over a contiguous last axis reduce each row on its own, so a slice's
# bits never depend on the block it sits in (tests/unit/test_lockstep.py checks this).
def matvec(A, v):
    """``A @ v`` per slice: A (B, n, k), v (B, k) give (B, n)."""
    return np.matmul(A, v[..., None])[..., 0]


def vecmat(v, A):
    """``v @ A`` per slice: v (B, n), A (B, n, k) give (B, k)."""
    return np.matmul(v[..., None, :], A)[..., 0, :]


def rowdot(a, b):
    """``a . b`` per row: shapes (B, n) give (B,)."""
    return np.matmul(a[..., None, :], b[..., :, None])[..., 0, 0]


def _touched(shape) -> np.ndarray:
    """A zero array whose memory is written now, in order.

    ``np.zeros`` maps pages lazily (and may back them with huge pages); the pool cross
    term is then written one row per trial per replicate, each row in another page, and a
    first touch maps and zeroes a whole page: tens of microseconds per replicate and trial
    measured on the development machine. Writing the buffer once, in order, is cheaper.
    """
    out = np.empty(shape)
    out.fill(0.0)
    return out


_SPARES: list[np.ndarray] = []   # flat buffers of released stacks, reused by the next ones
_MAX_SPARES = 1


def _cross_buffer(shape) -> np.ndarray:
    """A buffer for the pool cross term: a released stack's when one is large enough, so a
    worker replaying chunk after chunk maps its memory once. Rows are always written
    before they are read, so old contents never matter."""
    size = int(np.prod(shape))
    for i, flat in enumerate(_SPARES):
        if flat.size >= size:
            return _SPARES.pop(i)[:size].reshape(shape)
    return _touched(shape)


def _release(buffer: np.ndarray) -> None:
    flat = buffer.base if buffer.base is not None else buffer
    if flat.ndim != 1:
        flat = flat.reshape(-1)
    _SPARES.append(flat)
    _SPARES.sort(key=lambda a: -a.size)
    del _SPARES[_MAX_SPARES:]


class Stack:
    """The beliefs of B replicates after n trials each, kept in factored form.

    Parameters
    ----------
    kernel : Kernel
        Prior covariance (unit-cube inputs), shared by the block.
    mean : float
        Constant prior mean.
    noise : float
        Observation noise standard deviation (0 allowed).
    pools : ndarray of shape (B, m, d)
        Each replicate's candidate inputs, whose posterior mean and variance are kept current
        (m may be 0).
    capacity : int
        Largest number of trials held before the buffers grow.

    Notes
    -----
    Rasmussen & Williams (2006), Algorithm 2.1, with ``K + s2 I = L L^T``:

    - ``z = L^-1 (y - m)``, ``alpha = L^-T z``
    - mean ``mu(x) = m + v^T z`` with ``v = L^-1 k(x)``, variance ``k(x, x) - v^T v``
    - ``log p(y) = -z^T z / 2 - sum(log diag L) - n log(2 pi) / 2``

    Adding trial n+1 appends one row to L: ``l = L^-1 k(X, x)``, ``d = sqrt(k(x,x) + s2 - l^T l)``;
    one element to z: ``(y - m - l^T z) / d``; one row to ``L^-1``: ``[-l^T L^-1 / d, 1 / d]``;
    and one row to the pool cross term ``V = L^-1 K(X, pool)``: ``(k(x, pool) - l^T V) / d``.
    That is O(n^2 + n m) per trial, and pool moments are running sums (O(m)).

    The inverse factor ``L^-1`` is kept (one extra row per trial) so every solve is a
    stacked matrix product: a triangular solve cannot be batched over replicates in NumPy,
    and calling LAPACK once per replicate would cost more than the arithmetic. The relative
    nugget puts every eigenvalue of ``K + s2 I`` at or above ``NUGGET a^2`` (a the prior sd),
    so ``||L^-1||_2 = lambda_min^(-1/2) <= 1 / (sqrt(NUGGET) a) = 1e5 / a``, which bounds the
    extra rounding in the variance near 1e-11 relative.
    """

    # A constrained campaign's FeasibleBelief (simlab.model.feasible), set by the one-campaign loop for the
    # policies to read; None otherwise (lockstep blocks never hold limits).
    feasible = None

    def __init__(self, kernel: Kernel, mean: float, noise: float, *, pools, capacity: int = 64):
        self.kernel = kernel
        self.mean = float(mean)
        self.noise = float(noise)
        self.pools = np.ascontiguousarray(pools, dtype=float)
        B, m, d = self.pools.shape
        self.size = B
        self._jitter = np.zeros(B)   # relative, raised per replicate only when a factorisation fails
        self._cap = max(int(capacity), 1)
        self._X = np.zeros((B, self._cap, d))
        self._y = np.zeros((B, self._cap))
        self._L = np.zeros((B, self._cap, self._cap))
        self._Li = np.zeros((B, self._cap, self._cap))
        self._z = np.zeros((B, self._cap))
        self._V = _cross_buffer((B, self._cap, m))
        self._pool_mu = np.full((B, m), self.mean)
        self._pool_vsq = np.zeros((B, m))
        self.version = 0    # bumped by refit(): policies caching kernel-derived state compare it
        self.n = 0
        self._scaled_for = None

    @property
    def s2(self):
        """Diagonal added to the Gram matrix per replicate (B,): noise variance plus nugget and jitter."""
        return self._s2()

    @property
    def jitter(self):
        """Relative jitter per replicate (B,)."""
        return self._jitter

    def _s2(self) -> np.ndarray:
        return self.noise**2 + (NUGGET + self._jitter) * self.kernel.variance

    def _grow(self, extra: int):
        need = self.n + extra
        if need <= self._cap:
            return
        cap, n = max(need, 2 * self._cap), self.n
        for name, make in (("_X", np.zeros), ("_V", _cross_buffer)):
            old = getattr(self, name)
            new = make((old.shape[0], cap, old.shape[2]))
            new[:, :n] = old[:, :n]
            setattr(self, name, new)
        for name in ("_y", "_z"):
            old = getattr(self, name)
            new = np.zeros((old.shape[0], cap))
            new[:, :n] = old[:, :n]
            setattr(self, name, new)
        for name in ("_L", "_Li"):
            old = getattr(self, name)
            new = np.zeros((old.shape[0], cap, cap))
            new[:, :n, :n] = old[:, :n, :n]
            setattr(self, name, new)
        self._cap = cap

    # ------------------------------------------------------------------ updates
    def add(self, xs, ys) -> None:
        """Condition every replicate on one more observation: xs (B, d), ys (B,)."""
        xs = np.asarray(xs, dtype=float).reshape(self.size, -1)
        ys = np.asarray(ys, dtype=float).reshape(self.size)
        self._grow(1)
        n, var = self.n, self.kernel.variance
        Li = self._Li[:, :n, :n]
        k = self.kernel.stacked(self._X[:, :n], xs[:, None, :])[:, :, 0]      # (B, n)
        l = matvec(Li, k)
        d2 = var + self._s2() - rowdot(l, l)
        bad = ~(d2 > 1e-3 * NUGGET * var)      # the new row repeats an old one: refactor with jitter
        dd = np.sqrt(np.where(bad, 1.0, d2))
        self._X[:, n], self._y[:, n] = xs, ys
        self._L[:, n, :n], self._L[:, n, n] = l, dd
        self._Li[:, n, :n] = -vecmat(l, Li) / dd[:, None]
        self._Li[:, n, n] = 1.0 / dd
        zn = (ys - self.mean - rowdot(l, self._z[:, :n])) / dd
        self._z[:, n] = zn
        if self.pools.shape[1]:
            row = self._pool_row(xs)                                           # (B, m)
            row -= vecmat(l, self._V[:, :n])
            row *= (1.0 / dd)[:, None]
            self._V[:, n] = row
            self._pool_mu += row * zn[:, None]
            row *= row
            self._pool_vsq += row
        self.n += 1
        for b in np.flatnonzero(bad):
            self._refactor(b, escalate=True)

    def release(self) -> None:
        """Hand the pool cross term's memory to the next Stack (this one is then unusable)."""
        _release(self._V)
        self._V = None

    def _pool_row(self, xs) -> np.ndarray:
        """``k(x_b, pool_b)`` for every replicate, (B, m): the same values as
        ``kernel.stacked`` with the pools' scaled coordinates cached and passes done in place
        (this is the costliest step of a lockstep trial after the pool scores)."""
        kernel = self.kernel
        if not hasattr(kernel, "cov_from_sq"):     # not stationary in every input (levels.MixedKernel)
            return kernel.stacked(xs[:, None, :], self.pools)[:, 0, :]
        if self._scaled_for is not kernel:
            self._scaled = [np.ascontiguousarray(self.pools[..., j] / lj) for j, lj in enumerate(kernel.lengthscale)]
            self._scaled_for = kernel
        sq = None
        for j, (P, lj) in enumerate(zip(self._scaled, kernel.lengthscale)):
            diff = np.subtract((xs[:, j] / lj)[:, None], P)
            diff *= diff
            if sq is None:
                sq = diff
            else:
                sq += diff
        return kernel.cov_from_sq(sq)

    def _refactor(self, b: int, *, escalate: bool) -> None:
        """Factor replicate b from scratch, raising its jitter tenfold until the Cholesky succeeds."""
        n = self.n
        X = self._X[b : b + 1, :n]
        K = self.kernel.stacked(X, X)[0]
        if escalate:
            self._jitter[b] = max(10.0 * self._jitter[b], 1e-8)
        while True:
            try:
                L = np.linalg.cholesky(K + self._s2()[b] * np.eye(n))
                break
            except np.linalg.LinAlgError:
                if self._jitter[b] >= _MAX_JITTER:
                    raise np.linalg.LinAlgError(
                        f"Gram matrix not positive definite even with jitter {self._jitter[b]:g} x variance")
                self._jitter[b] = max(10.0 * self._jitter[b], 1e-8)
                escalate = True
        if escalate:
            # One wording for every occurrence, so a study reports it once, not once per trial.
            warnings.warn("a Gaussian-process factorisation needed extra diagonal jitter (repeated or "
                          "near-identical inputs with little noise); the belief is smoothed slightly there",
                          RuntimeWarning, stacklevel=3)
        Li = linalg.solve_triangular(L, np.eye(n), lower=True, check_finite=False)
        self._L[b, :n, :n], self._L[b, :n, n:] = L, 0.0
        self._Li[b, :n, :n], self._Li[b, :n, n:] = Li, 0.0
        z = Li @ (self._y[b, :n] - self.mean)
        self._z[b, :n] = z
        if self.pools.shape[1]:
            V = Li @ self.kernel.stacked(X, self.pools[b : b + 1])[0]
            self._V[b, :n] = V
            self._pool_mu[b] = self.mean + z @ V
            self._pool_vsq[b] = (V * V).sum(0)

    def _refactor_all(self) -> None:
        if self.n == 0:
            self._pool_mu[:] = self.mean
            self._pool_vsq[:] = 0.0
        for b in range(self.size):
            if self.n:
                self._refactor(b, escalate=False)

    @contextmanager
    def fantasies(self):
        """Observations added inside this block are forgotten when it ends.

        Appending rows leaves the first n rows of the factors untouched, so forgetting
        them only restores n and the running pool sums. A replicate whose jitter had to be
        raised is refactored once with the raised jitter instead.
        """
        n, jitter = self.n, self._jitter.copy()
        mu, vsq = self._pool_mu.copy(), self._pool_vsq.copy()
        try:
            yield self
        finally:
            self.n = n
            self._pool_mu, self._pool_vsq = mu, vsq
            for b in np.flatnonzero(self._jitter != jitter):
                self._refactor(b, escalate=False)

    # ------------------------------------------------------------------ queries
    def stacked_pool_moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and standard deviation over the pools, each of shape (B, m).

        The mean is the running sum itself (read-only for callers: no copy in the hot loop).
        """
        sd = np.subtract(self.kernel.variance, self._pool_vsq)
        np.maximum(sd, 0.0, out=sd)
        return self._pool_mu, np.sqrt(sd, out=sd)

    def alphas(self) -> np.ndarray:
        """``(K + s2 I)^-1 (y - m)`` per replicate, shape (B, n)."""
        n = self.n
        return matvec(self._Li[:, :n, :n].transpose(0, 2, 1), self._z[:, :n])

    def solves(self, r) -> np.ndarray:
        """``(K + s2 I)^-1 r`` per replicate, through the kept inverse factor: ``L^-T (L^-1 r)``.

        r of shape (B, n) gives (B, n); (B, n, S), S right-hand sides each, gives (B, n, S).
        Two stacked products, so a replicate's bits do not depend on the block.
        """
        r = np.asarray(r, dtype=float)
        n = self.n
        Li = self._Li[:, :n, :n]
        col = r[..., None] if r.ndim == 2 else r
        out = np.matmul(Li.transpose(0, 2, 1), np.matmul(Li, col))
        return out[..., 0] if r.ndim == 2 else out

    def pool_crosses(self, r) -> np.ndarray:
        """``K(pool, X) (K + s2 I)^-1 r`` per replicate from the cached cross term: ``V^T (L^-1 r)``.

        r of shape (B, n) gives (B, m); (B, n, S) gives (B, m, S). O(n m) per right-hand side.
        """
        r = np.asarray(r, dtype=float)
        n = self.n
        Li, V = self._Li[:, :n, :n], self._V[:, :n]
        if r.ndim == 2:
            return vecmat(matvec(Li, r), V)
        return np.matmul(V.transpose(0, 2, 1), np.matmul(Li, r))

    def means_at_data(self) -> np.ndarray:
        """Posterior mean at the evaluated inputs, (B, n): ``m + L z - s2 alpha``."""
        n = self.n
        return self.mean + matvec(self._L[:, :n, :n], self._z[:, :n]) - self._s2()[:, None] * self.alphas()

    def stacked_moments(self, U, *, grad: bool = False):
        """Posterior mean and sd at inputs U of shape (B, q, d), each (B, q).

        With ``grad`` also their gradients in U, each (B, q, d).
        """
        U = np.asarray(U, dtype=float)
        B, q, d = U.shape
        n = self.n
        if n == 0:
            mu, sd = np.full((B, q), self.mean), np.full((B, q), self.kernel.amplitude)
            return (mu, sd, np.zeros_like(U), np.zeros_like(U)) if grad else (mu, sd)
        X, Li = self._X[:, :n], self._Li[:, :n, :n]
        if grad:
            Kq, dK = self.kernel.stacked_grad(U, X)                     # (B, q, n), d x (B, q, n)
        else:
            Kq = self.kernel.stacked(U, X)
        vt = np.matmul(Kq, Li.transpose(0, 2, 1))                       # rows v^T = (L^-1 k(x))^T
        mu = self.mean + matvec(vt, self._z[:, :n])
        sd = np.sqrt(np.maximum(self.kernel.variance - (vt * vt).sum(-1), 0.0))
        if not grad:
            return mu, sd
        alpha = self.alphas()
        w = np.matmul(vt, Li)                                            # rows (K^-1 k(x))^T
        dmu = np.stack([matvec(g, alpha) for g in dK], axis=-1)
        dvar = np.stack([-2.0 * (g * w).sum(-1) for g in dK], axis=-1)
        with np.errstate(divide="ignore", invalid="ignore"):
            dsd = np.where(sd[..., None] > 0, dvar / (2.0 * sd[..., None]), 0.0)
        return mu, sd, dmu, dsd


class Posterior(Stack):
    """The belief of one campaign after n trials, updated one trial at a time.

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
        Largest number of trials held before the buffers grow.

    Notes
    -----
    A :class:`Stack` of one replicate (see there for the algebra), so a campaign replayed
    alone and one replayed in a block of replicates run the same arithmetic.
    """

    def __init__(self, kernel: Kernel, mean: float, noise: float, *, pool=None, capacity: int = 64):
        pool = np.empty((0, kernel.dim)) if pool is None else np.asarray(pool, dtype=float)
        super().__init__(kernel, mean, noise, pools=pool[None], capacity=capacity)
        self.pool = self.pools[0]

    # ------------------------------------------------------------------ state
    @property
    def s2(self) -> float:
        """Diagonal added to the Gram matrix: noise variance plus nugget and jitter."""
        return float(self._s2()[0])

    @property
    def jitter(self) -> float:
        """Relative jitter (raised only when a factorisation fails)."""
        return float(self._jitter[0])

    @property
    def X(self) -> np.ndarray:
        return self._X[0, : self.n]

    @property
    def y(self) -> np.ndarray:
        return self._y[0, : self.n]

    @property
    def L(self) -> np.ndarray:
        return self._L[0, : self.n, : self.n]

    # ------------------------------------------------------------------ updates
    def add(self, x, y: float) -> None:
        """Condition on one more observation ``y`` at ``x`` (shape (d,))."""
        super().add(np.asarray(x, dtype=float).reshape(1, -1), np.array([float(y)]))

    def add_many(self, X, y) -> None:
        """Condition on several observations at once (one factorisation)."""
        X = np.atleast_2d(np.asarray(X, dtype=float))
        y = np.asarray(y, dtype=float).reshape(-1)
        self._grow(len(y))
        self._X[0, self.n : self.n + len(y)] = X
        self._y[0, self.n : self.n + len(y)] = y
        self.n += len(y)
        self._refactor_all()

    def refit(self, kernel: Kernel, mean: float, noise: float) -> None:
        """Replace the hyperparameters and refactor the data held so far (O(n^3 + n^2 m))."""
        self.kernel, self.mean, self.noise = kernel, float(mean), float(noise)
        self._jitter[:] = 0.0
        self.version += 1
        self._refactor_all()

    # ------------------------------------------------------------------ queries
    def pool_moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Posterior mean and standard deviation over the pool, each of shape (m,)."""
        mu, sd = self.stacked_pool_moments()
        return mu[0].copy(), sd[0]

    def alpha(self) -> np.ndarray:
        """``(K + s2 I)^-1 (y - m)``, shape (n,)."""
        return self.alphas()[0]

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
        return tuple(a[0] for a in self.stacked_moments(Xq[None], grad=grad))

    def mean_at_data(self) -> np.ndarray:
        """Posterior mean at the evaluated inputs: ``m + L z - s2 alpha`` (no new solves of K)."""
        return self.means_at_data()[0]

    def recommend(self) -> int:
        """Index of the evaluated input with the lowest posterior mean."""
        return int(np.argmin(self.mean_at_data()))

    def solve(self, r) -> np.ndarray:
        """``(K + s2 I)^-1 r`` for a vector r of shape (n,)."""
        if self.n == 0:
            return np.zeros(0)
        return linalg.cho_solve((self.L, True), r, check_finite=False)

    def pool_cross(self, r) -> np.ndarray:
        """``K(pool, X) (K + s2 I)^-1 r`` over the pool in O(n m) using the cached cross term.

        ``r`` may be a vector (n,), giving (m,), or a matrix (n, S) of S right-hand sides,
        giving (m, S) (one batched solve: many posterior samples at once).
        """
        if self.n == 0:
            return np.zeros((self.pool.shape[0],) + np.shape(r)[1:])
        w = linalg.solve_triangular(self.L, r, lower=True, check_finite=False)
        return self._V[0, : self.n].T @ w

    def log_marginal_likelihood(self) -> float:
        """``log p(y | X)`` under the prior (Rasmussen & Williams 2006, Algorithm 2.1)."""
        n = self.n
        z = self._z[0, :n]
        return float(-0.5 * z @ z - np.log(np.diag(self.L)).sum() - 0.5 * n * np.log(2.0 * np.pi))
