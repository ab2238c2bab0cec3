"""Where a trial's time goes: pyinstrument over the speed benchmark's work, flat by self time.

The work is that of ``bench_vs_sklearn.py`` (2-D, pool 2048, 5 + 25 trials of EI). Paths:
``alone`` replays campaigns one at a time (``run_campaign``), ``lockstep`` as one block
(``run_block``; absent before lockstep replicates existed, which lets the same script
profile an older checkout). Needs pyinstrument (pip install pyinstrument), a profiling
tool only, not a dependency of simlab.

Run by hand:  python benchmarks/profile_trials.py {alone,lockstep} {pool,polish} [--campaigns 32]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from pyinstrument import Profiler
from scipy.stats import qmc
from threadpoolctl import threadpool_limits

from simlab.model.belief import Belief
from simlab.replay.campaign import run_campaign
from simlab.model.kernels import Matern52
from simlab.policies import ExpectedImprovement
from simlab.worlds.draws import FeatureWorld


class PoolOnlyEI(ExpectedImprovement):
    n_starts = 0


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("path", choices=("alone", "lockstep"))
    ap.add_argument("choice", choices=("pool", "polish"))
    ap.add_argument("--campaigns", type=int, default=32)
    args = ap.parse_args()
    rule = PoolOnlyEI if args.choice == "pool" else ExpectedImprovement
    kernel = Matern52([0.2, 0.2], 1.0)
    belief = Belief(kernel, 0.0, 0.1)
    reps = []
    for r in range(args.campaigns):
        rng = np.random.default_rng(r)
        world = FeatureWorld(kernel, 0.0, rng)
        seq = qmc.Sobol(2, seed=rng).random_base2(5)[:30]
        shocks = rng.standard_normal(30)
        reps.append((world, seq, shocks, qmc.Sobol(2, seed=rng).random_base2(11)))

    def alone():
        for world, seq, shocks, pool in reps:
            run_campaign(rule("ei"), belief, world, design=seq[:5], sequence=seq,
                         observe=lambda f, t, s=shocks: f + 0.1 * s[t], budget=30, pool=pool,
                         rng=np.random.default_rng(0))

    def lockstep():
        from simlab.replay.lockstep import run_block
        from simlab.worlds.noise import Observer
        from simlab.replay.runner import Replicate

        block = [Replicate(index=r, world=w, optimum=(np.zeros(2), 0.0), design=seq[:5], sequence=seq,
                           shocks=s, lost=np.zeros(30, bool), pool=pool) for r, (w, seq, s, pool) in enumerate(reps)]
        run_block(rule("ei"), belief, block, observer=Observer(sd=0.1), budget=30,
                  rngs=[np.random.default_rng(0)] * len(block))

    work = alone if args.path == "alone" else lockstep
    with threadpool_limits(1):
        profiler = Profiler(interval=0.0005)
        t0 = time.perf_counter()
        profiler.start()
        work()
        profiler.stop()
        seconds = time.perf_counter() - t0
    print(f"{args.path}, {args.choice}: {seconds / (args.campaigns * 25) * 1e6:.0f} us per acquisition trial "
          f"({args.campaigns} campaigns, under the profiler)")
    print(profiler.output_text(unicode=True, color=False, flat=True, show_all=False)[:6000])


if __name__ == "__main__":
    main()
