"""Kernels over mixed spaces: a stationary kernel on the numeric inputs (stepped ones rounded) times an
exchangeable correlation between the levels of each categorical input."""

from __future__ import annotations

import numpy as np

from ..study.types import Space
from .kernels import Kernel, make_kernel

__all__ = ["exchangeable", "correlation_range", "level_matrix", "MixedKernel", "mixed_kernel"]


def correlation_range(levels: int) -> tuple[float, float]:
    """The open interval of exchangeable correlations that are positive definite for ``levels`` levels.

    Notes
    -----
    ``(1 - rho) I + rho 1 1^T`` has eigenvalues ``1 + (L - 1) rho`` (once) and ``1 - rho`` (L - 1
    times), so it is positive definite exactly for ``-1 / (L - 1) < rho < 1`` (Qian, Wu & Wu 2008,
    *Gaussian process models for computer experiments with qualitative and quantitative factors*,
    Technometrics 50, section 3).
    """
    if levels < 2:
        raise ValueError(f"an exchangeable correlation needs at least 2 levels; got {levels}")
    return -1.0 / (levels - 1), 1.0


def exchangeable(levels: int, rho: float) -> np.ndarray:
    """The L x L exchangeable correlation matrix: 1 on the diagonal, ``rho`` elsewhere."""
    lo, hi = correlation_range(levels)
    if not lo < rho < hi:
        raise ValueError(f"rho must lie strictly between -1/(L-1) = {lo:.4g} and 1 for {levels} levels; got {rho}")
    return (1.0 - rho) * np.eye(levels) + rho


def level_matrix(space: Space, rho) -> np.ndarray:
    """Correlation between every pair of level combinations, shape (K, K) with K = prod L_c.

    Combinations are ordered as ``numpy.ndindex`` orders the level indices of the categorical
    inputs (the last input fastest), and the matrix is the Kronecker product of the inputs'
    exchangeable matrices (the product kernel on a grid of levels).
    """
    out = np.ones((1, 1))
    for j, r in zip(space.categorical, rho):
        out = np.kron(out, exchangeable(len(space.levels[j]), r))
    return out


class MixedKernel:
    """``k(a, b) = amplitude^2 rho(|round(a_num) - round(b_num)| / l) prod_c C_c[level_c(a), level_c(b)]``.

    Parameters
    ----------
    space : Space
        Says which inputs are numeric, stepped (rounded to their grid before the kernel sees them)
        and categorical (read as levels, :meth:`Space.level_index`).
    kernel : str
        The stationary kernel of the numeric inputs (a key of ``KERNELS``).
    lengthscale : array_like of shape (len(space.numeric),)
        On the unit cube.
    amplitude : float
    rho : sequence of float
        One exchangeable correlation per categorical input.

    Notes
    -----
    A product of positive-definite kernels is positive definite (Schur product theorem), and each
    factor here is: the stationary kernel, and ``C_c`` inside :func:`correlation_range`. Over a
    stepped input the kernel is a function of the rounded value only (Garrido-Merchán &
    Hernández-Lobato 2020, *Dealing with categorical and integer-valued variables in Bayesian
    optimization with Gaussian processes*, Neurocomputing 380), so it is piecewise constant
    there and its gradient in that input is 0.
    """

    name = "mixed"

    def __init__(self, space: Space, kernel: str, lengthscale, amplitude: float, rho):
        self.space = space
        self.numeric = np.asarray(space.numeric, dtype=int)
        self.cats = tuple(space.categorical)
        self.base: Kernel | None = make_kernel(kernel, lengthscale, 1.0) if len(self.numeric) else None
        self.amplitude = float(amplitude)
        self.variance = self.amplitude**2
        self.rho = tuple(float(r) for r in rho)
        if len(self.rho) != len(self.cats):
            raise ValueError(f"one correlation per categorical input ({len(self.cats)}); got {len(self.rho)}")
        self.C = [exchangeable(len(space.levels[j]), r) for j, r in zip(self.cats, self.rho)]
        self.stepped = np.array([space.kind(j) == "stepped" for j in space.numeric], dtype=bool)

    @property
    def dim(self) -> int:
        return self.space.dim

    @property
    def nu(self) -> float:
        return self.base.nu if self.base is not None else np.inf

    @property
    def lengthscale(self) -> np.ndarray:
        """Lengthscales of the numeric inputs on the unit cube (the continuous factor's)."""
        return self.base.lengthscale if self.base is not None else np.empty(0)

    def _parts(self, A):
        A = self.space.round_unit(np.asarray(A, dtype=float))
        levels = [self.space.level_index(A[..., j], j).astype(int) for j in self.cats]
        return A[..., self.numeric], levels

    def _level_factor(self, la, lc, pair):
        """prod_c C_c[la_c, lc_c] with ``pair`` broadcasting the two index arrays."""
        out = None
        for C, a, c in zip(self.C, la, lc):
            f = C[pair(a, c)]
            out = f if out is None else out * f
        return out

    def stacked(self, A, C) -> np.ndarray:
        """Covariances between stacked inputs: A (..., p, d) and C (..., q, d) give (..., p, q)."""
        An, la = self._parts(A)
        Cn, lc = self._parts(C)
        shape = np.broadcast_shapes(np.shape(A)[:-2], np.shape(C)[:-2]) + (np.shape(A)[-2], np.shape(C)[-2])
        K = self.base.stacked(An, Cn) if self.base is not None else np.ones(shape)
        if self.cats:
            K = K * self._level_factor(la, lc, lambda a, c: (a[..., :, None], c[..., None, :]))
        return self.variance * K

    def stacked_grad(self, A, C) -> tuple[np.ndarray, list[np.ndarray]]:
        """Covariances (..., p, q) and their gradients in A, one array per input (0 for stepped and
        categorical inputs, where the kernel is piecewise constant)."""
        An, la = self._parts(A)
        Cn, lc = self._parts(C)
        K = self.stacked(A, C)
        zero = np.zeros_like(K)
        grads = [zero] * self.dim
        if self.base is not None:
            Kb, gb = self.base.stacked_grad(An, Cn)
            factor = (self._level_factor(la, lc, lambda a, c: (a[..., :, None], c[..., None, :]))
                      if self.cats else 1.0)
            for i, j in enumerate(self.numeric):
                if not self.stepped[i]:
                    grads[j] = self.variance * factor * gb[i]
        return K, grads

    def grad(self, A, B) -> np.ndarray:
        """Gradient of ``k(a, b)`` in ``a``, shape (n, m, d) (0 in stepped and categorical inputs)."""
        _, grads = self.stacked_grad(np.asarray(A, dtype=float), np.asarray(B, dtype=float))
        return np.stack(grads, axis=-1)

    def __call__(self, A, B=None) -> np.ndarray:
        """Covariance matrix (n, m) between rows of A (n, d) and B (m, d)."""
        B = A if B is None else B
        return self.stacked(np.asarray(A, dtype=float), np.asarray(B, dtype=float))

    def diag(self, A) -> np.ndarray:
        return np.full(np.asarray(A).shape[0], self.variance)

    def __repr__(self):
        return (f"MixedKernel({self.base!r} on inputs {tuple(self.numeric)}, rho={self.rho} on {self.cats}, "
                f"amplitude={self.amplitude:.4g})")


def mixed_kernel(prior, space: Space) -> MixedKernel:
    """The product kernel of a study prior over its space (lengthscales divided by the input spans)."""
    ls = np.asarray(prior.lengthscale, dtype=float) / space.width if space.numeric else ()
    return MixedKernel(space, prior.kernel, ls, prior.amplitude, prior.level_correlation)
