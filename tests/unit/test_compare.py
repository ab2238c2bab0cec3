"""Tests of simlab.evidence.compare: Holm adjustment, paired statistics and the choice table."""

import math
import statistics
import warnings
from itertools import combinations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from simlab.evidence import choice, compare, metrics, reach


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------
def _paired_traces(seed, *, factors, replicates=60, trials=10, tie_share=0.0):
    """Campaigns on shared worlds: regret(t) = world * factor * exp(-0.3 t) * jitter.

    `factors` maps policy -> regret multiplier (smaller is better). With `tie_share`,
    that share of replicates gives every policy the same regret at every trial (as when
    all policies recommend the same initial-design point).
    """
    rng = np.random.default_rng(seed)
    world = rng.lognormal(0.0, 0.6, size=replicates)
    tied = rng.uniform(size=replicates) < tie_share
    rows = []
    for policy, factor in factors.items():
        for r in range(replicates):
            for t in range(1, trials + 1):
                base = world[r] * math.exp(-0.3 * t)
                value = base if tied[r] else base * factor * rng.lognormal(0.0, 0.25)
                rows.append((policy, r, t, value))
    return pd.DataFrame(rows, columns=["policy", "replicate", "trial", "regret"])


def _closed_testing_holm(p):
    """Holm-adjusted p-values by brute-force closed testing with Bonferroni local tests.

    Holm (1979) is the closure (Marcus, Peritz & Gabriel 1976) of Bonferroni tests of
    every intersection hypothesis; the adjusted p-value of H_i is the largest
    Bonferroni p-value min(1, |S| min_{j in S} p_j) over all index sets S containing i.
    Written independently of the step-down shortcut in the library.
    """
    m = len(p)
    adjusted = []
    for i in range(m):
        worst = 0.0
        for size in range(1, m + 1):
            for subset in combinations(range(m), size):
                if i in subset:
                    worst = max(worst, min(1.0, size * min(p[j] for j in subset)))
        adjusted.append(worst)
    return adjusted


def _mcnemar_by_hand(only_a, only_b):
    """Exact two-sided McNemar p: 2 * P(Bin(n, 1/2) <= min), capped at 1 (symmetric tails)."""
    n = only_a + only_b
    if n == 0:
        return 1.0
    k = min(only_a, only_b)
    return min(1.0, 2 * sum(math.comb(n, i) for i in range(k + 1)) / 2**n)


# ---------------------------------------------------------------------------
# Holm
# ---------------------------------------------------------------------------
def test_holm_worked_example():
    # Source: the worked example of the Wikipedia article "Holm-Bonferroni method"
    # (H1..H4 with p = 0.01, 0.04, 0.03, 0.005 at alpha = 0.05: H1 and H4 rejected,
    # H2 and H3 not). Adjusted values worked by hand from Holm (1979):
    # sorted 0.005, 0.01, 0.03, 0.04 -> 4*0.005 = 0.02, 3*0.01 = 0.03, 2*0.03 = 0.06,
    # max(0.06, 1*0.04) = 0.06.
    p = [0.01, 0.04, 0.03, 0.005]
    adjusted = compare.holm_adjust(p)
    np.testing.assert_allclose(adjusted, [0.03, 0.06, 0.06, 0.02], rtol=1e-12)
    assert list(adjusted <= 0.05) == [True, False, False, True]


def test_holm_caps_at_one_and_keeps_step_down_monotone():
    # Hand-worked: sorted 0.02, 0.3, 0.5 -> 0.06, 0.6, max(0.6, 0.5) = 0.6.
    np.testing.assert_allclose(compare.holm_adjust([0.5, 0.3, 0.02]), [0.6, 0.6, 0.06], rtol=1e-12)
    # Hand-worked: 2 * 0.8 = 1.6 capped at 1; then max(1, 0.9) = 1.
    np.testing.assert_allclose(compare.holm_adjust([0.9, 0.8]), [1.0, 1.0])
    assert compare.holm_adjust([]).size == 0


def test_holm_equals_closed_testing():
    rng = np.random.default_rng(1979)
    for m in (1, 2, 3, 5, 6):
        for _ in range(20):
            p = rng.uniform(0, 0.2, size=m) ** rng.uniform(0.5, 2)
            p[rng.uniform(size=m) < 0.2] = p[0]  # exercise ties
            np.testing.assert_allclose(compare.holm_adjust(p), _closed_testing_holm(list(p)), rtol=1e-12)


def test_holm_rejects_bad_p_values():
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        compare.holm_adjust([0.2, 1.2])
    with pytest.raises(ValueError, match="one-dimensional"):
        compare.holm_adjust([[0.1, 0.2]])


# ---------------------------------------------------------------------------
# pairwise
# ---------------------------------------------------------------------------
def test_pairwise_matches_naive_recomputation():
    traces = _paired_traces(7, factors={"A": 0.6, "B": 1.0, "C": 1.05}, tie_share=0.15)
    budget, target = 6, 0.12
    table = compare.pairwise(traces, budget=budget, target=target)
    assert list(zip(table["policy_a"], table["policy_b"])) == [("A", "B"), ("A", "C"), ("B", "C")]
    regret = {}
    for policy, replicate, trial, value in traces.itertuples(index=False):
        if trial == budget:
            regret[(policy, replicate)] = value
    naive_p = []
    for row in table.itertuples():
        a = [regret[(row.policy_a, r)] for r in range(60)]
        b = [regret[(row.policy_b, r)] for r in range(60)]
        d = [x - y for x, y in zip(a, b)]
        wins_a = sum(1 for v in d if v < 0)
        wins_b = sum(1 for v in d if v > 0)
        ties = sum(1 for v in d if v == 0)
        assert (row.wins_a, row.wins_b, row.ties, row.replicates) == (wins_a, wins_b, ties, 60)
        assert ties >= 1  # the tied worlds are really exercised
        assert row.win_rate == pytest.approx((wins_a + ties / 2) / 60)
        assert row.median_difference == pytest.approx(statistics.median(d), rel=1e-12)
        assert row.median_difference_low <= row.median_difference <= row.median_difference_high
        assert row.win_rate_low <= row.win_rate <= row.win_rate_high
        # Sign test of the win rate: scipy.stats.binomtest on wins vs losses, ties left out.
        assert row.sign_p_value == pytest.approx(stats.binomtest(wins_a, wins_a + wins_b, 0.5).pvalue, rel=1e-12)
        # Wilcoxon signed-rank on the untied replicates (scipy as the reference).
        nonzero = [v for v in d if v != 0]
        p = stats.wilcoxon(nonzero).pvalue
        assert row.regret_p_value == pytest.approx(p, rel=1e-12)
        naive_p.append(p)
        fail_a = [x > target for x in a]
        fail_b = [y > target for y in b]
        only_a = sum(1 for x, y in zip(fail_a, fail_b) if x and not y)
        only_b = sum(1 for x, y in zip(fail_a, fail_b) if y and not x)
        assert (row.failures_only_a, row.failures_only_b) == (only_a, only_b)
        assert (row.failures_a, row.failures_b) == (sum(fail_a), sum(fail_b))
        assert row.failure_p_value == pytest.approx(_mcnemar_by_hand(only_a, only_b), rel=1e-9)
        assert row.failure_difference == pytest.approx((sum(fail_a) - sum(fail_b)) / 60, rel=1e-12)
        assert row.failure_difference_low <= row.failure_difference <= row.failure_difference_high
    np.testing.assert_allclose(table["regret_p_holm"], _closed_testing_holm(naive_p), rtol=1e-12)
    np.testing.assert_allclose(
        table["failure_p_holm"], _closed_testing_holm(list(table["failure_p_value"])), rtol=1e-12
    )
    np.testing.assert_allclose(table["sign_p_holm"], _closed_testing_holm(list(table["sign_p_value"])), rtol=1e-12)
    # A is 40% better on untied worlds: the signed ranks favour it.
    assert table.loc[0, "regret_favours"] == "A" and table.loc[0, "median_difference_high"] < 0


def test_pairwise_identical_policies_are_a_tie_without_warnings():
    traces = _paired_traces(2, factors={"A": 1.0}, replicates=30)
    traces = pd.concat([traces, traces.assign(policy="copy")], ignore_index=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        row = compare.pairwise(traces, budget=5, target=0.2).iloc[0]
    assert (row["ties"], row["wins_a"], row["wins_b"]) == (30, 0, 0)
    # Every world tied: the win rate is 1/2, and its interval, which is about the
    # population, stays symmetric about 1/2 and of positive width (30 agreeing pairs
    # do not prove that the policies never differ).
    assert row["win_rate"] == 0.5 and row["win_rate_low"] < 0.5 < row["win_rate_high"]
    assert row["win_rate_low"] + row["win_rate_high"] == pytest.approx(1.0, abs=1e-12)
    assert row["sign_p_value"] == 1.0
    assert row["median_difference"] == 0 and row["median_difference_low"] == 0 == row["median_difference_high"]
    assert row["regret_p_value"] == 1.0 and row["failure_p_value"] == 1.0
    assert row["regret_favours"] == "neither" and row["failure_favours"] == "neither"


def test_pairwise_needs_two_policies_and_a_reachable_budget():
    traces = _paired_traces(2, factors={"A": 1.0}, replicates=5)
    with pytest.raises(ValueError, match="at least two policies"):
        compare.pairwise(traces, budget=3, target=0.1)
    traces = _paired_traces(2, factors={"A": 1.0, "B": 1.0}, replicates=5, trials=4)
    with pytest.raises(ValueError, match="not available"):
        compare.pairwise(traces, budget=9, target=0.1)


# ---------------------------------------------------------------------------
# choice table
# ---------------------------------------------------------------------------
def test_choice_table_clear_leader_agrees_with_naive_choice():
    traces = _paired_traces(11, factors={"bold": 0.35, "middle": 0.7, "cautious": 1.0}, replicates=80)
    budget, target, success = 6, 0.15, 0.8
    table = choice.choice_table(traces, budget=budget, target=target, success=success, n_resamples=500)
    assert list(table["attitude"]) == [
        "lowest median regret", "lowest failure risk", "fewest trials for the requested success level",
    ]  # fmt: skip
    # naive choices: loops over rows
    at_budget = {}
    first = {}
    for policy, replicate, trial, value in traces.itertuples(index=False):
        if trial == budget:
            at_budget.setdefault(policy, []).append(value)
        if value <= target and trial < first.get((policy, replicate), math.inf):
            first[(policy, replicate)] = trial
    medians = {p: statistics.median(v) for p, v in at_budget.items()}
    failures = {p: sum(1 for x in v if x > target) / len(v) for p, v in at_budget.items()}
    plans = {}
    for policy in at_budget:
        # every campaign runs to trial 10, so the Kaplan-Meier share is a plain share
        times = [first.get((policy, r), math.inf) for r in range(80)]
        plans[policy] = next((t for t in range(1, 11) if sum(x <= t for x in times) / 80 >= success), None)
    ranked_median = sorted(medians, key=medians.get)
    ranked_failure = sorted(failures, key=lambda p: (failures[p], medians[p]))
    ranked_plan = sorted(plans, key=lambda p: (plans[p] is None, plans[p] or 0))
    rows = table.set_index("attitude")
    assert rows.loc["lowest median regret", "leader"] == ranked_median[0] == "bold"
    assert rows.loc["lowest median regret", "runner_up"] == ranked_median[1]
    assert rows.loc["lowest median regret", "leader_value"] == pytest.approx(medians["bold"])
    assert rows.loc["lowest failure risk", "leader"] == ranked_failure[0] == "bold"
    assert rows.loc["lowest failure risk", "leader_value"] == pytest.approx(failures["bold"])
    trials_row = rows.loc["fewest trials for the requested success level"]
    assert trials_row["leader"] == ranked_plan[0] == "bold"
    assert trials_row["leader_value"] == plans["bold"]
    assert trials_row["leader_low"] <= trials_row["leader_value"] <= trials_row["leader_high"]
    # bold is 3x better on every world: every lead is clear
    assert list(table["lead"]) == ["clear", "clear", "clear"]
    assert table.loc[0, "p_value"] < 0.05


@pytest.mark.slow
def test_choice_table_false_clear_rate_is_controlled():
    # Two policies with the same regret law on shared worlds: any "clear" lead is a
    # false positive. Over 40 seeded studies the rate per attitude should be at most
    # alpha = 0.05 (the trials rule is stricter still); Monte Carlo sd at 0.05 over 40
    # studies is 0.034, so allow 0.05 + 3 sd = 0.15.
    studies = 40
    clear = np.zeros(3)
    for seed in range(studies):
        traces = _paired_traces(1000 + seed, factors={"one": 1.0, "two": 1.0}, replicates=50, trials=6)
        table = choice.choice_table(traces, budget=5, target=0.2, success=0.8, n_resamples=100)
        clear += (table["lead"] == "clear").to_numpy()
    assert np.all(clear / studies <= 0.15), clear
    # Negative control for the check itself: with a real difference that matters (half
    # the regret) the same count must exceed the bound for the regret and failure attitudes.
    found = np.zeros(3)
    for seed in range(10):
        traces = _paired_traces(2000 + seed, factors={"one": 0.5, "two": 1.0}, replicates=50, trials=6)
        table = choice.choice_table(traces, budget=5, target=0.2, success=0.8, n_resamples=100)
        found += (table["lead"] == "clear").to_numpy()
    assert np.all(found[:2] / 10 > 0.15), found


def test_choice_table_not_reached_is_not_a_number():
    # "never" cannot meet the target; "slow" reaches late. The trials row must rank
    # "never" last and, when nobody reaches, say so rather than invent a budget.
    traces = _paired_traces(5, factors={"slow": 1.0, "never": 1.0}, replicates=40)
    traces.loc[traces["policy"] == "never", "regret"] += 5.0
    table = choice.choice_table(traces, budget=8, target=0.2, success=0.6, n_resamples=200).set_index("attitude")
    trials_row = table.loc["fewest trials for the requested success level"]
    assert trials_row["leader"] == "slow" and trials_row["runner_up"] == "never"
    assert math.isnan(trials_row["runner_up_value"])
    nobody = choice.choice_table(traces, budget=8, target=1e-6, success=0.6, n_resamples=200)
    nobody = nobody.set_index("attitude").loc["fewest trials for the requested success level"]
    assert nobody["lead"] == "not reached" and pd.isna(nobody["leader"])
    assert math.isnan(nobody["leader_value"])


def test_choice_table_values_match_metrics_tables():
    traces = _paired_traces(13, factors={"x": 0.8, "y": 1.0, "z": 0.9}, replicates=50)
    table = choice.choice_table(traces, budget=4, target=0.3, success=0.7, n_resamples=300, seed=9)
    summary = metrics.budget_summary(traces, budgets=[4], target=0.3).set_index("policy")
    plan = reach.budget_plan(traces, target=0.3, success=0.7).set_index("policy")
    regret_row, failure_row, trials_row = (table.iloc[i] for i in range(3))
    assert regret_row["leader_value"] == summary.loc[regret_row["leader"], "regret_median"]
    assert failure_row["leader_value"] == summary.loc[failure_row["leader"], "failure_risk"]
    assert failure_row["leader_low"] == summary.loc[failure_row["leader"], "failure_low"]
    assert trials_row["leader_value"] == plan.loc[trials_row["leader"], "budget"]
    assert trials_row["leader_high"] == plan.loc[trials_row["leader"], "budget_conservative"]
