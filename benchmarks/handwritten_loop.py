"""The campaign loop a practitioner writes by hand with scikit-learn, for `whole_process.py`.

The same study as simlab's side: 2-D Matérn 5/2 worlds (lengthscale 0.2, amplitude 1), noise sd
0.1, 5 scrambled Sobol' initial trials, then expected improvement over a 2048-point Sobol' pool
until 30 trials; the GP's hyperparameters are the prior's (no refit), as simlab's belief. Worlds
are random-feature draws (1024 features, Rahimi & Recht 2007); each world's optimum is found
the usual way: the best of 2^14 Sobol' points, polished by L-BFGS-B. Regret is reported so the
two sides can be seen to do the same work, not compared number for number (their random
streams differ).

    python benchmarks/handwritten_loop.py [--replicates 40]
"""

from __future__ import annotations

import argparse

import numpy as np
from scipy.optimize import minimize
from scipy.stats import norm, qmc
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, Matern

LENGTHSCALE, AMPLITUDE, NOISE, INITIAL, TRIALS, POOL, FEATURES = 0.2, 1.0, 0.1, 5, 30, 2048, 1024


def draw_world(rng):
    """A Matérn 5/2 random-feature function: frequencies are Student-t with 5 degrees of freedom."""
    nu = 2.5
    z = rng.standard_normal((FEATURES, 2))
    g = rng.chisquare(2 * nu, size=(FEATURES, 1)) / (2 * nu)
    omega = z / np.sqrt(g) / LENGTHSCALE
    phase = rng.uniform(0, 2 * np.pi, FEATURES)
    weight = rng.standard_normal(FEATURES) * np.sqrt(2 * AMPLITUDE**2 / FEATURES)
    return lambda X: np.cos(np.atleast_2d(X) @ omega.T + phase) @ weight


def world_optimum(f, rng):
    X = qmc.Sobol(2, seed=rng).random_base2(14)
    best = X[np.argsort(f(X))[:5]]
    runs = [minimize(lambda x: f(x)[0], x0, method="L-BFGS-B", bounds=[(0, 1)] * 2) for x0 in best]
    return min(r.fun for r in runs)


def campaign(rng):
    f = draw_world(rng)
    f_star = world_optimum(f, rng)
    X = qmc.Sobol(2, seed=rng).random_base2(3)[:INITIAL]
    y = f(X) + NOISE * rng.standard_normal(INITIAL)
    pool = qmc.Sobol(2, seed=rng).random_base2(11)
    kernel = ConstantKernel(AMPLITUDE**2, "fixed") * Matern(LENGTHSCALE, "fixed", nu=2.5)
    while len(y) < TRIALS:
        gp = GaussianProcessRegressor(kernel, alpha=NOISE**2, optimizer=None).fit(X, y)
        mu, sd = gp.predict(pool, return_std=True)
        best = y.min()
        z = (best - mu) / np.maximum(sd, 1e-12)
        ei = (best - mu) * norm.cdf(z) + sd * norm.pdf(z)
        x = pool[np.argmax(ei)]
        X = np.vstack([X, x])
        y = np.append(y, f(x) + NOISE * rng.standard_normal(1))
    gp = GaussianProcessRegressor(kernel, alpha=NOISE**2, optimizer=None).fit(X, y)
    recommended = X[np.argmin(gp.predict(X))]
    return f(recommended)[0] - f_star


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--replicates", type=int, default=40)
    args = ap.parse_args()
    regrets = [campaign(np.random.default_rng([20261202, r])) for r in range(args.replicates)]
    print(f"median final regret {np.median(regrets):.3g} over {args.replicates} campaigns")


if __name__ == "__main__":
    main()
