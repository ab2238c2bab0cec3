"""Tests of simlab.evidence.metrics against published values and naive recomputations."""

import math
import statistics
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from simlab.evidence import intervals, reach
from simlab.evidence import metrics

Z95 = 1.959963984540054  # standard normal 97.5% quantile (common practice)


# ---------------------------------------------------------------------------
# helpers: building traces and naive (loop-based) recomputations
# ---------------------------------------------------------------------------
def _traces_from(regrets):
    """Traces frame from {policy: [regret array of one campaign, trial 1..len]}."""
    rows = []
    for policy, campaigns in regrets.items():
        for replicate, values in enumerate(campaigns):
            for trial, value in enumerate(values, start=1):
                rows.append((policy, replicate, trial, float(value)))
    return pd.DataFrame(rows, columns=["policy", "replicate", "trial", "regret"])


def _synthetic_traces(seed, *, replicates=37, trials=12, speeds=None, history=False):
    """Paired synthetic campaigns: shared world difficulty, policy-specific speed.

    Regret is not monotone in the trial (lognormal jitter), as a recommendation
    can change for the worse.
    """
    speeds = speeds or {"fast": 0.45, "slow": 0.15, "never": 0.0}
    rng = np.random.default_rng(seed)
    difficulty = rng.lognormal(0.0, 0.5, size=replicates)
    rows = []
    first = 0 if history else 1
    for policy, speed in speeds.items():
        for r in range(replicates):
            for t in range(first - (2 if history else 0), trials + 1):
                if speed == 0.0:
                    value = 2.0 + rng.uniform()  # never meets a target below 2
                else:
                    value = difficulty[r] * math.exp(-speed * max(t, 0)) * rng.lognormal(0.0, 0.3)
                rows.append(
                    {"policy": policy, "replicate": r, "trial": t, "regret": value,
                     "history": t <= 0, "initial": t in (1, 2)}
                )  # fmt: skip
    return pd.DataFrame(rows)


def _naive_first_reach(traces, target):
    """First trial with regret <= target per campaign, by a plain loop over rows."""
    found = {}
    last = {}
    for policy, replicate, trial, regret in traces[["policy", "replicate", "trial", "regret"]].itertuples(
        index=False
    ):
        if trial < 0:
            continue
        key = (policy, replicate)
        last[key] = max(last.get(key, trial), trial)
        if regret <= target and (key not in found or trial < found[key]):
            found[key] = trial
    return {k: (found.get(k, last[k]), k in found) for k in last}


def _naive_km(times_and_flags, trials, confidence_level=0.95):
    """Kaplan-Meier share reached by each trial with simlab's band rule, by loops.

    Product-limit estimate (Kaplan & Meier 1958). Band: while no campaign has been
    censored before t, the share is a binomial share and the band is the Clopper &
    Pearson (1934) exact interval (scipy.stats.binomtest, method="exact"). After
    censoring, Greenwood's (1926) variance sum with the log(-log S) transform
    (Kalbfleisch & Prentice 2002; formula from memory):
    S^(exp(+-z * sqrt(sum d/(n(n-d))) / |log S|)), and at a share of exactly 0 or 1 the
    exact one-sided bound 1 - 0.025^(1/m) (m at risk) or 0.025^(1/m) (m reached).
    Censoring at t counts as at risk at t.
    """
    z = {0.95: Z95}[confidence_level]
    tail = (1 - confidence_level) / 2
    n = len(times_and_flags)
    survival, greenwood = 1.0, 0.0
    out = []
    for t in trials:
        at_risk = sum(1 for time, _ in times_and_flags if time >= t)
        events = sum(1 for time, hit in times_and_flags if hit and time == t)
        if events:
            survival *= 1.0 - events / at_risk
            if at_risk > events:
                greenwood += events / (at_risk * (at_risk - events))
            else:
                greenwood = math.inf
        reached = sum(1 for time, hit in times_and_flags if hit and time <= t)
        censored_before = sum(1 for time, hit in times_and_flags if not hit and time < t)
        if censored_before == 0:
            ci = stats.binomtest(reached, n).proportion_ci(confidence_level, method="exact")
            low, high = ci.low, ci.high
        elif survival == 1.0:
            low, high = 0.0, 1 - tail ** (1 / at_risk)
        elif survival == 0.0:
            low, high = tail ** (1 / reached), 1.0
        else:
            width = z * math.sqrt(greenwood) / abs(math.log(survival))
            s_low, s_high = survival ** math.exp(width), survival ** math.exp(-width)
            low, high = 1.0 - s_high, 1.0 - s_low
        out.append((t, 1.0 - survival, low, high))
    return out


def _naive_wilson(k, n, z=Z95):
    """Wilson (1927) score interval, closed form, no continuity correction."""
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def _naive_cvar90(values):
    """Rockafellar & Uryasev (2002) variational form: min over c of c + E[(x - c)+] / 0.1.

    The objective is convex and piecewise linear with kinks at the data, so the
    minimum is attained at a data point.
    """
    n = len(values)
    return min(c + sum(max(x - c, 0.0) for x in values) / (0.1 * n) for c in values)


def _first_at(pairs, level):
    for t, share in pairs:
        if share >= level - 1e-9:
            return t
    return None


# ---------------------------------------------------------------------------
# Kaplan-Meier: Freireich 6-MP arm, Kleinbaum & Klein p. 18
# ---------------------------------------------------------------------------
# Source: Freireich et al. (1963) 6-MP arm as tabulated in Kleinbaum & Klein, Survival
# Analysis: A Self-Learning Text, p. 18 (values in REFERENCES.md); "+" = censored.
FREIREICH = [(6, True), (6, True), (6, True), (6, False), (7, True), (9, False), (10, True),
             (10, False), (11, False), (13, True), (16, True), (17, False), (19, False),
             (20, False), (22, True), (23, True), (25, False), (32, False), (32, False),
             (34, False), (35, False)]  # fmt: skip
KLEINBAUM_S = {6: 0.8571, 7: 0.8067, 10: 0.7529, 13: 0.6902, 16: 0.6275, 22: 0.5378, 23: 0.4482}


def _freireich_traces():
    """One campaign per patient: regret 1 (above target) until the event week.

    An event at week w is a campaign whose regret first drops to 0 at trial w (its last
    trial); a censored week w is a campaign that ends at trial w without meeting the
    target.
    """
    campaigns = []
    for week, event in FREIREICH:
        values = [1.0] * week
        if event:
            values[-1] = 0.0
        campaigns.append(values)
    return _traces_from({"6-MP": campaigns})


def test_freireich_first_reach_reproduces_weeks():
    first = reach.first_reach(_freireich_traces(), target=0.5)
    assert list(first["trials"]) == [w for w, _ in FREIREICH]
    assert list(first["reached"]) == [e for _, e in FREIREICH]


def test_freireich_kaplan_meier_matches_kleinbaum_klein():
    curve = reach.reach_curves(_freireich_traces(), target=0.5).set_index("trial")
    survival = 1.0 - curve["reached"]
    for week, published in KLEINBAUM_S.items():
        # Published to 4 decimals: half a unit in the last place is 5e-5.
        assert survival[week] == pytest.approx(published, abs=5e-5), week
    # Between events the curve is flat (step function): week 8 and 9 carry week 7's value.
    assert survival[9] == pytest.approx(KLEINBAUM_S[7], abs=5e-5)
    assert survival[35] == pytest.approx(KLEINBAUM_S[23], abs=5e-5)
    # Negative control: ignoring censoring (treating censored weeks as never reaching,
    # a plain share of 21) gives 9/21 reached by week 23, S = 0.5714, far from 0.4482.
    naive_share = sum(1 for w, e in FREIREICH if e and w <= 23) / len(FREIREICH)
    assert abs((1 - naive_share) - KLEINBAUM_S[23]) > 0.1


def test_freireich_median_is_23_weeks():
    # Source: Kleinbaum & Klein p. 18, median survival 23 weeks (REFERENCES.md).
    summary = reach.trials_to_target_summary(_freireich_traces(), target=0.5, levels=[0.5, 0.9])
    median = summary[summary["level"] == 0.5].iloc[0]
    assert median["trials"] == 23 and median["status"] == "reached"
    # Only 55% ever reach in 35 weeks: the 90% level is not reached, and says so.
    q90 = summary[summary["level"] == 0.9].iloc[0]
    assert pd.isna(q90["trials"]) and not q90["reached"] and q90["status"] == "not reached"
    assert q90["last_trial"] == 35


def test_freireich_band_matches_greenwood_by_hand():
    curve = reach.reach_curves(_freireich_traces(), target=0.5).set_index("trial")
    for t, share, low, high in _naive_km(FREIREICH, range(1, 36)):
        assert curve.at[t, "reached"] == pytest.approx(share, abs=1e-12)
        # float64 rounding only: formula and data are the same.
        assert curve.at[t, "reached_low"] == pytest.approx(low, abs=1e-10), t
        assert curve.at[t, "reached_high"] == pytest.approx(high, abs=1e-10), t


# ---------------------------------------------------------------------------
# Wilson interval: Newcombe (1998) Table I
# ---------------------------------------------------------------------------
# Source: Newcombe (1998), Two-sided confidence intervals for the single proportion,
# Stat. Med. 17, Table I, method 3 (Wilson score, no continuity correction).
NEWCOMBE = {(81, 263): (0.2553, 0.3662), (15, 148): (0.0624, 0.1605), (0, 20): (0.0, 0.1611)}


def _failure_traces(cases):
    """One policy per (failures, n): failures campaigns above target at budget 1."""
    regrets = {}
    for k, n in cases:
        regrets[f"{k}/{n}"] = [[1.0] if i < k else [0.0] for i in range(n)]
    return _traces_from(regrets)


# Newcombe (1998) Table I, method 5 (Clopper-Pearson exact); values recalled from memory
# and equal to scipy.stats.binomtest(...).proportion_ci(method="exact") to 4 decimals.
NEWCOMBE_EXACT = {(81, 263): (0.2527, 0.3676), (15, 148): (0.0578, 0.1617), (0, 20): (0.0, 0.1684)}


def test_wilson_helper_matches_newcombe_table_i():
    for (k, n), (low, high) in NEWCOMBE.items():
        got = intervals.wilson_interval(k, n, 0.95)
        assert got == pytest.approx((low, high), abs=5e-5)
        assert got == pytest.approx(_naive_wilson(k, n), abs=1e-12)  # closed form (Wilson 1927)


def test_failure_interval_is_clopper_pearson():
    cases = {**NEWCOMBE_EXACT, (0, 50): (0.0, 0.0711217365), (50, 50): (0.9288782635, 1.0)}
    summary = metrics.budget_summary(_failure_traces(cases), budgets=[1], target=0.5).set_index("policy")
    for (k, n), (low, high) in cases.items():
        row = summary.loc[f"{k}/{n}"]
        assert row["replicates"] == n and row["reached"] == n - k
        assert row["failure_risk"] == pytest.approx(k / n)
        # Newcombe prints 4 decimals: tolerance half a unit in the last place (plus float
        # rounding); the 0/50 and 50/50 values (REFERENCES.md) have 10.
        tol = 1e-9 if n == 50 else 5e-5 + 1e-9
        assert row["failure_low"] == pytest.approx(low, abs=tol)
        assert row["failure_high"] == pytest.approx(high, abs=tol)
        exact = stats.binomtest(k, n).proportion_ci(method="exact")  # reference library
        assert (row["failure_low"], row["failure_high"]) == pytest.approx((exact.low, exact.high), abs=1e-12)
        # within-target share is the complement, with the same interval mirrored
        assert row["within_target"] == pytest.approx(1 - k / n)
        assert row["within_low"] == pytest.approx(1 - row["failure_high"], abs=1e-15)
        assert row["within_high"] == pytest.approx(1 - row["failure_low"], abs=1e-15)
    # 0 of 50: the exact one-sided bound 1 - 0.025^(1/50) (Clopper & Pearson 1934).
    assert summary.loc["0/50", "failure_high"] == pytest.approx(1 - 0.025 ** (1 / 50), rel=1e-12)
    # Negative control: Wilson's 81/263 lower end (0.2553) misses method 5 by more than
    # the tolerance, so the check tells the two methods apart.
    assert abs(NEWCOMBE[(81, 263)][0] - NEWCOMBE_EXACT[(81, 263)][0]) > 5e-5


# ---------------------------------------------------------------------------
# budget summary and curves against naive recomputation
# ---------------------------------------------------------------------------
def test_budget_summary_matches_naive_recomputation():
    traces = _synthetic_traces(3, replicates=37, history=True)
    target = 0.4
    summary = metrics.budget_summary(traces, budgets=[8, 3, 0], target=target, n_resamples=500, seed=1)
    assert list(summary.columns[:3]) == ["policy", "budget", "replicates"]
    assert list(summary["policy"]) == ["fast"] * 3 + ["slow"] * 3 + ["never"] * 3
    assert list(summary["budget"]) == [0, 3, 8] * 3
    by_key = {}
    for policy, replicate, trial, regret in traces[["policy", "replicate", "trial", "regret"]].itertuples(
        index=False
    ):
        by_key.setdefault((policy, trial), []).append(regret)
    for row in summary.itertuples():
        values = by_key[(row.policy, row.budget)]
        assert row.replicates == len(values) == 37
        assert row.regret_median == pytest.approx(statistics.median(values), rel=1e-12)
        # statistics.quantiles 'inclusive' is the linear (type 7) rule numpy uses.
        q1, _, q3 = statistics.quantiles(values, n=4, method="inclusive")
        assert row.regret_q25 == pytest.approx(q1, rel=1e-12)
        assert row.regret_q75 == pytest.approx(q3, rel=1e-12)
        failures = sum(1 for v in values if v > target)
        assert row.reached == len(values) - failures
        assert row.failure_risk == pytest.approx(failures / len(values))
        exact = stats.binomtest(failures, len(values)).proportion_ci(method="exact")
        assert row.failure_low == pytest.approx(exact.low, abs=1e-9)
        assert row.failure_high == pytest.approx(exact.high, abs=1e-9)
        assert row.within_target == pytest.approx(1 - failures / len(values))
        # 37 campaigns: 3.7 campaigns' worth of tail, the fractional case.
        assert row.cvar90 == pytest.approx(_naive_cvar90(values), rel=1e-12)
        # order-statistic interval: ranks 13 and 25 of 37 (binomial, Thompson 1936)
        ordered = sorted(values)
        assert (row.median_low, row.median_high) == (ordered[12], ordered[24])
        ci = stats.quantile_test(values, q=statistics.median(values), p=0.5).confidence_interval(0.95)
        assert (row.median_low, row.median_high) == pytest.approx((ci.low, ci.high), rel=1e-12)  # scipy
        # DKW lower bound (Thomas & Learned-Miller 2019): mean of the empirical quantile
        # over [0.9 - e, 1 - e], e = sqrt(log(20) / 74), by integrating the steps
        e = math.sqrt(math.log(20) / (2 * 37))
        lo, hi = 0.9 - e, 1 - e
        naive = sum(v * max(0.0, min((i + 1) / 37, hi) - max(i / 37, lo)) for i, v in enumerate(ordered)) / 0.1
        assert row.cvar90_low == pytest.approx(naive, rel=1e-12)
        assert row.cvar90_low <= row.cvar90 and math.isnan(row.cvar90_high)


@pytest.mark.parametrize(
    "values, expected",
    [
        # hand-worked from the definition (Acerbi & Tasche 2002): worst 10% of n
        (list(range(1, 21)), (20 + 19) / 2),  # n = 20: the two worst
        (list(range(1, 8)), 7.0),  # n = 7 < 10: the worst campaign
        (list(range(1, 16)), (15 + 0.5 * 14) / 1.5),  # n = 15: 1.5 campaigns' worth
    ],
)
def test_cvar90_definition_for_awkward_n(values, expected):
    traces = _traces_from({"p": [[v] for v in values]})
    row = metrics.budget_summary(traces, budgets=1, target=0.0, n_resamples=200).iloc[0]
    assert row["cvar90"] == pytest.approx(expected, rel=1e-12)
    assert row["cvar90"] == pytest.approx(_naive_cvar90(values), rel=1e-12)


def test_regret_curves_match_naive_and_skip_history_rows():
    traces = _synthetic_traces(5, replicates=21, trials=6, history=True)
    curves = metrics.regret_curves(traces, n_resamples=200, seed=2)
    assert list(curves.columns) == [
        "policy", "trial", "replicates", "regret_median", "regret_q25", "regret_q75",
        "median_low", "median_high",
    ]  # fmt: skip
    # trial 0 (after history alone) is kept; trials -2, -1 (history rows) are not.
    assert sorted(curves["trial"].unique()) == list(range(0, 7))
    for row in curves.itertuples():
        values = [
            r for p, t, r in traces[["policy", "trial", "regret"]].itertuples(index=False)
            if p == row.policy and t == row.trial
        ]  # fmt: skip
        assert row.replicates == 21
        assert row.regret_median == pytest.approx(statistics.median(values), rel=1e-12)
        q1, _, q3 = statistics.quantiles(values, n=4, method="inclusive")
        assert (row.regret_q25, row.regret_q75) == pytest.approx((q1, q3), rel=1e-12)
        assert row.median_low <= row.regret_median <= row.median_high


def test_median_interval_is_order_statistics_and_ignores_seed():
    traces = _synthetic_traces(8, replicates=50, trials=3)
    a = metrics.regret_curves(traces, seed=11)
    b = metrics.regret_curves(traces, seed=12)
    pd.testing.assert_frame_equal(a, b)  # nothing resamples any more
    for row in a.itertuples():
        values = sorted(traces.loc[(traces["policy"] == row.policy) & (traces["trial"] == row.trial), "regret"])
        # ranks 18 and 33 of 50: P(Bin(50, 1/2) <= 17) = 0.0164 <= 0.025 < P(<= 18) (scipy.stats.binom)
        assert (row.median_low, row.median_high) == (values[17], values[32])
    # too few campaigns for any 95 % order-statistic interval: NaN, not a made-up band
    few = metrics.regret_curves(_synthetic_traces(1, replicates=5, trials=2))
    assert few["median_low"].isna().all() and few["median_high"].isna().all()


# ---------------------------------------------------------------------------
# trials-to-target and budget plan against naive recomputation (with censoring)
# ---------------------------------------------------------------------------
def _censored_traces():
    """fast/slow/never policies, plus campaigns of 'slow' stopped early (censored mid-way)."""
    traces = _synthetic_traces(17, replicates=40, trials=15)
    stopped = (traces["policy"] == "slow") & (traces["replicate"] % 4 == 0) & (traces["trial"] > 9)
    return traces[~stopped].reset_index(drop=True)


def test_first_reach_matches_naive():
    traces = _censored_traces()
    naive = _naive_first_reach(traces, 0.3)
    first = reach.first_reach(traces, target=0.3)
    assert list(first.columns) == ["policy", "replicate", "trials", "reached"]
    assert len(first) == len(naive)
    for row in first.itertuples():
        assert (row.trials, row.reached) == naive[(row.policy, row.replicate)]


def test_reach_curves_and_summary_match_naive_km():
    traces = _censored_traces()
    target = 0.3
    naive = _naive_first_reach(traces, target)
    curves = reach.reach_curves(traces, target=target)
    summary = reach.trials_to_target_summary(traces, target=target, levels=(0.5, 0.9))
    for policy in ["fast", "slow", "never"]:
        campaigns = [v for (p, _), v in naive.items() if p == policy]
        expected = _naive_km(campaigns, range(1, 16))
        got = curves[curves["policy"] == policy].set_index("trial")
        assert list(got.index) == list(range(1, 16))
        for t, share, low, high in expected:
            assert got.at[t, "reached"] == pytest.approx(share, abs=1e-12)
            assert got.at[t, "reached_low"] == pytest.approx(low, abs=1e-10)
            assert got.at[t, "reached_high"] == pytest.approx(high, abs=1e-10)
            assert got.at[t, "campaigns_reached"] == sum(1 for time, hit in campaigns if hit and time <= t)
        for level in (0.5, 0.9):
            row = summary[(summary["policy"] == policy) & (summary["level"] == level)].iloc[0]
            trials = _first_at([(t, s) for t, s, _, _ in expected], level)
            low = _first_at([(t, h) for t, _, _, h in expected], level)
            high = _first_at([(t, lo) for t, _, lo, _ in expected], level)
            for column, value in (("trials", trials), ("trials_low", low), ("trials_high", high)):
                assert (pd.isna(row[column]) and value is None) or row[column] == value, (policy, level, column)
            assert row["status"] == ("reached" if trials is not None else "not reached")
    never = summary[summary["policy"] == "never"]
    # A policy that never reaches the target gets "not reached", never a number.
    assert never["trials"].isna().all() and (never["status"] == "not reached").all()
    assert not never["reached"].any()
    assert (curves.loc[curves["policy"] == "never", "reached"] == 0).all()


def test_budget_plan_matches_naive_and_reports_not_reached():
    traces = _censored_traces()[lambda f: f["trial"] <= 9]  # every campaign to trial 9
    target, success = 0.3, 0.8
    plan = reach.budget_plan(traces, target=target, success=success).set_index("policy")
    for policy in ["fast", "slow", "never"]:
        shares = []
        for t in range(1, 10):
            values = traces.loc[(traces["policy"] == policy) & (traces["trial"] == t), "regret"]
            k = int(sum(v <= target for v in values))
            exact = stats.binomtest(k, len(values)).proportion_ci(method="exact")
            shares.append((t, k / len(values), exact.low, exact.high))
        budget = _first_at([(t, s) for t, s, _, _ in shares], success)
        conservative = _first_at([(t, lo) for t, _, lo, _ in shares], success)
        optimistic = _first_at([(t, h) for t, _, _, h in shares], success)
        row = plan.loc[policy]
        for column, value in (("budget", budget), ("budget_conservative", conservative),
                              ("budget_optimistic", optimistic)):  # fmt: skip
            assert (pd.isna(row[column]) and value is None) or row[column] == value, (policy, column)
    assert plan.loc["fast", "status"] == "reached"
    assert pd.isna(plan.loc["never", "budget"]) and pd.isna(plan.loc["never", "budget_sustained"])
    assert plan.loc["never", "status"] == "not reached within the simulated budget"
    assert plan.loc["never", "share"] == 0.0
    # 0 of 40 within target: the exact one-sided upper bound 1 - 0.025^(1/40) (Clopper & Pearson 1934)
    assert plan.loc["never", "share_high"] == pytest.approx(1 - 0.025 ** (1 / 40), rel=1e-12)
    # conservative >= estimate >= optimistic whenever they exist
    fast = plan.loc["fast"]
    assert fast["budget_optimistic"] <= fast["budget"] <= fast["budget_conservative"]


def test_shipped_share_and_first_passage_differ_when_regret_rises_again():
    # Constructed: 10 campaigns, target 0.5. Every recommendation is within target from
    # trial 3; in three campaigns it gets worse again at trials 5-7 and recovers at 8.
    campaigns = []
    for r in range(10):
        values = [1.0, 1.0, 0.2, 0.2, 0.2, 0.2, 0.2, 0.2, 0.2]
        if r < 3:
            values[4:7] = [0.9, 0.9, 0.9]
        campaigns.append(values)
    traces = _traces_from({"p": campaigns})
    within = reach.within_target_curves(traces, target=0.5).set_index("trial")
    first = reach.reach_curves(traces, target=0.5).set_index("trial")
    assert list(within["within_target"]) == [0, 0, 1, 1, 0.7, 0.7, 0.7, 1, 1]  # counted by hand
    assert list(first["reached"]) == [0, 0, 1, 1, 1, 1, 1, 1, 1]  # first passage never falls
    plan = reach.budget_plan(traces, target=0.5, success=0.9).iloc[0]
    assert plan["budget"] == 3 and plan["budget_sustained"] == 8
    assert plan["campaigns_within"] == 10 and plan["share"] == 1.0
    # Budgets 5, 6, 7 ship 7 of 10: a plan restricted to them and 9 says 9.
    restricted = reach.budget_plan(traces, target=0.5, success=0.9, budgets=[5, 6, 7, 9]).iloc[0]
    assert restricted["budget"] == 9 and restricted["budget_sustained"] == 9
    # The summary at trial 5 reports the same share and interval, failure risk its complement.
    row = metrics.budget_summary(traces, budgets=[5], target=0.5).iloc[0]
    exact = stats.binomtest(7, 10).proportion_ci(method="exact")
    assert (row["within_target"], row["within_low"], row["within_high"]) == pytest.approx((0.7, exact.low, exact.high))
    assert (within.at[5, "within_low"], within.at[5, "within_high"]) == (row["within_low"], row["within_high"])
    assert row["failure_risk"] == pytest.approx(0.3)


def test_horizon_column_is_carried_into_the_plan():
    # A horizon-aware policy as the runner writes it: trials 1-5 from the campaign planned
    # for 5 trials, 6-10 from the one planned for 10; a plain policy planned for 10 throughout.
    rng = np.random.default_rng(3)
    rows = []
    for policy in ("aware", "plain"):
        for r in range(20):
            for t in range(1, 11):
                horizon = (5 if t <= 5 else 10) if policy == "aware" else 10
                rows.append((policy, r, t, float(rng.exponential() * 0.7**t), horizon))
    traces = pd.DataFrame(rows, columns=["policy", "replicate", "trial", "regret", "horizon"])
    curves = reach.within_target_curves(traces, target=0.2)
    aware = curves[curves["policy"] == "aware"]
    assert list(aware["horizon"]) == [5] * 5 + [10] * 5 and aware["horizon_aware"].all()
    assert not curves.loc[curves["policy"] == "plain", "horizon_aware"].any()
    plan = reach.budget_plan(traces, target=0.2, success=0.5).set_index("policy")
    b = int(plan.loc["aware", "budget"])
    assert plan.loc["aware", "horizon"] == (5 if b <= 5 else 10) and plan.loc["aware", "horizon_aware"]
    with pytest.raises(ValueError, match="horizon"):
        reach.within_target_curves(traces.assign(horizon=traces["replicate"]), target=0.2)


def test_budget_plan_restricted_to_candidate_budgets():
    traces = _censored_traces()
    full = reach.budget_plan(traces, target=0.3, success=0.8).set_index("policy")
    plan = reach.budget_plan(traces, target=0.3, success=0.8, budgets=[5, 10, 15]).set_index("policy")
    b = full.loc["fast", "budget"]
    assert plan.loc["fast", "budget"] == min(c for c in (5, 10, 15) if c >= b)
    with pytest.raises(ValueError, match="outside the simulated trials"):
        reach.budget_plan(traces, target=0.3, budgets=[16])


def test_trial_zero_counts_as_after_history():
    traces = pd.DataFrame(
        {"policy": "p", "replicate": [0, 0, 0, 1, 1, 1], "trial": [-1, 0, 1, -1, 0, 1],
         "regret": [0.0, 0.1, 0.5, 0.0, 2.0, 0.1]}
    )  # fmt: skip
    first = reach.first_reach(traces, target=0.2)
    # replicate 0 meets the target on its history alone (trial 0); trial -1 is ignored.
    assert list(first["trials"]) == [0, 1] and first["reached"].all()
    curve = reach.reach_curves(traces, target=0.2)
    assert list(curve["trial"]) == [0, 1] and list(curve["reached"]) == [0.5, 1.0]


# ---------------------------------------------------------------------------
# input validation
# ---------------------------------------------------------------------------
def test_bad_input_raises_value_error():
    good = _synthetic_traces(1, replicates=5, trials=3)
    with pytest.raises(ValueError, match="lacks required column"):
        metrics.regret_curves(good.drop(columns="regret"))
    with pytest.raises(ValueError, match=">= 0"):
        reach.first_reach(good.assign(regret=-good["regret"]), target=0.1)
    with pytest.raises(ValueError, match="one row per"):
        reach.first_reach(pd.concat([good, good.iloc[:1]]), target=0.1)
    with pytest.raises(ValueError, match="confidence_level"):
        metrics.regret_curves(good, confidence_level=1.5)
    with pytest.raises(ValueError, match="target"):
        reach.first_reach(good, target=-1.0)
    with pytest.raises(ValueError, match="not available for every campaign"):
        metrics.budget_summary(good, budgets=[4], target=0.1)
    with pytest.raises(ValueError, match="method"):
        reach.reach_curves(good, target=0.1, method="plain")
    with pytest.raises(ValueError, match="success"):
        reach.budget_plan(good, target=0.1, success=0.0)


def test_constant_regret_gives_zero_width_intervals_without_warnings():
    traces = _traces_from({"p": [[0.0, 0.0]] * 12, "q": [[1.0, 1.0]] * 12})
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        summary = metrics.budget_summary(traces, budgets=[2], target=0.5, n_resamples=200)
        curves = metrics.regret_curves(traces, n_resamples=200)
    assert (summary["median_low"] == summary["regret_median"]).all()
    # the DKW lower bound of a constant sample is the constant (its weights sum to 1)
    assert np.allclose(summary["cvar90_low"], summary["cvar90"], rtol=1e-12) and summary["cvar90_high"].isna().all()
    assert (curves["median_high"] == curves["regret_median"]).all()
