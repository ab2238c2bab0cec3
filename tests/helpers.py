"""Test-only references shared by the unit tests: kernel names, scikit-learn kernels, differences.

Nothing here imports simlab: these are the outside references the tests compare simlab with.
"""

import numpy as np
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern

__all__ = ["KERNEL_NAMES", "MATERN_NU", "Z_MAX", "central_difference", "sklearn_kernel", "sklearn_regressor"]

# The study-file names of the four kernels (DESIGN.md).
KERNEL_NAMES = ("sqexp", "matern12", "matern32", "matern52")
# Smoothness nu of the Matern kernels (Rasmussen & Williams 2006, section 4.2.1, from memory).
MATERN_NU = {"matern12": 0.5, "matern32": 1.5, "matern52": 2.5}
# Monte Carlo acceptance: |estimate - exact| < 4.5 sd (two-sided p = 7e-6 per comparison).
Z_MAX = 4.5


def sklearn_kernel(name, lengthscale, amplitude, *, fixed=False, bounds=None):
    """The same covariance written with scikit-learn's kernels: ``ConstantKernel(a^2) * base``.

    ``base`` is RBF for ``sqexp`` and Matern(nu) otherwise. ``fixed`` fixes every
    hyperparameter (so an optimiser leaves them alone); ``bounds`` (a dict with
    ``lengthscale`` and ``amplitude`` ranges) sets the search box of a fit.
    """
    ls = np.asarray(lengthscale, dtype=float)
    if fixed:
        ls_kw, c_kw = {"length_scale_bounds": "fixed"}, {"constant_value_bounds": "fixed"}
    elif bounds is not None:
        ls_kw = {"length_scale_bounds": bounds["lengthscale"]}
        c_kw = {"constant_value_bounds": tuple(np.square(bounds["amplitude"]))}
    else:
        ls_kw, c_kw = {}, {}
    base = RBF(length_scale=ls, **ls_kw) if name == "sqexp" else Matern(length_scale=ls, nu=MATERN_NU[name], **ls_kw)
    return ConstantKernel(amplitude**2, **c_kw) * base


def sklearn_regressor(name, X, y, *, lengthscale, amplitude, mean, diagonal):
    """scikit-learn's regressor fitted with fixed hyperparameters (``optimizer=None``): the
    constant prior mean subtracted from y, ``diagonal`` (noise variance plus any nugget) as
    ``alpha``. Predict with ``regressor.predict(Q, return_std=True)`` and add ``mean`` back."""
    gpr = GaussianProcessRegressor(kernel=sklearn_kernel(name, lengthscale, amplitude), alpha=diagonal,
                                   optimizer=None, normalize_y=False)
    return gpr.fit(np.asarray(X, dtype=float), np.asarray(y, dtype=float) - mean)


def central_difference(f, U, h):
    """d f(U)[i, ...] / d U[i, :] by central differences, for f acting row by row on U (n, d).

    Returns shape ``f(U).shape + (d,)``. Truncation error h^2 f''' / 6 per entry (Nocedal &
    Wright 2006, section 8.1); callers state the step and tolerance they use.
    """
    U = np.asarray(U, dtype=float)
    d = U.shape[1]
    columns = []
    for c in range(d):
        step = np.zeros(d)
        step[c] = h
        columns.append((f(U + step) - f(U - step)) / (2 * h))
    return np.stack(columns, -1)


def evolved_minimum(world, d, *, seed, polished=5):
    """A world's minimum by an independent search: scipy.optimize.differential_evolution
    (population 20 per input, Sobol' start, 300 generations, on the world's float32 ranking
    values), then L-BFGS-B with the world's analytic float64 gradient from the `polished` best
    members of the final population. One BLAS thread, so the result does not depend on the load."""
    from scipy.optimize import differential_evolution, minimize
    from threadpoolctl import threadpool_limits
    with threadpool_limits(1):
        res = differential_evolution(lambda X: world.rank_values(X.T), [(0.0, 1.0)] * d, popsize=20, maxiter=300,
                                     tol=0.0, mutation=(0.5, 1.0), recombination=0.7, vectorized=True,
                                     updating="deferred", polish=False, seed=seed, init="sobol")
        best = np.inf
        for x0 in res.population[np.argsort(res.population_energies)[:polished]]:
            r = minimize(lambda x: (world(x[None])[0], world.grad(x[None])[0]), x0, jac=True, method="L-BFGS-B",
                         bounds=[(0.0, 1.0)] * d)
            best = min(best, float(r.fun))
    return best


def thorough_minimum(world, d, *, seed):
    """A heavier independent search for rough worlds (as benchmarks/world_optima.py's reference, sharing no code
    with simlab.worlds.draws.find_minimum): 2^18 Sobol' points ranked on the float32 values and
    scipy.optimize.differential_evolution (population 15 per input, 300 generations); L-BFGS-B (the world's
    analytic float64 gradient) from the 80 best points at least a quarter lengthscale apart and the 16 best of
    the final population; then 2048 Gaussian perturbations at 1e-1 ... 1e-5 lengthscales around the best
    four, the best two of each polished again. One BLAS thread."""
    from scipy.optimize import differential_evolution, minimize
    from scipy.stats import qmc
    from threadpoolctl import threadpool_limits

    rng = np.random.default_rng(seed)
    ls = float(np.exp(np.mean(np.log(world.sample.kernel.lengthscale))))

    def separated(X, v, k, gap):
        out = []
        for i in np.argsort(v):
            if all(np.max(np.abs(X[i] - x)) > gap for x in out):
                out.append(X[i])
                if len(out) == k:
                    break
        return np.array(out)

    def polish(starts):
        best_u, best_v = None, np.inf
        for x0 in starts:
            r = minimize(lambda x: (world(x[None])[0], world.grad(x[None])[0]), x0, jac=True, method="L-BFGS-B",
                         bounds=[(0.0, 1.0)] * d, options={"maxiter": 300})
            if r.fun < best_v:
                best_u, best_v = np.clip(r.x, 0.0, 1.0), float(r.fun)
        return best_u, best_v

    with threadpool_limits(1):
        dense = qmc.Sobol(d, seed=rng).random_base2(18)
        v = world.rank_values(dense)
        de = differential_evolution(lambda X: world.rank_values(X.T), [(0.0, 1.0)] * d, popsize=15, maxiter=300,
                                    tol=1e-9, mutation=(0.5, 1.0), recombination=0.9, polish=False, vectorized=True,
                                    updating="deferred", seed=rng, init="sobol")
        S = np.vstack([separated(dense, v, 80, 0.25 * ls), separated(de.population, de.population_energies, 16, 1e-4)])
        u, val = polish(S)
        for centre in [u, *S[np.argsort(world(S))[:3]]]:
            for scale in (1e-1, 1e-2, 1e-3, 1e-4, 1e-5):
                cand = np.clip(centre + scale * ls * rng.standard_normal((2048, d)), 0.0, 1.0)
                u2, v2 = polish(separated(cand, world(cand), 2, 1e-12))
                if v2 < val:
                    u, val = u2, v2
    return val
