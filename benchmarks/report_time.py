"""The report's time, its figures drawn here one after another against drawn by worker processes.

    python benchmarks/report_time.py RESULTS [--jobs 2] [--repeats 3]

RESULTS is a finished results folder, e.g. the demo's (about a minute to make):

    python -m simlab run configs/demo.toml --jobs 2 --out /tmp/demo

after run   `write_outputs` timed inside a fresh interpreter that has loaded the results and,
            for --jobs N, left N joblib workers running with simlab's runner imported (what
            `simlab run --jobs N` hands the report after its replay); the report's own imports
            (matplotlib, seaborn) are timed, as a run pays them.
report DIR  the whole command `simlab report COPY --jobs N --quiet`, from a fresh interpreter to
            its exit (workers started by the report itself).

Each repeat writes into a fresh copy of the folder (without its figures and report.html), the
sides alternate so that a change in the machine's load falls on both, and every copy's figures
and report.html are checked byte for byte against the first serial one. Prints medians, the
ratio, the 1-minute load average, and how many cores two busy processes got before and after
(a pure-Python loop timed alone and two at once: on a machine shared with other work the workers
can get less than their cores, and then the report gains less or nothing). Benchmarks never run
in the test suite.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}   # this checkout's simlab, whatever is installed


def after_run(folder: Path, jobs: int) -> None:
    """In a fresh interpreter (``--one``): the report of `folder` as `simlab run --jobs` writes it."""
    from joblib import Parallel, delayed

    from simlab.api import load_results
    from simlab.report.outputs import write_outputs

    result = load_results(folder)
    if jobs > 1:   # the replay's workers: started, runner imported, idle
        Parallel(n_jobs=jobs)(delayed(_import_runner)() for _ in range(jobs))
    t0 = time.perf_counter()
    write_outputs(folder, result.study, result.traces, jobs=jobs)
    print(time.perf_counter() - t0)


def _import_runner() -> None:
    import simlab.replay.runner  # noqa: F401


def _spin(_=None) -> float:
    t0 = time.perf_counter()
    x = 0
    for i in range(10_000_000):
        x += i
    return time.perf_counter() - t0


def cores_got() -> float:
    """Cores two busy processes get here now: 2 x (one loop alone) / (the same loop, two at once)."""
    alone = _spin()
    with multiprocessing.Pool(2) as pool:
        both = pool.map(_spin, range(2))
    return 2 * alone / max(both)


def copy(results: Path, to: Path) -> Path:
    if to.exists():
        shutil.rmtree(to)
    shutil.copytree(results, to, ignore=shutil.ignore_patterns("figures", "report.html", ".lock"))
    return to


def written(folder: Path) -> dict[str, bytes]:
    files = {p.relative_to(folder).as_posix(): p.read_bytes() for p in (folder / "figures").iterdir()}
    files["report.html"] = (folder / "report.html").read_bytes()
    return files


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("results", type=Path, help="a finished results folder")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--one", type=int, metavar="JOBS", help=argparse.SUPPRESS)   # a single timing, in a child
    args = ap.parse_args()
    if args.one is not None:
        after_run(args.results, args.one)
        return
    if not (args.results / "traces.parquet").is_file():
        sys.exit(f"{args.results}: not a finished results folder; make one with "
                 f"`python -m simlab run configs/demo.toml --jobs 2 --out {args.results}`")
    print(f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    sides = {"after run": lambda d, j: float(subprocess.run(
                 [sys.executable, __file__, str(d), "--one", str(j)], env=ENV, check=True,
                 capture_output=True, text=True).stdout.split()[-1]),
             "report DIR": lambda d, j: _wall([sys.executable, "-m", "simlab", "report", str(d), "--jobs", str(j),
                                               "--quiet"])}
    times = {(side, j): [] for side in sides for j in (1, args.jobs)}
    before = cores_got()
    reference, differ = None, []
    with tempfile.TemporaryDirectory() as tmp:
        for r in range(args.repeats):
            for side, run in sides.items():
                for j in (1, args.jobs):
                    folder = copy(args.results, Path(tmp) / "copy")
                    times[side, j].append(run(folder, j))
                    files = written(folder)
                    if reference is None:
                        reference = files
                    elif files != reference:
                        differ.append((side, j, r, sorted(k for k in files if files[k] != reference.get(k))))
    print(f"\nreport of {args.results} (medians of {args.repeats}; load {os.getloadavg()[0]:.1f}; two busy "
          f"processes got {before:.1f} cores before, {cores_got():.1f} after)")
    for side in sides:
        serial, parallel = statistics.median(times[side, 1]), statistics.median(times[side, args.jobs])
        print(f"  {side:10s}  --jobs 1 {serial:5.2f} s   --jobs {args.jobs} {parallel:5.2f} s   "
              f"{serial / parallel:.2f}x   (each: {_list(times[side, 1])} | {_list(times[side, args.jobs])})")
    print("  files: every copy's figures and report.html byte-identical" if not differ
          else f"  files DIFFER: {differ}")


def _wall(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, env=ENV, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0


def _list(values) -> str:
    return " ".join(f"{v:.2f}" for v in values)


if __name__ == "__main__":
    main()
