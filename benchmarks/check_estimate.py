"""How close `simlab check`'s time estimate lands: estimate, actual `simlab run` wall time and ratio.

    python benchmarks/check_estimate.py [--replicates 10] [--jobs 1 2] [configs/X.toml ...]

For each study (default: every configs/*.toml) and each --jobs, runs `simlab check STUDY
--replicates N --jobs J` and then `simlab run STUDY --replicates N --jobs J --out TMP --quiet`
in fresh interpreters, timing the run's wall clock from outside (interpreter start-up, world
optima, workers, report and all, as a user waits for it). Prints one row per study and jobs,
with the machine's 1-minute load average after the run (other workers share the cores: the
ratios are only as steady as that load).
The aim (issue 12) is a ratio within 0.7-1.3. Benchmarks never run in the test suite.
"""

import argparse
import os
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
_UNITS = {"s": 1.0, "min": 60.0, "h": 3600.0}


def _simlab(*args):
    return subprocess.run([sys.executable, "-m", "simlab", *map(str, args)], capture_output=True, text=True)


def estimate(study: Path, replicates: int, jobs: int) -> float:
    out = _simlab("check", study, "--replicates", replicates, "--jobs", jobs)
    if out.returncode != 0:
        raise SystemExit(f"check failed for {study}: {out.stderr.strip()}")
    m = re.search(r"simlab run needs about ([\d.]+) (s|min|h)", out.stdout)
    return float(m.group(1)) * _UNITS[m.group(2)]


def actual(study: Path, replicates: int, jobs: int) -> float:
    with tempfile.TemporaryDirectory(prefix="simlab-bench-") as tmp:
        t0 = time.perf_counter()
        out = _simlab("run", study, "--replicates", replicates, "--jobs", jobs, "--out", Path(tmp) / "out", "--quiet")
        wall = time.perf_counter() - t0
    if out.returncode != 0:
        raise SystemExit(f"run failed for {study}: {out.stderr.strip()}")
    return wall


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("studies", nargs="*", type=Path)
    p.add_argument("--replicates", type=int, default=10)
    p.add_argument("--jobs", type=int, nargs="+", default=[1, 2])
    args = p.parse_args(argv)
    studies = args.studies or sorted((ROOT / "configs").glob("*.toml"))
    print(f"{'study':<28} {'jobs':>4} {'estimate s':>10} {'actual s':>9} {'ratio':>6} {'load':>5}", flush=True)
    for study in studies:
        for jobs in args.jobs:
            est = estimate(study, args.replicates, jobs)
            real = actual(study, args.replicates, jobs)
            print(f"{study.stem:<28} {jobs:>4} {est:>10.1f} {real:>9.1f} {est / real:>6.2f} {os.getloadavg()[0]:>5.1f}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
