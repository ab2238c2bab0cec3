"""check's schedule on a shared machine: each worker's share of the cores under fair sharing."""

import pytest

from simlab.replay.estimate import Estimate, _block_fit, _makespan, _others, _slowdown


def test_an_idle_machine_gives_each_worker_a_core():
    # negative control for the shared case below: nothing else runs, two workers on two cores
    assert _slowdown(2, 0.0, 2) == 1.0 and _others(1.0, 1.0, 2) == 0.0


def test_one_other_busy_process_leaves_two_workers_two_thirds_of_a_core_each():
    # fair sharing (common practice): 3 runnable processes on 2 cores get 2/3 of a core each,
    # the one timed process got a whole core, so each worker runs 1.5x slower (hand-computed)
    assert _slowdown(2, 1.0, 2) == pytest.approx(1.5)
    assert _slowdown(1, 1.0, 2) == 1.0


def test_others_inverts_the_share_the_timed_process_got():
    # 0.4 s of CPU in 1 s of wall on 2 cores: 2 / (1 + others) = 0.4, so others = 4;
    # then two workers share 2 cores with 4 others: 1/3 each, 1.2x slower than the timed 0.4
    assert _others(0.4, 1.0, 2) == pytest.approx(4.0)
    assert _slowdown(2, 4.0, 2) == pytest.approx(0.4 / (2 / 6))


def test_makespan_hands_tasks_to_the_first_free_worker():
    # five equal chunks on two workers end after three (hand-computed)
    assert _makespan([1.0] * 5, 2) == 3.0 and _makespan([1.0] * 5, 1) == 5.0


def _workers_alive(psutil) -> list:
    """joblib's worker processes among this process's children (its resource trackers aside)."""
    return [p for p in psutil.Process().children(recursive=True)
            if p.status() != psutil.STATUS_ZOMBIE and "popen_loky" in " ".join(p.cmdline())]


def test_timing_the_workers_start_leaves_no_worker_behind():
    psutil = pytest.importorskip("psutil")
    from joblib import Parallel, delayed

    from simlab.replay.estimate import worker_startup
    from simlab.replay.runner import _stop_local_workers
    Parallel(n_jobs=2)(delayed(abs)(i) for i in range(2))
    assert len(_workers_alive(psutil)) == 2            # negative control: joblib keeps its workers
    _stop_local_workers()
    worker_startup.cache_clear()
    assert worker_startup(2) > 0
    assert _workers_alive(psutil) == []


def test_block_fit_separates_a_blocks_fixed_cost_from_its_replicates():
    # a block of B replicates taking 1.5 + 0.2 B seconds (two points fix a line: exact arithmetic)
    assert _block_fit([2, 4], [1.9, 2.3]) == pytest.approx((0.2, 1.5))
    # timing noise that makes the line fall, or its intercept negative: the mean per replicate, no fixed cost
    assert _block_fit([2, 4], [2.0, 1.8]) == pytest.approx((3.8 / 6, 0.0))
    assert _block_fit([2, 4], [0.2, 2.0]) == pytest.approx((2.2 / 6, 0.0))
    assert _block_fit([5], [2.0]) == pytest.approx((0.4, 0.0))


def test_replay_estimate_prices_the_blocks_the_run_will_compute(monkeypatch):
    """40 replicates: the plan's chunks of 5 are computed by one process as two blocks of 20
    (runner._joined), so the replay costs 2 x (1 + 20 x 0.1) s, not 8 x (1 + 5 x 0.1)."""
    from studies import study_with

    study = study_with({"study": {"name": "t", "goal": "minimize", "replicates": 40, "seed": 1},
                        "space": {"a": [0.0, 1.0]}, "world": {"lengthscale": [0.3], "amplitude": 1.0, "noise": 0.1},
                        "campaign": {"initial": 2, "budgets": [4], "pool": 64}, "target": {"regret": 0.1}},
                       "t", policy=[{"rule": "ei"}])
    est = Estimate(per_replicate=0.1, timed=6, startup=0.0, report=2.0, per_block=1.0, figures=1.5)
    assert est._replay(study, 1) == pytest.approx(6.0)
    assert est.report_time(1) == pytest.approx(2.0)
    assert est.report_time(2) == pytest.approx(0.5 + 1.5 * 0.75)     # figures: (1 + 1/2) / 2 of their serial time
    # negative control: were the chunks not joined, the same estimate prices eight blocks of 5
    import simlab.replay.runner as runner
    monkeypatch.setattr(runner, "_joined", lambda study, tasks, workers=1: [[task] for task in tasks])
    assert est._replay(study, 1) == pytest.approx(8 * (1.0 + 5 * 0.1))
