"""Stationary kernels on the unit cube: value, gradient in the inputs, spectral samples."""

from __future__ import annotations

import numpy as np

__all__ = ["Kernel", "SquaredExponential", "Matern12", "Matern32", "Matern52", "KERNELS", "make_kernel"]

_S3, _S5 = np.sqrt(3.0), np.sqrt(5.0)


class Kernel:
    """A stationary kernel ``k(a, b) = amplitude**2 * rho(r)`` with scaled distance
    ``r = ||(a - b) / lengthscale||``.

    A new kernel implements two profile functions of ``r`` and, for world draws and
    Thompson sampling, :meth:`_spectral_scale`.

    Parameters
    ----------
    lengthscale : array_like of shape (d,)
        One lengthscale per input, in the units the inputs are given in (simlab passes
        unit-cube inputs, so lengthscales are divided by the input ranges first).
    amplitude : float
        Prior standard deviation.
    """

    name = "kernel"
    title = "kernel"   # its name in the report
    nu = np.inf  # smoothness: Matérn nu, inf for the squared exponential

    def __init__(self, lengthscale, amplitude: float = 1.0):
        self.lengthscale = np.atleast_1d(np.asarray(lengthscale, dtype=float))
        self.amplitude = float(amplitude)
        self.variance = self.amplitude**2

    @property
    def dim(self) -> int:
        return self.lengthscale.size

    # profile functions of the scaled distance r (rho(0) = 1)
    def _rho(self, r):  # pragma: no cover - abstract
        raise NotImplementedError

    def _drho_over_r(self, r):  # pragma: no cover - abstract
        """d rho / d r divided by r (finite at r = 0 for differentiable kernels)."""
        raise NotImplementedError

    def _spectral_scale(self, rng, n):  # pragma: no cover - abstract
        """Per-frequency radial factors s so that omega = z * s / lengthscale, z ~ N(0, I)."""
        raise NotImplementedError

    def _diff(self, A, B):
        A = np.asarray(A, dtype=float) / self.lengthscale
        B = np.asarray(B, dtype=float) / self.lengthscale
        return A[:, None, :] - B[None, :, :]

    def _dist(self, A, B):
        A = np.asarray(A, dtype=float) / self.lengthscale
        B = np.asarray(B, dtype=float) / self.lengthscale
        a2, b2 = (A * A).sum(1)[:, None], (B * B).sum(1)[None, :]
        # |a|^2 + |b|^2 - 2ab is fast but cancels near r = 0, where rounding of ~1e-16 in the
        # square becomes r ~ 1e-8 (a visible dent in the Matern-1/2 diagonal). Entries that
        # small are recomputed from the exact differences.
        sq = a2 + b2 - 2.0 * A @ B.T
        near = np.nonzero(sq < 1e-6 * (a2 + b2 + 1.0))
        if near[0].size:
            diff = A[near[0]] - B[near[1]]
            sq[near] = (diff * diff).sum(1)
        np.maximum(sq, 0.0, out=sq)
        return np.sqrt(sq)

    def __call__(self, A, B=None) -> np.ndarray:
        """Covariance matrix of shape (n, m) between rows of A (n, d) and B (m, d)."""
        B = A if B is None else B
        if min(A.shape[0], B.shape[0]) <= 8:
            # few rows (a new trial against the pool): exact differences are cheap
            diff = self._diff(A, B)
            r = np.sqrt(np.einsum("nmd,nmd->nm", diff, diff))
        else:
            r = self._dist(A, B)
        return self.variance * self._rho(r)

    def diag(self, A) -> np.ndarray:
        """``k(a, a)`` for each row of A: shape (n,)."""
        return np.full(np.asarray(A).shape[0], self.variance)

    def grad(self, A, B) -> np.ndarray:
        """Gradient of ``k(a, b)`` with respect to ``a``: shape (n, m, d).

        Notes
        -----
        dk/da = amplitude**2 * rho'(r) / r * (a - b) / lengthscale**2.
        """
        diff = self._diff(A, B)  # (n, m, d), already divided by lengthscale
        r = np.sqrt((diff**2).sum(-1))
        return (self.variance * self._drho_over_r(r))[..., None] * diff / self.lengthscale

    def stacked(self, A, C) -> np.ndarray:
        """Covariances between stacked inputs: A (..., p, d) and C (..., q, d) give (..., p, q).

        Notes
        -----
        Every entry is computed by the same elementwise steps (scaled differences summed
        over the inputs one at a time), so an entry's bits do not depend on how many
        replicates are stacked or how many points sit beside it. Lockstep replicates
        (``simlab.replay.lockstep``) and the one-at-a-time posterior share this function, which is
        what keeps their results bit-identical.
        """
        r = np.sqrt(self._stacked_sq(A, C))
        return self.variance * self._rho(r)

    def cov_from_sq(self, sq) -> np.ndarray:
        """``k`` from squared scaled distances, computed in place in ``sq`` (which is returned).

        The hot loop of lockstep replicates spends much of its time on these passes over
        the pool, so kernels override this with a version that allocates at most one
        temporary; the values equal ``variance * rho(sqrt(sq))`` up to rounding.
        """
        sq[...] = self.variance * self._rho(np.sqrt(sq))
        return sq

    def stacked_grad(self, A, C) -> tuple[np.ndarray, list[np.ndarray]]:
        """Covariances (..., p, q) and their gradients in A, one (..., p, q) array per input."""
        diffs = self._stacked_diffs(A, C)
        r = np.sqrt(_sum_sq(diffs))
        coef = self.variance * self._drho_over_r(r)
        return self.variance * self._rho(r), [coef * dj / lj for dj, lj in zip(diffs, self.lengthscale)]

    def _stacked_diffs(self, A, C) -> list[np.ndarray]:
        A, C = np.asarray(A, dtype=float), np.asarray(C, dtype=float)
        return [A[..., :, None, j] / lj - C[..., None, :, j] / lj for j, lj in enumerate(self.lengthscale)]

    def _stacked_sq(self, A, C) -> np.ndarray:
        return _sum_sq(self._stacked_diffs(A, C))

    def spectral(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Draw n angular frequencies (n, d) from the kernel's normalised spectral density.

        References
        ----------
        Rahimi & Recht (2007), Random Features for Large-Scale Kernel Machines.
        Rasmussen & Williams (2006), Gaussian Processes for Machine Learning, section 4.2.
        """
        z = rng.standard_normal((n, self.dim))
        return z * self._spectral_scale(rng, n)[:, None] / self.lengthscale

    def __repr__(self):
        ls = ", ".join(f"{v:.4g}" for v in self.lengthscale)
        return f"{type(self).__name__}(lengthscale=[{ls}], amplitude={self.amplitude:.4g})"


def _sum_sq(diffs: list[np.ndarray]) -> np.ndarray:
    """Sum of squares of per-input differences, input by input (a fixed order per entry)."""
    sq = diffs[0] * diffs[0]
    for dj in diffs[1:]:
        sq += dj * dj
    return sq


class SquaredExponential(Kernel):
    """rho(r) = exp(-r^2 / 2); spectral density N(0, lengthscale^-2 I)."""

    name, title = "sqexp", "squared exponential"

    def _rho(self, r):
        return np.exp(-0.5 * r * r)

    def _drho_over_r(self, r):
        return -np.exp(-0.5 * r * r)

    def cov_from_sq(self, sq):
        sq *= -0.5
        np.exp(sq, out=sq)
        sq *= self.variance
        return sq

    def _spectral_scale(self, rng, n):
        return np.ones(n)


class _Matern(Kernel):
    """Matérn kernels: spectral density is a multivariate Student-t with 2 nu degrees of freedom."""

    def _spectral_scale(self, rng, n):
        # omega = (z / l) * sqrt(2 nu / u), u ~ chi^2(2 nu)  (REFERENCES.md, random features)
        u = rng.chisquare(2.0 * self.nu, size=n)
        return np.sqrt(2.0 * self.nu / u)


class Matern12(_Matern):
    """rho(r) = exp(-r) (the exponential kernel; not differentiable at r = 0)."""

    name, nu, title = "matern12", 0.5, "Matérn 1/2 (exponential)"

    def _rho(self, r):
        return np.exp(-r)

    def _drho_over_r(self, r):
        # -exp(-r) / r; at r = 0 the kernel has a kink and we return the zero subgradient.
        with np.errstate(divide="ignore", invalid="ignore"):
            out = -np.exp(-r) / r
        return np.where(r > 0, out, 0.0)

    def cov_from_sq(self, sq):
        np.sqrt(sq, out=sq)
        np.negative(sq, out=sq)
        np.exp(sq, out=sq)
        sq *= self.variance
        return sq


class Matern32(_Matern):
    """rho(r) = (1 + sqrt3 r) exp(-sqrt3 r)."""

    name, nu, title = "matern32", 1.5, "Matérn 3/2"

    def _rho(self, r):
        s = _S3 * r
        return (1.0 + s) * np.exp(-s)

    def _drho_over_r(self, r):
        return -3.0 * np.exp(-_S3 * r)

    def cov_from_sq(self, sq):
        s = np.sqrt(sq, out=sq)
        s *= _S3
        e = np.negative(s)
        np.exp(e, out=e)
        s += 1.0
        s *= e
        s *= self.variance
        return s


class Matern52(_Matern):
    """rho(r) = (1 + sqrt5 r + 5 r^2 / 3) exp(-sqrt5 r)."""

    name, nu, title = "matern52", 2.5, "Matérn 5/2"

    def _rho(self, r):
        s = _S5 * r
        return (1.0 + s + s * s / 3.0) * np.exp(-s)

    def _drho_over_r(self, r):
        return -(5.0 / 3.0) * (1.0 + _S5 * r) * np.exp(-_S5 * r)

    def cov_from_sq(self, sq):
        # variance * (1 + s + s^2 / 3) exp(-s) with s = sqrt5 r, as ((v/3 s + v) s + v) e
        v = self.variance
        s = np.sqrt(sq, out=sq)
        s *= _S5
        e = np.negative(s)
        np.exp(e, out=e)
        e *= v
        p = s * (1.0 / 3.0)
        p += 1.0
        p *= s
        p += 1.0
        p *= e
        return p


KERNELS: dict[str, type[Kernel]] = {k.name: k for k in (SquaredExponential, Matern12, Matern32, Matern52)}


def make_kernel(name: str, lengthscale, amplitude: float) -> Kernel:
    """Kernel from its study-file name; an unknown name lists the valid ones."""
    if name not in KERNELS:
        raise ValueError(f"kernel must be one of {', '.join(KERNELS)}; got {name!r}")
    return KERNELS[name](lengthscale, amplitude)
