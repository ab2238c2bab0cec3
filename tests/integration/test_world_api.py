"""simlab.world: one replicate's objective in the user's units and orientation, checked against the traces
and scipy; worlds.csv written with the traces and rebuilt identically on resume."""

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import differential_evolution

import simlab
from simlab.study.spec import parse_study
from simlab.replay.store import read_worlds

AMP = 1.5
BASE = {"study": {"name": "world-look", "goal": "maximize", "replicates": 4, "seed": 21},
        "space": {"feed": [0.5, 2.5], "temp": [28.0, 37.0]},
        "world": {"kernel": "matern52", "lengthscale": [0.4, 2.0], "amplitude": AMP, "mean": 7.0, "noise": 0.1},
        "campaign": {"initial": 3, "budgets": [8], "pool": 256}, "target": {"regret": 0.2},
        "policy": [{"rule": "ei"}, {"rule": "random"}]}
NAMES = ["feed", "temp"]


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    study = parse_study(BASE, source="test")
    out = tmp_path_factory.mktemp("world") / "run"
    result = simlab.run_study(study, out=out)
    return study, result


def test_values_at_the_traces_inputs_are_the_traces_f(run):
    study, result = run
    t = result.traces
    for r in range(study.replicates):
        w = simlab.world(study, r)
        rows = t[t["replicate"] == r]
        # The traces' f comes from the runner on unit-cube inputs; here the inputs go through user units
        # and back, which moves them by float64 rounding (~1e-16 relative), i.e. the value by far less
        # than 1e-10 x amplitude (common practice: the world's slope is a few amplitudes per lengthscale).
        np.testing.assert_allclose(w(rows[NAMES].to_numpy()), rows["f"].to_numpy(), rtol=0, atol=1e-10 * AMP)
    # negative control: another replicate's world does not match these traces
    other = simlab.world(study, 1)(t.loc[t["replicate"] == 0, NAMES].to_numpy())
    assert np.max(np.abs(other - t.loc[t["replicate"] == 0, "f"].to_numpy())) > 1e-3 * AMP


def test_best_value_against_differential_evolution(run):
    study, result = run
    low, high = np.array([0.5, 28.0]), np.array([2.5, 37.0])
    for r in (0, 3):
        w = simlab.world(study, r)
        # Reference: scipy.optimize.differential_evolution on the world in user units (maximised, so
        # the negated world is minimised), polished by scipy's L-BFGS-B. Tolerance: 1e-3 x amplitude.
        de = differential_evolution(lambda X: -w(X.T), list(zip(low, high)), popsize=30, tol=1e-10, seed=300 + r,
                                    vectorized=True, updating="deferred", polish=True)
        assert w.best_value >= -de.fun - 1e-3 * AMP
        assert np.all((w.best_x >= low) & (w.best_x <= high))
        assert w(w.best_x[None])[0] == pytest.approx(w.best_value, abs=1e-12 * AMP)
        # a maximize study: the best value is the largest, so no trace value lies above it by more than
        # the search's own error (f* also counts evaluated inputs; see worlds.csv "reference")
        assert result.traces.loc[result.traces["replicate"] == r, "f"].max() <= w.best_value + 1e-3 * AMP


def test_worlds_csv_holds_what_regret_is_measured_against(run):
    study, result = run
    worlds = read_worlds(result.path)
    assert list(worlds.columns) == ["replicate", *NAMES, "best_value", "optimum_gap", "optimum_searches",
                                    "optimum_spread", "reference", "reference_from_trial"]
    assert (worlds["optimum_searches"] >= 2).all() and (worlds["optimum_spread"] >= worlds["optimum_gap"]).all()
    assert worlds["replicate"].tolist() == list(range(study.replicates))
    assert (worlds["optimum_gap"] >= 0).all()
    t = result.traces
    for r in range(study.replicates):
        w = simlab.world(study, r)
        row = worlds.iloc[r]
        assert row["best_value"] == w.best_value and row["optimum_gap"] == w.optimum_gap
        assert row["optimum_searches"] == w.optimum_searches and row["optimum_spread"] == w.optimum_spread
        np.testing.assert_array_equal(row[NAMES].to_numpy(dtype=float), w.best_x)
        rows = t[t["replicate"] == r]
        # maximize: the reference is the larger of the searched optimum and every value evaluated
        assert row["reference"] == max(w.best_value, rows["f"].max())
        # regret of the recommendation = reference - f(recommendation), in the user's orientation
        for _, camp in rows.groupby("policy", observed=True):
            f_at = camp.set_index("trial")["f"]
            f_rec = f_at.loc[camp["rec_trial"]].to_numpy()
            np.testing.assert_allclose(camp["regret"].to_numpy(), row["reference"] - f_rec, rtol=0,
                                       atol=1e-12 * AMP)
            if not row["reference_from_trial"]:
                np.testing.assert_allclose(camp["regret"].to_numpy(), w.best_value - f_rec, rtol=0, atol=1e-12 * AMP)


def test_world_accepts_a_path_and_refuses_bad_input(run, tmp_path):
    study, result = run
    from_folder = simlab.world(result.path, 2)
    assert from_folder.best_value == simlab.world(study, 2).best_value
    for bad in (-1, 4, 1.0, True, "0"):
        with pytest.raises(ValueError, match=r"replicate must be an integer from 0 to 3 .*got"):
            simlab.world(study, bad)
    w = simlab.world(study, 0)
    for shape in [(2,), (3, 3), (1, 2, 2)]:
        with pytest.raises(ValueError, match=r"x must have shape \(n, 2\).*feed, temp.*got shape"):
            w(np.full(shape, 1.0))
    with pytest.raises(ValueError, match="x must lie in the study's space"):
        w([[3.0, 30.0]])
    with pytest.raises(ValueError, match="finite"):
        w([[np.nan, 30.0]])


def test_worlds_csv_is_rebuilt_identically_on_resume(run, tmp_path, monkeypatch):
    study, result = run
    import simlab.replay.runner as runner

    real = runner.replay_chunks

    def interrupted(*args, **kwargs):
        for k, item in enumerate(real(*args, **kwargs)):
            if k == 2:
                raise KeyboardInterrupt("simulated kill after two chunks")
            yield item

    big = parse_study({**BASE, "study": {**BASE["study"], "replicates": 12}}, source="test")
    whole = simlab.run_study(big, out=tmp_path / "whole")
    monkeypatch.setattr(runner, "replay_chunks", interrupted)
    with pytest.raises(KeyboardInterrupt):
        simlab.run_study(big, out=tmp_path / "cut")
    assert not (tmp_path / "cut" / "worlds.csv").exists()
    monkeypatch.setattr(runner, "replay_chunks", real)
    resumed = simlab.run_study(big, out=tmp_path / "cut", resume=True, jobs=2)
    assert (tmp_path / "cut" / "worlds.csv").read_bytes() == (tmp_path / "whole" / "worlds.csv").read_bytes()
    pd.testing.assert_frame_equal(resumed.traces, whole.traces)
    # and the in-memory table of a run that writes nothing is the same table
    memory = simlab.run_study(big, write=False).worlds
    pd.testing.assert_frame_equal(memory.reset_index(drop=True), read_worlds(tmp_path / "whole"), check_dtype=False)
