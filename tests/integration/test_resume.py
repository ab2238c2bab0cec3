"""Results folders: killed runs resume bit for bit, folders are never silently lost or shared, clusters agree."""

import os
import signal
import socket
import subprocess
import sys
import time
import tomllib

import pandas as pd
import pytest

from simlab import run_study
from simlab.replay.runner import chunk_plan
from simlab.study.spec import parse_study
from simlab.replay.store import FolderBusy

STUDY = """
[study]
name = "resume-me"
replicates = 24
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
budgets = [6, 10]
pool = 256
[target]
regret = 0.05
[[policy]]
rule = "ei"
[[policy]]
rule = "thompson"
features = 128
[[policy]]
rule = "random"
"""


def _simlab(*args, cwd):
    return subprocess.run([sys.executable, "-m", "simlab", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=600)


@pytest.mark.slow
def test_killed_run_resumes_bit_identical(tmp_path):
    (tmp_path / "s.toml").write_text(STUDY)
    reference = _simlab("run", "s.toml", "--out", "ref", "--quiet", "--no-report", cwd=tmp_path)
    assert reference.returncode == 0, reference.stderr

    proc = subprocess.Popen([sys.executable, "-m", "simlab", "run", "s.toml", "--out", "cut", "--quiet",
                             "--no-report"], cwd=tmp_path, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    partial = tmp_path / "cut" / ".partial"
    deadline = time.time() + 300
    while time.time() < deadline and proc.poll() is None:
        if partial.is_dir() and len(list(partial.glob("chunk-*.parquet"))) >= 2:
            break
        time.sleep(0.05)
    assert proc.poll() is None, "the run finished before it could be killed; make the study longer"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    done = len(list(partial.glob("chunk-*.parquet")))
    assert 2 <= done < len(chunk_plan(parse_study(tomllib.loads(STUDY), source="s.toml")))
    assert not (tmp_path / "cut" / "traces.parquet").exists()

    refused = _simlab("run", "s.toml", "--out", "cut", "--quiet", cwd=tmp_path)
    assert refused.returncode == 2
    assert "--resume" in refused.stderr and "--fresh" in refused.stderr and "Traceback" not in refused.stderr
    unreadable = _simlab("report", "cut", cwd=tmp_path)
    assert unreadable.returncode == 2 and "unfinished" in unreadable.stderr

    resumed = _simlab("run", "s.toml", "--out", "cut", "--resume", "--quiet", "--no-report", "--jobs", "2",
                      cwd=tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    a = pd.read_parquet(tmp_path / "ref" / "traces.parquet")
    b = pd.read_parquet(tmp_path / "cut" / "traces.parquet")
    pd.testing.assert_frame_equal(a, b)                       # bit for bit, in the same order
    counts = b.groupby(["policy", "replicate"]).size()
    assert len(counts) == 3 * 24 and (counts == 10).all()     # no replicate lost or doubled
    assert not (tmp_path / "cut" / ".partial").exists()

    again = _simlab("run", "s.toml", "--out", "cut", "--quiet", "--no-report", cwd=tmp_path)
    assert again.returncode == 0 and "up to date" in again.stderr


def _small(**over):
    data = {"study": {"name": "small", "replicates": 4, "seed": 1}, "space": {"a": [0.0, 1.0]},
            "world": {"lengthscale": 0.2, "amplitude": 1.0, "noise": 0.05},
            "campaign": {"initial": 2, "budgets": [5], "pool": 64}, "target": {"regret": 0.1},
            "policy": [{"rule": "ei"}, {"rule": "random"}]}
    for key, value in over.items():
        data[key] = {**data[key], **value}
    return parse_study(data, source="test")


def test_folder_of_another_study_is_refused(tmp_path):
    run_study(_small(), out=tmp_path / "out")
    with pytest.raises(FolderBusy, match="different study.*--out.*--fresh"):
        run_study(_small(study={"seed": 2}), out=tmp_path / "out")
    fresh = run_study(_small(study={"seed": 2}), out=tmp_path / "out", fresh=True)
    assert not fresh.up_to_date and fresh.study.seed == 2
    assert run_study(_small(study={"seed": 2}), out=tmp_path / "out").up_to_date


def test_a_foreign_folder_is_not_overwritten(tmp_path):
    (tmp_path / "notes.txt").write_text("someone's work")
    with pytest.raises(FolderBusy, match="not empty"):
        run_study(_small(), out=tmp_path)
    assert (tmp_path / "notes.txt").read_text() == "someone's work"


def test_a_second_writer_is_refused(tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    (folder / ".lock").write_text(f"{socket.gethostname()} {os.getpid()}")   # a live process holds it
    with pytest.raises(FolderBusy, match="another simlab run"):
        run_study(_small(), out=folder)
    (folder / ".lock").write_text(f"{socket.gethostname()} 999999999")       # stale: no such process
    assert run_study(_small(), out=folder).traces.shape[0] == 2 * 4 * 5
    assert not (folder / ".lock").exists()


@pytest.mark.slow
def test_cluster_backend_matches_local_run(tmp_path):
    """A local dask.distributed cluster on 127.0.0.1 (two worker processes) gives the same
    traces as a local run: every random stream is keyed by replicate, not by worker."""
    distributed = pytest.importorskip("distributed")
    study = _small(study={"replicates": 6})
    local = run_study(study, write=False).traces
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", processes=True,
                                  dashboard_address=None) as cluster:
        remote = run_study(study, out=tmp_path / "c", cluster=cluster.scheduler_address).traces
    pd.testing.assert_frame_equal(local, remote)


def test_an_unfinished_run_of_another_version_is_not_resumed(tmp_path):
    """Chunks replayed by another simlab version could differ in their numbers; a resume
    must not mix them into one traces file (common practice: refuse rather than guess)."""
    import json

    run_study(_small(), out=tmp_path / "out")
    manifest = tmp_path / "out" / "manifest.json"
    data = json.loads(manifest.read_text())
    data.update(complete=False, simlab_version="0.0.1")
    manifest.write_text(json.dumps(data))
    with pytest.raises(FolderBusy, match="made by simlab 0.0.1.*--fresh"):
        run_study(_small(), out=tmp_path / "out", resume=True)
    assert run_study(_small(), out=tmp_path / "out", fresh=True).traces.shape[0] == 2 * 4 * 5
