"""World optima: time per world and miss, the search before issue 16 against the current one, side by side.

Run by hand (not part of the test suite):

    python benchmarks/world_optima.py                          # 30 worlds per (inputs, kernel) cell
    python benchmarks/world_optima.py --worlds 10 --dims 2 6 --repeats 3
    python benchmarks/world_optima.py --reference-only         # fill the reference cache first

Worlds: random-feature draws (1024 frequencies, amplitude 1, mean 0) with lengthscale 0.2 of the
range in every input, for every kernel, in 1, 2, 4 and 6 inputs; world i of a cell has its own
seed. For each world:

reference  an independent thorough search sharing no code with ``simlab.worlds.draws.find_minimum``
           (:func:`reference`): a dense set (1-D: a regular grid of 2^17; else 2^18 Sobol'
           points) ranked in float32, scipy.optimize.differential_evolution (population 15 per
           input, 300 generations), scipy L-BFGS-B (float64, analytic gradients) from the 96
           best separated points of both, then random perturbations at scales 1e-1 to 1e-5
           lengthscales around the 4 best, polished again. Cached (JSON lines). 2^18 points
           is 4-64 times the new search's own Sobol' set, on another scramble.
old        ``World.optimum`` as simlab had it before issue 16 (``find_minimum``, ``search_plan`` and
           ``_descend`` of commit 51a34b4, loaded from git with ``git show``, unchanged).
new        ``World.optimum`` as simlab has it now (``--runner``: the runner's rule, two searches and more
           while the best two disagree, what regret is measured against).

miss = a search's value - the best value known for that world (the reference and both searches),
in units of the amplitude. Time = median over ``--repeats`` runs of one search (one BLAS thread),
old and new interleaved world by world so that the load of the shared machine hits both alike.
Prints, per (inputs, kernel): the largest miss of each and the median time of each; per number
of inputs: the median time per world of each and the ratio old / new.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
import types
from pathlib import Path

import numpy as np
from scipy.optimize import differential_evolution, minimize
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from simlab.model.kernels import KERNELS
from simlab.worlds.draws import FeatureWorld

sys.path.insert(0, str(Path(__file__).resolve().parent))
from optimum_miss import _separated, _values32  # noqa: E402  (shares no code with find_minimum)

KERNEL_NAMES = ("matern12", "matern32", "matern52", "sqexp")
LENGTHSCALE = 0.2
SEED = 1616
OLD_COMMIT = "51a34b4"


def _lbfgsb(world, starts, maxiter=300):
    """scipy L-BFGS-B from every start, one problem each (float64, analytic gradients)."""
    best_u, best_v = None, np.inf
    d = starts.shape[1]
    for x0 in starts:
        res = minimize(lambda x: (float(world(x[None])[0]), world.grad(x[None])[0]), x0, jac=True,
                       method="L-BFGS-B", bounds=[(0.0, 1.0)] * d, options={"maxiter": maxiter})
        for u in (np.clip(res.x, 0.0, 1.0), x0):
            v = float(world(u[None])[0])
            if v < best_v:
                best_u, best_v = u.copy(), v
    return best_u, best_v


def reference(world, d: int, rng) -> tuple[np.ndarray, float]:
    """The independent thorough search (module docstring)."""
    dense = np.linspace(0.0, 1.0, 2**17)[:, None] if d == 1 else qmc.Sobol(d, seed=rng).random_base2(18)
    v = _values32(world, dense)
    ls = float(np.exp(np.mean(np.log(world.sample.kernel.lengthscale))))
    starts = [_separated(dense, v, 80, 0.25 * ls)]
    de = differential_evolution(lambda X: _values32(world, X.T), [(0.0, 1.0)] * d, popsize=15, maxiter=300,
                                tol=1e-9, mutation=(0.5, 1.0), recombination=0.9, polish=False, vectorized=True,
                                updating="deferred", seed=rng, init="sobol")
    starts.append(_separated(de.population, de.population_energies, 16, 1e-4))
    S = np.vstack(starts)
    u, val = _lbfgsb(world, S)
    exact = world(S)
    tops = S[np.argsort(exact)[:3]]
    for centre in [u, *tops]:
        for scale in (1e-1, 1e-2, 1e-3, 1e-4, 1e-5):
            cand = np.clip(centre + scale * ls * rng.standard_normal((2048, d)), 0.0, 1.0)
            cv = world(cand)
            u2, v2 = _lbfgsb(world, _separated(cand, cv, 2, 1e-12))
            if v2 < val:
                u, val = u2, v2
    return u, val


def make_world(d: int, kernel: str, i: int) -> FeatureWorld:
    rng = np.random.default_rng([SEED, d, KERNEL_NAMES.index(kernel), i])
    return FeatureWorld(KERNELS[kernel]([LENGTHSCALE] * d, 1.0), 0.0, rng)


def old_module():
    """simlab/worlds/draws.py of OLD_COMMIT, imported as a module of its own (its search functions)."""
    repo = Path(__file__).resolve().parent.parent
    text = subprocess.run(["git", "show", f"{OLD_COMMIT}:simlab/worlds/draws.py"], cwd=repo, check=True,
                          capture_output=True, text=True).stdout
    mod = types.ModuleType("simlab.worlds._old_draws")
    mod.__package__ = "simlab.worlds"
    sys.modules[mod.__name__] = mod
    exec(compile(text, f"{OLD_COMMIT}:simlab/worlds/draws.py", "exec"), mod.__dict__)
    return mod


def old_search(mod):
    def run(world, rng):
        ls, nu = world.roughness()
        s = world.sample
        band = lambda U, cutoff, grad=False: mod.FeatureSample.values32(s, U, below=cutoff, grad=grad)  # noqa: E731
        return mod.find_minimum(world, world.value_grad, world.dim, rng, lengthscale=ls, nu=nu,
                                rank=lambda U: mod.FeatureSample.values32(s, U), band=band)
    return run


def new_search(world, rng):
    return world.optimum(rng)


def runner_search(world, rng):
    """What regret is measured against: as ``simlab.worlds.replicate.world_optimum`` does it, two
    independent searches and up to ``EXTRA_SEARCHES`` more while the best two disagree by more than
    ``AGREE`` x amplitude (amplitude 1 here), each on its own stream spawned from ``rng``."""
    from simlab.worlds.replicate import AGREE, EXTRA_SEARCHES

    streams = rng.spawn(2 + EXTRA_SEARCHES)
    found = [world.optimum(streams[0]), world.optimum(streams[1])]
    for k in range(EXTRA_SEARCHES):
        values = sorted(v for _, v in found)
        if values[1] - values[0] <= AGREE:
            break
        found.append(world.optimum(streams[2 + k]))
    return min(found, key=lambda t: t[1])


def load_cache(path: Path) -> dict:
    out = {}
    if path.is_file():
        for line in path.read_text().splitlines():
            row = json.loads(line)
            out[(row["d"], row["kernel"], row["i"])] = row
    return out


def fill_reference(cache, path, d, kernel, i):
    key = (d, kernel, i)
    if key not in cache:
        world = make_world(d, kernel, i)
        t0 = time.perf_counter()
        _, v = reference(world, d, np.random.default_rng([SEED + 1, d, i]))
        cache[key] = {"d": d, "kernel": kernel, "i": i, "ref": v, "seconds": time.perf_counter() - t0}
        path.parent.mkdir(parents=True, exist_ok=True)     # a first run with a new --cache folder
        with path.open("a") as fh:
            fh.write(json.dumps(cache[key]) + "\n")
    return cache[key]["ref"]


def measure(world, search, rng_key, repeats):
    """(value, median seconds) of one search over ``repeats`` runs (each with the same rng)."""
    times, value = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        _, v = search(world, np.random.default_rng(rng_key))
        times.append(time.perf_counter() - t0)
        value = float(v)
    return value, float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--worlds", type=int, default=30, help="worlds per (inputs, kernel) cell")
    ap.add_argument("--dims", type=int, nargs="+", default=[1, 2, 4, 6])
    ap.add_argument("--kernels", nargs="+", default=list(KERNEL_NAMES))
    ap.add_argument("--repeats", type=int, default=3, help="timed runs of each search per world (median)")
    ap.add_argument("--runner", action="store_true",
                    help="'new' = the runner's rule (two searches, more while they disagree), not one search")
    ap.add_argument("--cache", type=Path, default=Path("/tmp/wo/ref.jsonl"),
                    help="reference values are stored here and reused (JSON lines)")
    ap.add_argument("--cached-only", action="store_true", help="skip worlds whose reference is not cached yet")
    ap.add_argument("--reference-only", action="store_true", help="only compute and store the references")
    ap.add_argument("--no-old", action="store_true", help="measure the new search only")
    args = ap.parse_args()

    cache = load_cache(args.cache)
    old = None if args.no_old else old_search(old_module())
    rows = []
    print(f"# numpy {np.__version__}, one BLAS thread, lengthscale {LENGTHSCALE}, {args.repeats} timed runs per "
          f"search and world (median); miss = value - best known, x amplitude")
    with threadpool_limits(1):
        for d in args.dims:
            for kernel in args.kernels:
                cell = []
                for i in range(args.worlds):
                    if (d, kernel, i) not in cache and args.cached_only:
                        continue
                    ref = fill_reference(cache, args.cache, d, kernel, i)
                    if args.reference_only:
                        continue
                    world = make_world(d, kernel, i)
                    key = [SEED + 2, d, i]
                    row = {"d": d, "kernel": kernel, "i": i, "ref": ref}
                    search = runner_search if args.runner else new_search
                    order = (("old", old), ("new", search)) if i % 2 == 0 else (("new", search), ("old", old))
                    for name, fn in order:
                        if fn is not None:
                            row[name], row[name + "_s"] = measure(world, fn, key, args.repeats)
                    cell.append(row)
                if cell:
                    report_cell(cell, d, kernel)
                    rows += cell
    if rows:
        report_dims(rows)


def _best(r):
    return min(r["ref"], *(r[k] for k in ("old", "new") if k in r))


def report_cell(cell, d, kernel):
    parts = [f"d={d} {kernel:9s} worlds {len(cell):2d}"]
    for name in ("old", "new"):
        if name in cell[0]:
            miss = np.array([r[name] - _best(r) for r in cell])
            parts.append(f"{name}: max miss {miss.max():.1e} (over 1e-3: {int((miss > 1e-3).sum()):2d}), "
                         f"median {np.median([r[name + '_s'] for r in cell]) * 1e3:7.1f} ms")
    if "old" in cell[0] and "new" in cell[0]:
        parts.append(f"old/new {np.median([r['old_s'] for r in cell]) / np.median([r['new_s'] for r in cell]):5.1f}x")
    print(" | ".join(parts), flush=True)


def report_dims(rows):
    print("\n# per number of inputs (all kernels): median time per world, ratio old / new, largest miss")
    for d in sorted({r["d"] for r in rows}):
        cell = [r for r in rows if r["d"] == d]
        line = [f"d={d} ({len(cell)} worlds)"]
        for name in ("old", "new"):
            if name in cell[0]:
                line.append(f"{name} {np.median([r[name + '_s'] for r in cell]) * 1e3:7.1f} ms, "
                            f"max miss {max(r[name] - _best(r) for r in cell):.1e}")
        if "old" in cell[0] and "new" in cell[0]:
            line.append(f"old/new {np.median([r['old_s'] for r in cell]) / np.median([r['new_s'] for r in cell]):5.1f}x"
                        f" (median of per-world ratios "
                        f"{np.median([r['old_s'] / r['new_s'] for r in cell]):5.1f}x)")
        print(" | ".join(line), flush=True)


if __name__ == "__main__":
    main()
