"""Worlds: the true objectives campaigns are replayed on, each knowing its own optimum."""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace

import numpy as np

from ..lazy import stats
from .functions import TestFunction
from ..model.kernels import Kernel
from ..model.optimize import polish

__all__ = ["World", "FeatureWorld", "GridWorld", "FunctionWorld", "ConditionedWorld", "FeatureSample",
           "WorldBlock", "feature_values", "find_minimum", "search_plan", "SearchPlan", "spread_best"]


class World:
    """A noise-free objective on the unit cube, in simlab's internal (minimising) orientation.

    A new world implements :meth:`__call__` and either :meth:`grad` (so its optimum can be
    polished) or its own :meth:`optimum`. A world drawn from a kernel also says how rough it
    is (:meth:`roughness`), so the search for its optimum can scale with it, and may offer
    cheaper approximate values for ranking candidates (:meth:`rank_values`).
    """

    dim: int

    def __call__(self, U) -> np.ndarray:  # pragma: no cover - abstract
        """Values at unit-cube inputs U of shape (n, d): shape (n,)."""
        raise NotImplementedError

    def grad(self, U) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def value_grad(self, U):
        return self(U), self.grad(U)

    def roughness(self) -> tuple[np.ndarray, float] | None:
        """Lengthscales on the unit cube (d,) and the Matern smoothness nu, or None if unknown."""
        return None

    def rank_values(self, U) -> np.ndarray:
        """Values good enough to rank candidates (default: the exact values)."""
        return self(U)

    # Optional ``local_values(U)``: values, gradients (n, d) and Hessians (n, d, d) in the arithmetic of
    # :meth:`rank_values`, for the Newton steps of the search on smooth worlds; None if it has none.
    local_values = None

    # Optional ``band_values(U, cutoff)``: ranking values of the world with only its components of
    # frequency norm at most ``cutoff`` (the world seen at a coarser resolution); None if it has none.
    band_values = None

    def optimum(self, rng: np.random.Generator) -> tuple[np.ndarray, float]:
        """The minimiser (d,) and minimum: see :func:`find_minimum`."""
        rough = self.roughness()
        ls, nu = rough if rough is not None else (None, np.inf)
        return find_minimum(self, self.value_grad, self.dim, rng, lengthscale=ls, nu=nu, rank=self.rank_values,
                            band=self.band_values, local=self.local_values)


@dataclass(frozen=True)
class SearchPlan:
    """How hard :func:`find_minimum` searches: see :func:`search_plan`."""

    n_search: int            # Sobol' points ranked (a power of two)
    n_polish: int            # best starts polished in float64
    zoom: int                # rounds of the derivative-free local search (rough worlds)
    zoom_points: int         # uniform points per start and round
    half: np.ndarray         # (d,) half-width of the first zoom box, per input
    separation: np.ndarray   # (d,) starts differ by more than this in some input
    descend: int = 0         # with band values: descend from this many points per start, add their best
    banded: bool = False     # rank on band values (the part each box resolves) where the world has them
    n_starts: int = 0        # separated starts taken from the ranked points (0: 2 n_polish)
    climb: int = 0           # lockstep quasi-Newton steps on the ranking values from every start
    polish_steps: int = 500  # iteration limit of the float64 polish
    keep_after: tuple = ()   # zoom rounds after which only the better half of the starts go on
    whole: float = 0.5       # banded: this share of n_starts more starts from the whole function's ranking


# Search sizes (measured by benchmarks/world_optima.py against an independent thorough search:
# 1, 2, 4 and 6 inputs, every kernel, lengthscale 0.2 of the range).
_POINTS_PER_CELL = 64        # Sobol' points per lengthscale cell, before the roughness factor
_MIN_SEARCH, _MAX_SEARCH = 2**12, 2**18
_ROUGH = {0.5: 4.0, 1.5: 2.0}   # more points for rough kernels (Matern 1/2, 3/2)
# Smooth worlds (Matern 5/2, squared exponential): a draw has of the order of one basin per
# lengthscale cell and is smooth inside it, so a few Sobol' points per cell find the basins
# and quasi-Newton steps on the float32 values find their floors.
_SMOOTH_PER_CELL = 32
_SMOOTH_MIN, _SMOOTH_MAX = 2**9, 2**18
# With ``band``, a ranking step sees the components of frequency norm up to this many radians per
# half-width of its box (tried 1, 2, 3, 6 and 10 on 4-D and 6-D Matern 1/2 and 3/2 worlds: 3 missed least).
_BAND_RADIANS = 3.0


def search_plan(dim: int, lengthscale=None, nu: float = np.inf) -> SearchPlan:
    """The default search effort for a world of ``dim`` inputs and the given roughness.

    Parameters
    ----------
    dim : int
    lengthscale : array_like of shape (dim,), optional
        The world's lengthscales on the unit cube. None: unknown, searched as if 0.25.
    nu : float
        Matern smoothness (inf for the squared exponential).

    Notes
    -----
    A draw of a stationary process has of the order of one basin per lengthscale cell,
    ``prod_j 1 / l_j`` of them in the cube (for the squared exponential in one input, Rice's
    formula gives sqrt(3) / (2 pi l) local minima per unit length; Adler & Taylor 2007,
    *Random Fields and Geometry*, chapter 11, from memory).

    *Smooth* kernels (Matern 5/2, squared exponential, and Matern 3/2 in 1 or 2 inputs):
    ``32 x cells`` Sobol' points (2^9 to 2^18), 8 + 8 d separated starts, up to 40 damped
    Newton steps on the float32 values from every start (no zoom: gradients are informative
    inside a basin), then the best 2 + d/2 starts polished in float64. Measured by
    benchmarks/world_optima.py (lengthscale 0.2): with 16 points per cell and 8 + 4 d starts,
    one 6-D Matern 5/2 world of five was missed by 0.22 and one 4-D world by 0.12; Matern 3/2
    in 4 inputs on this path missed one world of eight by 0.07, so from 4 inputs it keeps the
    rough search; with at most 2^16 points, one 6-D squared-exponential world of nine was
    missed by 0.45 (2^18 found it).

    *Rough* kernels' random-feature draws are wiggly on scales far below the lengthscale
    (their spectral densities have heavy tails): ``64 x roughness x cells`` Sobol' points
    (2^12 to 2^18), 8 + 4 d starts (twice as many for Matern 1/2), and a zoom down to 1e-4
    lengthscales with 128 (Matern 3/2) or 256 (Matern 1/2) points per start and round.
    """
    ls = np.full(dim, 0.25) if lengthscale is None else np.minimum(np.asarray(lengthscale, dtype=float), 1.0)
    cells = float(np.prod(1.0 / ls))
    if nu > 1.5 or (nu == 1.5 and dim <= 2):
        # Matern 3/2 is the roughest kernel on this path: twice the points and starts (2-D, 30 worlds,
        # benchmarks/world_optima.py, 2026-12-03: one search alone missed 2 of 60 searches by 0.015-0.034
        # with the plan of the smoother kernels, 1 of 60 with this one, at ~8 -> ~16 ms a world; the
        # better of the runner's two searches missed none). The one left is a minimum on the boundary.
        more = 2 if nu == 1.5 else 1
        n_search = 2 ** int(np.ceil(np.log2(np.clip(more * _SMOOTH_PER_CELL * cells, _SMOOTH_MIN, _SMOOTH_MAX))))
        return SearchPlan(n_search=n_search, n_polish=2 + dim // 2, zoom=0, zoom_points=0, half=0.5 * ls,
                          separation=0.5 * ls, n_starts=more * (8 + 8 * dim), climb=40, polish_steps=100)
    rough = _ROUGH.get(float(nu), 1.0)
    want = _POINTS_PER_CELL * rough * cells
    n_search = 2 ** int(np.ceil(np.log2(np.clip(want, _MIN_SEARCH, _MAX_SEARCH))))
    n_polish = (8 + 4 * dim) * (2 if nu <= 0.5 else 1)
    zoom, zoom_points = (14, 256) if nu <= 0.5 else (14, 128)
    descend = 8 if 0.5 < nu <= 1.5 else 0
    # In 1 or 2 inputs the Sobol' points resolve even the fine features, and ranking on the smooth
    # part only cost misses (2-D Matern 1/2: 3 of 10 worlds, by up to 0.025); in 4 and 6 inputs
    # they are coarser than the lengthscale, and it missed less (benchmarks/optimum_miss.py).
    return SearchPlan(n_search=n_search, n_polish=n_polish, zoom=zoom, zoom_points=zoom_points, half=0.5 * ls,
                      separation=0.5 * ls, descend=descend, banded=dim >= 4)


def find_minimum(f, fg, dim: int, rng, *, lengthscale=None, nu: float = np.inf, rank=None,
                 plan: SearchPlan | None = None, extra=None, band=None, local=None) -> tuple[np.ndarray, float]:
    """Global minimum of a function on [0, 1]^dim.

    Parameters
    ----------
    f, fg : callable
        ``f(U)`` gives values and ``fg(U)`` values and gradients for U of shape (n, dim).
    dim : int
    rng : numpy.random.Generator
        The only source of randomness (Sobol' scramble, zoom points).
    lengthscale, nu
        The function's roughness (lengthscales on the unit cube, Matern smoothness);
        :func:`search_plan` turns them into the search effort.
    rank : callable, optional
        Approximate values for ranking candidates (e.g. float32); default ``f``. Only the
        ranking uses it: every value returned comes from ``f``/``fg`` in float64.
    plan : SearchPlan, optional
        Overrides :func:`search_plan`.
    extra : ndarray of shape (k, dim), optional
        More points to rank (e.g. a grid world's own grid).
    band : callable, optional
        ``band(U, cutoff)`` gives ranking values of the function's components of frequency
        norm at most ``cutoff`` only (the function seen at a coarser resolution), and
        ``band(U, cutoff, grad=True)`` values and gradients; e.g. a random-feature world's
        :meth:`FeatureWorld.band_values`. Used where ``plan.banded``; otherwise every
        ranking uses ``rank``.
    local : callable, optional
        ``local(U)`` gives values, gradients and Hessians (n, dim, dim) in the arithmetic of
        ``rank`` (e.g. :meth:`FeatureSample.local32`), for the Newton steps of ``plan.climb``.
        Without it the climb is a float64 polish of every start.

    Returns
    -------
    u : ndarray of shape (dim,)
    value : float
        ``f(u)``.

    Notes
    -----
    1. ``plan.n_search`` scrambled Sobol' points, plus any ``extra`` points, are ranked; the
       ``plan.n_starts`` best in distinct basins (:func:`spread_best`)
       are kept as starts. With ``band``, half as many more come from the whole function's
       ranking, and those are zoomed on the whole function at every resolution (step 3), so
       that a narrow basin deepened by the fine features is not left at the coarse rounds. With ``band`` and ``plan.descend``, as many more starts come from
       ``descend`` times as many good points after 24 normalised gradient steps on the
       smooth part, so that basins compete by (nearly) their floors.
    2. ``plan.climb`` damped Newton steps on the ranking values (:func:`_newton`) move every
       start to the floor of its basin (smooth worlds); without ``local``, every start is
       polished in float64 instead.
    3. Every start runs ``plan.zoom`` rounds of ``plan.zoom_points`` uniform points in a box
       around it that halves every round, moving to the best point found: a derivative-free
       local search for rough worlds, where gradients say little. With ``band``, each ranking
       sees only the components that turn by at most 3 radians across the box's half-width:
       a coarse box is not misled by wiggles far finer than itself (the fine features of
       rough kernels), and the last rounds see the whole function.
    4. The ``n_polish`` best starts, by their float64 values, are polished with L-BFGS-B.

    A missed optimum makes regret too *small*: the reference f* is too high, so every
    recommendation looks closer to it than it is. simlab measures regret against the
    better of this search, a second independent one, and every input any campaign
    evaluated on the replicate; a campaign that found a better point than the search
    then has regret 0 there, but a policy that never went near the missed optimum still
    has its regret understated, by an amount that depends on which other policies ran.
    The search is a heuristic, not a certificate: ``benchmarks/world_optima.py`` measures
    its miss against an independent thorough search.
    """
    plan = plan or search_plan(dim, lengthscale, nu)
    rank = rank or f
    band = band if plan.banded else None
    n_starts = plan.n_starts or 2 * plan.n_polish

    def rank_at(U, half):
        # the function as resolved at a box of this half-width (all of it without ``band``)
        return rank(U) if band is None else band(U, _BAND_RADIANS / float(np.min(half)))

    U = stats.qmc.Sobol(dim, seed=rng).random_base2(int(np.log2(plan.n_search)))
    if extra is not None:
        U = np.vstack([U, extra])
    half = plan.half.copy()
    v = rank_at(U, half)
    starts = U[spread_best(U, v, n_starts, plan.separation)].copy()
    fine = np.zeros(len(starts), dtype=bool)     # starts zoomed on the whole function at every resolution
    if band is not None and plan.whole > 0:
        # and starts from the whole function's ranking, zoomed on the whole function: a narrow basin whose
        # depth comes from the fine features looks poor at the coarse resolutions, so the banded zoom would
        # leave it (4-D Matern 1/2, benchmarks/world_optima.py: a basin 0.3 amplitudes deeper than the one
        # every banded search settled in)
        whole = U[spread_best(U, rank(U), int(round(plan.whole * n_starts)), plan.separation)]
        starts = np.vstack([starts, whole])
        fine = np.r_[fine, np.ones(len(whole), dtype=bool)]
    if band is not None and plan.descend > 0:
        # More starts: descend from many good points on the smooth part, so that basins are
        # ranked by (nearly) their floors rather than by wherever a sample fell in them.
        head = spread_best(U, v, plan.descend * n_starts, 0.5 * plan.separation)
        X, vx = _descend(band, U[head], _BAND_RADIANS / float(np.min(half)), plan.half)
        more = X[spread_best(X, vx, n_starts, plan.separation)]
        starts = np.vstack([starts, more])
        fine = np.r_[fine, np.zeros(len(more), dtype=bool)]
    if plan.climb > 0:
        if local is None:
            starts, _ = polish(fg, starts, maxiter=plan.polish_steps)
        else:
            starts = _newton(local, starts, plan.climb, plan.half)

    def zoom_values(C, half):
        # (starts, k, d) candidates: each start's own at its resolution (the whole function for `fine` ones)
        out = np.empty(C.shape[:2])
        if (~fine).any():
            out[~fine] = rank_at(C[~fine].reshape(-1, dim), half).reshape(-1, C.shape[1])
        if fine.any():
            out[fine] = rank(C[fine].reshape(-1, dim)).reshape(-1, C.shape[1])
        return out

    if plan.zoom > 0:
        best_v = zoom_values(starts[:, None, :], half)[:, 0]
    for r in range(plan.zoom):
        if band is not None and r > 0:
            best_v = zoom_values(starts[:, None, :], half)[:, 0]   # the starts seen at the finer resolution
        cand = starts[:, None, :] + half * (2.0 * rng.random((len(starts), plan.zoom_points, dim)) - 1.0)
        cand = np.clip(cand, 0.0, 1.0)
        vc = zoom_values(cand, half)
        j = np.argmin(vc, axis=1)
        better = vc[np.arange(len(starts)), j] < best_v
        starts[better] = cand[better, j[better]]
        best_v[better] = vc[better, j[better]]
        half /= 2.0
        if r + 1 in plan.keep_after and len(starts) > 2 * plan.n_polish and not fine.any():
            # successive halving: the starts that look worse at this resolution stop here
            order = np.argsort(best_v, kind="stable")[: max(2 * plan.n_polish, len(starts) // 2)]
            starts, best_v = starts[order], best_v[order]
    exact = f(starts)
    keep = np.argsort(exact, kind="stable")[: plan.n_polish]
    Up, vp = polish(fg, starts[keep], maxiter=plan.polish_steps)
    best = int(np.argmin(vp))
    return Up[best], float(vp[best])


def spread_best(U, values, k: int, scale) -> np.ndarray:
    """Indices of k low ``values`` whose inputs lie in different basins, best first.

    Greedy: the lowest value is taken, every point within ``scale`` of it in every input
    (a scaled max-norm ball) is set aside, and so on until k are taken or none is left; the
    best of the points set aside then fill up to k. One pass over the points per start taken,
    so its cost does not depend on how many points share a basin (unlike a scan of the ranked
    list, which in 1 or 2 inputs walks through thousands of points of the few basins there).
    """
    values = np.asarray(values, dtype=float)
    scale = np.broadcast_to(np.asarray(scale, dtype=float), (U.shape[1],))
    k = min(k, len(values))
    # Only the 64 k lowest values compete (as in simlab.model.optimize.separated_best).
    m = min(len(values), 64 * k)
    head = np.argpartition(values, m - 1)[:m] if m < len(values) else np.arange(len(values))
    head = head[np.argsort(values[head], kind="stable")]
    X = U[head] / scale
    masked = values[head].copy()
    chosen: list[int] = []
    while len(chosen) < k:
        i = int(np.argmin(masked))
        if not np.isfinite(masked[i]):
            break
        chosen.append(i)
        masked[np.max(np.abs(X - X[i]), axis=1) <= 1.0] = np.inf
    if len(chosen) < k:
        taken = np.zeros(m, bool)
        taken[chosen] = True
        chosen += [int(i) for i in np.flatnonzero(~taken)[: k - len(chosen)]]
    return head[np.asarray(chosen, dtype=int)]


def _newton(local, X, steps: int, scale) -> np.ndarray:
    """Damped Newton steps from every row of X inside the unit cube, one evaluation per step.

    ``local(U) -> (values, grads, hessians)``. Each point solves
    ``(H + (lam + shift) I) p = -g``, with ``shift`` lifting the smallest eigenvalue of H to 0
    where H is not positive definite, ``p`` limited to ``scale`` in every input (a basin is about
    a lengthscale wide), and the trial clipped to the cube; a trial that lowers the value is
    taken and ``lam`` shrinks 3-fold, one that does not is not taken and ``lam`` grows 4-fold
    (Levenberg-Marquardt damping, Nocedal & Wright 2006, section 10.3; common practice for the
    factors). ``lam`` starts at a tenth of the mean |diagonal| of H.
    """
    x = np.array(X, dtype=float)
    n, d = x.shape
    v, g, H = local(x)
    lam = 0.1 * np.mean(np.abs(np.diagonal(H, axis1=1, axis2=2)), axis=1) + 1e-12
    stop = 1e6 * lam            # damping this strong: the point no longer moves
    active = np.arange(n)
    eye = np.eye(d)
    for _ in range(steps):
        a = active
        low = np.linalg.eigvalsh(H[a])[:, 0]
        shift = np.maximum(0.0, -low) + lam[a]
        p = -np.linalg.solve(H[a] + shift[:, None, None] * eye, g[a][:, :, None])[:, :, 0]
        p = np.clip(p, -scale, scale)
        trial = np.clip(x[a] + p, 0.0, 1.0)
        move = np.max(np.abs(trial - x[a]) / scale, axis=1)     # the step after clipping to the cube
        vt, gt, Ht = local(trial)
        ok = vt < v[a]
        moved = a[ok]
        x[moved], v[moved], g[moved], H[moved] = trial[ok], vt[ok], gt[ok], Ht[ok]
        lam[a] = np.where(ok, lam[a] / 3.0, lam[a] * 4.0)
        # stopped: the step (after clipping: a point held at a bound stops) is below what float32
        # values resolve (1e-5 of the scale; the float64 polish finishes), or the damping has
        # grown past any curvature
        active = a[(move > 1e-5) & (lam[a] < stop[a])]
        if len(active) == 0:
            break
    return x


_DESCEND_STEPS = 24


def _descend(band, X, cutoff, scale):
    """Normalised gradient steps (in units of ``scale`` per input) on ``band(., cutoff)``.

    Each point steps along its preconditioned steepest-descent direction; a step that lowers
    the value is taken and the next one is 1.5 times longer, one that does not is not taken
    and the next is 0.3 times as long (common practice for adaptive step sizes).
    """
    x = np.array(X, dtype=float)
    v, g = band(x, cutoff, grad=True)
    step = np.full(len(x), 0.2)
    for _ in range(_DESCEND_STEPS):
        p = g * scale
        p /= np.maximum(np.linalg.norm(p, axis=1), 1e-300)[:, None]
        trial = np.clip(x - step[:, None] * p * scale, 0.0, 1.0)
        vt, gt = band(trial, cutoff, grad=True)
        ok = vt < v
        x[ok], v[ok], g[ok] = trial[ok], vt[ok], gt[ok]
        step = np.where(ok, 1.5 * step, 0.3 * step)
    return x, v


class FeatureSample:
    """A function drawn with random Fourier features: ``mean + a sqrt(1/F) sum_j w_j phi_j(u)``.

    Parameters
    ----------
    kernel : Kernel
    mean : float
    rng : numpy.random.Generator
    n_freq : int
        Number of spectral frequencies F; the basis holds a cosine and a sine per frequency.

    Notes
    -----
    With ``phi = [cos(Omega u), sin(Omega u)]`` and ``w ~ N(0, I)``, the covariance of a draw
    given the frequencies is ``a^2 / F sum_j cos(omega_j (u - u'))``, whose expectation over
    ``omega`` drawn from the normalised spectral density is the kernel (Bochner's theorem;
    Rahimi & Recht 2007). For F = 1024 the error at any lag has standard deviation at most
    ``a^2 sqrt(1 / (2 F)) ~ 0.022 a^2``; ``tests/unit/test_worlds.py`` checks this.
    """

    def __init__(self, kernel: Kernel, mean: float, rng: np.random.Generator, n_freq: int = 1024):
        self.kernel = kernel
        self.mean = float(mean)
        self.dim = kernel.dim
        self.omega = kernel.spectral(rng, n_freq)          # (F, d)
        self.scale = kernel.amplitude / np.sqrt(n_freq)
        self.w = rng.standard_normal(2 * n_freq)           # (2F,)
        self._polar_of = None

    def basis(self, U) -> np.ndarray:
        """Feature matrix of shape (n, 2F), already multiplied by ``a / sqrt(F)``."""
        P = np.atleast_2d(U) @ self.omega.T
        return self.scale * np.hstack([np.cos(P), np.sin(P)])

    def basis32(self, U) -> np.ndarray:
        """:meth:`basis` in float32, for products that are kept in float32 anyway (pathwise draws over a
        pool): the phases ``U omega^T`` are formed in float64 and reduced to [-pi, pi] before the cast, so
        each feature is within 2e-7 of ``a / sqrt(F)`` of its float64 value (1.6e-7 measured with frequencies up to
        |omega| = 4,600; without the reduction a phase of 100 would carry float32's 8e-6), and the cosines and sines run in
        NumPy's float32 loops, about 8 times faster here than :meth:`basis` followed by a cast."""
        P = np.atleast_2d(U) @ self.omega.T
        P -= (2.0 * np.pi) * np.round(P / (2.0 * np.pi))
        P = P.astype(np.float32)
        out = np.hstack([np.cos(P), np.sin(P)])
        out *= np.float32(self.scale)
        return out

    def redraw(self, rng) -> None:
        """New weights on the same frequencies (another draw from the same feature prior)."""
        self.w = rng.standard_normal(self.w.size)

    def polar(self) -> tuple[np.ndarray, np.ndarray]:
        """Weights in amplitude-phase form: ``a cos(p) + b sin(p) = r cos(p - phi)``, each (F,).

        One cosine per frequency instead of a cosine and a sine halves the transcendental
        work of every evaluation. Recomputed whenever the weights are redrawn.
        """
        if self._polar_of is not self.w:
            F = self.omega.shape[0]
            self._polar = (np.hypot(self.w[:F], self.w[F:]), np.arctan2(self.w[F:], self.w[:F]))
            self._polar_of = self.w
        return self._polar

    def __call__(self, U) -> np.ndarray:
        amp, phase = self.polar()
        return feature_values(self.omega[None], amp[None], phase[None], self.scale, self.mean,
                              np.atleast_2d(U)[None])[0]

    def grad(self, U) -> np.ndarray:
        amp, phase = self.polar()
        P = np.atleast_2d(U) @ self.omega.T - phase
        return (-self.scale * amp * np.sin(P)) @ self.omega

    def values32(self, U, *, chunk: int = 512, below: float = np.inf, grad: bool = False):
        """Values in float32 arithmetic (returned as float64), for ranking many candidates.

        NumPy's float32 cosine is vectorised and about 12-19 times faster here than the
        float64 one; the result is off by about 1e-6 of the amplitude (rounding of the
        phases and of the sum), which is plenty to rank candidates that float64 then polishes.
        Chunks of 512 inputs keep the (chunk, F) phase matrix in cache: 2.5 times faster than
        chunks of 4096 here. ``below``: only the features whose frequency norm ``|omega_j|``
        is at most this (the draw seen at a coarser resolution; fewer features, cheaper).
        ``grad``: also the gradients (n, d), in the same arithmetic.
        """
        amp, phase = self.polar()
        if getattr(self, "_f32_of", None) is not self.w:
            order = np.argsort(self.frequency_norms(), kind="stable")
            self._f32 = (self.omega[order].astype(np.float32), phase[order].astype(np.float32),
                         amp[order].astype(np.float32), self.frequency_norms()[order])
            self._f32_of = self.w
        omega, ph, am, norms = self._f32
        k = len(norms) if below >= norms[-1] else int(np.searchsorted(norms, below, side="right"))
        omega, ph, am = omega[:k], ph[:k], am[:k]
        U = np.atleast_2d(U)
        out = np.empty(len(U))
        G = np.empty(U.shape) if grad else None
        for a in range(0, len(U), chunk):
            P = U[a:a + chunk].astype(np.float32) @ omega.T
            P -= ph
            if grad:
                S = np.sin(P)
                S *= am
                G[a:a + chunk] = -self.scale * (S @ omega)
            np.cos(P, out=P)
            out[a:a + chunk] = P @ am
        values = self.mean + self.scale * out
        return (values, G) if grad else values

    def local32(self, U):
        """Values (n,), gradients (n, d) and Hessians (n, d, d) in float32 arithmetic (as float64).

        For the quasi-Newton steps of :func:`find_minimum`: one matrix product per output over
        the point set, ``H = -s sum_j r_j cos(omega_j . u - phi_j) omega_j omega_j'`` as
        ``(n, F) @ (F, d^2)``. Accurate to float32 rounding, like :meth:`values32`.
        """
        amp, phase = self.polar()
        if getattr(self, "_local_of", None) is not self.w:
            om = self.omega.astype(np.float32)
            outer = (self.omega[:, :, None] * self.omega[:, None, :]).reshape(len(om), -1).astype(np.float32)
            self._local = (om, phase.astype(np.float32), amp.astype(np.float32), outer)
            self._local_of = self.w
        om, ph, am, outer = self._local
        U = np.atleast_2d(U)
        P = U.astype(np.float32) @ om.T
        P -= ph
        S = np.sin(P)
        S *= am
        np.cos(P, out=P)
        P *= am
        d = U.shape[1]
        values = self.mean + self.scale * P.sum(axis=1, dtype=np.float64)
        grads = -self.scale * (S @ om).astype(np.float64)
        hess = -self.scale * (P @ outer).astype(np.float64).reshape(len(U), d, d)
        return values, grads, hess

    def frequency_norms(self) -> np.ndarray:
        """``|omega_j|`` of every feature, shape (F,)."""
        return np.linalg.norm(self.omega, axis=1)


def feature_values(omega, amp, phase, scale, mean, U) -> np.ndarray:
    """Stacked random-feature functions ``mean + scale sum_j amp_j cos(omega_j . u - phase_j)``.

    omega (B, F, d), amp and phase (B, F), U (B, q, d) give (B, q); ``scale`` and ``mean``
    are scalars or shaped (B, 1). One function serves a single sample (B = 1) and a block
    of worlds advancing in lockstep, so both give the same bits.
    """
    from ..model.gp import matvec

    P = np.matmul(U, omega.transpose(0, 2, 1))                 # (B, q, F)
    P -= phase[:, None, :]
    np.cos(P, out=P)
    return mean + scale * matvec(P, amp)


class WorldBlock:
    """The worlds of a block of replicates, evaluated together at one input each.

    Random-feature worlds are stacked into one array product; any other kind is evaluated
    one world at a time. Either way each world's value has the bits of ``world(u[None])[0]``.
    """

    def __init__(self, worlds: list["World"]):
        self.worlds = worlds
        kinds = {type(w) for w in worlds}
        sizes = {w.sample.omega.shape for w in worlds} if kinds == {FeatureWorld} else set()
        self.stacked = len(sizes) == 1
        if self.stacked:
            self.omega = np.stack([w.sample.omega for w in worlds])
            self.amp, self.phase = (np.stack(a) for a in zip(*(w.sample.polar() for w in worlds)))
            self.scale = np.array([[w.sample.scale] for w in worlds])
            self.mean = np.array([[w.sample.mean] for w in worlds])

    def __call__(self, xs) -> np.ndarray:
        """Values (B,) at inputs xs (B, d), one input per world."""
        xs = np.asarray(xs, dtype=float)
        if self.stacked:
            return feature_values(self.omega, self.amp, self.phase, self.scale, self.mean, xs[:, None, :])[:, 0]
        return np.array([w(x[None, :])[0] for w, x in zip(self.worlds, xs)])


class FeatureWorld(World):
    """A continuous draw from a Gaussian-process prior via random Fourier features."""

    def __init__(self, kernel: Kernel, mean: float, rng: np.random.Generator, n_freq: int = 1024):
        self.sample = FeatureSample(kernel, mean, rng, n_freq)
        self.dim = kernel.dim

    def __call__(self, U):
        return self.sample(U)

    def grad(self, U):
        return self.sample.grad(U)

    def roughness(self):
        return self.sample.kernel.lengthscale, self.sample.kernel.nu

    def rank_values(self, U):
        return self.sample.values32(U)

    def local_values(self, U):
        return self.sample.local32(U)

    def band_values(self, U, cutoff, grad=False):
        return self.sample.values32(U, below=cutoff, grad=grad)


class GridWorld(World):
    """An exact joint draw of the prior on a regular grid (1 or 2 inputs), smooth in between.

    Between grid points the world is the kernel interpolant of the grid values,
    ``m + k(u, G) (K + jI)^-1 (f_G - m)``, which passes through every grid value (up to the
    jitter j) and is as smooth as the kernel.
    """

    def __init__(self, kernel: Kernel, mean: float, rng: np.random.Generator, n_per_dim: int = 0):
        d = kernel.dim
        if d > 2:
            raise ValueError(f"grid worlds need 1 or 2 inputs; got {d}")
        n = n_per_dim or (256 if d == 1 else 40)
        axes = [np.linspace(0.0, 1.0, n)] * d
        self.grid = np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, d)
        self.kernel, self.mean, self.dim = kernel, float(mean), d
        K = kernel(self.grid)
        # Dense grids of smooth kernels are numerically singular: raise the jitter tenfold until
        # the factorisation succeeds, up to 1e-2 of the prior variance (then refuse), and say so
        # when it rose above the nugget, since the draw is then that much smoother than the prior.
        jitter = 1e-10 * kernel.variance
        for _ in range(9):
            try:
                L = np.linalg.cholesky(K + jitter * np.eye(len(K)))
                break
            except np.linalg.LinAlgError:
                jitter *= 10.0
        else:
            raise ValueError(f"grid world: the prior covariance of {len(K)} grid points cannot be factored even "
                             "with a jitter of 1e-2 of the prior variance; use fewer grid points or method = "
                             "\"features\"")
        if jitter > 1e-10 * kernel.variance:
            warnings.warn(f"grid world: jitter raised to {jitter / kernel.variance:.0e} of the prior variance to "
                          f"factor {len(K)} grid points (fewer grid points avoid it)", RuntimeWarning, stacklevel=2)
        z = rng.standard_normal(len(K))
        self.values = self.mean + L @ z                      # exact draw at the grid points
        self.alpha = np.linalg.solve(L.T, z)                 # (K + jI)^-1 (f_G - m) = L^-T z

    def __call__(self, U):
        return self.mean + self.kernel(np.atleast_2d(U), self.grid) @ self.alpha

    def grad(self, U):
        return np.einsum("qnd,n->qd", self.kernel.grad(np.atleast_2d(U), self.grid), self.alpha)

    def roughness(self):
        return self.kernel.lengthscale, self.kernel.nu

    def optimum(self, rng):
        # The grid holds the draw itself; between grid points the world is a smooth interpolant.
        ls, nu = self.roughness()
        plan = replace(search_plan(self.dim, ls, nu), n_search=1024)
        return find_minimum(self, self.value_grad, self.dim, rng, plan=plan, extra=self.grid)


class FunctionWorld(World):
    """A published test function on its published domain; its optimum is the published one."""

    def __init__(self, fn: TestFunction):
        self.fn = fn
        self.dim = fn.dim
        self.low = np.array([b[0] for b in fn.bounds])
        self.width = np.array([b[1] - b[0] for b in fn.bounds])

    def __call__(self, U):
        return self.fn(self.low + np.atleast_2d(U) * self.width)

    def optimum(self, rng):
        u = (np.asarray(self.fn.minimizers[0]) - self.low) / self.width
        return u, float(self.fn.fmin)


class ConditionedWorld(World):
    """A prior draw updated pathwise to agree with past observations (Matheron's rule).

    ``g(u) = f(u) + k(u, H) (K_HH + s2 I)^-1 (y_H - f(H) - eps)``, ``eps ~ N(0, s2)``, is an
    exact draw from the prior conditioned on observing ``y_H`` at ``H`` with noise variance
    ``s2`` when ``f`` is an exact prior draw (Wilson et al. 2020, ICML).

    Parameters
    ----------
    base : FeatureWorld or GridWorld
        The prior draw ``f``.
    kernel : Kernel
        The world's kernel (the same one ``base`` was drawn from).
    H : ndarray of shape (h, d)
        Past inputs on the unit cube.
    yH : ndarray of shape (h,)
        Past observations, internal orientation.
    noise : float
        Observation noise sd of the past runs.
    rng : numpy.random.Generator
        Stream for ``eps``.
    """

    def __init__(self, base: World, kernel: Kernel, H, yH, noise: float, rng: np.random.Generator):
        from ..model.gp import NUGGET

        self.base, self.kernel, self.dim = base, kernel, base.dim
        self.H = np.atleast_2d(np.asarray(H, dtype=float))
        s2 = noise**2 + NUGGET * kernel.variance
        K = kernel(self.H) + s2 * np.eye(len(self.H))
        eps = np.sqrt(s2) * rng.standard_normal(len(self.H))
        r = np.asarray(yH, dtype=float) - base(self.H) - eps
        self.beta = np.linalg.solve(K, r)

    def __call__(self, U):
        U = np.atleast_2d(U)
        return self.base(U) + self.kernel(U, self.H) @ self.beta

    def grad(self, U):
        U = np.atleast_2d(U)
        return self.base.grad(U) + np.einsum("qnd,n->qd", self.kernel.grad(U, self.H), self.beta)

    def roughness(self):
        return self.base.roughness()

    def rank_values(self, U):
        U = np.atleast_2d(U)
        return self.base.rank_values(U) + self.kernel(U, self.H) @ self.beta

    @property
    def band_values(self):
        if self.base.band_values is None:
            return None
        def band(U, cutoff, grad=False):
            # The base at the coarser resolution; the correction to the past trials in full.
            U = np.atleast_2d(U)
            if not grad:
                return self.base.band_values(U, cutoff) + self.kernel(U, self.H) @ self.beta
            v, g = self.base.band_values(U, cutoff, grad=True)
            return (v + self.kernel(U, self.H) @ self.beta,
                    g + np.einsum("qnd,n->qd", self.kernel.grad(U, self.H), self.beta))
        return band

    def optimum(self, rng):
        if isinstance(self.base, GridWorld):
            ls, nu = self.roughness()
            plan = replace(search_plan(self.dim, ls, nu), n_search=1024)
            return find_minimum(self, self.value_grad, self.dim, rng, plan=plan, extra=self.base.grid)
        return super().optimum(rng)
