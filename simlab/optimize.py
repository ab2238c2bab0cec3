"""Box-constrained polishing of many starting points at once (L-BFGS-B with analytic gradients)."""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize

__all__ = ["polish", "distinct_best"]


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

    res = minimize(total, starts.reshape(-1), jac=True, method="L-BFGS-B",
                   bounds=[(0.0, 1.0)] * (q * d), options={"maxiter": maxiter})
    U = np.clip(res.x.reshape(q, d), 0.0, 1.0)
    v, _ = fg(U)
    v = np.asarray(v, dtype=float)
    worse = ~(v <= v0)
    U[worse], v[worse] = starts[worse], v0[worse]
    return U, v
