"""A study with rounds of trials, whole `simlab run` processes, this checkout against git revision REV.

    python benchmarks/rounds_time.py --before REV [--batch 3] [--replicates 40] [--repeats 3]

The study is configs/demo.toml (7 policies, 5 + 25 trials, two [[stop]] rules) with
``[campaign] batch`` set and ``[study] replicates`` lowered, written to a temporary folder;
each side runs ``python -m simlab run STUDY --jobs 1 --no-report --quiet`` in a fresh interpreter
with its own code on PYTHONPATH (REV's simlab package exported with ``git archive``). Written
for rounds in lockstep (2026-12-04: before, every campaign with rounds ran one at a time).

Repeats alternate between the sides (before, now, before, ...), so load from other work falls
on both alike; prints each side's medians, the ratio and the 1-minute load average, and checks
that both sides wrote the same traces bit for bit. Benchmarks never run in the test suite.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from _revision import export   # benchmarks/ is first on sys.path when a script here runs

ROOT = Path(__file__).resolve().parents[1]


def _study(folder: Path, batch: int, replicates: int) -> Path:
    text = (ROOT / "configs" / "demo.toml").read_text()
    for old, new in (("replicates = 200", f"replicates = {replicates}"),
                     ("budgets = [10, 20, 30]\n", f"budgets = [10, 20, 30]\nbatch = {batch}\n")):
        if old not in text:
            sys.exit(f"rounds_time.py: configs/demo.toml no longer holds {old.strip()!r}; update this script")
        text = text.replace(old, new)
    path = folder / "demo-rounds.toml"
    path.write_text(text)
    return path


def _run(src: Path, study: Path, out: Path) -> float:
    env = dict(os.environ, PYTHONPATH=str(src))
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-m", "simlab", "run", str(study), "--jobs", "1", "--no-report", "--quiet",
                    "--fresh", "--out", str(out)], env=env, check=True, stdout=subprocess.DEVNULL,
                   cwd=study.parent)     # not this checkout: `python -m` puts the working directory first on sys.path
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--before", required=True, help="git revision to measure beside this checkout")
    ap.add_argument("--batch", type=int, default=3)
    ap.add_argument("--replicates", type=int, default=40)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        trees = {"before": export(args.before, tmp / "before"), "now": ROOT}
        study = _study(tmp, args.batch, args.replicates)
        times = {side: [] for side in trees}
        for _ in range(args.repeats):
            for side, src in trees.items():
                times[side].append(_run(src, study, tmp / f"out-{side}"))
        import pandas as pd

        same = pd.read_parquet(tmp / "out-before" / "traces.parquet").equals(
            pd.read_parquet(tmp / "out-now" / "traces.parquet"))
    med = {side: statistics.median(t) for side, t in times.items()}
    print(f"demo with batch = {args.batch}, {args.replicates} replicates, --jobs 1, no report; "
          f"load {os.getloadavg()[0]:.1f}")
    for side, t in times.items():
        print(f"  {side:7s} median {med[side]:6.2f} s   ({', '.join(f'{x:.2f}' for x in t)})")
    print(f"  before/now {med['before'] / med['now']:.2f}x; traces identical: {same}")


if __name__ == "__main__":
    main()
