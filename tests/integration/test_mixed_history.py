"""[history] over stepped and categorical inputs and [candidates] libraries: past trials read in the
user's terms (level names, allowed values, library rows), refused in one line otherwise, worlds
conditioned on them as box worlds are, optima searched with the correction, traces and dumps."""

import dataclasses

import numpy as np
import pytest
from command_line import one_line, simlab

from simlab.model.gp import Posterior
from simlab.model.levels import mixed_kernel
from simlab.replay.runner import replay
from simlab.study.dump import dump_study
from simlab.study.spec import StudyError, load_study
from simlab.worlds.mixed import ConditionedMixedWorld, LibraryWorld, MixedWorld, search_combinations
from simlab.worlds.replicate import history_arrays, make_world

STUDY = """
[study]
name = "seeding"
replicates = 2
seed = 5
[space]
cooling_rate = [0.1, 2.0]
stages = { low = 1, high = 3, step = 1 }
solvent = { levels = ["acetone", "ethanol", "water"] }
[world]
lengthscale = [0.6, 1.0]
amplitude = 1.0
mean = 10.0
noise = 0.1
level_correlation = 0.4
features = 128
[campaign]
budgets = [3]
pool = 128
[target]
regret = 0.1
[history]
file = "past.csv"
[[policy]]
rule = "ei"
[[policy]]
rule = "random"
"""

PAST = """cooling_rate,stages,solvent,y
0.5,2,ethanol,9.1
1.5,3.0000000001,water,10.4
0.3,1,acetone,8.7
1.1,2,acetone,9.6
"""


def write(tmp_path, study=STUDY, past=PAST):
    (tmp_path / "past.csv").write_text(past, encoding="utf-8")
    p = tmp_path / "s.toml"
    p.write_text(study, encoding="utf-8")
    return p


def test_levels_read_as_indices_and_steps_as_exact_values(tmp_path):
    s = load_study(write(tmp_path))
    X = np.array(s.history.X)
    # level names -> level indices (what Space.to_unit expects); 3.0000000001 is within 1e-9 x step of 3
    np.testing.assert_array_equal(X[:, 2], [1.0, 2.0, 0.0, 0.0])
    assert X[1, 1] == 3.0 and X.dtype == float
    assert load_study(write(tmp_path, dump_study(s))) == s          # dumped and read again: the same study


@pytest.mark.parametrize("past,says", [
    (PAST.replace("ethanol", "methanol"),
     'column "solvent", row 2 (the header is row 1): "methanol" is not a level of [space] solvent; '
     "allowed: acetone, ethanol, water"),
    (PAST.replace("0.3,1,", "0.3,1.5,"),
     'column "stages", row 4 (the header is row 1): 1.5 is not one of the allowed values 1, 2, ... 3 (step 1)'),
    # 1e-7 off the grid is 100 x the tolerance of 1e-9 x step
    (PAST.replace("0.3,1,", "0.3,1.0000001,"), 'column "stages", row 4 (the header is row 1): 1.0000001 is not one'),
    (PAST.replace("1.1,2,", "1.1,4,"), 'column "stages", row 5 (the header is row 1): 4 lies outside [space] [1, 3]'),
    (PAST.replace("1.1,2,", "1.1,,"), 'column "stages", row 5 (the header is row 1): is blank'),
])
def test_values_the_space_does_not_allow_are_one_line(tmp_path, past, says):
    path = write(tmp_path, past=past)
    with pytest.raises(StudyError) as info:
        load_study(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}: history.file: {tmp_path / 'past.csv'}: ") and says in msg and "\n" not in msg, msg
    # the command line: one line, exit 2, nothing written
    out = one_line(simlab("run", "s.toml", "--out", "res", cwd=tmp_path))
    assert out.startswith("simlab: error: s.toml: history.file: ") and says in out
    assert not (tmp_path / "res").exists()


def test_conditioned_mixed_worlds_agree_with_the_history(tmp_path):
    """Mean of 300 conditioned worlds at the past inputs = the posterior mean of the product kernel.

    Pathwise conditioning (Wilson et al. 2020) makes the mean of the conditioned draws the exact
    posterior mean (Rasmussen & Williams 2006, eq. 2.25), so only Monte Carlo error is allowed: 5
    standard errors of the 300 worlds. Negative control: the unconditioned worlds average to the
    prior mean instead and fail the same check.
    """
    s = dataclasses.replace(load_study(write(tmp_path)), replicates=300)
    H, yH = history_arrays(s)
    worlds = [make_world(s, r) for r in range(300)]
    assert all(isinstance(w, ConditionedMixedWorld) for w in worlds)
    vals = np.array([w(H) for w in worlds])
    post = Posterior(mixed_kernel(s.world.prior, s.space), 10.0, 0.1)
    post.add_many(H, yH)
    mu, _ = post.moments(H)
    se = vals.std(0, ddof=1) / np.sqrt(len(vals))
    assert np.all(np.abs(vals.mean(0) - mu) < 5 * se)
    plain = dataclasses.replace(s, history=None)
    raw = np.array([make_world(plain, r)(H) for r in range(300)])
    assert isinstance(make_world(plain, 0), MixedWorld)
    assert not np.all(np.abs(raw.mean(0) - mu) < 5 * raw.std(0, ddof=1) / np.sqrt(300))


def _brute_minimum(world, sp, n=4001):
    """The world on 4001 cooling rates at every (stage, solvent): an upper bound of the true minimum."""
    xs = np.linspace(0.0, 1.0, n)
    best = np.inf
    for s_ in sp.grid(1):
        for c in sp.grid(2):
            U = np.column_stack([xs, np.full(n, s_), np.full(n, c)])
            best = min(best, float(world(U).min()))
    return best


@pytest.mark.slow
def test_conditioned_optimum_is_not_missed(tmp_path):
    """A past trial far below the prior (mean - 4 amplitudes) puts the optimum where the prior draw alone
    has none. The combination-by-combination search of the conditioned world must reach a dense grid's
    minimum (a grid of 4001 points per combination over one continuous input, lengthscale 0.6 / 1.9
    of the range, is within float noise of the true minimum of such a smooth function); the tolerance
    1e-6 is far below the effect. Negative control: the base world's own optimum, read in the
    conditioned world, misses by much more than that (the check can fail)."""
    past = PAST + "0.9,2,water,6.0\n"
    s = load_study(write(tmp_path, past=past))
    for r in range(3):
        w = make_world(s, r)
        u, v = search_combinations(w, np.random.default_rng(r))
        brute = _brute_minimum(w, s.space)
        assert np.isclose(w(u[None])[0], v) and v <= brute + 1e-6, (r, v, brute)
        ub, _ = w.base.optimum(np.random.default_rng(r))
        assert w(ub[None])[0] > brute + 0.1


def test_history_rows_show_as_user_values_in_the_traces(tmp_path):
    s = load_study(write(tmp_path))
    t = replay(s)
    past = t[t["history"]]
    assert sorted(past["trial"].unique()) == [-3, -2, -1, 0]
    for _, g in past.groupby(["policy", "replicate"], observed=True):
        assert list(g["solvent"]) == ["ethanol", "water", "acetone", "acetone"]
        assert list(g["stages"]) == [2.0, 3.0, 1.0, 2.0]
        np.testing.assert_array_equal(g["y"], [9.1, 10.4, 8.7, 9.6])
    assert (t["regret"] >= 0).all() and not t[["y", "f", "regret"]].isna().any().any()


LIBRARY_STUDY = """
[study]
name = "formulations"
replicates = 2
seed = 2
[candidates]
file = "library.csv"
[world]
lengthscale = [0.5, 2.0]
amplitude = 1.0
noise = 0.05
level_correlation = { binder = 0.3 }
[campaign]
budgets = [4]
[target]
regret = 0.1
[history]
file = "past.csv"
response = "hardness"
[[policy]]
rule = "ei"
[[policy]]
rule = "random"
"""

LIBRARY = """filler,binder,layers
0.5,starch,1
1.0,gum,2
1.5,pectin,3
2.0,gum,3
0.5,pectin,2
1.0,starch,3
"""


def test_library_history_rows_are_library_rows(tmp_path):
    (tmp_path / "library.csv").write_text(LIBRARY, encoding="utf-8")
    # 1.50 and 3.0 are the library's 1.5 and 3 written otherwise
    path = write(tmp_path, LIBRARY_STUDY, "filler,binder,layers,hardness\n1.50,pectin,3.0,4.2\n1.0,gum,2,3.1\n")
    s = load_study(path)
    H, yH = history_arrays(s)
    rows = s.space.library_unit()
    assert [int(np.flatnonzero((rows == h).all(axis=1))[0]) for h in H] == [2, 1]   # bit for bit those rows
    w = make_world(s, 0)
    assert isinstance(w, LibraryWorld)
    # conditioned on the past trials: within a few noise sd of them (unconditioned: prior sd 1)
    assert np.abs(w(H) - yH).max() < 4 * 0.05
    t = replay(s)
    assert (t.loc[t["history"], "binder"].to_numpy().reshape(-1, 2) == ["pectin", "gum"]).all()
    assert (t["regret"] >= 0).all()
    assert load_study(write(tmp_path, dump_study(s), "filler,binder,layers,hardness\n1.5,pectin,3,4.2\n"
                            "1.0,gum,2,3.1\n")) == s


def test_a_past_trial_off_the_library_names_its_row(tmp_path):
    (tmp_path / "library.csv").write_text(LIBRARY, encoding="utf-8")
    path = write(tmp_path, LIBRARY_STUDY, "filler,binder,layers,hardness\n1.5,pectin,3,4.2\n1.5,gum,3,3.1\n")
    with pytest.raises(StudyError) as info:
        load_study(path)
    msg = str(info.value)
    assert msg.startswith(f"{path}: history.file: {tmp_path / 'past.csv'}: row 3 (the header is row 1): "
                          "(filler = 1.5, binder = gum, layers = 3) is not a row of the [candidates] library "
                          "library.csv"), msg
    out = one_line(simlab("check", "s.toml", cwd=tmp_path))
    assert "row 3 (the header is row 1): (filler = 1.5, binder = gum, layers = 3) is not a row" in out


def test_results_folder_keeps_the_mixed_history(tmp_path):
    """The results folder's study.toml and its copy of the past trials read back to the same study."""
    from simlab import load_results, run_study
    s = dataclasses.replace(load_study(write(tmp_path)), replicates=1)
    run_study(s, out=tmp_path / "out")
    (tmp_path / "past.csv").unlink()                       # the original moves away
    assert load_results(tmp_path / "out").study == s
