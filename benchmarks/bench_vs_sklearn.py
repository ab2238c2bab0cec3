"""Trials per second: simlab's campaign loop against the straightforward scikit-learn loop.

Same work on both sides: 2-D Matern 5/2 worlds (random-feature draws), noise sd 0.1,
5 Sobol' initial trials then EI until 30 trials, scored over the same 2048-point pool.
The scikit-learn loop refits GaussianProcessRegressor (fixed hyperparameters, as simlab's
belief) on all data every trial and predicts mean and sd over the pool. simlab is timed
twice: choosing the best pool point only (the same work) and with its default L-BFGS-B
polish (more work, for a regret without grid floor).

Run by hand:  python benchmarks/bench_vs_sklearn.py [--replicates 7]
Prints medians over replicates and the ratios, measured side by side in one run.
"""

from __future__ import annotations

import argparse
import platform
import time

import numpy as np
from scipy.stats import norm, qmc
from threadpoolctl import threadpool_limits

from simlab.campaign import Belief, run_campaign
from simlab.kernels import Matern52
from simlab.policies import ExpectedImprovement
from simlab.worlds import FeatureWorld

D, POOL, BUDGET, INITIAL, NOISE, LS, AMP = 2, 2048, 30, 5, 0.1, 0.2, 1.0


class PoolOnlyEI(ExpectedImprovement):
    n_starts = 0


def sklearn_loop(world, design, noise, pool):
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    kernel = ConstantKernel(AMP**2, "fixed") * Matern(LS, "fixed", nu=2.5)
    X = list(design)
    y = [float(world(x[None])[0]) + noise[i] for i, x in enumerate(design)]
    for t in range(INITIAL, BUDGET):
        gp = GaussianProcessRegressor(kernel, alpha=NOISE**2, optimizer=None).fit(np.array(X), np.array(y))
        mu, sd = gp.predict(pool, return_std=True)
        best = gp.predict(np.array(X)).min()
        z = (best - mu) / np.maximum(sd, 1e-12)
        ei = (best - mu) * norm.cdf(z) + sd * norm.pdf(z)
        x = pool[int(np.argmax(ei))]
        X.append(x)
        y.append(float(world(x[None])[0]) + noise[t])
    return np.array(X)


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--replicates", type=int, default=7)
    args = ap.parse_args()
    kernel = Matern52([LS] * D, AMP)
    belief = Belief(kernel, 0.0, NOISE)
    rows = {"scikit-learn loop": [], "simlab, pool only": [], "simlab, pool + polish": []}
    with threadpool_limits(1):
        for r in range(args.replicates):
            rng = np.random.default_rng(r)
            world = FeatureWorld(kernel, 0.0, rng)
            seq = qmc.Sobol(D, seed=rng).random_base2(5)[:BUDGET]
            noise = NOISE * rng.standard_normal(BUDGET)
            pool = qmc.Sobol(D, seed=rng).random_base2(11)
            def observe(f, t):
                return f + noise[t]

            common = dict(design=seq[:INITIAL], sequence=seq, observe=observe, budget=BUDGET, pool=pool, rng=rng)
            for name, run in (
                ("scikit-learn loop", lambda: sklearn_loop(world, seq[:INITIAL], noise, pool)),
                ("simlab, pool only", lambda: run_campaign(PoolOnlyEI("ei"), belief, world, **common)),
                ("simlab, pool + polish", lambda: run_campaign(ExpectedImprovement("ei"), belief, world, **common)),
            ):
                t0 = time.perf_counter()
                run()
                rows[name].append((BUDGET - INITIAL) / (time.perf_counter() - t0))
    base = np.median(rows["scikit-learn loop"])
    print(f"machine: {platform.processor() or platform.machine()}, {platform.python_version()}, one worker, "
          f"BLAS threads 1; {args.replicates} campaigns each, {BUDGET - INITIAL} acquisition trials per campaign")
    print(f"{'loop':<24} {'trials/s (median)':>18} {'ratio':>8}")
    for name, values in rows.items():
        med = np.median(values)
        print(f"{name:<24} {med:>18.1f} {med / base:>7.1f}x")


if __name__ == "__main__":
    main()
