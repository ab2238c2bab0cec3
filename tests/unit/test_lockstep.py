"""Lockstep replicates: a block of campaigns gives the bits of each campaign replayed alone.

The reference is the one-at-a-time path (``replay(..., lockstep=False)``: every campaign
through ``run_campaign``). Equality is exact (``check_exact=True``, ``np.array_equal``),
and each comparison has a negative control showing it would see a one-ulp change.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import simlab.model.gp
from simlab.model.belief import Belief
from simlab.model.gp import Posterior, Stack, matvec, rowdot, vecmat
from simlab.model.kernels import KERNELS, Matern52
from simlab.replay.lockstep import fits_lockstep
from simlab.policies import POLICIES
from simlab.replay.runner import replay
from simlab.worlds.draws import ConditionedWorld, FeatureWorld, GridWorld, WorldBlock
from studies import study_with


BASE = {
    "study": {"name": "lockstep", "goal": "minimize", "replicates": 7, "seed": 11},
    "space": {"speed": [1.0, 5.0], "gap": [0.1, 0.9]},
    "world": {"kernel": "matern52", "lengthscale": [1.2, 0.25], "amplitude": 1.0, "mean": 3.0,
              "noise": 0.05},
    "campaign": {"initial": 3, "budgets": [6, 10], "pool": 128},
    "target": {"regret": 0.2},
    "policy": [{"rule": "ei"}, {"rule": "pi", "margin": 0.01}, {"rule": "lcb", "width": 1.5},
               {"rule": "mean"}, {"rule": "random"}, {"rule": "sobol"},
               {"rule": "ei", "label": "ei then exploit", "exploit_last": 2}, {"rule": "gp-ucb"}],
}


def study(**over):
    return study_with(BASE, "test", **over)


# ---------------------------------------------------------------- stacked arithmetic
@pytest.mark.parametrize("n", [1, 7, 8, 9, 33])
def test_stacked_products_do_not_depend_on_the_block(n):
    """common practice (NumPy: matmul loops BLAS per stacked slice; last-axis sums reduce each
    row alone): each slice of a stacked product equals the product of that slice alone."""
    rng = np.random.default_rng(n)
    B, cap, m = 9, 40, 300
    A = rng.standard_normal((B, cap, cap))[:, :n, :n]
    V = rng.standard_normal((B, cap, m))[:, :n]
    v = rng.standard_normal((B, n))
    together = (matvec(A, v), vecmat(v, V), rowdot(v, v), (V * V).sum(-1))
    for b in range(B):
        alone = (matvec(A[b : b + 1].copy(), v[b : b + 1]), vecmat(v[b : b + 1], V[b : b + 1].copy()),
                 rowdot(v[b : b + 1], v[b : b + 1]), (V[b : b + 1] * V[b : b + 1]).sum(-1))
        for x, y in zip(together, alone):
            assert np.array_equal(x[b : b + 1], y)
    # negative control: another summation order changes the last bits somewhere
    reordered = (V[:, ::-1] * V[:, ::-1]).sum(-1) if n > 2 else None
    if reordered is not None:
        assert not np.array_equal(reordered, together[3])


def _data(rng, B, n, d):
    return rng.random((B, n, d)), rng.standard_normal((B, n))


@pytest.mark.parametrize("name", sorted(KERNELS))
def test_stack_slices_equal_posteriors(name):
    """Each replicate of a Stack has the bits of a Posterior given the same data."""
    rng = np.random.default_rng(3)
    B, n, m, d = 5, 12, 64, 2
    kernel = KERNELS[name]([0.3, 0.5], 1.4)
    pools = rng.random((B, m, d))
    X, y = _data(rng, B, n, d)
    st = Stack(kernel, 0.2, 0.1, pools=pools, capacity=4)       # small capacity: buffers grow
    for i in range(n):
        st.add(X[:, i], y[:, i])
    U = rng.random((B, 3, d))
    mu, sd, dmu, dsd = st.stacked_moments(U, grad=True)
    pmu, psd = st.stacked_pool_moments()
    md = st.means_at_data()
    for b in range(B):
        post = Posterior(kernel, 0.2, 0.1, pool=pools[b], capacity=4)
        for i in range(n):
            post.add(X[b, i], y[b, i])
        for got, want in zip(post.moments(U[b], grad=True), (mu[b], sd[b], dmu[b], dsd[b])):
            assert np.array_equal(got, want)
        assert np.array_equal(post.pool_moments()[0], pmu[b])
        assert np.array_equal(post.pool_moments()[1], psd[b])
        assert np.array_equal(post.mean_at_data(), md[b])


def test_stack_moments_match_a_dense_solve():
    """Rasmussen & Williams (2006), eqs. 2.25-2.26, by np.linalg.solve on the full Gram matrix."""
    rng = np.random.default_rng(4)
    B, n, m, d = 4, 15, 50, 3
    kernel = Matern52([0.4, 0.6, 0.5], 2.0)
    pools = rng.random((B, m, d))
    X, y = _data(rng, B, n, d)
    st = Stack(kernel, -1.0, 0.2, pools=pools)
    for i in range(n):
        st.add(X[:, i], y[:, i])
    mu, sd = st.stacked_pool_moments()
    for b in range(B):
        K = kernel(X[b]) + st.s2[b] * np.eye(n)
        Ks = kernel(pools[b], X[b])
        want_mu = -1.0 + Ks @ np.linalg.solve(K, y[b] + 1.0)
        want_var = kernel.variance - np.einsum("ij,ji->i", Ks, np.linalg.solve(K, Ks.T))
        assert np.allclose(mu[b], want_mu, rtol=0, atol=1e-10)
        assert np.allclose(sd[b] ** 2, want_var, rtol=0, atol=1e-10)


def test_repeated_input_raises_jitter_for_that_replicate_only(monkeypatch):
    """Without the nugget a noise-free repeat makes one replicate's Gram matrix singular:
    that replicate alone is refactored with jitter, and it equals a Posterior doing the same."""
    monkeypatch.setattr(simlab.model.gp, "NUGGET", 0.0)
    rng = np.random.default_rng(5)
    kernel = Matern52([0.3], 1.0)
    st = Stack(kernel, 0.0, 0.0, pools=rng.random((3, 20, 1)))
    x = rng.random((3, 1))
    st.add(x, np.zeros(3))
    again = x.copy()
    again[[0, 2]] = rng.random((2, 1))                  # replicate 1 repeats its input exactly
    with pytest.warns(RuntimeWarning, match="jitter"):
        st.add(again, np.zeros(3))
    assert st.jitter[1] > 0 and st.jitter[0] == 0 and st.jitter[2] == 0
    for b in range(3):
        post = Posterior(kernel, 0.0, 0.0, pool=st.pools[b])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            post.add(x[b], 0.0)
            post.add(again[b], 0.0)
        assert post.jitter == st.jitter[b]
        assert np.array_equal(post.pool_moments()[1], st.stacked_pool_moments()[1][b])


# ---------------------------------------------------------------- worlds
def test_world_block_values_equal_each_world_alone():
    kernel = Matern52([0.2, 0.3], 1.3)
    worlds = [FeatureWorld(kernel, 0.5, np.random.default_rng(i)) for i in range(9)]
    xs = np.random.default_rng(9).random((9, 2))
    block = WorldBlock(worlds)
    assert block.stacked
    alone = np.array([w(x[None])[0] for w, x in zip(worlds, xs)])
    assert np.array_equal(block(xs), alone)
    assert np.array_equal(WorldBlock(worlds[:4])(xs[:4]), alone[:4])
    assert not np.array_equal(block(xs + 1e-15), alone)             # negative control


def test_world_block_mixed_kinds_fall_back_to_one_at_a_time():
    kernel = Matern52([0.3], 1.0)
    rng = np.random.default_rng(2)
    base = FeatureWorld(kernel, 0.0, rng)
    worlds = [GridWorld(kernel, 0.0, rng, 64), ConditionedWorld(base, kernel, [[0.5]], [1.0], 0.1, rng), base]
    block = WorldBlock(worlds)
    xs = rng.random((3, 1))
    assert not block.stacked
    assert np.array_equal(block(xs), np.array([w(x[None])[0] for w, x in zip(worlds, xs)]))


# ---------------------------------------------------------------- whole studies
@pytest.fixture(scope="module")
def alone():
    return replay(study(), lockstep=False, chunk=7)


@pytest.mark.parametrize("chunk", [1, 3, 7])
@pytest.mark.slow
def test_traces_are_bit_identical_to_one_at_a_time(alone, chunk):
    together = replay(study(), lockstep=True, chunk=chunk)
    pd.testing.assert_frame_equal(together, alone, check_exact=True)


def test_negative_control_one_ulp_is_seen(alone):
    """The exact comparison above sees a change in the last bit of one value."""
    changed = alone.copy()
    changed.loc[5, "y"] = np.nextafter(changed.loc[5, "y"], np.inf)
    with pytest.raises(AssertionError):
        pd.testing.assert_frame_equal(changed, alone, check_exact=True)


@pytest.mark.parametrize("over", [
    {"world": {"noise_kind": "student", "noise_df": 4.0, "noise_growth": 0.3}},
    {"world": {"kernel": "matern32", "method": "grid", "grid": 16}},
    {"world": {"lengthscale_within": 2.0, "amplitude_within": 1.5}},     # every world its own kernel
    {"campaign": {"initial": 2, "budgets": [5], "design": "lhs", "pool": 64}},
])
@pytest.mark.slow
def test_identity_holds_for_other_worlds_and_designs(over):
    s = study(**over)
    pd.testing.assert_frame_equal(replay(s, lockstep=True, chunk=4), replay(s, lockstep=False, chunk=4),
                                  check_exact=True)


def test_only_campaigns_of_equal_length_run_in_lockstep():
    belief = Belief(Matern52([0.3], 1.0), 0.0, 0.1)
    ei, kg, pbest = POLICIES["ei"](), POLICIES["kg"](), POLICIES["pbest"]()
    assert fits_lockstep(ei, belief, batch=1, lost=0.0)
    assert fits_lockstep(kg, belief, batch=1, lost=0.0)              # in lockstep since its block form
    assert fits_lockstep(pbest, belief, batch=1, lost=0.0)           # in lockstep since its block form
    assert fits_lockstep(ei, belief, batch=2, lost=0.0)              # rounds hold their fantasies per block
    assert not fits_lockstep(POLICIES["ei"](fill="penalize"), belief, batch=2, lost=0.0)   # pending lists per campaign
    assert fits_lockstep(POLICIES["ei"](fill="penalize"), belief, batch=1, lost=0.0)       # no round, nothing held
    assert not fits_lockstep(ei, belief, batch=1, lost=0.1)          # ragged beliefs
    refit = Belief(belief.kernel, 0.0, 0.1, refit_every=5)
    assert not fits_lockstep(ei, refit, batch=1, lost=0.0)


def test_identity_holds_with_past_trials():
    """configs/fermentation-continue.toml: worlds conditioned on past runs, no initial design."""
    import dataclasses
    from pathlib import Path

    from simlab.study.spec import load_study

    s = load_study(Path(__file__).resolve().parents[2] / "configs" / "fermentation-continue.toml")
    s = dataclasses.replace(s, replicates=5)
    pd.testing.assert_frame_equal(replay(s, lockstep=True, chunk=5), replay(s, lockstep=False, chunk=5),
                                  check_exact=True)


# ---------------------------------------------------------------- rules of their own random draws
# Rules that draw posterior samples (each replicate from its own stream) and polish with
# polish_block; the one-at-a-time path runs the same block code on a block of one.
SAMPLING = {
    "study": {"name": "sampling", "goal": "minimize", "replicates": 7, "seed": 23},
    "space": {"speed": [1.0, 5.0], "gap": [0.1, 0.9]},
    "world": {"kernel": "matern52", "lengthscale": [1.2, 0.25], "amplitude": 1.0, "mean": 3.0, "noise": 0.05},
    "campaign": {"initial": 3, "budgets": [5, 8], "pool": 96},
    "target": {"regret": 0.2},
}
MOVED = [[{"rule": "thompson", "features": 64}, {"rule": "thompson", "label": "ts exploit", "features": 32,
                                                  "exploit_last": 1}],
         [{"rule": "mes", "samples": 8, "features": 32}, {"rule": "mes", "label": "mes gumbel", "gumbel": 1},
          {"rule": "mes", "label": "mes free", "noise_aware": 0, "exploit_last": 1}],
         [{"rule": "hedge"}, {"rule": "hedge", "label": "hedge eager", "eta": 20.0}],
         [{"rule": "kg", "points": 16}, {"rule": "kg", "label": "kg exploit", "points": 8, "exploit_last": 1}],
         [{"rule": "pbest", "samples": 64, "features": 32},
          {"rule": "pbest", "label": "pbest plain", "samples": 32, "refine": 0, "exploit_last": 1}]]


@pytest.mark.parametrize("policies", MOVED, ids=lambda p: p[0]["rule"])
@pytest.mark.parametrize("over", [{}, {"world": {"noise": 0.0}}], ids=["noisy", "noise-free"])
def test_sampling_rules_are_bit_identical_to_one_at_a_time(policies, over):
    s = study_with(SAMPLING, "test", policy=policies, **over)
    for policy in policies:
        assert fits_lockstep(POLICIES[policy["rule"]](), Belief(Matern52([0.3], 1.0), 0.0, 0.1), batch=1, lost=0.0)
    ref = replay(s, lockstep=False, chunk=7)
    for chunk in (1, 3, 7):
        pd.testing.assert_frame_equal(replay(s, lockstep=True, chunk=chunk), ref, check_exact=True)



def test_negative_control_a_stream_shared_by_the_block_is_seen(monkeypatch):
    """Were a block's replicates to draw from one shared stream, the traces would differ."""
    import simlab.replay.lockstep as lockstep

    s = study_with(SAMPLING, "test", policy=MOVED[0][:1])
    ref = replay(s, lockstep=False, chunk=7)
    real = lockstep.run_block

    def shared(policy, belief, reps, *, rngs, **kw):
        return real(policy, belief, reps, rngs=[rngs[0]] * len(rngs), **kw)

    monkeypatch.setattr(lockstep, "run_block", shared)
    with pytest.raises(AssertionError):
        pd.testing.assert_frame_equal(replay(s, lockstep=True, chunk=7), ref, check_exact=True)


# ---------------------------------------------------------------- rounds of several trials
# [campaign] batch > 1: every trial of a round is chosen for the whole block before any result
# is back, pending trials held as fantasies by the rule's hold_block; the one-campaign hold is
# the same code on a block of one. Budgets that are not multiples of the batch end on a short
# round, and an initial design of 5 ends inside a round for batches of 2 and 3 (its last rows
# are held too).
ROUNDS = {**SAMPLING, "study": {**SAMPLING["study"], "replicates": 5, "seed": 31},
          "campaign": {"initial": 5, "budgets": [7, 11], "pool": 64},
          # what the stopping rules read after each trial of a round (stop_chance, stop_gain, stop_gap)
          "stop": [{"rule": "confident", "chance": 0.8}, {"rule": "small-gain", "fraction": 0.02},
                   {"rule": "bound-gap", "gap": 0.3}]}
IN_ROUNDS = [[{"rule": "ei"}, {"rule": "ei", "label": "ei liar", "fill": "liar"},
              {"rule": "pi", "fill": "liar", "lie": "mean"}, {"rule": "lcb", "fill": "liar", "lie": "max"},
              {"rule": "ei", "label": "ei exploit", "exploit_last": 2}],
             [{"rule": "thompson", "features": 32},
              {"rule": "thompson", "label": "ts believer", "features": 32, "fill": "believer", "exploit_last": 1},
              {"rule": "pbest", "samples": 32, "features": 32},
              {"rule": "pbest", "label": "pbest liar", "samples": 32, "features": 32, "fill": "liar"}],
             [{"rule": "mes", "samples": 4, "features": 32}, {"rule": "kg", "points": 8},
              {"rule": "kg", "label": "kg liar", "points": 8, "fill": "liar", "lie": "min"}],
             [{"rule": "hedge", "eta": 20.0}, {"rule": "random"}, {"rule": "sobol"}, {"rule": "gp-ucb"}]]


def _fits(policy, batch):
    settings = {k: v for k, v in policy.items() if k not in ("rule", "label")}
    return fits_lockstep(POLICIES[policy["rule"]](**settings), Belief(Matern52([0.3], 1.0), 0.0, 0.1),
                         batch=batch, lost=0.0)


@pytest.mark.parametrize("fill,lie", [("believer", "min"), ("liar", "min"), ("liar", "mean"), ("liar", "max"),
                                      ("samples", "min")])
def test_hold_block_holds_what_each_fill_says(fill, lie):
    """Kriging believer: each replicate's pending trial returns its posterior mean there (Rasmussen &
    Williams 2006, eq. 2.25, by np.linalg.solve on the full Gram matrix); constant liar: min, mean or
    max of that replicate's real observations, fixed at the round's first hold, the prior mean before
    any (Ginsbourger, Le Riche & Carraro 2010); samples: nothing held. The one-campaign hold of
    replicate b alone holds the same bits."""
    rng = np.random.default_rng(8)
    B, n, m, d = 4, 6, 16, 2
    kernel = Matern52([0.4, 0.6], 1.3)
    pools = rng.random((B, m, d))
    X, y = _data(rng, B, n, d)
    U1, U2 = rng.random((B, d)), rng.random((B, d))
    for data in (n, 0):                                            # with real observations, and none
        st = Stack(kernel, 0.5, 0.1, pools=pools, capacity=n + 2)
        for i in range(data):
            st.add(X[:, i], y[:, i])
        rule = POLICIES["ei"](fill=fill, lie=lie)
        with st.fantasies():
            rule.hold_block(st, U1)
            rule.hold_block(st, U2)
            held = st._y[:, data : st.n].copy()
        rule.release()
        assert st.n == data                                        # undone with the round
        if fill == "samples":
            assert held.shape == (B, 0)
            continue
        assert held.shape == (B, 2)
        for b in range(B):
            if fill == "believer":
                want = []
                for k, u in enumerate((U1[b], U2[b])):
                    Xb = np.vstack([X[b, :data], U1[b : b + 1, :][:k]])
                    yb = np.append(y[b, :data], want)
                    if len(yb) == 0:
                        want.append(0.5)
                        continue
                    K = kernel(Xb) + st.s2[b] * np.eye(len(yb))
                    want.append(0.5 + kernel(u[None], Xb)[0] @ np.linalg.solve(K, yb - 0.5))
                np.testing.assert_allclose(held[b], want, rtol=0, atol=1e-10)
            else:
                lie_value = {"min": np.min, "mean": np.mean, "max": np.max}[lie](y[b, :data]) if data else 0.5
                np.testing.assert_allclose(held[b], [lie_value, lie_value], rtol=0, atol=1e-14)
            alone = Posterior(kernel, 0.5, 0.1, pool=pools[b], capacity=n + 2)
            for i in range(data):
                alone.add(X[b, i], y[b, i])
            one = POLICIES["ei"](fill=fill, lie=lie)
            with alone.fantasies():
                one.hold(alone, U1[b])
                one.hold(alone, U2[b])
                assert np.array_equal(alone.y[data:], held[b])
            one.release()


@pytest.mark.parametrize("policies", IN_ROUNDS, ids=lambda p: p[0]["rule"])
@pytest.mark.parametrize("batch,world", [(2, {}), (3, {}), (3, {"noise": 0.0})], ids=["2", "3", "3-noise-free"])
def test_rounds_are_bit_identical_to_one_at_a_time(policies, batch, world):
    s = study_with(ROUNDS, "test", policy=policies, campaign={"batch": batch}, world=world)
    assert all(_fits(policy, batch) for policy in policies)
    ref = replay(s, lockstep=False, chunk=7)
    assert ref["round"].max() > ref["round"].min() + 1         # several rounds, some of several trials
    assert {"stop_chance", "stop_gain", "stop_gap"} <= set(ref.columns)
    for chunk in (1, 3, 7):
        pd.testing.assert_frame_equal(replay(s, lockstep=True, chunk=chunk), ref, check_exact=True)


def test_rounds_with_penalizers_stay_one_campaign_at_a_time():
    assert not _fits({"rule": "ei", "fill": "penalize"}, 2)
    assert not _fits({"rule": "thompson", "fill": "penalize"}, 3)
    assert _fits({"rule": "ei", "fill": "penalize"}, 1)


@pytest.mark.parametrize("wrong", ["one ulp", "nothing held"])
def test_negative_control_a_wrong_hold_in_the_block_is_seen(monkeypatch, wrong):
    """Were the block to hold a value one ulp off the one-campaign hold (or hold nothing), the
    traces would differ: the comparison above sees the holds."""
    from simlab.policies.base import Policy

    s = study_with(ROUNDS, "test", policy=IN_ROUNDS[0][:1], campaign={"batch": 3})
    ref = replay(s, lockstep=False, chunk=7)
    real = Policy.hold_block

    def changed(self, st, U):
        if isinstance(st, Posterior):                          # the one-campaign path holds as it should
            return real(self, st, U)
        if wrong == "one ulp":
            Stack.add(st, U, np.nextafter(self._held_values(st, U), np.inf))

    monkeypatch.setattr(Policy, "hold_block", changed)
    with pytest.raises(AssertionError):
        pd.testing.assert_frame_equal(replay(s, lockstep=True, chunk=3), ref, check_exact=True)


# ---------------------------------------------------------------- small chunks, larger blocks
def test_small_chunks_are_joined_into_blocks_without_changing_a_chunk(monkeypatch):
    """With one job the default plan's chunks (3 replicates each here) are computed in blocks of at
    least 20 replicates (with more workers, smaller ones that leave each a block), then handed back
    chunk by chunk: every chunk's traces and worlds rows are the
    ones it gets as its own block (chunk=3), bit for bit, and the chunks stay the plan's."""
    import simlab.replay.runner as runner

    s = study_with(SAMPLING, "test", study={**SAMPLING["study"], "replicates": 24},
                   policy=[{"rule": "ei"}, {"rule": "thompson", "features": 32}], campaign={"initial": 3, "budgets": [5]})
    plan = runner.chunk_plan(s)
    assert [len(c) for c in plan] == [3] * 8
    sizes, real = [], runner._replay_chunk

    def counted(study, replicates, lockstep=True):
        sizes.append(len(replicates))
        return real(study, replicates, lockstep)

    monkeypatch.setattr(runner, "_replay_chunk", counted)
    joined = dict(runner.replay_chunks(s))
    assert sizes == [21, 3]                                   # blocks of at least 20, then the rest
    sizes.clear()
    alone = dict(runner.replay_chunks(s, chunk=3))            # a chunk size asked for is the block
    assert sizes == [3] * 8
    assert sorted(joined) == sorted(alone) == list(range(8))
    for i, reps in enumerate(plan):
        assert sorted(joined[i]["replicate"].unique()) == reps
        pd.testing.assert_frame_equal(joined[i], alone[i], check_exact=True)
        pd.testing.assert_frame_equal(joined[i].attrs["worlds"], alone[i].attrs["worlds"], check_exact=True)
    # two workers get a block of 12 each (the joined blocks travel to the workers and come back chunk by chunk)
    two = dict(runner.replay_chunks(s, jobs=2))
    assert sorted(two) == list(range(8))
    for i in range(8):
        pd.testing.assert_frame_equal(two[i], alone[i], check_exact=True)
        pd.testing.assert_frame_equal(two[i].attrs["worlds"], alone[i].attrs["worlds"], check_exact=True)
    # with two workers each gets a block: 40 replicates in chunks of 5 become two blocks of 20
    groups = runner._joined(s, [(i, reps) for i, reps in enumerate(plan)], 2)
    assert [sum(len(r) for _, r in g) for g in groups] == [12, 12]     # 24 replicates: at least 12 a worker
    forty = study_with(SAMPLING, "test", study={**SAMPLING["study"], "replicates": 40}, policy=[{"rule": "ei"}])
    tasks = list(enumerate(runner.chunk_plan(forty)))
    assert [sum(len(r) for _, r in g) for g in runner._joined(forty, tasks, 2)] == [20, 20]
    assert [sum(len(r) for _, r in g) for g in runner._joined(forty, tasks, 8)] == [5] * 8
    # negative control: handing back a chunk the whole block's worlds rows is seen by the same comparison
    wrong = joined[0].attrs["worlds"]
    bigger = pd.concat([wrong, joined[1].attrs["worlds"]], ignore_index=True)
    with pytest.raises(AssertionError):
        pd.testing.assert_frame_equal(bigger, alone[0].attrs["worlds"], check_exact=True)
