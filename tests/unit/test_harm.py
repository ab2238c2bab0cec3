"""Harmful trials (evidence/harm.py): counts and shortfall against a recomputation from the traces,
the intervals' coverage in repeated studies (with controls that must under-cover), Clopper-Pearson
shares against scipy, and the fourth attitude's lead rule (with an A/A control)."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from simlab.evidence.choice import HARM_ATTITUDE, choice_table
from simlab.evidence.harm import (FEW, count_mean_interval, harm_pairs, harm_per_campaign, harm_table,
                                  skew_mean_interval)
from simlab.evidence.intervals import bounded_mean_interval
from simlab.replay.runner import replay_study
from simlab.study.spec import parse_study


def _study(*, goal, floor, replicates=6, history=None):
    data = {
        "study": {"name": "harm-unit", "replicates": replicates, "seed": 3, "goal": goal},
        "space": {"die_temp": [180.0, 240.0]},
        "world": {"kernel": "matern52", "lengthscale": 15.0, "amplitude": 2.0, "mean": 80.0, "noise": 0.1},
        "campaign": {"initial": 3, "budgets": [6, 10], "pool": 128},
        "target": {"regret": 0.5, "floor": floor},
        "policy": [{"rule": "ei", "label": "EI"}, {"rule": "random", "label": "Random"}],
    }
    return parse_study(data, source="test")


@pytest.fixture(scope="module", params=["maximize", "minimize"])
def replayed(request):
    goal = request.param
    study = _study(goal=goal, floor=79.0 if goal == "maximize" else 81.0)
    traces, worlds = replay_study(study)
    return study, traces, worlds


def test_counts_and_shortfall_match_a_recomputation_from_the_traces(replayed):
    # Reference: the definitions applied directly with pandas to the traces and worlds.csv's
    # `reference` (the world's best, user's orientation); nothing of harm.py is used.
    study, traces, worlds = replayed
    best = worlds.set_index("replicate")["reference"]
    for budget in study.campaign.budgets:
        rows = traces[(traces["trial"] >= 1) & (traces["trial"] <= budget) & ~traces["history"]].copy()
        worse = rows["f"] < study.floor if study.goal == "maximize" else rows["f"] > study.floor
        rows["harm"] = worse
        rows["own_harm"] = worse & ~rows["initial"]
        gap = best.loc[rows["replicate"]].to_numpy() - rows["f"].to_numpy()
        rows["short"] = gap if study.goal == "maximize" else -gap
        expect = rows.groupby(["policy", "replicate"], observed=True).agg(
            harmful=("harm", "sum"), own_harmful=("own_harm", "sum"), shortfall=("short", "sum"),
            trials=("harm", "size")).reset_index()
        expect["policy"] = expect["policy"].astype(str)
        for reference in (best, None):       # from worlds.csv, and read back from the traces
            got = harm_per_campaign(traces, floor=study.floor, sign=study.sign, budget=budget, reference=reference)
            merged = expect.merge(got, on=["policy", "replicate"], suffixes=("", "_got"))
            assert len(merged) == len(expect) == len(got)
            assert (merged["harmful"] == merged["harmful_got"]).all()
            assert (merged["own_harmful"] == merged["own_harmful_got"]).all()
            assert (merged["trials"] == budget).all() and (merged["trials_got"] == budget).all()
            # float64 rounding of a sum of `budget` terms of size ~10 (and of reading the reference back)
            np.testing.assert_allclose(merged["shortfall_got"], merged["shortfall"], rtol=0, atol=1e-9)
            assert (merged["shortfall"] >= -1e-9).all()       # no trial beats the world's best
        table = harm_table(traces, floor=study.floor, sign=study.sign, budgets=[budget],
                           initial=study.campaign.initial, reference=best)
        means = expect.groupby("policy")[["harmful", "own_harmful", "shortfall"]].mean()
        for _, row in table.iterrows():
            assert row["harmful_mean"] == pytest.approx(means.at[row["policy"], "harmful"], abs=1e-12)
            assert row["own_harmful_mean"] == pytest.approx(means.at[row["policy"], "own_harmful"], abs=1e-12)
            assert row["shortfall_mean"] == pytest.approx(means.at[row["policy"], "shortfall"], abs=1e-9)
            mine = expect[expect["policy"] == row["policy"]]
            assert row["campaigns_harmed"] == int((mine["harmful"] > 0).sum())
            assert row["own_campaigns_harmed"] == int((mine["own_harmful"] > 0).sum())


def test_history_rows_never_count_and_the_floor_is_strict():
    # A hand-made frame: one campaign, maximise, floor 10; past trials (trial <= 0) are far below it.
    f = [0.0, 0.0, 9.0, 10.0, 11.0, 8.0]
    trial = [-1, 0, 1, 2, 3, 4]
    frame = pd.DataFrame({"policy": "A", "replicate": 0, "trial": trial, "initial": [False, False, True, False, False,
                                                                                   False],
                          "history": [True, True, False, False, False, False], "f": f,
                          "rec_trial": 3, "regret": 1.0})   # recommendation 11, best 12
    per = harm_per_campaign(frame, floor=10.0, sign=-1.0, budget=4)
    assert per.loc[0, "harmful"] == 2            # 9 and 8; 10 is at the floor, not below it
    assert per.loc[0, "own_harmful"] == 1        # 8: the 9 was the initial design
    assert per.loc[0, "shortfall"] == pytest.approx((12 - 9) + (12 - 10) + (12 - 11) + (12 - 8))


def test_harmed_share_is_clopper_pearson(replayed):
    # Reference: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper & Pearson 1934).
    study, traces, worlds = replayed
    table = harm_table(traces, floor=study.floor, sign=study.sign, budgets=study.campaign.budgets,
                       initial=study.campaign.initial)
    for _, row in table.iterrows():
        for k, low, high in (("campaigns_harmed", "harmed_low", "harmed_high"),
                             ("own_campaigns_harmed", "own_harmed_low", "own_harmed_high")):
            ci = stats.binomtest(int(row[k]), int(row["replicates"])).proportion_ci(0.95, method="exact")
            assert row[low] == pytest.approx(ci.low, abs=1e-12) and row[high] == pytest.approx(ci.high, abs=1e-12)


# ---------------------------------------------------------------------------------------------
# coverage in repeated studies: campaigns are the units, harmful counts per campaign are
# beta-binomial (each world has its own chance of a harmful trial; given it, the trials of the
# campaign are binomial): from rare harm (a cautious policy) to common, over-dispersed harm.
# ---------------------------------------------------------------------------------------------
TRIALS, CAMPAIGNS, STUDIES = 25, 50, 600
# (a, b) of the Beta law of a world's chance; the mean count is TRIALS * a / (a + b).
LAWS = [(0.02, 2.0), (0.05, 2.0), (0.1, 3.0), (0.2, 5.0), (0.5, 20.0), (1.0, 9.0), (0.3, 3.0), (2.0, 2.0),
        (0.1, 0.9), (1.1, 7.2)]
# 600 studies: the standard error of a coverage near 95 % is sqrt(.95 * .05 / 600) = 0.9 %, so
# 93 % is two standard errors below the nominal level: an interval that truly covers 95 % fails
# this bar with probability about 2 % per law; one that truly covers 90 % passes it with 1e-3.
BAR = 0.93


def _counts(a, b, seed):
    rng = np.random.default_rng(seed)
    chance = rng.beta(a, b, size=(STUDIES, CAMPAIGNS))
    return rng.binomial(TRIALS, chance).astype(float)


@pytest.mark.parametrize("a,b", LAWS)
def test_mean_count_interval_covers(a, b):
    truth = TRIALS * a / (a + b)
    counts = _counts(a, b, seed=int(1000 * a + b))
    covered = [lo <= truth <= hi for lo, hi in (count_mean_interval(x, 0, TRIALS, 0.95) for x in counts)]
    assert np.mean(covered) >= BAR, (a, b, np.mean(covered))


@pytest.mark.parametrize("a,b", [(0.02, 2.0), (0.05, 2.0)])
def test_t_interval_alone_under_covers_where_harm_is_rare(a, b):
    # Negative control: the Student t interval (scipy.stats.ttest_1samp) without the switch to
    # the betting interval below FEW harmed campaigns. Mostly-zero samples give it zero width.
    truth = TRIALS * a / (a + b)
    counts = _counts(a, b, seed=int(1000 * a + b))
    covered = []
    for x in counts:
        if np.all(x == x[0]):
            covered.append(x[0] == truth)
            continue
        ci = stats.ttest_1samp(x, 0.0).confidence_interval(0.95)
        covered.append(ci.low <= truth <= ci.high)
    assert np.mean(covered) < 0.88, np.mean(covered)


@pytest.mark.parametrize("a,b", [(1.0, 9.0), (0.3, 3.0)])
def test_interval_treating_trials_as_independent_under_covers(a, b):
    # Negative control: Clopper-Pearson over the pooled trials (TRIALS * CAMPAIGNS of them), as if
    # every trial were independent; the campaigns' own chances make the counts over-dispersed.
    truth = TRIALS * a / (a + b)
    counts = _counts(a, b, seed=int(1000 * a + b))
    total = counts.sum(axis=1).astype(int)
    n = TRIALS * CAMPAIGNS
    covered = []
    for k in total:
        ci = stats.binomtest(int(k), n).proportion_ci(0.95, method="exact")
        covered.append(TRIALS * ci.low <= truth <= TRIALS * ci.high)
    assert np.mean(covered) < 0.80, np.mean(covered)


def test_betting_interval_covers_the_worst_case_law():
    # Waudby-Smith & Ramdas (2024): coverage >= 95 % for every law on [0, 1]; the hardest case for
    # a mean is the two-point law at the ends (Bernoulli), here with a rare catastrophe of 0.04.
    rng = np.random.default_rng(11)
    x = (rng.random((STUDIES, CAMPAIGNS)) < 0.04).astype(float) * TRIALS
    covered = [lo <= 0.04 * TRIALS <= hi for lo, hi in (bounded_mean_interval(r, 0, TRIALS, 0.95) for r in x)]
    assert np.mean(covered) >= BAR
    # all zero: the bound must still allow a catastrophe this rare (the exact one-sided bound for a
    # Bernoulli share at 0 of 50 is 1 - 0.025 ** (1 / 50) = 0.071; no valid interval is narrower)
    lo, hi = bounded_mean_interval(np.zeros(CAMPAIGNS), 0, 1, 0.95)
    assert lo == 0.0 and hi >= 1 - 0.025 ** (1 / CAMPAIGNS)


def test_few_is_where_the_switch_happens():
    x = np.zeros(CAMPAIGNS)
    x[: FEW - 1] = 1.0
    assert count_mean_interval(x, 0, TRIALS, 0.95) == bounded_mean_interval(x, 0, TRIALS, 0.95)
    x[FEW - 1] = 1.0
    assert count_mean_interval(x, 0, TRIALS, 0.95) == skew_mean_interval(x, 0.95)


def test_skew_interval_is_the_t_interval_on_a_symmetric_sample_and_leans_right_on_a_skewed_one():
    # Reference: scipy.stats.ttest_1samp(...).confidence_interval (Student t); Hall's correction
    # vanishes when the sample skewness is 0 and moves the interval toward the long tail otherwise.
    x = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    ci = stats.ttest_1samp(x, 0.0).confidence_interval(0.95)
    assert skew_mean_interval(x, 0.95) == pytest.approx((ci.low, ci.high), abs=1e-12)
    y = np.random.default_rng(1).exponential(1.0, 60)
    ci = stats.ttest_1samp(y, 0.0).confidence_interval(0.95)
    low, high = skew_mean_interval(y, 0.95)
    assert low > ci.low and high > ci.high


@pytest.mark.parametrize("a,b", [(0.2, 5.0), (0.3, 3.0)])
def test_plain_t_interval_is_short_on_over_dispersed_counts(a, b):
    # Negative control for the skewness correction: with enough harmed campaigns for the t branch,
    # the plain t interval (scipy.stats.ttest_1samp) covers about 91-92 % here (measured 92.0 and
    # 91.2 % at these seeds); the corrected one passes the 93 % bar above.
    truth = TRIALS * a / (a + b)
    counts = _counts(a, b, seed=int(1000 * a + b))
    ci = stats.ttest_1samp(counts, 0.0, axis=1).confidence_interval(0.95)
    assert np.mean((ci.low <= truth) & (truth <= ci.high)) < BAR


SHORTFALL_LAWS = [("gamma 2", lambda rng, size: rng.gamma(2.0, 40.0, size), 80.0),
                  ("gamma 8", lambda rng, size: rng.gamma(8.0, 12.0, size), 96.0)]


@pytest.mark.parametrize("name,draw,truth", SHORTFALL_LAWS)
def test_shortfall_interval_covers(name, draw, truth):
    # A campaign's shortfall is a sum of its trials' non-negative gaps: skewed to the right. The
    # skewness-corrected t interval over campaigns (the one harm_table uses), on gamma laws as
    # skewed as a sum of a few exponential gaps (shape 2: skewness 1.4) and of more (shape 8).
    rng = np.random.default_rng(5)
    samples = draw(rng, (STUDIES, CAMPAIGNS))
    covered = [lo <= truth <= hi for lo, hi in (skew_mean_interval(x, 0.95) for x in samples)]
    assert np.mean(covered) >= BAR


# ---------------------------------------------------------------------------------------------
# the fourth attitude
# ---------------------------------------------------------------------------------------------
def _harm_frame(counts_by_policy, trials=20, initial=4):
    rows = []
    for policy, counts in counts_by_policy.items():
        for r, k in enumerate(counts):
            rows.append({"policy": policy, "replicate": r, "trials": trials, "harmful": int(k),
                         "own_trials": trials - initial, "own_harmful": int(k), "shortfall": float(k), "floor": 1.0})
    return pd.DataFrame(rows)


def _traces(policies, replicates, regret):
    rows = [{"policy": p, "replicate": r, "trial": t, "regret": regret[p][r]}
            for p in policies for r in range(replicates) for t in (1, 20)]
    frame = pd.DataFrame(rows)
    frame["policy"] = pd.Categorical(frame["policy"], categories=policies)
    return frame


def test_alpha_is_shared_by_four_attitudes_only_with_a_floor():
    rng = np.random.default_rng(2)
    regret = {p: rng.exponential(1.0, 30) for p in ("A", "B")}
    traces = _traces(["A", "B"], 30, regret)
    three = choice_table(traces, budget=20, target=1.0)
    harm = _harm_frame({"A": rng.binomial(16, 0.05, 30), "B": rng.binomial(16, 0.3, 30)})
    four = choice_table(traces, budget=20, target=1.0, harm=harm)
    assert list(three["attitude"]) == ["lowest median regret", "lowest failure risk",
                                       "fewest trials for the requested success level"]
    assert list(four["attitude"]) == list(three["attitude"]) + [HARM_ATTITUDE]
    assert all("shared by the 3 attitudes" in e for e in three["evidence"] if "shared" in e)
    assert all("shared by the 4 attitudes" in e for e in four["evidence"] if "shared" in e)
    row = four.iloc[3]
    assert row["leader"] == "A" and row["lead"] == "clear"       # 0.8 against 4.8 harmful trials per campaign


def test_identical_policies_never_show_a_clear_harm_lead():
    # Negative control (A/A): two policies whose counts are independent draws from one law, in 200
    # studies of 50 replicates. Some clear lead at alpha 0.05 / 4 (Holm over one pair) would
    # appear in about 1.25 % of studies if the rule were exact; it must stay at most that
    # (binomial 200 x 0.0125: mean 2.5, P(> 8) < 0.001); the t/betting interval beyond 0.1 makes
    # it rarer still. Positive control: a policy with half the harm leads clearly in most studies.
    rng = np.random.default_rng(17)
    clear = positive = 0
    for _ in range(200):
        chance = rng.beta(1.0, 6.0, size=50)           # the world decides most of the harm
        a = rng.binomial(16, chance)
        b = rng.binomial(16, chance)
        pairs = harm_pairs(_harm_frame({"A": a, "B": b}), trials=20, initial=4)
        better = rng.binomial(16, chance / 2)
        again = harm_pairs(_harm_frame({"A": better, "B": b}), trials=20, initial=4)
        for table, counter in ((pairs, "aa"), (again, "ab")):
            row = table.iloc[0]
            lead = (row["harm_p_holm"] < 0.05 / 4 and (row["harm_difference_high"] < -0.1
                                                       or row["harm_difference_low"] > 0.1))
            if counter == "aa":
                clear += lead
            else:
                positive += lead and row["harm_difference"] < 0
    assert clear <= 8, clear
    assert positive >= 150, positive


def test_identical_traces_tie_on_harm():
    rng = np.random.default_rng(4)
    counts = rng.binomial(16, 0.2, 40)
    regret = {p: np.full(40, 0.5) for p in ("A", "B")}
    table = choice_table(_traces(["A", "B"], 40, regret), budget=20, target=1.0,
                         harm=_harm_frame({"A": counts, "B": counts}))
    assert table.iloc[3]["lead"] == "tie"
