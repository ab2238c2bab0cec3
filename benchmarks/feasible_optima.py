"""Feasible optima: miss and time per world of feasible_minimum, its default against a quarter of the ranking points.

Run by hand (not part of the test suite):

    python benchmarks/feasible_optima.py                       # 20 worlds per cell
    python benchmarks/feasible_optima.py --worlds 8 --dims 2 --repeats 3

Worlds: random-feature draws (Matern 5/2 and 3/2, 1024 frequencies, amplitude 1, mean 0,
lengthscale 0.2 of the range) with one or two limits, each an independent draw of the same
prior bounded at a quantile of its values on 4096 uniform points (``--quantiles``: 0.3 and 0.7
for two limits give feasible shares of about 9 % and 50 %). For each world:

reference  the better of scipy.optimize.differential_evolution with a NonlinearConstraint
           (population 20 per input, 300 generations, polished by trust-constr) and SLSQP from
           200 uniform starts; shares no code with simlab.worlds.feasible. Cached (JSON lines).
default    ``feasible_minimum`` as shipped.
quarter    the same with a quarter of the default ranking points (``n_rank``).

miss = a search's value - the best value known for the world (the reference and both searches),
in amplitudes; a search that finds no feasible point where the best known is feasible misses by
inf. Time = median over ``--repeats`` runs (one BLAS thread), default and quarter interleaved.
Prints per cell: worlds, worlds missed by more than 1e-3, the largest miss and the median time
of each, and the time ratio default / quarter.
"""

from __future__ import annotations

import argparse
import json
import time
import warnings
from pathlib import Path

import numpy as np
from scipy.optimize import NonlinearConstraint, differential_evolution, minimize
from threadpoolctl import threadpool_limits

from simlab.model.kernels import make_kernel
from simlab.worlds.draws import FeatureWorld
from simlab.worlds.feasible import Slack, _rank_size, _roughest, feasible_minimum

MISS = 1e-3


def stream(d, m, q, i, *key):
    return np.random.default_rng(np.random.SeedSequence(5151, spawn_key=(d, m, int(1000 * q), i) + key))


def problem(d, kernel, m, q, i):
    def rng(*key):
        return stream(d, m, q, i, *key)
    k = make_kernel(kernel, [0.2] * d, 1.0)
    world = FeatureWorld(k, 0.0, rng(0))
    probe = rng(99).random((4096, d))
    limits = []
    for j in range(m):
        g = FeatureWorld(k, 0.0, rng(1 + j))
        limits.append(Slack(g, float(np.quantile(g(probe), q)), 1))
    return world, limits, rng(50)


def reference(world, limits, d, seed) -> float:
    def stacked(x):
        X = x.T if x.ndim == 2 else x[None]
        out = np.array([c(X) for c in limits])
        return out if x.ndim == 2 else out[:, 0]
    best = np.inf
    nlc = NonlinearConstraint(stacked, -np.inf, 0.0, jac=lambda x: np.array([c.grad(x[None])[0] for c in limits]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = differential_evolution(lambda X: world(X.T), [(0.0, 1.0)] * d, constraints=[nlc], vectorized=True,
                                   updating="deferred", popsize=20, maxiter=300, tol=0.0, mutation=(0.5, 1.0),
                                   recombination=0.7, init="sobol", polish=True, seed=seed)
    if np.max(stacked(r.x)) <= 1e-9:
        best = float(r.fun)
    cons = [{"type": "ineq", "fun": (lambda x, c=c: -c(x[None])[0]), "jac": (lambda x, c=c: -c.grad(x[None])[0])}
            for c in limits]
    for x0 in np.random.default_rng(seed).random((200, d)):
        r = minimize(lambda x: (world(x[None])[0], world.grad(x[None])[0]), x0, jac=True, method="SLSQP",
                     bounds=[(0.0, 1.0)] * d, constraints=cons, options={"maxiter": 200, "ftol": 1e-12})
        x = np.clip(r.x, 0.0, 1.0)
        if np.max(stacked(x)) <= 1e-9:
            best = min(best, float(world(x[None])[0]))
    return best


def timed(fn, repeats):
    out, times = None, []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return out, float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--worlds", type=int, default=20)
    ap.add_argument("--dims", type=int, nargs="+", default=[2, 4])
    ap.add_argument("--kernels", nargs="+", default=["matern52", "matern32"])
    ap.add_argument("--limits", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--quantiles", type=float, nargs="+", default=[0.3, 0.7])
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--cache", type=Path, default=Path("/tmp/fo/ref.jsonl"))
    args = ap.parse_args()
    cache = {}
    if args.cache.exists():
        for line in args.cache.read_text().splitlines():
            row = json.loads(line)
            cache[tuple(row["key"])] = row["ref"]
    args.cache.parent.mkdir(parents=True, exist_ok=True)
    print(f"{'d':>2} {'kernel':>9} {'m':>2} {'q':>4} {'n':>3}  {'default: missed, max, ms':>28}  "
          f"{'quarter: missed, max, ms':>28}  {'time ratio':>10}")
    with threadpool_limits(1):
        feasible_minimum(*problem(2, "matern52", 1, 0.5, 0)[:2], 2, np.random.default_rng(0))   # imports
        for d in args.dims:
            for kernel in args.kernels:
                for m in args.limits:
                    for q in args.quantiles:
                        rows = []
                        for i in range(args.worlds):
                            world, limits, _ = problem(d, kernel, m, q, i)
                            key = (d, kernel, m, q, i)
                            if key not in cache:
                                cache[key] = reference(world, limits, d, 700 + i)
                                with args.cache.open("a") as fh:
                                    fh.write(json.dumps({"key": list(key), "ref": cache[key]}) + "\n")
                            n_rank = _rank_size(*_roughest(d, [world, *limits])) // 4
                            # the same search stream for every run (the world is built once, outside the clock)
                            a, ta = timed(lambda: feasible_minimum(world, limits, d, stream(d, m, q, i, 50)),
                                          args.repeats)
                            b, tb = timed(lambda: feasible_minimum(world, limits, d, stream(d, m, q, i, 50),
                                                                   n_rank=n_rank), args.repeats)
                            va, vb = (r.value if r.found else np.inf for r in (a, b))
                            best = min(cache[key], va, vb)
                            rows.append((va - best if np.isfinite(best) else 0.0,
                                         vb - best if np.isfinite(best) else 0.0, ta, tb))
                        ma, mb, ta, tb = (np.array(col) for col in zip(*rows))
                        print(f"{d:>2} {kernel:>9} {m:>2} {q:>4} {len(rows):>3}  "
                              f"{int((ma > MISS).sum()):>6} {ma.max():>10.2e} {1000 * np.median(ta):>8.0f}ms  "
                              f"{int((mb > MISS).sum()):>6} {mb.max():>10.2e} {1000 * np.median(tb):>8.0f}ms  "
                              f"{np.median(ta) / np.median(tb):>10.2f}", flush=True)


if __name__ == "__main__":
    main()
