"""A stopped run (kill PID, Ctrl-C) stops its workers, keeps its chunks, removes its lock and says how to resume.

Exit codes are 128 + the signal number (`common practice` for POSIX shells): 143 after
SIGTERM, 130 after SIGINT. Ctrl-C reaches the whole process group, workers included.
"""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
from command_line import simlab

# Long enough to be stopped part-way with --jobs 2 (8 chunks of 12 replicates): the stop must land while
# chunks remain. With 6 replicates a chunk, the run finished before the signal took effect (exit 0,
# every file written) in two of five full-suite runs under load.
SLOW = """
[study]
name = "safe-slow"
replicates = 96
seed = 77
[space]
dose = [0.0, 1.0]
temp = [20.0, 40.0]
[world]
lengthscale = [0.3, 6.0]
amplitude = 1.0
noise = 0.05
[campaign]
initial = 3
budgets = [6, 20]
pool = 256
[target]
regret = 0.05
[[policy]]
rule = "thompson"
features = 128
[[policy]]
rule = "random"
"""


def _session_alive(pgid: int) -> list[int]:
    """Processes of the session still running (zombies are dead: they only wait to be reaped)."""
    import psutil
    alive = []
    for p in psutil.process_iter(["pid", "status"]):
        try:
            if os.getpgid(p.pid) == pgid and p.info["status"] != psutil.STATUS_ZOMBIE:
                alive.append(p.pid)
        except (ProcessLookupError, psutil.Error):
            pass
    return alive


def _start_and_stop(folder: Path, sig: int, *, group: bool):
    proc = subprocess.Popen([sys.executable, "-m", "simlab", "run", "s.toml", "--out", "cut", "--jobs", "2",
                             "--quiet", "--no-report"], cwd=folder, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, start_new_session=True)
    partial = folder / "cut" / ".partial"
    deadline = time.time() + 240
    while time.time() < deadline and proc.poll() is None and not list(partial.glob("chunk-*.parquet")):
        time.sleep(0.05)
    assert proc.poll() is None, "the run finished before it could be stopped; make SLOW longer"
    os.killpg(proc.pid, sig) if group else os.kill(proc.pid, sig)
    out, err = proc.communicate(timeout=120)
    time.sleep(0.5)
    if proc.returncode == 0:   # diagnose a stop that did not take (seen once under load): what did the run do?
        err += (f"\n[exit 0 after the signal; stdout: {out[-500:]!r}; folder: "
                f"{sorted(p.name for p in (folder / 'cut').rglob('*'))}]")
    return proc, err


@pytest.mark.parametrize("sig,code,group", [(signal.SIGTERM, 143, False), (signal.SIGINT, 130, True)],
                         ids=["kill-PID", "ctrl-c"])
def test_a_stopped_run_keeps_its_chunks_removes_its_lock_and_its_workers(tmp_path, sig, code, group):
    pytest.importorskip("psutil")
    (tmp_path / "s.toml").write_text(SLOW)
    proc, err = _start_and_stop(tmp_path, sig, group=group)
    lines = [line for line in err.splitlines() if line.strip()]
    assert proc.returncode == code, err
    assert len(lines) == 1 and "--resume" in lines[0] and "Traceback" not in err, err
    assert not (tmp_path / "cut" / ".lock").exists()
    assert list((tmp_path / "cut" / ".partial").glob("chunk-*.parquet"))
    assert _session_alive(proc.pid) == [], "worker processes outlived the run"
    if sig != signal.SIGTERM:
        return                               # resuming is the same after either signal
    resumed = simlab("run", "s.toml", "--out", "cut", "--resume", "--quiet", "--no-report", cwd=tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    assert len(pd.read_parquet(tmp_path / "cut" / "traces.parquet")) == 96 * 2 * 20
