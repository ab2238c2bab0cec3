"""Each rule's time per trial in a block of replicates, against EI's, before and after, side by side.

The study is the demo's shape (2-D Matérn 5/2, pool 2048, 5 design + 25 chosen trials) with
one policy at a time on a block of ``--replicates`` (64) replicates, replayed the way a chunk
is (``runner._campaigns``: lockstep where the rule allows it, else one campaign at a time).
Time per trial is the block's wall time over replicates × chosen trials, median of
``--repeats`` runs; the replicates' worlds and optima are built once, outside the timing.

``--before REV`` also measures the code of git revision REV (exported with ``git archive``
into a temporary folder, run in a subprocess with that folder first on ``PYTHONPATH``), and
prints both columns and their ratios to EI's in one table. Runs are interleaved rule by rule
(before, after, before, ...), so load from other work on the machine falls on both alike.

Run by hand:  python benchmarks/rules_per_trial.py [--before 51a34b4] [--replicates 64] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

from _revision import export   # benchmarks/ is first on sys.path when a script here runs

RULES = ("ei", "pi", "lcb", "mean", "random", "sobol", "gp-ucb", "thompson", "mes", "pbest", "kg", "hedge")

# Measured in a subprocess so that each revision imports its own simlab.
_WORKER = r"""
import json, sys, time
import numpy as np
from threadpoolctl import threadpool_limits
from simlab.study.spec import parse_study
from simlab.replay import runner

rule, R, initial, horizon = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
data = {
    "study": {"name": "bench", "goal": "minimize", "replicates": R, "seed": 20261202},
    "space": {"a": [0.0, 1.0], "b": [0.0, 1.0]},
    "world": {"kernel": "matern52", "lengthscale": [0.25, 0.31], "amplitude": 4.0, "mean": 0.0, "noise": 0.8},
    "campaign": {"initial": initial, "budgets": [horizon], "pool": 2048},
    "target": {"regret": 1.0},
    "policy": [{"rule": rule}],
}
study = parse_study(data, source="bench")
with threadpool_limits(1):
    reps = [runner.make_replicate(study, r) for r in range(R)]
    t0 = time.perf_counter()
    runner._campaigns(study, reps)
    wall = time.perf_counter() - t0
print(json.dumps({"rule": rule, "per_trial": wall / (R * (horizon - initial))}))
"""


def _measure(src: Path, rule: str, args) -> float:
    env = dict(os.environ, PYTHONPATH=str(src), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    out = subprocess.run([sys.executable, "-c", _WORKER, rule, str(args.replicates), "5", str(args.horizon)],
                         env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])["per_trial"]


def main():
    import numpy as np

    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--before", help="git revision to measure beside the working tree")
    ap.add_argument("--replicates", type=int, default=64, help="replicates in the block")
    ap.add_argument("--horizon", type=int, default=30, help="trials per campaign (5 of them the design)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--rules", default=",".join(RULES))
    args = ap.parse_args()
    rules = ["ei"] + [r for r in args.rules.split(",") if r and r != "ei"]
    now = Path(__file__).resolve().parents[1]
    with tempfile.TemporaryDirectory() as tmp:
        trees = {"now": now}
        if args.before:
            trees = {"before": export(args.before, Path(tmp)), **trees}
        times: dict[str, dict[str, list[float]]] = {k: {r: [] for r in rules} for k in trees}
        print(f"time per trial (ms), block of {args.replicates}, 2-D, pool 2048, 5 + {args.horizon - 5} trials, "
              f"median of {args.repeats}; x EI = ratio to EI's time in the same column", flush=True)
        head = f"{'rule':10s}" + "".join(f"{k + ' ms':>12s}{'x EI':>8s}" for k in trees)
        print(head + (f"{'before/now':>12s}" if args.before else ""), flush=True)
        for rule in rules:                       # EI first: every later row is printed as soon as it is measured
            for _ in range(args.repeats):
                for name, src in trees.items():
                    times[name][rule].append(_measure(src, rule, args))
            med = {k: float(np.median(times[k][rule])) for k in trees}
            ei = {k: float(np.median(times[k]["ei"])) for k in trees}
            line = f"{rule:10s}" + "".join(f"{1e3 * med[k]:12.3f}{med[k] / ei[k]:8.2f}" for k in trees)
            if args.before:
                line += f"{med['before'] / med['now']:12.2f}"
            print(line, flush=True)


if __name__ == "__main__":
    main()
