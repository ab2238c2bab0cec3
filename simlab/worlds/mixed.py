"""Worlds over mixed spaces (stepped and categorical inputs, libraries): draws of the product prior,
exact in the level correlation, and their optima (each level combination searched in turn)."""

from __future__ import annotations

import itertools

import numpy as np

from ..model.levels import MixedKernel, level_matrix, mixed_kernel
from ..study.types import CATEGORICAL, STEPPED, Space
from .draws import ConditionedWorld, FeatureSample, World, find_minimum

__all__ = ["MixedWorld", "ConditionedMixedWorld", "LibraryWorld", "MixedFeatureSample", "feature_sample",
           "make_mixed_world", "search_combinations", "needs_mixed", "discrete_combinations", "MAX_SEARCHED",
           "MAX_ENUMERATED"]

# Level-and-step combinations whose continuous part gets its own optimum search: each search costs
# about as much as one box world's, so more than this would make a replicate's optimum the run.
MAX_SEARCHED = 64
# Points evaluated exactly when no input is continuous (every combination is a point).
MAX_ENUMERATED = 2**22
_CHUNK = 4096


def needs_mixed(space: Space) -> bool:
    """Does the space need these worlds (a stepped or categorical input, or a library)? Log-scaled and
    continuous inputs alone are a box on the unit cube and keep the box worlds (and their bits)."""
    return space.library is not None or any(space.kind(j) in (STEPPED, CATEGORICAL) for j in range(space.dim))


def discrete_combinations(space: Space) -> int:
    """How many combinations of levels and stepped values the space has (1 without such inputs)."""
    return int(np.prod([len(space.grid(j)) for j in range(space.dim) if space.kind(j) in (STEPPED, CATEGORICAL)]))


class MixedWorld(World):
    """A draw of ``mean + GP(0, k_num x prod_c C_c)`` over a mixed space, on the unit cube.

    Parameters
    ----------
    kernel : MixedKernel
        The product kernel; its continuous factor is drawn with random Fourier features.
    mean : float
    rng : numpy.random.Generator
    n_freq : int
        Spectral frequencies per feature draw.

    Notes
    -----
    With K level combinations and the K x K level correlation ``C = A A^T`` (``A`` its Cholesky
    factor; ``C`` is the Kronecker product of the inputs' exchangeable matrices), the world is

        f(u, c) = mean + sum_k A[c, k] g_k(u),

    with ``g_1 ... g_K`` independent draws of the continuous factor. Then
    ``Cov(f(u, c), f(u', c')) = sum_k A[c, k] A[c', k] k(u, u') = C[c, c'] k(u, u')``: exactly the
    product kernel across levels, and as exact as the feature draws within one (each ``g_k`` is a
    random-feature function, :class:`simlab.worlds.draws.FeatureSample`). Stepped inputs are rounded
    to their grid before anything is evaluated (Garrido-Merchán & Hernández-Lobato 2020), so the world
    is a step function of them; log inputs are already stationary in the logarithm on the cube.
    """

    def __init__(self, kernel: MixedKernel, mean: float, rng: np.random.Generator, n_freq: int = 1024):
        self.sample = MixedFeatureSample(kernel, mean, rng, n_freq)     # the draw itself
        self.kernel, self.space, self.mean = kernel, kernel.space, float(mean)
        self.dim = self.space.dim
        self.shape, self.K, self.A, self.numeric = self.sample.shape, self.sample.K, self.sample.A, kernel.numeric
        self.omega, self.scale = self.sample.omega, self.sample.scale
        F = self.omega.shape[1] if self.omega is not None else 0
        self.w = self.sample.w.reshape(self.K, 2 * F) if self.omega is not None else None
        self.z = self.sample.w if self.omega is None else None                     # one value per g_k

    def combination(self, U) -> np.ndarray:
        """Flat index (n,) of each row's level combination (``numpy.ndindex`` order)."""
        if not self.shape:
            return np.zeros(len(U), dtype=int)
        idx = [self.space.level_index(U[:, j], j).astype(int) for j in self.kernel.cats]
        return np.ravel_multi_index(idx, self.shape)

    def __call__(self, U) -> np.ndarray:
        out = np.empty(len(np.atleast_2d(U)))
        U = np.atleast_2d(U)
        for a in range(0, len(U), _CHUNK):
            out[a:a + _CHUNK] = self.sample(U[a:a + _CHUNK])
        return out

    def combination_function(self, c: int, fixed):
        """The world at level combination ``c`` as a function of its continuous inputs.

        ``fixed`` (d_num,) holds the numeric coordinates the function does not vary (the stepped
        values; NaN at the continuous inputs). Returns ``(f, fg, dims)``: values and values with
        gradients on (n, len(dims)) inputs, and the numeric positions of those inputs. The K draws
        mixed by row c of A are one feature function with K F frequencies, and the fixed inputs
        fold into its phases.
        """
        fixed = np.asarray(fixed, dtype=float)
        dims = np.flatnonzero(np.isnan(fixed))
        rest = np.flatnonzero(~np.isnan(fixed))
        F = self.omega.shape[1]
        a = self.A[c]
        omega = self.omega.reshape(-1, self.omega.shape[2])                    # (K F, d_num)
        wc = (a[:, None] * self.w[:, :F]).reshape(-1)
        ws = (a[:, None] * self.w[:, F:]).reshape(-1)
        keep = np.repeat(a != 0.0, F)                                           # A is lower triangular
        omega, wc, ws = omega[keep], wc[keep], ws[keep]
        shift = omega[:, rest] @ fixed[rest]                                    # (K F,)
        om = omega[:, dims]
        scale, mean = self.scale, self.mean

        def f(X):
            P = np.atleast_2d(X) @ om.T + shift
            return mean + scale * (np.cos(P) @ wc + np.sin(P) @ ws)

        def fg(X):
            P = np.atleast_2d(X) @ om.T + shift
            C, S = np.cos(P), np.sin(P)
            return mean + scale * (C @ wc + S @ ws), scale * ((C * ws - S * wc) @ om)

        return f, fg, dims

    def optimum(self, rng: np.random.Generator) -> tuple[np.ndarray, float]:
        """The minimiser (d,) and minimum over every level combination and stepped value
        (:func:`search_combinations`)."""
        return search_combinations(self, rng)


class ConditionedMixedWorld(ConditionedWorld):
    """A :class:`MixedWorld` updated pathwise to agree with past trials (Matheron's rule, as
    :class:`simlab.worlds.draws.ConditionedWorld` does for boxes).

    ``g(u) = f(u) + k(u, H) beta`` with ``beta = (K_HH + s2 I)^-1 (y_H - f(H) - eps)`` and ``k`` the
    product kernel the world was drawn from: an exact draw of the prior conditioned on the trials
    when ``f`` is one (Wilson et al. 2020, ICML). Within one level combination the correction is a
    smooth function of the continuous inputs, so the optimum is searched as the world's own, one
    combination at a time with the correction included (:func:`search_combinations`).
    """

    def __init__(self, base: MixedWorld, kernel: MixedKernel, H, yH, noise: float, rng: np.random.Generator):
        super().__init__(base, kernel, H, yH, noise, rng)
        self.space, self.shape, self.numeric = base.space, base.shape, base.numeric

    def grad(self, U):     # pragma: no cover - the search uses combination_function
        raise NotImplementedError("a mixed world's gradient is taken within one level combination")

    def combination(self, U) -> np.ndarray:
        return self.base.combination(U)

    def combination_function(self, c: int, fixed):
        """As :meth:`MixedWorld.combination_function`, with the correction to the past trials added."""
        f0, fg0, dims = self.base.combination_function(c, fixed)
        template = np.zeros(self.space.dim)
        template[self.numeric] = np.nan_to_num(np.asarray(fixed, dtype=float))
        if self.shape:
            for j, level in zip(self.kernel.cats, np.unravel_index(c, self.shape)):
                template[j] = (level + 0.5) / len(self.space.levels[j])
        where = self.numeric[dims]                      # the continuous inputs' positions in the space
        H, beta, kernel = self.H, self.beta, self.kernel

        def full(X):
            U = np.repeat(template[None], len(X), axis=0)
            U[:, where] = X
            return U

        def f(X):
            X = np.atleast_2d(X)
            return f0(X) + kernel(full(X), H) @ beta

        def fg(X):
            X = np.atleast_2d(X)
            v, g = fg0(X)
            K, grads = kernel.stacked_grad(full(X), H)
            return v + K @ beta, g + np.stack([grads[j] @ beta for j in where], axis=-1)

        return f, fg, dims

    def optimum(self, rng: np.random.Generator) -> tuple[np.ndarray, float]:
        return search_combinations(self, rng)


def search_combinations(world, rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """The minimiser (d,) and minimum of a mixed world over every level combination and stepped value.

    Without continuous inputs every allowed point is evaluated (at most ``MAX_ENUMERATED``).
    Otherwise each of the (at most ``MAX_SEARCHED``) combinations of levels and stepped values
    gets the continuous search :func:`simlab.worlds.draws.find_minimum` of
    ``world.combination_function``, at the world's roughness, and the best is kept: a missed
    optimum makes regret too small, so every combination is searched, none sampled.
    """
    sp = world.space
    discrete = [j for j in range(sp.dim) if sp.kind(j) in (STEPPED, CATEGORICAL)]
    continuous = [j for j in range(sp.dim) if j not in discrete]
    grids = [sp.grid(j) for j in discrete]
    total = discrete_combinations(sp)
    if not continuous:
        if total > MAX_ENUMERATED:
            raise ValueError(f"{total} allowed points: more than the {MAX_ENUMERATED} enumerated exactly")
        best_u, best_v = None, np.inf
        combos = itertools.product(*grids)
        while True:
            block = np.array(list(itertools.islice(combos, _CHUNK)))
            if not len(block):
                break
            v = world(block)
            i = int(np.argmin(v))
            if v[i] < best_v:
                best_u, best_v = block[i].copy(), float(v[i])
        return best_u, best_v
    if total > MAX_SEARCHED:
        raise ValueError(f"{total} combinations of levels and stepped values: more than the {MAX_SEARCHED} "
                         "searched one by one")
    pos = {j: i for i, j in enumerate(world.numeric)}
    ls = world.kernel.lengthscale[[pos[j] for j in continuous]]
    best_u, best_v = None, np.inf
    for values in itertools.product(*grids):
        u = np.full(sp.dim, np.nan)
        u[discrete] = values
        c = int(world.combination(u[None])[0]) if world.shape else 0
        f, fg, dims = world.combination_function(c, u[world.numeric])
        uc, v = find_minimum(f, fg, len(dims), rng, lengthscale=ls, nu=world.kernel.nu)
        if v < best_v:
            u[continuous] = uc
            best_u, best_v = u, float(v)
    return best_u, best_v


class MixedFeatureSample:
    """A random-feature function of the product prior over a mixed space, with the interface of
    :class:`simlab.worlds.draws.FeatureSample` (``basis``, ``redraw``, ``w``, ``__call__``, ``grad``),
    so the policies' posterior samples (Thompson sampling, pbest, MES) run over such spaces unchanged.

    Notes
    -----
    The construction of :class:`MixedWorld`: with the level correlation ``C = A A^T`` over the K
    level combinations and K independent random-feature draws ``g_k`` of the continuous factor,
    ``f(u, c) = mean + sum_k A[c, k] g_k(u)`` has covariance ``C[c, c'] k(u, u')`` (in expectation
    over the frequencies, as for a box). The basis of an input in combination c is the K bases of
    the ``g_k`` scaled by ``A[c, k]``, side by side: (n, 2 F K) columns, weights ``w ~ N(0, I)``.
    Stepped inputs are rounded first (the function is a step function of them, gradient 0), and
    categorical inputs enter only through ``c`` (gradient 0).
    """

    def __init__(self, kernel: MixedKernel, mean: float, rng: np.random.Generator, n_freq: int = 1024):
        self.kernel, self.space, self.mean = kernel, kernel.space, float(mean)
        self.dim = self.space.dim
        self.shape = tuple(len(self.space.levels[j]) for j in kernel.cats)
        self.K = int(np.prod(self.shape)) if self.shape else 1
        self.A = np.linalg.cholesky(level_matrix(self.space, kernel.rho))
        self.numeric = kernel.numeric
        # the inputs a gradient moves: continuous and log inputs (positions among the numeric ones)
        self.moving = np.array([i for i, j in enumerate(self.numeric) if self.space.kind(j) != STEPPED], dtype=int)
        if kernel.base is not None:
            self.omega = np.stack([kernel.base.spectral(rng, n_freq) for _ in range(self.K)])   # (K, F, d_num)
            self.scale = kernel.amplitude / np.sqrt(n_freq)
            self.w = rng.standard_normal(self.K * 2 * n_freq)
        else:
            self.omega, self.scale = None, kernel.amplitude
            self.w = rng.standard_normal(self.K)

    def _parts(self, U):
        R = self.space.round_unit(np.atleast_2d(np.asarray(U, dtype=float)))
        if self.shape:
            c = np.ravel_multi_index([self.space.level_index(R[:, j], j).astype(int) for j in self.kernel.cats],
                                     self.shape)
        else:
            c = np.zeros(len(R), dtype=int)
        return R[:, self.numeric], self.A[c]                                     # (n, d_num), (n, K)

    def basis(self, U) -> np.ndarray:
        """Feature matrix (n, 2 F K) (or (n, K) without numeric inputs), scaled like ``FeatureSample``'s."""
        Un, a = self._parts(U)
        if self.omega is None:
            return self.scale * a
        P = np.matmul(Un[None], self.omega.transpose(0, 2, 1))                  # (K, n, F)
        parts = [a[:, k, None] * np.hstack([np.cos(P[k]), np.sin(P[k])]) for k in range(self.K)]
        return self.scale * np.hstack(parts)

    def redraw(self, rng) -> None:
        """New weights on the same frequencies."""
        self.w = rng.standard_normal(self.w.size)

    def __call__(self, U) -> np.ndarray:
        """Values (n,): ``basis(U) @ w + mean``, one combination's K draws at a time (no (n, 2 F K) basis)."""
        Un, a = self._parts(U)
        if self.omega is None:
            return self.mean + self.scale * (a @ self.w)
        F = self.omega.shape[1]
        W = self.w.reshape(self.K, 2 * F)
        out = np.zeros(len(Un))
        for k in range(self.K):
            live = a[:, k] != 0.0                        # A is lower triangular: most rows skip most draws
            if live.any():
                P = Un[live] @ self.omega[k].T
                out[live] += a[live, k] * (np.cos(P) @ W[k, :F] + np.sin(P) @ W[k, F:])
        return self.mean + self.scale * out

    def values32(self, U, *, chunk: int = 512) -> np.ndarray:
        """Values (n,) in float32 arithmetic (returned as float64), for ranking many candidates.

        As :meth:`simlab.worlds.draws.FeatureSample.values32`: each frequency's cosine and sine weights
        in amplitude-phase form (one cosine instead of two transcendental calls) and NumPy's float32
        cosine, about 1e-6 of the amplitude off; chunks of 512 rows keep the phases in cache.
        """
        Un, a = self._parts(U)
        if self.omega is None:
            return self.mean + self.scale * (a @ self.w)
        if getattr(self, "_f32_of", None) is not self.w:
            F = self.omega.shape[1]
            W = self.w.reshape(self.K, 2 * F)
            self._f32 = [(self.omega[k].T.astype(np.float32), np.arctan2(W[k, F:], W[k, :F]).astype(np.float32),
                          np.hypot(W[k, :F], W[k, F:]).astype(np.float32)) for k in range(self.K)]
            self._f32_of = self.w
        out = np.zeros(len(Un))
        for k, (om, ph, am) in enumerate(self._f32):
            live = np.flatnonzero(a[:, k] != 0.0)
            for s in range(0, len(live), chunk):
                rows = live[s:s + chunk]
                P = Un[rows].astype(np.float32) @ om
                P -= ph
                np.cos(P, out=P)
                out[rows] += a[rows, k] * (P @ am)
        return self.mean + self.scale * out

    def grad(self, U) -> np.ndarray:
        """Gradients (n, d): nonzero in continuous and log inputs only."""
        Un, a = self._parts(U)
        G = np.zeros((len(Un), self.dim))
        if self.omega is None or not self.moving.size:
            return G
        F = self.omega.shape[1]
        W = self.w.reshape(self.K, 2 * F)
        g = np.zeros((len(Un), len(self.numeric)))
        for k in range(self.K):
            P = Un @ self.omega[k].T                                             # (n, F)
            dk = (-np.sin(P) * W[k, :F] + np.cos(P) * W[k, F:]) @ self.omega[k]  # (n, d_num)
            g += a[:, k, None] * dk
        G[:, self.numeric[self.moving]] = self.scale * g[:, self.moving]
        return G


def feature_sample(kernel, mean: float, rng: np.random.Generator, n_freq: int):
    """A random-feature prior function of a belief: :class:`MixedFeatureSample` for the product kernel
    over a mixed space, :class:`simlab.worlds.draws.FeatureSample` for a stationary kernel."""
    if isinstance(kernel, MixedKernel):
        return MixedFeatureSample(kernel, mean, rng, n_freq)
    return FeatureSample(kernel, mean, rng, n_freq)


class LibraryWorld(World):
    """A world seen only at a library's rows: the prior over the columns, evaluated at the rows.

    Its optimum is exact: the best row (every row evaluated once, in chunks). The values at the rows
    are kept, and a row is always given its kept value, so a trial at the best row has exactly the
    optimum's value (regret exactly 0, not a rounding difference between batch sizes).
    """

    def __init__(self, base: World, rows: np.ndarray):
        self.base, self.rows, self.dim = base, np.asarray(rows, dtype=float), base.dim
        self._values = np.concatenate([self.base(self.rows[a:a + _CHUNK]) for a in range(0, len(self.rows), _CHUNK)])
        self._index = {row.tobytes(): i for i, row in enumerate(self.rows)}

    def __call__(self, U) -> np.ndarray:
        U = np.ascontiguousarray(np.atleast_2d(U), dtype=float)
        where = [self._index.get(u.tobytes(), -1) for u in U]
        out = np.array([self._values[i] if i >= 0 else np.nan for i in where])
        off = np.array(where) < 0
        if off.any():                       # not a row (a figure's line through the space): the prior's value
            out[off] = self.base(U[off])
        return out

    def row_values(self) -> np.ndarray:
        """The world at every row, shape (n,)."""
        return self._values.copy()

    def optimum(self, rng: np.random.Generator) -> tuple[np.ndarray, float]:
        i = int(np.argmin(self._values))
        return self.rows[i].copy(), float(self._values[i])


def make_mixed_world(study, kernel_prior, mean: float, rng: np.random.Generator, n_freq: int, *,
                     history=None, noise: float = 0.0) -> World:
    """The replicate's world over a mixed space (internal orientation, unit cube).

    ``history`` (past inputs (h, d) on the unit cube, observations (h,) in the internal orientation):
    the draw is conditioned on them pathwise, with observation noise sd ``noise``, before a library
    sees it at its rows, exactly as a box world is (:class:`ConditionedWorld`).
    """
    space = study.space
    if space.categorical or any(space.kind(j) == STEPPED for j in range(space.dim)):
        kernel = mixed_kernel(kernel_prior, space)
        base = MixedWorld(kernel, mean, rng, n_freq)
        if history is not None:
            base = ConditionedMixedWorld(base, kernel, *history, noise, rng)
    else:
        from ..worlds.draws import FeatureWorld
        from .replicate import unit_kernel
        kernel = unit_kernel(kernel_prior, study)
        base = FeatureWorld(kernel, mean, rng, n_freq)
        if history is not None:
            base = ConditionedWorld(base, kernel, *history, noise, rng)
    if space.library is not None:
        return LibraryWorld(base, space.library_unit())
    return base
