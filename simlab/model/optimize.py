"""Box-constrained polishing of many starting points at once (L-BFGS-B, or a lockstep quasi-Newton)."""

from __future__ import annotations

import numpy as np

from ..lazy import optimize

__all__ = ["polish", "polish_block", "distinct_best", "separated_best"]


def distinct_best(U, values, k: int, *, min_dist: float = 1e-6) -> np.ndarray:
    """Indices of the k lowest ``values`` whose inputs differ (so starts are not duplicated)."""
    order = np.argsort(values, kind="stable")
    chosen: list[int] = []
    for i in order:
        if all(np.max(np.abs(U[i] - U[j])) > min_dist for j in chosen):
            chosen.append(int(i))
            if len(chosen) == k:
                break
    return np.asarray(chosen, dtype=int)


def separated_best(U, values, k: int, scale) -> np.ndarray:
    """Indices of k low ``values`` whose inputs lie, as far as possible, in different basins.

    Among the ``64 k`` lowest values, a point is taken when, in some coordinate j, it differs
    from every better point taken by more than ``scale[j]`` (a scaled max-norm), so starts
    spread over distinct basins of a function whose features are about ``2 scale`` wide
    instead of crowding into the best one. When fewer than k such points exist there, the
    best of the others fill up (as :func:`distinct_best` would choose them).
    """
    values = np.asarray(values)
    scale = np.broadcast_to(np.asarray(scale, dtype=float), (U.shape[1],))
    m = min(len(values), 64 * k)
    head = np.argpartition(values, m - 1)[:m] if m < len(values) else np.arange(len(values))
    head = head[np.argsort(values[head], kind="stable")]
    chosen: list[int] = []
    # Blocks of candidates are first screened against every point already taken in one
    # array operation; only the survivors are checked one by one (against the points taken
    # within the block). The result is the one-at-a-time greedy choice.
    for a in range(0, len(head), 256):
        block = head[a:a + 256]
        if chosen:
            far = np.max(np.abs(U[block][:, None, :] - U[chosen][None, :, :]) / scale, axis=2) > 1.0
            block = block[far.all(axis=1)]
        first = len(chosen)
        for i in block:
            if len(chosen) == first or np.all(np.max(np.abs(U[chosen[first:]] - U[i]) / scale, axis=1) > 1.0):
                chosen.append(int(i))
                if len(chosen) == k:
                    return np.asarray(chosen, dtype=int)
    for i in head:
        if len(chosen) == k:
            break
        if np.all(np.max(np.abs(U[chosen] - U[i]), axis=1) > 1e-6):
            chosen.append(int(i))
    return np.asarray(chosen, dtype=int)


def polish(fg, starts, *, maxiter: int = 50) -> tuple[np.ndarray, np.ndarray]:
    """Minimise a function of one input from several starts inside the unit cube.

    Parameters
    ----------
    fg : callable
        ``fg(U) -> (values, grads)`` for U of shape (q, d), returning shapes (q,) and (q, d).
    starts : ndarray of shape (q, d)
        Starting points in [0, 1]^d.
    maxiter : int
        L-BFGS-B iteration limit.

    Returns
    -------
    U : ndarray of shape (q, d)
        The polished points (never worse than the starts).
    values : ndarray of shape (q,)

    Notes
    -----
    The q problems are independent, so their sum is minimised as one problem in q*d
    variables: its gradient is the stacked per-start gradients, and one L-BFGS-B call
    replaces q calls, paying SciPy's per-call overhead once. The result for each start is
    then compared with its starting value, so polishing can only improve a start.
    """
    starts = np.clip(np.atleast_2d(np.asarray(starts, dtype=float)), 0.0, 1.0)
    q, d = starts.shape
    v0, _ = fg(starts)
    v0 = np.asarray(v0, dtype=float)

    def total(flat):
        v, g = fg(flat.reshape(q, d))
        v = np.asarray(v, dtype=float)
        g = np.asarray(g, dtype=float)
        if not np.all(np.isfinite(v)) or not np.all(np.isfinite(g)):
            # Leave the line search a clear signal rather than NaN.
            return np.inf, np.zeros(q * d)
        return float(v.sum()), g.reshape(-1)

    res = optimize.minimize(total, starts.reshape(-1), jac=True, method="L-BFGS-B",
                            bounds=[(0.0, 1.0)] * (q * d), options={"maxiter": maxiter})
    U = np.clip(res.x.reshape(q, d), 0.0, 1.0)
    v, _ = fg(U)
    v = np.asarray(v, dtype=float)
    worse = ~(v <= v0)
    U[worse], v[worse] = starts[worse], v0[worse]
    return U, v


# Sufficient-decrease constant c1 (Nocedal & Wright 2006, section 3.1 suggests 1e-4).
_C1 = 1e-4
# First trial step of an identity H moves a quarter of the cube's side in the largest coordinate
# (common practice: -g carries no length scale; a short first step keeps a polish local).
_FIRST_STEP = 0.25
# A step shorter than this in every coordinate cannot move a point of [0, 1] meaningfully.
_XTOL = 1e-13
# Converged: an accepted step gained less than this relative to the value, or the projected
# gradient is below _PGTOL. SciPy's L-BFGS-B defaults (factr = 1e7 times machine epsilon,
# pgtol = 1e-5), so a polish stops where L-BFGS-B would.
_FTOL = 1e7 * np.finfo(float).eps
_PGTOL = 1e-5
# An accepted step that taught H no curvature (y's not clearly positive: flat or concave
# along s) was too short to tell; H grows by this factor (common practice: line searches
# extrapolate by factors of 2 to 4).
_GROW = 4.0


def _dot(a, b):
    """Per-problem inner product: elementwise, then summed over the last axis only."""
    return (a * b).sum(-1)


def _hv(H, v):
    """Per-problem product H v for H (..., d, d) and v (..., d), summed over the last axis only."""
    return (H * v[..., None, :]).sum(-1)


def polish_block(fg, starts, *, iterations: int = 30) -> tuple[np.ndarray, np.ndarray]:
    """Minimise many independent smooth functions of one input each inside the unit cube, in lockstep.

    Parameters
    ----------
    fg : callable
        ``fg(U) -> (values, grads)`` for U of shape (B, q, d), returning shapes (B, q) and
        (B, q, d). Problem (b, j) may depend on ``U[b, j]`` only.
    starts : ndarray of shape (B, q, d)
        Starting points; clipped to [0, 1]^d.
    iterations : int
        Number of trial evaluations. ``fg`` is called at most ``iterations + 1`` times in
        all (once at the starts, then once per iteration for the whole block), fewer when
        every problem has stopped.

    Returns
    -------
    U : ndarray of shape (B, q, d)
        Polished points in [0, 1]^d, never worse than the starts (a start whose value or
        gradient is not finite is returned unchanged).
    values : ndarray of shape (B, q)

    Notes
    -----
    Each problem runs a projected BFGS method. Its direction is p = -H g restricted to
    the free variables (those not at a bound with the gradient pointing out of the box),
    falling back to projected steepest descent when that is not a descent direction. The
    trial point is clip(x + a p, 0, 1), accepted when it passes the Armijo test
    f(trial) <= f + c1 g's on the projected step s. A problem whose trial fails, or is not
    finite, shrinks a by safeguarded quadratic interpolation and tries again at the next
    evaluation; one that succeeds moves, updates H and starts its next step at a = 1.
    Backtracking can shorten a step but never lengthen it, so before each update H is
    scaled up by y's / y'Hy when that exceeds 1 (the self-scaling of Oren & Luenberger,
    used only to enlarge H), and an accepted step without positive curvature multiplies
    H by 4. y is zeroed for variables that stayed at a bound, so H learns the curvature of
    the free variables. A problem stops when its projected gradient is zero or when even
    steepest descent finds no acceptable step; it then never changes.

    SciPy's L-BFGS-B solves one problem per call, at milliseconds of Python per call, and
    one call on the sum of the problems would couple their line searches and stopping.
    Here every operation is elementwise or reduces over the last axis only, so problem
    (b, j) gets a bit-for-bit identical result whatever else is in the block.

    References
    ----------
    Nocedal, J. & Wright, S. J. (2006). Numerical Optimization, 2nd ed., Springer:
    BFGS update and initial scaling (eqs. 6.17, 6.20), backtracking with interpolation
    (sections 3.1, 3.5), projected steps for bound constraints (section 16.7).
    Bertsekas, D. P. (1982). Projected Newton methods for optimization problems with simple
    constraints. SIAM Journal on Control and Optimization 20(2), 221-246.
    Oren, S. S. & Luenberger, D. G. (1974). Self-scaling variable metric (SSVM) algorithms,
    part I. Management Science 20(5), 845-862.
    """
    x = np.clip(np.array(starts, dtype=float), 0.0, 1.0)
    if x.ndim != 3:
        raise ValueError(f"starts must have shape (B, q, d); got shape {x.shape}")
    eye = np.eye(x.shape[-1])

    def evaluate(U):
        v, g = fg(U)
        v, g = np.asarray(v, dtype=float), np.asarray(g, dtype=float)
        if v.shape != U.shape[:-1] or g.shape != U.shape:
            raise ValueError(f"fg must return shapes {U.shape[:-1]} and {U.shape}; "
                             f"got {v.shape} and {g.shape}")
        ok = np.isfinite(v) & np.isfinite(g).all(-1)
        return v, np.where(ok[..., None], g, 0.0), ok

    f, g, ok = evaluate(x)
    x0, f0 = x.copy(), f.copy()
    done = ~ok                                     # nothing to polish from a non-finite start
    H = np.broadcast_to(eye, x.shape + x.shape[-1:]).copy()
    fresh = np.ones(f.shape, bool)                 # H is a multiple of I: no curvature learnt yet
    renew = np.ones(f.shape, bool)                 # the problem needs a new direction
    p, a = np.zeros_like(x), np.ones_like(f)
    for _ in range(iterations):
        # New directions: -H g on the free variables, never pointing out of the box.
        at_lo, at_hi = x <= 0.0, x >= 1.0
        held = (at_lo & (g > 0.0)) | (at_hi & (g < 0.0))
        gf = np.where(held, 0.0, g)
        d_qn = -_hv(H, gf)
        d_qn = np.where(held | (at_lo & (d_qn < 0.0)) | (at_hi & (d_qn > 0.0)), 0.0, d_qn)
        steep = renew & ~(_dot(g, d_qn) < 0.0)     # not a descent direction: steepest descent
        H = np.where(steep[..., None, None], eye, H)
        fresh |= steep
        gmax = np.abs(gf).max(-1)
        done |= renew & (gmax <= _PGTOL)
        p = np.where(renew[..., None], np.where(steep[..., None], -gf, d_qn), p)
        first = np.minimum(1.0, _FIRST_STEP / np.where(gmax > 0.0, gmax, 1.0))
        a = np.where(renew, np.where(fresh, first, 1.0), a)
        if done.all():
            break

        # One evaluation for the whole block; stopped problems are evaluated where they are.
        trial = np.where(done[..., None], x, np.clip(x + a[..., None] * p, 0.0, 1.0))
        s = trial - x
        gs = _dot(g, s)
        ft, gt, ok = evaluate(trial)
        accept = ~done & ok & (ft < f) & (ft <= f + _C1 * gs)

        # Accepted steps update H where the curvature y's is clearly positive: scale H
        # (eq. 6.20 for the identity, else Oren-Luenberger if that enlarges H), then eq. 6.17.
        y = np.where((s == 0.0) & (at_lo | at_hi), 0.0, gt - g)
        ys, yy = _dot(y, s), _dot(y, y)
        upd = accept & (ys > 1e-10 * np.sqrt(_dot(s, s) * yy))
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            H0 = np.where(fresh[..., None, None], eye, H)
            Hy = _hv(H0, y)
            scale = np.where(fresh, ys / yy, np.maximum(1.0, ys / _dot(y, Hy)))
            H0, Hy = scale[..., None, None] * H0, scale[..., None] * Hy
            rho = (1.0 / ys)[..., None, None]
            sHy = s[..., :, None] * Hy[..., None, :]
            ss = s[..., :, None] * s[..., None, :]
            yHy = _dot(y, Hy)[..., None, None]
            new = H0 - rho * (sHy + np.swapaxes(sHy, -1, -2)) + (rho * rho * yHy + rho) * ss
        H = np.where(upd[..., None, None], new, H)
        H = np.where((accept & ~upd)[..., None, None], _GROW * H, H)
        fresh &= ~upd
        x = np.where(accept[..., None], trial, x)
        done |= accept & (f - ft <= _FTOL * np.maximum(np.maximum(np.abs(f), np.abs(ft)), 1.0))
        f = np.where(accept, ft, f)
        g = np.where(accept[..., None], gt, g)

        # Rejected steps shrink to the minimiser of the quadratic through f, g's and f(trial).
        # A non-finite trial shrinks by 4 (common practice: back well away from the failure).
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            t = np.where(gs < 0.0, -gs / (2.0 * (ft - f - gs)), 0.5)
        t = np.where(ok & np.isfinite(t), np.clip(t, 0.1, 0.5), 0.25)
        reject = ~done & ~accept
        a = np.where(reject, a * t, a)
        tiny = reject & (a * np.abs(p).max(-1) < _XTOL)
        done |= tiny & fresh                       # even steepest descent cannot move
        H = np.where((tiny & ~fresh)[..., None, None], eye, H)   # a stale H restarts
        fresh |= tiny
        renew = accept | tiny
    better = f <= f0
    return np.where(better[..., None], x, x0), np.where(better, f, f0)
