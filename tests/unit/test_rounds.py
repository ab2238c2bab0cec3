"""Rounds of trials, lost trials, noise models and horizon-aware policies."""

import numpy as np
import pytest
from scipy import stats
from scipy.stats import qmc

from simlab.model.belief import Belief
from simlab.replay.campaign import run_campaign
from simlab.model.gp import Posterior
from simlab.model.kernels import Matern52
from simlab.worlds.noise import Observer
from simlab.policies import Context, ExpectedImprovement, RandomSearch
from simlab.replay.runner import replay
from simlab.study.spec import parse_study
from simlab.worlds.draws import FeatureWorld

KERNEL = Matern52([0.25, 0.25], 1.0)
BELIEF = Belief(KERNEL, 0.0, 0.05)


def _setup(seed=0, budget=12):
    rng = np.random.default_rng(seed)
    world = FeatureWorld(KERNEL, 0.0, rng)
    seq = qmc.Sobol(2, seed=rng).random_base2(4)[:budget]
    pool = qmc.Sobol(2, seed=rng).random_base2(8)
    shocks = rng.standard_normal(budget)
    return world, seq, pool, shocks


def test_batch_of_one_is_the_plain_sequential_loop():
    """batch = 1 gives exactly the loop written out by hand: choose, evaluate, update.

    The reference loop below is the textbook sequential Bayesian-optimisation loop
    (common practice), written without rounds or fantasies.
    """
    world, seq, pool, shocks = _setup()
    trace = run_campaign(ExpectedImprovement("ei"), BELIEF, world, design=seq[:4], sequence=seq,
                         observe=lambda f, t: f + 0.05 * shocks[t], budget=12, pool=pool,
                         rng=np.random.default_rng(1), batch=1)
    post = Posterior(KERNEL, 0.0, 0.05, pool=pool, capacity=12)
    policy = ExpectedImprovement("ei")
    policy.start(Context(pool=pool, rng=np.random.default_rng(1), sequence=seq, horizon=12, posterior=post))
    for t in range(12):
        u = seq[t] if t < 4 else policy.choose(post, t)
        post.add(u, world(u[None])[0] + 0.05 * shocks[t])
    np.testing.assert_array_equal(trace.U, post.X)


def test_rounds_choose_before_results_and_differ_from_sequential():
    world, seq, pool, shocks = _setup()
    kw = dict(design=seq[:4], sequence=seq, observe=lambda f, t: f + 0.05 * shocks[t], budget=12, pool=pool)
    one = run_campaign(ExpectedImprovement("ei"), BELIEF, world, rng=np.random.default_rng(1), batch=1, **kw)
    four = run_campaign(ExpectedImprovement("ei"), BELIEF, world, rng=np.random.default_rng(1), batch=4, **kw)
    np.testing.assert_array_equal(one.U[:5], four.U[:5])   # same design; trial 5 sees the same data
    assert not np.allclose(one.U[5:8], four.U[5:8])        # trials 6-8 were chosen blind in round 2
    # within a round the believer spreads trials out rather than repeating one point
    d = np.linalg.norm(four.U[4:8, None] - four.U[None, 4:8], axis=-1)
    assert d[np.triu_indices(4, 1)].min() > 1e-3


def test_constant_liar_at_the_incumbent_matches_its_definition():
    """Constant liar (Ginsbourger, Le Riche & Carraro 2010): the second trial of a round
    maximises EI of the posterior that treats the first as having returned the lie L, here
    L = min(y) (CL-min). Recomputed from scratch with a fresh posterior holding that row."""
    world, seq, pool, shocks = _setup(3)
    X = seq[:6]
    y = world(X) + 0.05 * shocks[:6]
    post = Posterior(KERNEL, 0.0, 0.05, pool=pool, capacity=10)
    post.add_many(X, y)
    ei = ExpectedImprovement("ei", fill="liar", lie="min")
    ei.start(Context(pool=pool, rng=np.random.default_rng(0), sequence=seq, horizon=10, posterior=post))
    with post.fantasies():
        first = ei.choose(post, 6)
        ei.hold(post, first)
        assert post.n == 7 and post.y[-1] == y.min()
        second = ei.choose(post, 7)
    ei.release()
    assert post.n == 6                                            # the lie is forgotten
    ref = Posterior(KERNEL, 0.0, 0.05, pool=pool, capacity=10)
    ref.add_many(np.vstack([X, first]), np.append(y, y.min()))
    ei2 = ExpectedImprovement("ei")
    ei2.start(Context(pool=pool, rng=np.random.default_rng(0), sequence=seq, horizon=10, posterior=ref))
    np.testing.assert_allclose(second, ei2.choose(ref, 7), atol=1e-6)


def test_fantasies_restore_the_posterior_exactly():
    world, seq, pool, shocks = _setup(4)
    post = Posterior(KERNEL, 0.0, 0.05, pool=pool, capacity=8)
    post.add_many(seq[:5], world(seq[:5]))
    mu0, sd0 = post.pool_moments()
    with post.fantasies():
        post.add(seq[5], 3.0)
        post.add(seq[6], -3.0)
        assert not np.allclose(post.pool_moments()[0], mu0)
    mu1, sd1 = post.pool_moments()
    np.testing.assert_array_equal(mu0, mu1)
    np.testing.assert_array_equal(sd0, sd1)


def test_local_penalizer_matches_its_formula():
    """log phi_j(x) = log Phi((L ||x - x_j|| - mu_j + M) / sd_j) (Gonzalez et al. 2016, eq. 4,
    minimisation form), added to log EI; checked against scipy.stats.norm.logcdf, and the
    gradient against central finite differences."""
    world, seq, pool, shocks = _setup(5)
    post = Posterior(KERNEL, 0.0, 0.05, pool=pool, capacity=10)
    post.add_many(seq[:6], world(seq[:6]))
    ei = ExpectedImprovement("ei", fill="penalize")
    ei.start(Context(pool=pool, rng=np.random.default_rng(0), sequence=seq, horizon=10, posterior=post))
    ei.prepare(post)
    xj = np.array([0.4, 0.6])
    ei.hold(post, xj)
    U = np.array([[0.1, 0.2], [0.45, 0.58], [0.9, 0.9]])
    base = ei.score(post, U)
    mu_j, sd_j = (v[0] for v in post.moments(xj[None]))
    z = (ei._lipschitz * np.linalg.norm(U - xj, axis=1) - mu_j + ei._minimum) / sd_j
    np.testing.assert_allclose(ei._penalized(post, U, base), base + stats.norm.logcdf(z), rtol=1e-10)
    _, g = ei._penalized(post, U, *ei.score(post, U, grad=True))
    h = 1e-6
    for k in range(2):
        e = np.zeros(2)
        e[k] = h
        fd = (ei._penalized(post, U + e, ei.score(post, U + e)) - ei._penalized(post, U - e, ei.score(post, U - e))) / (2 * h)
        np.testing.assert_allclose(g[:, k], fd, rtol=1e-4, atol=1e-6)


def test_student_noise_has_unit_variance_and_t_tails():
    """Shocks are Student-t(df) scaled by sqrt((df-2)/df): Kolmogorov-Smirnov against
    scipy.stats.t with that scale accepts; the same test against a normal of unit variance
    (negative control) rejects. n = 20000, df = 3."""
    obs = Observer(sd=1.0, kind="student", settings=(("noise_df", 3.0),))
    shocks, _ = obs.draw(np.random.default_rng(11), 20000)
    scale = np.sqrt(1.0 / 3.0)
    assert stats.kstest(shocks, stats.t(3.0, scale=scale).cdf).pvalue > 0.01
    assert stats.kstest(shocks, stats.norm.cdf).pvalue < 1e-6
    # sample moments at df = 6 against scipy.stats.t's own: variance (df/(df-2)) * scale^2 = 1 and
    # excess kurtosis 6/(df-4) = 3; the sample variance of 40000 draws has sd sqrt((kurt+2)/n) = 0.011
    six = Observer(sd=1.0, kind="student", settings=(("noise_df", 6.0),)).draw(np.random.default_rng(12), 40000)[0]
    var, kurt = stats.t(6.0, scale=np.sqrt(4.0 / 6.0)).stats(moments="vk")
    assert abs(six.var() - var) < 0.05
    assert abs(stats.kurtosis(six) - kurt) < 1.5          # heavy-tailed: the estimate itself is noisy
    assert stats.kurtosis(six) > 1.0                       # and clearly not Gaussian (0)
    g = Observer(sd=1.0).draw(np.random.default_rng(11), 20000)[0]
    # sample variance of 20000 unit normals has sd sqrt(2/20000) = 0.01
    assert abs(g.var() - 1.0) < 0.04


def test_noise_growth_and_lost_share():
    obs = Observer(sd=0.5, growth=0.8, center=10.0, scale=2.0, lost=0.3, sign=-1.0)
    # sd at user value f: 0.5 exp(0.8 (f - 10) / 2); internal value -f (maximising study)
    np.testing.assert_allclose(obs.sd_at(np.array([-10.0, -12.0])), [0.5, 0.5 * np.exp(0.8)])
    _, lost = obs.draw(np.random.default_rng(2), 40000)
    # binomial sd of the share: sqrt(0.3 * 0.7 / 40000) = 0.0023
    assert abs(lost.mean() - 0.3) < 0.01
    assert np.isnan(obs(1.0, 0.3, True)) and obs(1.0, 0.0, False) == 1.0


class _Spy(RandomSearch):
    rule = "spy"

    def choose(self, post, t):
        self.seen.append((t, post.n, post.X.copy()))
        return super().choose(post, t)


def test_lost_trials_never_enter_the_posterior():
    world, seq, pool, shocks = _setup(6, budget=16)
    lost = np.zeros(16, bool)
    lost[[1, 5, 6, 11]] = True
    spy = _Spy("spy")
    spy.seen = []
    trace = run_campaign(spy, BELIEF, world, design=seq[:3], sequence=seq, budget=16, pool=pool,
                         observe=lambda f, t: np.nan if lost[t] else f, rng=np.random.default_rng(0))
    assert np.isnan(trace.y[lost]).all() and np.isfinite(trace.y[~lost]).all()
    for t, n, X in spy.seen:
        assert n == (~lost[:t]).sum()                       # only observed trials are data
        np.testing.assert_array_equal(X, trace.U[:t][~lost[:t]])
    assert not lost[trace.rec].any()                        # never recommend an unseen input


def _horizon_study(**policy):
    return parse_study({
        "study": {"replicates": 2, "seed": 4},
        "space": {"a": [0.0, 1.0]},
        "world": {"lengthscale": 0.2, "amplitude": 1.0, "noise": 0.05},
        "campaign": {"initial": 3, "budgets": [6, 10], "pool": 128},
        "target": {"regret": 0.05},
        "policy": [{"rule": "ei", **policy}],
    }, source="test")


def test_horizon_aware_policy_is_replayed_per_budget():
    plain = replay(_horizon_study())
    aware = replay(_horizon_study(exploit_last=2))
    assert set(plain["horizon"]) == {10}
    for r, g in aware.groupby("replicate"):
        assert (g.loc[g.trial <= 6, "horizon"] == 6).all() and (g.loc[g.trial > 6, "horizon"] == 10).all()
    # before the switch fires, both campaigns choose as plain EI does
    same = plain.trial.isin([1, 2, 3, 4, 7, 8])
    np.testing.assert_array_equal(plain.loc[same, "a"], aware.loc[same, "a"])
    assert not np.allclose(plain.loc[plain.trial.isin([5, 6, 9, 10]), "a"],
                           aware.loc[aware.trial.isin([5, 6, 9, 10]), "a"])
    # trial 5 of the 6-trial campaign goes to the lowest posterior mean given trials 1-4:
    # checked against a brute-force search over a dense grid of 20001 points
    s = _horizon_study()
    g = aware[aware.replicate == 0].sort_values("trial")
    post = Posterior(Matern52([0.2], 1.0), 0.0, 0.05)
    post.add_many(g["a"].to_numpy()[:4, None], g["y"].to_numpy()[:4])
    grid = np.linspace(0, 1, 20001)[:, None]
    chosen = post.moments(g["a"].to_numpy()[4:5, None])[0][0]
    assert chosen <= post.moments(grid)[0].min() + 1e-9
    assert s.campaign.budgets == (6, 10)


@pytest.mark.parametrize("fill", ["believer", "liar", "penalize", "samples"])
def test_batch_runs_every_fill(fill):
    rule = "thompson" if fill == "samples" else "ei"
    s = parse_study({
        "study": {"replicates": 2, "seed": 8},
        "space": {"a": [0.0, 1.0], "b": [0.0, 1.0]},
        "world": {"lengthscale": 0.3, "amplitude": 1.0, "noise": 0.05, "lost": 0.1},
        "campaign": {"initial": 4, "budgets": [10], "pool": 128, "batch": 3},
        "target": {"regret": 0.05},
        "policy": [{"rule": rule, "fill": fill}],
    }, source="test")
    t = replay(s)
    assert (t.groupby(["replicate", "round"]).size() <= 3).all()
    assert (t["round"] == (t["trial"] - 1) // 3 + 1).all()
    assert (t["regret"] >= 0).all() and t["regret"].notna().all()
