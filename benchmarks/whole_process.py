"""What the user waits for: whole processes, timed from outside, side by side in one run.

    python benchmarks/whole_process.py [--repeats 3] [--replicates 40] [--demo]

study     `simlab run` (no report, one job) on a 2-D Matérn 5/2 study of --replicates
          replicates, 30 trials of EI (benchmarks/studies/ei-2d.toml), against the
          hand-written scikit-learn loop on the same study (benchmarks/handwritten_loop.py):
          fresh interpreters both, imports, world optima and all. Prints both medians and the
          ratio.
start     seconds to the first line on the screen for `simlab --help`, `simlab check` and
          `simlab run` (aim: 0.5 s), next to a bare `python -c "import numpy"`.
demo      (with --demo) `simlab run configs/demo.toml --jobs 2`, report included.

Repeats alternate between the sides, so a change in the machine's load falls on both; the
1-minute load average is printed with each table. Benchmarks never run in the test suite.
"""

from __future__ import annotations

import argparse
import os
import platform
import selectors
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def wall(cmd: list[str], **kw) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, **kw)
    return time.perf_counter() - t0


def first_line(cmd: list[str]) -> float:
    """Seconds from launch to the first bytes on standard output or standard error."""
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=ROOT)
    with selectors.DefaultSelector() as sel:
        sel.register(p.stdout, selectors.EVENT_READ)
        sel.register(p.stderr, selectors.EVENT_READ)
        sel.select()
    t = time.perf_counter() - t0
    p.kill()
    p.wait()
    return t


def study_file(folder: Path, replicates: int) -> Path:
    text = (HERE / "studies" / "ei-2d.toml").read_text().replace("replicates = 40", f"replicates = {replicates}")
    path = folder / "ei-2d.toml"
    path.write_text(text)
    return path


def simlab(*args) -> list[str]:
    return [sys.executable, "-m", "simlab", *map(str, args)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--replicates", type=int, default=40)
    ap.add_argument("--demo", action="store_true", help="also time the demo with --jobs 2 (minutes)")
    args = ap.parse_args()
    print(f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        study = study_file(tmp, args.replicates)
        ours, theirs = [], []
        for _ in range(args.repeats):
            ours.append(wall(simlab("run", study, "--no-report", "--jobs", 1, "--quiet", "--fresh", "--out", tmp / "o")))
            theirs.append(wall([sys.executable, str(HERE / "handwritten_loop.py"), "--replicates", str(args.replicates)]))
        a, b = statistics.median(ours), statistics.median(theirs)
        print(f"\nstudy: {args.replicates} replicates x 30 trials of EI, 2-D, one job (medians of {args.repeats}; "
              f"load {os.getloadavg()[0]:.1f})")
        print(f"  hand-written scikit-learn loop  {b:7.1f} s  1.0x")
        print(f"  simlab run --no-report          {a:7.1f} s  {b / a:.1f}x")

        cmds = {"python -c 'import numpy'": [sys.executable, "-c", "import numpy; print()"],
                "simlab --help": simlab("--help"),
                "simlab check (first line)": simlab("check", ROOT / "configs" / "demo.toml"),
                "simlab run (first line)": simlab("run", ROOT / "configs" / "demo.toml", "--fresh", "--out", tmp / "d")}
        times = {k: [] for k in cmds}
        for _ in range(max(args.repeats, 5)):
            for k, cmd in cmds.items():
                times[k].append(first_line(cmd))
        print(f"\nstart: seconds to the first line (medians of {max(args.repeats, 5)}; load {os.getloadavg()[0]:.1f})")
        for k, ts in times.items():
            print(f"  {k:28s} {statistics.median(ts):5.2f} s")

        if args.demo:
            ts = [wall(simlab("run", ROOT / "configs" / "demo.toml", "--jobs", 2, "--quiet", "--fresh", "--out", tmp / "demo"))
                  for _ in range(args.repeats)]
            print(f"\ndemo: configs/demo.toml --jobs 2, report included: {statistics.median(ts):.1f} s "
                  f"(median of {args.repeats}; load {os.getloadavg()[0]:.1f})")


if __name__ == "__main__":
    main()
