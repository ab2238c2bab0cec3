"""How simlab's cost scales: per-trial cost against campaign length, workers, and memory.

Run by hand (not part of the test suite):

    python benchmarks/bench_scaling.py              # all three
    python benchmarks/bench_scaling.py --only trials
    python benchmarks/bench_scaling.py --only workers
    python benchmarks/bench_scaling.py --only memory

trials   per-trial cost of EI campaigns (2-D, pool 2048) at 25, 50, 100 and 200 trials, one
         at a time and in lockstep blocks of 16, medians of 3, and the exponent of a power-law
         fit of cost per trial against trials (0 = constant per trial, i.e. linear total;
         2 = cubic total).
workers  configs/demo.toml (its 200 replicates unless --replicates) at --jobs 1 and --jobs 2,
         side by side, --repeats times each in alternation; prints the median speed-up.
memory   a 10,000-replicate study (1-D, short campaigns) run in a child process with traces
         streamed to disk in chunks; prints the child's peak resident memory.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def bench_trials() -> None:
    from scipy.stats import qmc
    from threadpoolctl import threadpool_limits

    from simlab.model.belief import Belief
    from simlab.replay.campaign import run_campaign
    from simlab.model.kernels import Matern52
    from simlab.replay.lockstep import run_block
    from simlab.worlds.noise import Observer
    from simlab.policies import ExpectedImprovement
    from simlab.replay.runner import Replicate
    from simlab.worlds.draws import FeatureWorld

    kernel = Matern52([0.2, 0.2], 1.0)
    belief = Belief(kernel, 0.0, 0.1)
    sizes, block = (25, 50, 100, 200), 16
    costs: dict[str, list[float]] = {"one at a time": [], f"lockstep, blocks of {block}": []}
    with threadpool_limits(1):
        for n in sizes:
            reps = []
            for r in range(block):
                rng = np.random.default_rng(r)
                seq = qmc.Sobol(2, seed=rng).random_base2(int(np.ceil(np.log2(n))))[:n]
                reps.append(Replicate(index=r, world=FeatureWorld(kernel, 0.0, rng), optimum=(np.zeros(2), 0.0),
                                      design=seq[:5], sequence=seq, shocks=rng.standard_normal(n),
                                      lost=np.zeros(n, bool), pool=qmc.Sobol(2, seed=rng).random_base2(11)))
            times = []
            for rep in reps[:3]:
                t0 = time.perf_counter()
                run_campaign(ExpectedImprovement("ei"), belief, rep.world, design=rep.design, sequence=rep.sequence,
                             observe=lambda f, t, s=rep.shocks: f + 0.1 * s[t], budget=n, pool=rep.pool,
                             rng=np.random.default_rng(0))
                times.append((time.perf_counter() - t0) / n)
            costs["one at a time"].append(float(np.median(times)))
            times = []
            for _ in range(3):
                t0 = time.perf_counter()
                run_block(ExpectedImprovement("ei"), belief, reps, observer=Observer(sd=0.1), budget=n,
                          rngs=[np.random.default_rng(0)] * block)
                times.append((time.perf_counter() - t0) / (n * block))
            costs[f"lockstep, blocks of {block}"].append(float(np.median(times)))
    print("per-trial cost of EI campaigns (2-D, pool 2048, with polish), medians of 3")
    for name, values in costs.items():
        slope = np.polyfit(np.log(sizes), np.log(values), 1)[0]
        cells = ", ".join(f"{n} trials {1e3 * c:.2f} ms" for n, c in zip(sizes, values))
        print(f"  {name}: {cells}")
        print(f"    fitted exponent of cost per trial against trials: {slope:.2f} "
              f"(total cost grows as trials^{1 + slope:.2f})")


def _timed_run(args: list[str], cwd: str) -> float:
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "simlab", *args], cwd=cwd, check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def bench_workers(replicates: int, repeats: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        rows = {1: [], 2: []}
        for rep in range(repeats):
            for jobs in (1, 2):
                out = Path(tmp) / f"j{jobs}-{rep}"
                rows[jobs].append(_timed_run(["run", str(ROOT / "configs" / "demo.toml"), "--replicates",
                                              str(replicates), "--jobs", str(jobs), "--out", str(out),
                                              "--no-report", "--quiet"], tmp))
    one, two = np.median(rows[1]), np.median(rows[2])
    print(f"configs/demo.toml, {replicates} replicates, no report: --jobs 1 {one:.1f} s, --jobs 2 {two:.1f} s "
          f"(medians of {repeats}); speed-up {one / two:.2f}x")


MEMORY_STUDY = """
[study]
name = "memory"
replicates = 10000
seed = 1
[space]
x = [0.0, 1.0]
[world]
lengthscale = 0.2
amplitude = 1.0
noise = 0.1
features = 256
[campaign]
initial = 3
budgets = [8]
pool = 128
[target]
regret = 0.1
[[policy]]
rule = "ei"
[[policy]]
rule = "random"
"""

_CHILD = """
import resource, sys, simlab
simlab.run_study(sys.argv[1], jobs=int(sys.argv[2]), out=sys.argv[3])
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def bench_memory(jobs: int = 2) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        study = Path(tmp) / "memory.toml"
        study.write_text(MEMORY_STUDY)
        t0 = time.perf_counter()
        out = subprocess.run([sys.executable, "-c", _CHILD, str(study), str(jobs), str(Path(tmp) / "out")],
                             capture_output=True, text=True, check=True)
        seconds = time.perf_counter() - t0
        main_kib = int(out.stdout.strip().splitlines()[-1])
        workers_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss  # largest single child
        size = sum(p.stat().st_size for p in (Path(tmp) / "out").rglob("*") if p.is_file())
    print(f"10,000 replicates x 2 policies x 8 trials (160,000 rows), --jobs {jobs}: {seconds:.0f} s; "
          f"peak resident memory {main_kib / 1024:.0f} MiB in the main process, {workers_kib / 1024:.0f} MiB "
          f"in the largest process; results folder {size / 2**20:.1f} MiB")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--only", choices=("trials", "workers", "memory"))
    ap.add_argument("--replicates", type=int, default=200, help="replicates of the demo study for 'workers'")
    ap.add_argument("--repeats", type=int, default=1, help="runs of each worker count for 'workers'")
    args = ap.parse_args()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    if args.only in (None, "trials"):
        bench_trials()
    if args.only in (None, "workers"):
        bench_workers(args.replicates, args.repeats)
    if args.only in (None, "memory"):
        bench_memory()


if __name__ == "__main__":
    main()
