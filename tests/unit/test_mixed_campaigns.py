"""Campaigns over stepped and categorical inputs: trials take allowed values only (each equally likely
from a uniform draw), the pool covers the space, lockstep and one-at-a-time replays agree, and EI
beats random search on worlds drawn from its own prior."""

import numpy as np
from scipy import stats

from simlab.replay.runner import replay_replicate
from simlab.study.spec import load_study
from simlab.worlds.replicate import make_replicate

STUDY = """
[study]
name = "mixed-campaigns"
replicates = {R}
seed = 11
[space]
rate = [0.0, 1.0]
stages = {{ low = 1, high = 4, step = 1 }}
carrier = {{ levels = ["oil", "gel", "foam"] }}
[world]
lengthscale = [0.3, 1.5]
amplitude = 1.0
noise = 0.05
level_correlation = 0.3
features = 256
[campaign]
initial = 4
budgets = [{B}]
pool = 256
[target]
regret = 0.1
{policies}
"""
RULES = ("ei", "pi", "lcb", "mean", "random", "sobol", "gp-ucb", "hedge", "thompson", "pbest", "mes", "kg")


def study(tmp_path, R=2, B=10, rules=RULES, text=STUDY):
    policies = "".join(f'[[policy]]\nrule = "{r}"\nlabel = "{r}-{i}"\n' for i, r in enumerate(rules))
    p = tmp_path / "s.toml"
    p.write_text(text.format(R=R, B=B, policies=policies), encoding="utf-8")
    return load_study(p)


def test_snap_draws_every_allowed_value_equally_often():
    """A uniform draw snapped to a stepped input's 5 values is uniform over them (chi-square goodness
    of fit, scipy.stats.chisquare); the negative control, rounding to the nearest value, gives the two
    ends half the share of the others and must be rejected."""
    from simlab.study.types import Space
    space = Space(names=("k",), low=(0.0,), high=(4.0,), kinds=("stepped",), steps=(1.0,), levels=((),))
    u = np.random.default_rng(3).random((100_000, 1))
    for move, uniform in ((space.snap, True), (space.round_unit, False)):
        values = space.from_unit(move(u))[:, 0]
        assert set(np.unique(values)) == {0.0, 1.0, 2.0, 3.0, 4.0}
        p = stats.chisquare(np.bincount(values.astype(int), minlength=5)).pvalue
        assert (p > 1e-3) if uniform else (p < 1e-12), (move, p)
    assert np.array_equal(space.snap(space.snap(u)), space.snap(u))          # allowed values stay put


def test_trials_take_allowed_values_and_the_pool_covers_every_combination(tmp_path):
    s = study(tmp_path)
    rep = make_replicate(s, 0)
    combos = {tuple(row) for row in s.space.round_unit(rep.pool)[:, 1:]}
    assert len(combos) == 4 * 3 and np.array_equal(s.space.snap(rep.pool), rep.pool)
    traces = replay_replicate(s, 0)
    assert set(traces["carrier"]) <= {"oil", "gel", "foam"}
    assert set(traces["stages"]) <= {1.0, 2.0, 3.0, 4.0}
    for label in s.labels:              # every policy spends its trials across levels, not on one
        mine = traces[(traces["policy"] == label) & ~traces["initial"]]
        assert len(mine) == 6


def test_a_discrete_space_is_enumerated_when_it_fits_the_pool(tmp_path):
    text = STUDY.replace("rate = [0.0, 1.0]\n", "").replace("lengthscale = [0.3, 1.5]", "lengthscale = [1.5]")
    s = study(tmp_path, text=text)
    pool = make_replicate(s, 0).pool
    assert pool.shape == (12, 2) and len({tuple(r) for r in pool}) == 12
    big = text.replace("high = 4, step = 1", "high = 200, step = 1")          # 600 points > pool 256
    s = study(tmp_path, text=big)
    pool = make_replicate(s, 0).pool
    assert pool.shape == (256, 2) and len({tuple(r) for r in pool}) == 256


def test_lockstep_and_one_at_a_time_give_the_same_traces(tmp_path):
    s = study(tmp_path, R=2, B=9)
    for r in range(2):
        a = replay_replicate(s, r, lockstep=True)
        b = replay_replicate(s, r, lockstep=False)
        cols = ["rate", "stages", "y", "regret"]
        np.testing.assert_allclose(a[cols].to_numpy(float), b[cols].to_numpy(float), rtol=1e-9, atol=1e-9)
        assert (a["carrier"] == b["carrier"]).all()


def test_ei_beats_random_on_worlds_from_its_own_prior(tmp_path):
    """Matched prior, 40 replicates, 12 trials: EI's final regret is below random search's on most
    worlds (one-sided sign test, scipy.stats.binomtest, p < 0.01). Negative control: two random-search
    policies (independent streams) compared the same way must not pass (common practice)."""
    s = study(tmp_path, R=40, B=12, rules=("ei", "random", "random"))
    from simlab.replay.runner import replay
    traces = replay(s, jobs=1)
    last = traces[traces["trial"] == 12].pivot(index="replicate", columns="policy", values="regret")

    def wins(a, b):
        d = last[b] - last[a]
        return stats.binomtest(int((d > 0).sum()), int((d != 0).sum()), alternative="greater").pvalue

    assert wins("ei-0", "random-1") < 0.01
    assert wins("random-2", "random-1") > 0.05 and wins("random-1", "random-2") > 0.05


def test_mixed_feature_samples_have_the_product_covariance(tmp_path):
    """Posterior samples over a mixed space start from these prior draws: their covariance over
    fresh draws (frequencies and weights) is the product kernel (Rahimi & Recht 2007 in the
    continuous factor; the Cholesky mixing of Qian, Wu & Wu 2008's exchangeable correlation across
    levels), within 4.5 Monte Carlo standard errors; the negative control, the kernel with a
    level correlation of 0.8 instead of 0.3, must be rejected. Gradients match central differences
    in the continuous input and are 0 in the stepped and categorical ones."""
    from simlab.model.levels import MixedKernel
    from simlab.worlds.mixed import MixedFeatureSample
    s = study(tmp_path)
    space = s.space
    k = MixedKernel(space, "matern52", [0.3, 1.5 / 3.0], 1.0, [0.3])
    wrong = MixedKernel(space, "matern52", [0.3, 1.5 / 3.0], 1.0, [0.8])
    U = space.snap(np.array([[0.2, 0.1, 0.1], [0.3, 0.1, 0.5], [0.25, 0.9, 0.9], [0.7, 0.5, 0.1], [0.2, 0.1, 0.9]]))
    rng = np.random.default_rng(5)
    N = 4000
    F = np.array([MixedFeatureSample(k, 0.0, rng, 32)(U) for _ in range(N)])     # (N, 5)
    prods = F[:, :, None] * F[:, None, :]
    emp, se = prods.mean(0), prods.std(0, ddof=1) / np.sqrt(N)
    assert np.all(np.abs(emp - k(U)) <= 4.5 * se), np.max(np.abs(emp - k(U)) / se)
    assert np.any(np.abs(emp - wrong(U)) > 4.5 * se)
    sample = MixedFeatureSample(k, 0.0, np.random.default_rng(1), 64)
    G = sample.grad(U)
    h = 1e-6
    fd = (sample(U + [h, 0, 0]) - sample(U - [h, 0, 0])) / (2 * h)
    np.testing.assert_allclose(G[:, 0], fd, rtol=1e-5, atol=1e-7)
    assert np.all(G[:, 1:] == 0.0)
