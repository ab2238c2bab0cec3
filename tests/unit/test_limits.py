"""limits.csv (evidence/limits.py) on a small hand-made frame: counts worked out by hand, the shares'
intervals against scipy, the count intervals against the rule they are documented to follow, and the
errors for traces that do not keep the columns' contract. Coverage in repeated studies is in
tests/unit/test_coverage.py."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from studies import constrained, study_with

from simlab.evidence.harm import FEW
from simlab.evidence.intervals import bounded_mean_interval
from simlab.evidence.limits import limit_per_campaign, limit_table

BASE = {"study": {"name": "limits-unit", "replicates": 2, "seed": 1},
        "space": {"die_temp": [180.0, 240.0]},
        "world": {"kernel": "matern52", "lengthscale": 15.0, "amplitude": 1.0, "mean": 0.0, "noise": 0.1},
        "campaign": {"initial": 2, "budgets": [2, 4], "pool": 64},
        "target": {"regret": 0.1}, "policy": [{"rule": "ei", "label": "B"}, {"rule": "random", "label": "A"}]}

T, F = True, False
# Trials 1-4 per campaign (the design is trials 1-2); each tuple: breaks, failed, rec_breaks.
CAMPAIGNS = {
    ("B", 0): ([T, F, T, F], [F, T, F, F], [F, T, F, T]),
    ("B", 1): ([F, F, F, F], [F, F, T, T], [F, F, F, F]),
    ("A", 0): ([F, F, F, F], [F, T, F, F], [T, T, F, F]),
    ("A", 1): ([T, T, T, F], [F, F, F, T], [F, T, T, T]),
}
# By hand from CAMPAIGNS (policy, budget): per-campaign breaks, failed, own breaks, own failed, rec_breaks.
EXPECTED = {
    ("B", 2): ([1, 0], [1, 0], [0, 0], [0, 0], [T, F]),
    ("B", 4): ([2, 0], [1, 2], [1, 0], [0, 2], [T, F]),
    ("A", 2): ([0, 2], [1, 0], [0, 0], [0, 0], [T, T]),
    ("A", 4): ([0, 3], [1, 1], [0, 1], [0, 1], [F, T]),
}


def _frame():
    """Policies in study order B, A (not alphabetical); two past trials (trial -1, 0) per campaign
    flagged as breaking, which must never count."""
    rows = []
    for (policy, replicate), (breaks, failed, rec) in CAMPAIGNS.items():
        for trial in (-1, 0):
            rows.append({"policy": policy, "replicate": replicate, "trial": trial, "initial": F, "history": T,
                         "breaks": T, "failed": F, "rec_breaks": T})
        for t in range(4):
            rows.append({"policy": policy, "replicate": replicate, "trial": t + 1, "initial": t < 2, "history": F,
                         "breaks": breaks[t], "failed": failed[t], "rec_breaks": rec[t]})
    frame = pd.DataFrame(rows)
    frame["policy"] = pd.Categorical(frame["policy"], categories=["B", "A"])
    return frame


@pytest.fixture(scope="module")
def study():
    return constrained(study_with(BASE), fails=True)


def test_counts_per_campaign_by_hand():
    for budget in (2, 4):
        per = limit_per_campaign(_frame(), budget=budget)
        assert list(per["policy"]) == ["B", "B", "A", "A"] and list(per["replicate"]) == [0, 1, 0, 1]
        assert (per["trials"] == budget).all() and (per["own_trials"] == budget - 2).all()
        for policy in ("B", "A"):
            mine = per[per["policy"] == policy]
            breaks, failed, own_breaks, own_failed, rec = EXPECTED[(policy, budget)]
            assert list(mine["breaks"]) == breaks and list(mine["failed"]) == failed
            assert list(mine["own_breaks"]) == own_breaks and list(mine["own_failed"]) == own_failed
            assert list(mine["rec_breaks"]) == rec


def test_table_by_hand(study):
    assert FEW > 2      # so every count interval below is the betting one
    table = limit_table(_frame(), study)
    assert list(zip(table["policy"], table["budget"])) == [("B", 2), ("B", 4), ("A", 2), ("A", 4)]
    assert table["study_budget"].all() and (table["replicates"] == 2).all()
    assert not table["horizon_aware"].any()
    for _, row in table.iterrows():
        breaks, failed, own_breaks, own_failed, rec = EXPECTED[(row["policy"], row["budget"])]
        budget, own = row["budget"], row["budget"] - 2
        assert row["trials"] == budget and row["own_trials"] == own
        for name, counts, bound in (("breaks", breaks, budget), ("failed", failed, budget),
                                    ("own_breaks", own_breaks, own), ("own_failed", own_failed, own)):
            assert row[f"{name}_mean"] == np.mean(counts)
            # Two campaigns, fewer than FEW with a count: the betting interval on [0, trials counted]
            # (Waudby-Smith & Ramdas 2024), the rule count_mean_interval documents.
            assert (row[f"{name}_low"], row[f"{name}_high"]) == bounded_mean_interval(counts, 0, bound, 0.95)
            assert row[f"{name}_low"] <= row[f"{name}_mean"] <= row[f"{name}_high"]
        assert row["rec_breaks"] == sum(rec) and row["rec_breaks_share"] == sum(rec) / 2
        # Reference: scipy.stats.binomtest(k, n).proportion_ci(method="exact") (Clopper & Pearson 1934).
        ci = stats.binomtest(int(sum(rec)), 2).proportion_ci(0.95, method="exact")
        assert row["rec_breaks_low"] == pytest.approx(ci.low, abs=1e-12)
        assert row["rec_breaks_high"] == pytest.approx(ci.high, abs=1e-12)


def test_extra_budgets_are_marked_and_computed_alike(study):
    table = limit_table(_frame(), study, budgets=[2, 3, 4])
    assert list(table.loc[table["policy"] == "B", "budget"]) == [2, 3, 4]
    assert list(table.loc[table["policy"] == "B", "study_budget"]) == [True, False, True]
    row = table[(table["policy"] == "A") & (table["budget"] == 3)].iloc[0]
    # A at 3 trials, by hand: breaks 0 and 3, failed 1 and 0, recommendations after trial 3 F and T
    assert row["breaks_mean"] == 1.5 and row["failed_mean"] == 0.5 and row["rec_breaks"] == 1
    assert row["own_trials"] == 1 and row["own_breaks_mean"] == 0.5


def test_horizon_aware_policies_are_flagged(study):
    frame = _frame()
    frame["horizon"] = 4
    frame.loc[(frame["policy"] == "A") & frame["trial"].between(1, 2), "horizon"] = 2
    table = limit_table(frame, study)
    assert dict(zip(table["policy"], table["horizon_aware"])) == {"B": False, "A": True}


def test_a_study_without_limits_has_no_table():
    with pytest.raises(ValueError, match="no \\[\\[limit\\]\\] and no \\[world\\] fails_where"):
        limit_table(_frame(), study_with(BASE))


def test_traces_that_break_the_columns_contract_are_refused(study):
    with pytest.raises(ValueError, match="lacks required column.*rec_breaks"):
        limit_table(_frame().drop(columns="rec_breaks"), study)
    both = _frame()
    both.loc[(both["trial"] == 3) & (both["policy"] == "B") & (both["replicate"] == 1), "breaks"] = True
    with pytest.raises(ValueError, match="failed trial cannot break a limit.*'B', replicate 1, trial 3"):
        limit_table(both, study)
    text = _frame()
    text["failed"] = text["failed"].astype(object)
    text.loc[3, "failed"] = "yes"
    with pytest.raises(ValueError, match="'failed'.*true/false flags; found 'yes'"):
        limit_table(text, study)
    short = _frame()
    short = short[~((short["policy"] == "A") & (short["replicate"] == 0) & (short["trial"] == 2))]
    with pytest.raises(ValueError, match="'A', replicate 0\\) has no row at trial 2"):
        limit_table(short, study)
    with pytest.raises(ValueError, match="beyond the traces' last trial 4"):
        limit_table(_frame(), study, budgets=[5])
