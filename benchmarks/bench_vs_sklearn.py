"""Trials per second: simlab's campaign loops against the straightforward scikit-learn loop.

Same work on every side: 2-D Matern 5/2 worlds (random-feature draws), noise sd 0.1,
5 Sobol' initial trials then EI until 30 trials, scored over the same 2048-point pool.
The scikit-learn loop refits GaussianProcessRegressor (fixed hyperparameters, as simlab's
belief) on all data every trial and predicts mean and sd over the pool. simlab is timed
one campaign at a time (``run_campaign``) and in lockstep (``run_block``: every campaign
of the block advancing together), each choosing the best pool point only (the same work)
and with its default polish (more work, for a regret without grid floor).

Run by hand:  python benchmarks/bench_vs_sklearn.py [--replicates 64] [--repeats 3]
Prints medians and the ratios, measured side by side in one run.
"""

from __future__ import annotations

import argparse
import platform
import time

import numpy as np
from scipy.stats import norm, qmc
from threadpoolctl import threadpool_limits

from simlab.model.belief import Belief
from simlab.replay.campaign import run_campaign
from simlab.model.kernels import Matern52
from simlab.replay.lockstep import run_block
from simlab.worlds.noise import Observer
from simlab.policies import ExpectedImprovement
from simlab.replay.runner import Replicate
from simlab.worlds.draws import FeatureWorld

D, POOL, BUDGET, INITIAL, NOISE, LS, AMP = 2, 2048, 30, 5, 0.1, 0.2, 1.0


class PoolOnlyEI(ExpectedImprovement):
    n_starts = 0


def sklearn_loop(rep):
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    kernel = ConstantKernel(AMP**2, "fixed") * Matern(LS, "fixed", nu=2.5)
    X = list(rep.design)
    y = [float(rep.world(x[None])[0]) + NOISE * rep.shocks[i] for i, x in enumerate(rep.design)]
    for t in range(INITIAL, BUDGET):
        gp = GaussianProcessRegressor(kernel, alpha=NOISE**2, optimizer=None).fit(np.array(X), np.array(y))
        mu, sd = gp.predict(rep.pool, return_std=True)
        best = gp.predict(np.array(X)).min()
        z = (best - mu) / np.maximum(sd, 1e-12)
        ei = (best - mu) * norm.cdf(z) + sd * norm.pdf(z)
        x = rep.pool[int(np.argmax(ei))]
        X.append(x)
        y.append(float(rep.world(x[None])[0]) + NOISE * rep.shocks[t])
    return np.array(X)


def replicate(r: int, kernel) -> Replicate:
    rng = np.random.default_rng(r)
    world = FeatureWorld(kernel, 0.0, rng)
    seq = qmc.Sobol(D, seed=rng).random_base2(5)[:BUDGET]
    shocks = rng.standard_normal(BUDGET)
    pool = qmc.Sobol(D, seed=rng).random_base2(11)
    return Replicate(index=r, world=world, optimum=(np.zeros(D), 0.0), design=seq[:INITIAL], sequence=seq,
                     shocks=shocks, lost=np.zeros(BUDGET, dtype=bool), pool=pool)


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--replicates", type=int, default=64, help="campaigns in the lockstep block")
    ap.add_argument("--alone", type=int, default=8, help="campaigns timed one at a time (and by scikit-learn)")
    ap.add_argument("--repeats", type=int, default=3, help="repeats of each lockstep block")
    args = ap.parse_args()
    kernel = Matern52([LS] * D, AMP)
    belief = Belief(kernel, 0.0, NOISE)
    observer = Observer(sd=NOISE)
    reps = [replicate(r, kernel) for r in range(args.replicates)]
    trials = BUDGET - INITIAL
    rows: dict[str, list[float]] = {}

    def timed(name, run, campaigns):
        t0 = time.perf_counter()
        run()
        rows.setdefault(name, []).append(campaigns * trials / (time.perf_counter() - t0))

    def alone(rule, rep):
        def observe(f, t):
            return observer(f, rep.shocks[t], False)
        return lambda: run_campaign(rule("ei"), belief, rep.world, design=rep.design, sequence=rep.sequence,
                                    observe=observe, budget=BUDGET, pool=rep.pool,
                                    rng=np.random.default_rng(0))

    def block(rule):
        return lambda: run_block(rule("ei"), belief, reps, observer=observer, budget=BUDGET,
                                 rngs=[np.random.default_rng(0)] * len(reps))

    with threadpool_limits(1):
        for rep in reps[: args.alone]:
            timed("scikit-learn loop", lambda: sklearn_loop(rep), 1)
            timed("simlab alone, pool only", alone(PoolOnlyEI, rep), 1)
            timed("simlab alone, pool + polish", alone(ExpectedImprovement, rep), 1)
        for _ in range(args.repeats):
            timed("simlab lockstep, pool only", block(PoolOnlyEI), len(reps))
            timed("simlab lockstep, pool + polish", block(ExpectedImprovement), len(reps))
    base = np.median(rows["scikit-learn loop"])
    print(f"machine: {platform.processor() or platform.machine()}, Python {platform.python_version()}, "
          f"one worker, BLAS threads 1; {trials} acquisition trials per campaign; lockstep block of "
          f"{len(reps)} campaigns x {args.repeats}, one at a time {args.alone} campaigns")
    print(f"{'loop':<32} {'trials/s (median)':>18} {'ratio':>8}")
    for name, values in rows.items():
        med = np.median(values)
        print(f"{name:<32} {med:>18.1f} {med / base:>7.1f}x")


if __name__ == "__main__":
    main()
