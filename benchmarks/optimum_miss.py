"""How far simlab's world-optimum search misses, against an independent thorough search.

Run by hand (not part of the test suite):

    python benchmarks/optimum_miss.py                      # 30 worlds per (inputs, kernel)
    python benchmarks/optimum_miss.py --worlds 8 --dims 2 6
    python benchmarks/optimum_miss.py --cache /tmp/optimum-ref.jsonl   # reuse the references

Worlds are random-feature draws (1024 frequencies, amplitude 1, mean 0) on the unit cube with
deliberately short lengthscales, drawn per input log-uniformly in the ranges of ``HARD``
(the study configs use 0.13-0.6 of the range). For every world:

reference  an independent thorough search, sharing no code with ``simlab.worlds.draws.find_minimum``:
           a dense set (1-D: a regular grid of 2^18; 2-D: 2^20 Sobol' points; 4-D and 6-D:
           2^19 uniform points), ranked in float32; scipy.optimize.differential_evolution
           (population 40 per input, up to 1000 generations, float32 values); L-BFGS-B
           (scipy.optimize.minimize, analytic gradients, float64) from the 128 (4-D and 6-D:
           256) best separated points of the dense set, 128 raw Sobol' points of another scramble and the 16 best
           of DE's final population; then random perturbations at scales from 1e-1 to 1e-5
           around the 8 best, polished again (the fine wiggles of rough worlds).
           The reference value is the best of all of it *and* of the searches being measured.
previous   the search simlab used before issue 11 (kept verbatim below).
main       the first scaled search of issue 11 (float32 ranking of the full world at every
           step; kept verbatim below), for a side-by-side view of the last change.
current    ``World.optimum`` as simlab has it now.
pair       the better of two independent current searches, as ``runner.world_optimum`` uses.

miss = searched value - best known value (>= 0, in units of the amplitude), and the cost per
world (seconds, one thread). Prints the worst miss and the median cost per (inputs, kernel)
cell, previous and current side by side, and the worst miss per number of inputs.
"""

from __future__ import annotations

import argparse
import json
import platform
import time
from pathlib import Path

import numpy as np
from scipy.optimize import differential_evolution, minimize
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from simlab.model.kernels import KERNELS
from simlab.model.optimize import distinct_best, polish, separated_best
from simlab.worlds.draws import FeatureWorld

HARD = {1: (0.03, 0.1), 2: (0.05, 0.15), 4: (0.1, 0.2), 6: (0.15, 0.25)}
KERNEL_NAMES = ("sqexp", "matern12", "matern32", "matern52")
SEED = 1111


def make_world(d: int, kernel: str, i: int) -> FeatureWorld:
    """World i of a (d, kernel) cell: its own lengthscales (log-uniform in HARD[d]) and draw."""
    rng = np.random.default_rng([SEED, d, KERNEL_NAMES.index(kernel), i])
    lo, hi = HARD[d]
    ls = np.exp(rng.uniform(np.log(lo), np.log(hi), d))
    return FeatureWorld(KERNELS[kernel](ls, 1.0), 0.0, rng)


# --------------------------------------------------------------------------- reference search
def _values32(world, U, chunk=8192):
    s = world.sample
    amp, phase = s.polar()
    om, ph, am = s.omega.astype(np.float32), phase.astype(np.float32), amp.astype(np.float32)
    out = np.empty(len(U))
    for a in range(0, len(U), chunk):
        P = U[a:a + chunk].astype(np.float32) @ om.T
        P -= ph
        np.cos(P, out=P)
        out[a:a + chunk] = s.mean + s.scale * (P @ am)
    return out


def _separated(U, v, k, sep):
    """The k best points of U, each at least ``sep`` (max-norm) from every better one kept."""
    order = np.argsort(v)[: 50 * k]
    kept = []
    for i in order:
        if not kept or np.min(np.max(np.abs(U[kept] - U[i]), axis=1)) > sep:
            kept.append(i)
            if len(kept) == k:
                break
    return U[kept]


def _lbfgsb(world, starts, batch=32):
    """scipy L-BFGS-B from every start (batches solved as one separable problem), float64."""
    d = starts.shape[1]
    best_u, best_v = None, np.inf
    for a in range(0, len(starts), batch):
        S = starts[a:a + batch]
        q = len(S)

        def fun(x):
            U = x.reshape(q, d)
            return float(world(U).sum()), world.grad(U).reshape(-1)

        res = minimize(fun, S.reshape(-1), jac=True, method="L-BFGS-B", bounds=[(0.0, 1.0)] * (q * d),
                       options={"maxiter": 2000, "ftol": 1e-15, "gtol": 1e-10})
        for U in (np.clip(res.x.reshape(q, d), 0.0, 1.0), S):
            v = world(U)
            j = int(np.argmin(v))
            if v[j] < best_v:
                best_u, best_v = U[j].copy(), float(v[j])
    return best_u, best_v


def reference(world, d: int, rng) -> tuple[np.ndarray, float]:
    if d == 1:
        dense = np.linspace(0.0, 1.0, 2**18)[:, None]
    elif d == 2:
        dense = qmc.Sobol(d, seed=rng).random_base2(20)
    else:
        dense = rng.random((2**19, d))
    v = _values32(world, dense)
    mean_ls = float(np.exp(np.mean(np.log(world.sample.kernel.lengthscale))))
    starts = [_separated(dense, v, 128 if d <= 2 else 256, 0.25 * mean_ls)]
    starts.append(qmc.Sobol(d, seed=rng).random_base2(7))
    de = differential_evolution(lambda X: _values32(world, X.T), [(0.0, 1.0)] * d, popsize=40,
                                maxiter=1000 if d > 2 else 300, tol=1e-9, mutation=(0.5, 1.0),
                                recombination=0.9, polish=False, vectorized=True, updating="deferred",
                                seed=rng, init="sobol")
    pv = de.population_energies
    starts.append(_separated(de.population, pv, 16, 1e-4))
    u, val = _lbfgsb(world, np.vstack(starts))
    # basin hopping around the best: perturb at decreasing scales and polish again
    for scale in (1e-1, 1e-2, 1e-3, 1e-4, 1e-5):
        cand = np.clip(u + scale * mean_ls * rng.standard_normal((4096, d)), 0.0, 1.0)
        cv = world(cand)
        u2, v2 = _lbfgsb(world, _separated(cand, cv, 8, 1e-12))
        if v2 < val:
            u, val = u2, v2
    return u, val


# --------------------------------------------------------------------------- the previous search
def previous_find_minimum(f, fg, dim, rng, *, n_search=None, n_polish=8, extra=None, zoom=6, zoom_points=64):
    """simlab.worlds.draws.find_minimum as it was before issue 11 (verbatim)."""
    if n_search is None:
        n_search = 2 ** min(10 + dim, 14)
    U = qmc.Sobol(dim, seed=rng).random_base2(int(np.ceil(np.log2(n_search))))
    if extra is not None:
        U = np.vstack([U, extra])
    v = f(U)
    idx = distinct_best(U, v, 2 * n_polish)
    starts, best_v = U[idx].copy(), v[idx].copy()
    half = 2.0 * len(U) ** (-1.0 / dim)
    for _ in range(zoom):
        cand = starts[:, None, :] + half * (2.0 * rng.random((len(starts), zoom_points, dim)) - 1.0)
        cand = np.clip(cand, 0.0, 1.0)
        vc = f(cand.reshape(-1, dim)).reshape(len(starts), zoom_points)
        j = np.argmin(vc, axis=1)
        better = vc[np.arange(len(starts)), j] < best_v
        starts[better] = cand[better, j[better]]
        best_v[better] = vc[better, j[better]]
        half /= 2.0
    keep = np.argsort(best_v)[:n_polish]
    Up, vp = polish(fg, starts[keep], maxiter=200)
    best = int(np.argmin(vp))
    return Up[best], float(vp[best])


def main_find_minimum(f, fg, dim, rng, *, lengthscale, nu, rank):
    """simlab.worlds.draws.search_plan + find_minimum as merged for issue 11 (verbatim, before band ranking)."""
    ls = np.minimum(np.asarray(lengthscale, dtype=float), 1.0)
    want = 64 * {0.5: 4.0, 1.5: 2.0}.get(float(nu), 1.0) * float(np.prod(1.0 / ls))
    n_search = 2 ** int(np.ceil(np.log2(np.clip(want, 2**12, 2**18))))
    n_polish = (8 + 4 * dim) * (2 if nu <= 0.5 else 1)
    zoom, zoom_points = (14, 256) if nu <= 0.5 else (14, 128) if nu <= 1.5 else (8, 64)
    half, separation = 0.5 * ls, 0.5 * ls
    U = qmc.Sobol(dim, seed=rng).random_base2(int(np.log2(n_search)))
    v = rank(U)
    starts = U[separated_best(U, v, 2 * n_polish, separation)].copy()
    best_v = rank(starts)
    half = half.copy()
    for _ in range(zoom):
        cand = starts[:, None, :] + half * (2.0 * rng.random((len(starts), zoom_points, dim)) - 1.0)
        cand = np.clip(cand, 0.0, 1.0)
        vc = rank(cand.reshape(-1, dim)).reshape(len(starts), zoom_points)
        j = np.argmin(vc, axis=1)
        better = vc[np.arange(len(starts)), j] < best_v
        starts[better] = cand[better, j[better]]
        best_v[better] = vc[better, j[better]]
        half /= 2.0
    exact = f(starts)
    keep = np.argsort(exact, kind="stable")[:n_polish]
    Up, vp = polish(fg, starts[keep], maxiter=500)
    best = int(np.argmin(vp))
    return Up[best], float(vp[best])


def main_search(world, rng):
    ls, nu = world.roughness()
    return main_find_minimum(world, world.value_grad, world.dim, rng, lengthscale=ls, nu=nu, rank=world.rank_values)


def previous(world, rng):
    return previous_find_minimum(world, world.value_grad, world.dim, rng)


def current(world, rng):
    return world.optimum(rng)


def pair(world, rng):
    """What simlab's regret uses (runner.world_optimum): the better of two independent searches."""
    u1, v1 = world.optimum(rng)
    u2, v2 = world.optimum(np.random.default_rng(rng.integers(2**63)))
    return (u1, v1) if v1 <= v2 else (u2, v2)


def timed(fn, world, rng):
    t0 = time.perf_counter()
    u, v = fn(world, rng)
    return float(v), time.perf_counter() - t0


METHODS = {"previous": previous, "main": main_search, "current": current, "pair": pair}


# --------------------------------------------------------------------------- driver
def common_case(n: int = 12) -> None:
    """Cost of main's search and the current one on the worlds the configs use, interleaved."""
    print("# common case: lengthscales log-uniform in 0.13-0.6 of the range; median seconds per world, one thread")
    for d in (2, 4):
        for kernel in ("matern52", "sqexp"):
            t = {"main": [], "current": []}
            values = {"main": [], "current": []}
            for i in range(n):
                rng = np.random.default_rng([SEED + 3, d, KERNEL_NAMES.index(kernel), i])
                world = FeatureWorld(KERNELS[kernel](np.exp(rng.uniform(np.log(0.13), np.log(0.6), d)), 1.0), 0.0, rng)
                for name in (("main", "current") if i % 2 == 0 else ("current", "main")):
                    v, sec = timed(METHODS[name], world, np.random.default_rng([SEED + 4, d, i]))
                    t[name].append(sec)
                    values[name].append(v)
            gap = np.max(np.abs(np.subtract(values["main"], values["current"])))
            m, c = np.median(t["main"]), np.median(t["current"])
            print(f"d={d} {kernel:9s} main {m:.3f} s | current {c:.3f} s | ratio current/main {c / m:.2f} "
                  f"| median of per-world ratios {np.median(np.divide(t['current'], t['main'])):.2f} "
                  f"| largest value difference {gap:.1e}", flush=True)


def load_cache(path: Path) -> dict:
    out = {}
    if path.is_file():
        for line in path.read_text().splitlines():
            row = json.loads(line)
            out[(row["d"], row["kernel"], row["i"])] = row
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--worlds", type=int, default=30, help="worlds per (inputs, kernel) cell")
    ap.add_argument("--dims", type=int, nargs="+", default=[1, 2, 4, 6])
    ap.add_argument("--kernels", nargs="+", default=list(KERNEL_NAMES))
    ap.add_argument("--cache", type=Path, default=Path("/tmp/optimum-miss-reference.jsonl"),
                    help="reference values are stored here and reused (JSON lines)")
    ap.add_argument("--methods", nargs="+", default=list(METHODS), choices=list(METHODS),
                    help="searches to measure (the reference is always used)")
    ap.add_argument("--rows", type=Path, help="append every measured world here (JSON lines)")
    ap.add_argument("--cached-only", action="store_true", help="skip worlds whose reference is not cached yet")
    ap.add_argument("--reference-only", action="store_true", help="only compute and store the references")
    ap.add_argument("--common", action="store_true", help="only time main's and the current search on the configs' lengthscales")
    args = ap.parse_args()
    if args.common:
        with threadpool_limits(1):
            common_case()
        return

    cache = load_cache(args.cache)
    print(f"# {platform.processor() or platform.machine()}, numpy {np.__version__}, one BLAS thread")
    print(f"# lengthscales (share of the range, per input, log-uniform): {HARD}")
    rows = []
    with threadpool_limits(1):
        for d in args.dims:
            for kernel in args.kernels:
                for i in range(args.worlds):
                    world = make_world(d, kernel, i)
                    key = (d, kernel, i)
                    if key not in cache and args.cached_only:
                        continue
                    if key not in cache:
                        t0 = time.perf_counter()
                        _, vref = reference(world, d, np.random.default_rng([SEED + 1, d, i]))
                        cache[key] = {"d": d, "kernel": kernel, "i": i, "ref": vref,
                                      "seconds": time.perf_counter() - t0}
                        with args.cache.open("a") as fh:
                            fh.write(json.dumps(cache[key]) + "\n")
                    if args.reference_only:
                        continue
                    row = {"d": d, "kernel": kernel, "i": i, "ref": cache[key]["ref"],
                           "ref_seconds": cache[key]["seconds"]}
                    for name in args.methods:
                        fn = METHODS[name]
                        row[name], row[name + "_seconds"] = timed(fn, world, np.random.default_rng([SEED + 2, d, i]))
                    rows.append(row)
                    if args.rows:
                        with args.rows.open("a") as fh:
                            fh.write(json.dumps(row) + "\n")
                if any(r["d"] == d and r["kernel"] == kernel for r in rows):
                    report_cell(rows, d, kernel)
    if rows:
        report_dims(rows)


def _misses(rows, name):
    best = np.array([min(r["ref"], *(r[k] for k in METHODS if k in r)) for r in rows])
    return np.array([r[name] for r in rows]) - best


def report_cell(rows, d, kernel):
    cell = [r for r in rows if r["d"] == d and r["kernel"] == kernel]
    parts = [f"d={d} {kernel:9s} n={len(cell):3d}"]
    for name in METHODS:
        if name in cell[0]:
            m = _misses(cell, name)
            cost = np.median([r[name + "_seconds"] for r in cell])
            parts.append(f"{name}: worst miss {m.max():.2e} (>1e-3: {int((m > 1e-3).sum()):2d}) "
                         f"median cost {cost:.3f} s")
    parts.append(f"reference {np.median([r['ref_seconds'] for r in cell]):.1f} s")
    print(" | ".join(parts), flush=True)


def report_dims(rows):
    print("\n# worst miss (x amplitude) and median cost per world, per number of inputs")
    for d in sorted({r["d"] for r in rows}):
        cell = [r for r in rows if r["d"] == d]
        line = [f"d={d} ({len(cell)} worlds)"]
        for name in METHODS:
            if name in cell[0]:
                line.append(f"{name}: {_misses(cell, name).max():.2e}, "
                            f"{np.median([r[name + '_seconds'] for r in cell]):.3f} s")
        print(" | ".join(line))


if __name__ == "__main__":
    main()
