"""The best feasible input of a world under measured limits and hidden failures."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lazy import stats
from .draws import spread_best

__all__ = ["FeasibleOptimum", "Slack", "feasible_minimum"]


@dataclass(frozen=True)
class FeasibleOptimum:
    """What :func:`feasible_minimum` found.

    Attributes
    ----------
    u : ndarray of shape (d,)
        The best feasible input found (every constraint <= 0 there, in float64); with
        ``found`` False, the input with the smallest largest constraint violation seen.
    value : float
        The world's value at ``u`` (float64).
    worst : float
        The largest world value found over the feasible set: the feasible ranking point that
        ranked worst, evaluated in float64 and polished upward by SLSQP (unless ``n_starts``
        is 0): the regret reference of a campaign that recommends an infeasible input. Never
        below ``value``; equal to it when ``found`` is False.
    feasible_share : float
        Share of the ranking points that are feasible (an estimate of the feasible volume).
    found : bool
        False when no feasible input was found at all.
    """

    u: np.ndarray
    value: float
    worst: float
    feasible_share: float
    found: bool


class Slack:
    """A world turned into a constraint that is <= 0 where feasible: ``sign * (world(u) - bound)``.

    Parameters
    ----------
    world : World
        The limited quantity (a limit's world) or a hidden failure's latent world.
    bound : float
        The limit's value, or the failure threshold.
    sign : {1, -1}
        1: feasible where ``world <= bound`` (an upper limit; a failure where the latent
        exceeds its threshold); -1: feasible where ``world >= bound`` (a lower limit).
    """

    def __init__(self, world, bound: float, sign: int = 1):
        if sign not in (1, -1):
            raise ValueError(f"sign must be 1 (stay at or below the bound) or -1 (at or above); got {sign!r}")
        bound = float(bound)
        if not np.isfinite(bound):
            raise ValueError(f"bound must be finite; got {bound}")
        self.world, self.bound, self.sign = world, bound, sign
        self.dim = world.dim

    def __call__(self, U) -> np.ndarray:
        return self.sign * (self.world(U) - self.bound)

    def grad(self, U) -> np.ndarray:
        return self.sign * self.world.grad(U)

    def rank_values(self, U) -> np.ndarray:
        rank = getattr(self.world, "rank_values", self.world)
        return self.sign * (rank(U) - self.bound)

    def roughness(self):
        rough = getattr(self.world, "roughness", None)
        return rough() if rough is not None else None


# Ranking effort: Sobol' points per lengthscale cell (about one basin each, see draws.search_plan),
# twice as many for Matern 3/2 and 1/2 worlds, between 2^10 and 2^16 points. Measured by
# benchmarks/feasible_optima.py against differential evolution with the constraints.
_PER_CELL = 32
_MIN_RANK, _MAX_RANK = 2**10, 2**16
# Of the infeasible ranking points, this least-violating share makes the band just outside the
# feasible set from which "nearly feasible" starts are taken (the optimum usually lies on its edge).
_NEAR_SHARE = 0.25
# Float64 checks of the best few ranking points (their feasibility and value were seen in float32).
_CHECKED = 8
_SLSQP = {"maxiter": 100, "ftol": 1e-12}
# SLSQP is asked to keep every constraint this far inside (in units of the constraint's spread
# over the ranking points), so that its solution, which sits on the active constraints up to
# rounding, is feasible in float64; it costs about this much of the objective's spread.
_MARGIN = 1e-9
# Rough worlds (Matern smoothness at most this, in the world or any constraint) get a zoom of
# _ZOOM_ROUNDS rounds of _ZOOM_POINTS uniform points per start before the polish (see _zoom).
_ROUGH_NU = 1.5
_ZOOM_ROUNDS, _ZOOM_POINTS = 14, 128


def feasible_minimum(world, constraints, dim: int, rng, *, n_rank: int | None = None, n_starts: int | None = None,
                     unconstrained=None) -> FeasibleOptimum:
    """The minimum of a world over the inputs where every constraint is <= 0.

    Parameters
    ----------
    world : World
        ``world(U)`` values (n,), ``world.grad(U)`` gradients (n, d) at unit-cube inputs
        U of shape (n, d); optionally ``rank_values(U)`` (cheap values for ranking) and
        ``roughness()`` (lengthscales, nu), as :class:`simlab.worlds.draws.World`.
    constraints : sequence
        Objects with ``c(U)`` (n,) and ``c.grad(U)`` (n, d), optionally ``rank_values``
        and ``roughness`` (e.g. :class:`Slack`). An input is feasible where every one is <= 0.
    dim : int
        Number of inputs d.
    rng : numpy.random.Generator
        The only source of randomness (the Sobol' scramble, the zoom of rough worlds, and
        the unconstrained search when there are no constraints and no ``unconstrained``).
    n_rank : int, optional
        Ranking points (rounded up to a power of two). Default: 32 per lengthscale cell
        of the roughest of the world and the constraints (64 for Matern 3/2 and 1/2),
        2^10 to 2^16.
    n_starts : int, optional
        Constrained polishes (SLSQP): half from the best feasible ranking points in
        distinct basins, half from the best nearly feasible ones. 0: no polish (the best
        feasible ranking point is the answer). Default ``4 + 2 d``.
    unconstrained : tuple (u, value), optional
        The world's unconstrained optimum (e.g. from ``world.optimum``). Where it is
        feasible it is the answer, and nothing is polished.

    Returns
    -------
    FeasibleOptimum

    Notes
    -----
    1. ``n_rank`` scrambled Sobol' points are ranked on the world and every constraint in
       the ranking arithmetic (float32 for random-feature worlds).
    2. If ``unconstrained`` is feasible in float64 it is the global minimum over the
       feasible set too, and is returned.
    3. Otherwise the best ``_CHECKED`` feasible ranking points are re-evaluated in float64,
       and SLSQP (Kraft 1988, *A software package for sequential quadratic programming*,
       DFVLR-FB 88-28; scipy.optimize.minimize) with the analytic gradients and bounds
       [0, 1]^d polishes starts taken with :func:`simlab.worlds.draws.spread_best`: the best
       feasible points in distinct basins, and the best points of the band just outside
       the feasible set (the least-violating quarter of the infeasible points), since a
       constrained minimum usually lies on the boundary, where a thin feasible sliver may
       hold no ranking point. Objective and constraints are divided by their spread over
       the ranking points, so SLSQP's tolerances are relative. On rough worlds (Matern
       smoothness <= 3/2 in the world or a constraint) every start first runs a zoom
       (:func:`_zoom`: shrinking boxes of uniform points, feasibility first), since SLSQP
       alone stalls there (benchmarks/feasible_optima.py, 10 worlds per cell: Matern 3/2
       missed 2 of 40 2-D and 8 of 40 4-D worlds by up to 0.67 amplitudes without it, none
       with it).
    4. A polished point counts only if every constraint is <= 0 in float64. SLSQP is asked
       to stay ``_MARGIN`` (1e-9 of each constraint's spread) inside, so its solution is
       feasible despite rounding; one that still lands outside gets up to three
       minimum-norm linearised corrections onto its active constraints (:func:`_restore`),
       and failing that is moved back along the segment to a feasible anchor (its start if
       feasible, else the nearest feasible point known) by the smallest step of a geometric
       then linear ladder (:func:`_pull_back`). The correction comes first because at the
       corner of a thin feasible sliver the segment to the anchor can leave the sliver at
       once (measured on a 2-D world with its optimum at such a corner: the segment alone
       moved SLSQP's solution to a point 0.33 amplitudes worse).
    5. With no feasible ranking point, the phase-I problem (minimise the largest scaled
       violation) is solved by SLSQP from the ``n_starts`` least-violating ranking points in
       distinct basins instead, and every feasible solution is polished as in 3.
    6. The answer is the best feasible float64 value among all candidates; an infeasible
       point is never returned as the optimum. With no feasible candidate at all, ``found``
       is False and the answer is the least-violating point seen (largest constraint value,
       unscaled), its value, and ``worst`` equal to that value.

    The search is a heuristic, not a certificate: a feasible basin missed by every ranking
    point and every polish is missed. ``benchmarks/feasible_optima.py`` measures the miss
    against differential evolution with the constraints (10 worlds per cell of 2 or 4
    inputs, Matern 5/2 or 3/2, 1 or 2 limits, shares ~10 % or ~50 %: one miss of 160, by
    0.0096 amplitudes, a 4-D basin on an edge of the cube that no start reached).
    """
    constraints = tuple(constraints)
    for i, c in enumerate(constraints):
        if not (callable(c) and callable(getattr(c, "grad", None))):
            raise ValueError(f"constraints[{i}] must be callable and have a grad method; got {type(c).__name__}")
    if isinstance(dim, bool) or not isinstance(dim, (int, np.integer)) or dim < 1:
        raise ValueError(f"dim must be a positive integer; got {dim!r}")
    if n_rank is not None and (isinstance(n_rank, bool) or not isinstance(n_rank, (int, np.integer)) or n_rank < 1):
        raise ValueError(f"n_rank must be a positive integer; got {n_rank!r}")
    if n_starts is not None and (isinstance(n_starts, bool) or not isinstance(n_starts, (int, np.integer))
                                 or n_starts < 0):
        raise ValueError(f"n_starts must be a non-negative integer; got {n_starts!r}")
    if unconstrained is not None:
        u0, v0 = unconstrained
        u0 = np.asarray(u0, dtype=float)
        if u0.shape != (dim,):
            raise ValueError(f"unconstrained[0] must have shape ({dim},); got {u0.shape}")
        unconstrained = (u0, float(v0))
    if not constraints and unconstrained is None:
        unconstrained = world.optimum(rng)

    # 1. rank
    ls, nu = _roughest(dim, [world, *constraints])
    n_rank = n_rank or _rank_size(ls, nu)
    n_starts = 4 + 2 * dim if n_starts is None else int(n_starts)
    U = stats.qmc.Sobol(dim, seed=rng).random_base2(int(np.ceil(np.log2(n_rank))))
    f = _rank(world, U)
    C = np.array([_rank(c, U) for c in constraints]).reshape(len(constraints), len(U))
    viol = C.max(axis=0) if constraints else np.zeros(len(U))
    feasible = viol <= 0.0
    share = float(feasible.mean())
    worst = -np.inf
    if feasible.any():
        i = np.flatnonzero(feasible)[np.argmax(f[feasible])]
        worst = float(world(U[i:i + 1])[0])
        if n_starts is None or n_starts > 0:
            worst = _worst_polished(world, constraints, U[i], worst, f, C)

    # 2. a feasible unconstrained optimum is the answer
    if unconstrained is not None and _violation(constraints, unconstrained[0][None])[0] <= 0.0:
        u0, v0 = unconstrained
        return FeasibleOptimum(u=u0, value=v0, worst=max(worst, v0), feasible_share=share, found=True)

    # 3. candidates: the best feasible ranking points in float64, then the polished starts
    sep = 0.5 * ls
    rough = nu <= _ROUGH_NU
    cand = _Candidates(world, constraints)
    fi = np.flatnonzero(feasible)
    if len(fi):
        cand.offer(U[fi[np.argsort(f[fi], kind="stable")[:_CHECKED]]])
    f_scale = _spread(f)
    c_scale = np.array([_spread(row) for row in C])
    if len(fi) and n_starts > 0:
        n_feas = (n_starts + 1) // 2
        starts = [U[fi[spread_best(U[fi], f[fi], n_feas, sep)]]]
        bad = np.flatnonzero(~feasible)
        if len(bad) and n_starts > n_feas:
            band = bad[np.argsort(viol[bad], kind="stable")[: max(n_starts, int(np.ceil(_NEAR_SHARE * len(bad))))]]
            starts.append(U[band[spread_best(U[band], f[band], n_starts - n_feas, sep)]])
        starts = np.vstack(starts)
        if rough:
            starts = _zoom(world, constraints, starts, 0.5 * ls, rng)
            cand.offer(starts)
        for x0 in starts:
            cand.polish(x0, f_scale, c_scale)
    elif n_starts > 0:
        # 4. no feasible ranking point: phase I from the least-violating points in distinct basins,
        # and a polish from every feasible point it finds
        least = np.argsort(viol, kind="stable")[: max(n_starts, int(np.ceil(_NEAR_SHARE * len(viol))))]
        starts = U[least[spread_best(U[least], viol[least], n_starts, sep)]]
        if rough:
            starts = _zoom(world, constraints, starts, 0.5 * ls, rng)
            cand.tried.append(starts)
        for x0 in starts:
            if cand.offer(x0)[0]:          # the zoom found a feasible point
                cand.polish(x0, f_scale, c_scale)
                continue
            x = cand.least_violation(x0, c_scale)
            if cand.offer(x)[0]:
                cand.polish(x, f_scale, c_scale)

    # 5. the answer
    if cand.values:
        b = int(np.argmin(cand.values))
        u, v = cand.points[b], cand.values[b]
        if not np.isfinite(worst):
            worst = max(cand.values)       # no feasible ranking point: the worst feasible point found
        return FeasibleOptimum(u=u, value=v, worst=max(worst, v), feasible_share=share, found=True)
    seen = np.vstack([U[np.argsort(viol, kind="stable")[:_CHECKED]], *cand.tried])
    u = seen[int(np.argmin(_violation(constraints, seen)))]
    v = float(world(u[None])[0])
    return FeasibleOptimum(u=u, value=v, worst=v, feasible_share=share, found=False)


class _Negated:
    """``-world``: the largest feasible value is the smallest of this."""

    def __init__(self, world):
        self.world = world

    def __call__(self, U):
        return -self.world(U)

    def grad(self, U):
        return -self.world.grad(U)


def _worst_polished(world, constraints, x0, worst: float, f, C) -> float:
    """The largest feasible value, polished up from the worst feasible ranking point (SLSQP on ``-world``,
    kept only where feasible in float64). It is the regret charged to a campaign that ships an infeasible
    input, so it is searched upward rather than taken from the ranking points alone, which could only
    understate it (a missed worst value makes that penalty too small: search harder, never round in the
    tool's favour)."""
    cand = _Candidates(_Negated(world), constraints)
    cand.polish(np.asarray(x0, dtype=float), _spread(f), np.array([_spread(row) for row in C]))
    return max([worst] + [-v for v in cand.values])


class _Candidates:
    """Feasible points (float64) and their values, and every polished point tried."""

    def __init__(self, world, constraints):
        self.world, self.constraints = world, constraints
        self.points: list[np.ndarray] = []
        self.values: list[float] = []
        self.tried: list[np.ndarray] = []

    def offer(self, X) -> np.ndarray:
        """Keep the rows of X that are feasible in float64; return which were."""
        X = np.atleast_2d(X)
        ok = _violation(self.constraints, X) <= 0.0
        if ok.any():
            self.points += list(X[ok])
            self.values += [float(v) for v in self.world(X[ok])]
        return ok

    def polish(self, x0, f_scale, c_scale) -> None:
        """SLSQP from x0; keep the result if feasible, else pulled back to a feasible anchor."""
        from scipy.optimize import minimize

        world, cons = self.world, self.constraints
        d = len(x0)

        def objective(x):
            x = x[None]
            return float(world(x)[0]) / f_scale, world.grad(x)[0] / f_scale

        ineq = {"type": "ineq",     # SLSQP wants g(x) >= 0: -c(x) / scale, kept _MARGIN inside
                "fun": lambda x: -np.array([c(x[None])[0] for c in cons]) / c_scale - _MARGIN,
                "jac": lambda x: -np.array([c.grad(x[None])[0] for c in cons]) / c_scale[:, None]}
        res = minimize(objective, x0, jac=True, method="SLSQP", bounds=[(0.0, 1.0)] * d,
                       constraints=[ineq] if cons else [], options=_SLSQP)
        x = np.clip(np.asarray(res.x, dtype=float), 0.0, 1.0)
        if not np.all(np.isfinite(x)):
            return
        self.tried.append(x[None])
        if self.offer(x)[0]:
            return
        x = _restore(cons, x, c_scale)
        self.tried.append(x[None])
        if self.offer(x)[0]:
            return
        anchor = x0 if _violation(cons, x0[None])[0] <= 0.0 else self._nearest(x)
        if anchor is not None:
            self.offer(_pull_back(cons, x, anchor))

    def least_violation(self, x0, c_scale) -> np.ndarray:
        """The phase-I problem from x0: minimise t over (x, t) subject to c_j(x) / scale_j <= t.

        Its solution is a (local) minimiser of the largest scaled violation, feasible when
        t < 0; Boyd & Vandenberghe 2004, *Convex Optimization*, section 11.4.1 (phase I).
        """
        from scipy.optimize import minimize

        cons, d = self.constraints, len(x0)
        e = np.zeros(d + 1)
        e[-1] = 1.0
        ineq = {"type": "ineq",     # t - c_j(x) / scale_j - margin >= 0
                "fun": lambda z: z[-1] - np.array([c(z[None, :d])[0] for c in cons]) / c_scale - _MARGIN,
                "jac": lambda z: np.hstack([-np.array([c.grad(z[None, :d])[0] for c in cons]) / c_scale[:, None],
                                            np.ones((len(cons), 1))])}
        t0 = float(np.max([c(x0[None])[0] for c in cons] / c_scale))
        res = minimize(lambda z: (z[-1], e), np.append(x0, t0), jac=True, method="SLSQP",
                       bounds=[(0.0, 1.0)] * d + [(None, None)], constraints=[ineq], options=_SLSQP)
        x = np.clip(np.asarray(res.x[:d], dtype=float), 0.0, 1.0)
        x = x if np.all(np.isfinite(x)) else np.asarray(x0, dtype=float)
        self.tried.append(x[None])
        return x

    def _nearest(self, x):
        if not self.points:
            return None
        P = np.array(self.points)
        return P[int(np.argmin(np.abs(P - x).sum(axis=1)))]


def _zoom(world, constraints, X, half, rng) -> np.ndarray:
    """Derivative-free local search from every row of X (rough worlds), in the ranking arithmetic.

    ``_ZOOM_ROUNDS`` rounds of ``_ZOOM_POINTS`` uniform points in a box around each point, clipped
    to the cube (so faces and corners are reached), halving the box every round. A candidate
    replaces its point if it is better in the order: feasible before infeasible, then the lower
    value among feasible points and the smaller largest violation among infeasible ones. The
    zoom of :func:`simlab.worlds.draws.find_minimum`, with feasibility first; SLSQP alone stalls
    on rough draws (Matern 3/2 and 1/2 features have large high-frequency gradients), often
    outside the feasible set ("positive directional derivative for linesearch").
    """
    X = np.array(X, dtype=float)
    n, d = X.shape
    half = np.array(half, dtype=float)
    fx, vx = _rank(world, X), _rank_violation(constraints, X)
    rows = np.arange(n)
    for _ in range(_ZOOM_ROUNDS):
        cand = np.clip(X[:, None, :] + half * (2.0 * rng.random((n, _ZOOM_POINTS, d)) - 1.0), 0.0, 1.0)
        flat = cand.reshape(-1, d)
        fc = _rank(world, flat).reshape(n, _ZOOM_POINTS)
        vc = _rank_violation(constraints, flat).reshape(n, _ZOOM_POINTS)
        # the best candidate of each row: the lowest value among feasible ones, else the least violation
        score = np.where(vc <= 0.0, fc, np.inf)
        j = np.where(np.isfinite(score).any(axis=1), np.argmin(score, axis=1), np.argmin(vc, axis=1))
        fj, vj = fc[rows, j], vc[rows, j]
        better = np.where(vj <= 0.0, (vx > 0.0) | (fj < fx), (vx > 0.0) & (vj < vx))
        X[better], fx[better], vx[better] = cand[better, j[better]], fj[better], vj[better]
        half /= 2.0
    return X


def _rank_violation(constraints, X) -> np.ndarray:
    """Largest constraint value at each row of X in the ranking arithmetic (n,); 0 without constraints."""
    if not constraints:
        return np.zeros(len(X))
    return np.max([_rank(c, X) for c in constraints], axis=0)


def _restore(constraints, x, c_scale) -> np.ndarray:
    """A few minimum-norm linearised corrections onto the constraints that are (nearly) active at x.

    Each step solves ``c_A(x) + J_A dx = -margin`` for the least-norm ``dx`` (the Gauss-Newton
    step of the active set A, ``dx = -pinv(J_A) (c_A + margin)``; Nocedal & Wright 2006,
    section 15.6, from memory), so a point just outside a corner of two constraints moves
    onto the corner rather than along a segment that may leave a thin feasible set at once.
    """
    margin = _MARGIN * c_scale
    for _ in range(3):
        cx = np.array([c(x[None])[0] for c in constraints])
        if np.all(cx <= 0.0):
            break
        active = cx > -margin
        J = np.array([c.grad(x[None])[0] for c in constraints])[active]
        dx = -np.linalg.pinv(J) @ (cx[active] + 2.0 * margin[active])
        x = np.clip(x + dx, 0.0, 1.0)
        margin = 10.0 * margin
    return x


# t along the segment from an infeasible point to a feasible anchor: 0, 1e-14, 1e-13, ..., 1
_LADDER = np.concatenate([[0.0], np.logspace(-14.0, 0.0, 15)])


def _pull_back(constraints, x, anchor) -> np.ndarray:
    """The point nearest x on the segment to a feasible anchor that a ladder of steps finds feasible.

    A geometric ladder finds the decade of the smallest feasible step (SLSQP's point is
    usually outside by rounding only), then 16 linear steps inside that decade refine it.
    Bisection would take ~50 sequential evaluations for the same resolution; two batched
    evaluations per constraint are cheaper here. The anchor itself (t = 1) is feasible,
    so a feasible point is always returned.
    """
    step = anchor - x
    ok = _violation(constraints, x + _LADDER[:, None] * step) <= 0.0
    ok[-1] = True
    j = int(np.argmax(ok))
    fine = np.linspace(_LADDER[j - 1], _LADDER[j], 17)[1:]
    ok_fine = _violation(constraints, x + fine[:, None] * step) <= 0.0
    t = fine[int(np.argmax(ok_fine))] if ok_fine.any() else _LADDER[j]
    return x + t * step


def _violation(constraints, X) -> np.ndarray:
    """Largest constraint value at each row of X (n,), float64; 0 without constraints."""
    X = np.atleast_2d(X)
    if not constraints:
        return np.zeros(len(X))
    return np.max([np.asarray(c(X), dtype=float) for c in constraints], axis=0)


def _rank(fn, U) -> np.ndarray:
    return np.asarray(getattr(fn, "rank_values", fn)(U), dtype=float)


def _spread(values) -> float:
    s = float(np.std(values))
    return s if np.isfinite(s) and s > 0.0 else 1.0


def _roughest(dim, functions):
    """Elementwise smallest lengthscale (d,) and smallest nu over the functions that know theirs."""
    ls, nu = np.full(dim, 0.25), np.inf
    known = [r for r in (getattr(fn, "roughness", lambda: None)() for fn in functions) if r is not None]
    if known:
        ls = np.min([np.broadcast_to(np.asarray(r[0], dtype=float), (dim,)) for r in known], axis=0)
        nu = min(float(r[1]) for r in known)
    return np.minimum(ls, 1.0), nu


def _rank_size(ls, nu) -> int:
    want = _PER_CELL * (2.0 if nu <= 1.5 else 1.0) * float(np.prod(1.0 / ls))
    return 2 ** int(np.ceil(np.log2(np.clip(want, _MIN_RANK, _MAX_RANK))))
