"""The results folder's lock: of many processes entering at once, exactly one wins."""

import multiprocessing
import os
import socket
import time

import pytest

from simlab.study.spec import parse_study
from simlab.replay.store import FolderBusy, RunFolder

STUDY = parse_study({"space": {"a": [0.0, 1.0]}, "world": {"lengthscale": 0.2, "amplitude": 1.0, "noise": 0.1},
                     "campaign": {"initial": 2, "budgets": [4]}, "target": {"regret": 0.1},
                     "policy": [{"rule": "random"}]}, source="lock-test")
RACERS = 4
TRIALS = 100


def _slow_lock_files():
    """A slow file system: opening the lock file takes 20 ms before the caller gets it back.
    Whatever an implementation does between making the file visible and owning it then
    takes long enough for every other racer to see it in that state."""
    real = os.open

    def slow(path, *args, **kwargs):
        fd = real(path, *args, **kwargs)
        if os.path.basename(path) == ".lock":
            time.sleep(0.02)
        return fd

    os.open = slow                       # in a forked racer only


def _racer(base, trials, start, held, wins, slow):
    """Enter each trial's folder together with the other racers; hold the lock until all have tried."""
    if slow:
        _slow_lock_files()
    for t in range(trials):
        folder = RunFolder(base / f"trial-{t:03d}", STUDY, "test", chunks=1)
        start.wait()
        try:
            folder.__enter__()
            got = True
        except FolderBusy:
            got = False
        if got:
            with wins.get_lock():
                wins[t] += 1
        held.wait()                      # everyone has tried before the winner lets go
        if got:
            folder.__exit__(None, None, None)


@pytest.mark.parametrize("slow", [False, True], ids=["plain", "slow-file-system"])
def test_exactly_one_of_many_simultaneous_writers_takes_the_lock(tmp_path, slow):
    """Atomic creation is the whole point (common practice: O_EXCL or an OS file lock); a lock
    that is visible before its owner is written let three racers in together in 67 of 100 trials.
    On a loaded machine the racers rarely meet inside that window, so the slow-file-system
    case widens it (the race then shows in nearly every trial on the code before the fix)."""
    ctx = multiprocessing.get_context("fork")
    start, held = ctx.Barrier(RACERS, timeout=60), ctx.Barrier(RACERS, timeout=60)
    wins = ctx.Array("i", TRIALS)
    procs = [ctx.Process(target=_racer, args=(tmp_path, TRIALS, start, held, wins, slow)) for _ in range(RACERS)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(120)
    assert all(p.exitcode == 0 for p in procs)
    assert list(wins) == [1] * TRIALS, f"trials with other than one winner: {[w for w in wins if w != 1]}"
    assert not any((tmp_path / f"trial-{t:03d}" / ".lock").exists() for t in range(TRIALS))


def test_a_lock_of_a_dead_process_is_taken_over_and_a_live_one_is_not(tmp_path):
    folder = tmp_path / "f"
    folder.mkdir()
    (folder / ".lock").write_text(f"{socket.gethostname()} 999999999")   # no such process
    with RunFolder(folder, STUDY, "test", chunks=1):
        assert (folder / ".lock").read_text() == f"{socket.gethostname()} {os.getpid()}"
        with pytest.raises(FolderBusy, match="another simlab run"):      # negative control: held
            RunFolder(folder, STUDY, "test", chunks=1).__enter__()
    assert not (folder / ".lock").exists()
