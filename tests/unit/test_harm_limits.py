"""Harmful trials in a study with limits (evidence/harm.py with the traces' limit columns): a trial is
harmful when it is worse than the floor, breaks a limit or fails; counts by hand and against a
recomputation with pandas, the floor-only counts unchanged when no trial breaks or fails, the world's
best read back past penalised regrets, and the fourth attitude's words."""

import numpy as np
import pandas as pd
import pytest

from simlab.evidence.choice import HARM_ATTITUDE, choice_table
from simlab.evidence.harm import harm_per_campaign, harm_table

PENALTY = 50.0     # the regret the runner gives a row whose recommendation breaks a limit


def _hand():
    """One campaign, maximise, floor 10, design = trial 1; past trials (trial <= 0) break and fail freely."""
    return pd.DataFrame({
        "policy": "A", "replicate": 0, "trial": [-1, 0, 1, 2, 3, 4, 5],
        "initial": [False, False, True, False, False, False, False],
        "history": [True, True, False, False, False, False, False],
        #     past   past   design  own: below floor, and breaks; breaks; fails (no value); fine
        "f": [0.0, 0.0, 9.0, 8.0, 11.0, np.nan, 12.0],
        "breaks": [True, True, False, True, True, False, False],
        "failed": [False, False, False, False, False, True, False],
        "rec_breaks": [False, False, False, False, True, True, False],
        "rec_trial": [0, 0, 1, 1, 3, 3, 5],
        "regret": [13.0, 13.0, 4.0, 4.0, PENALTY, PENALTY, 1.0],    # best 13
    })


def test_hand_counts_with_and_without_a_floor():
    frame = _hand()
    with_floor = harm_per_campaign(frame, floor=10.0, sign=-1.0, budget=5).iloc[0]
    # by hand: trial 1 (9 < 10), trial 2 (8 < 10 and breaks: once), trial 3 (breaks), trial 4 (failed)
    assert with_floor["harmful"] == 4 and with_floor["own_harmful"] == 3
    assert with_floor["counted"] == "true value below the floor 10, breaks a limit or failed"
    # shortfall against the best 13 (read back from a row whose recommendation breaks nothing); the
    # failed trial has no true value and adds nothing
    assert with_floor["shortfall"] == pytest.approx((13 - 9) + (13 - 8) + (13 - 11) + (13 - 12))
    limits_only = harm_per_campaign(frame, floor=None, sign=-1.0, budget=5).iloc[0]
    assert limits_only["harmful"] == 3 and limits_only["own_harmful"] == 3      # trials 2, 3, 4
    assert np.isnan(limits_only["floor"]) and limits_only["counted"] == "breaks a limit or failed"
    assert harm_per_campaign(frame, floor=None, sign=-1.0, budget=2).iloc[0]["harmful"] == 1


def test_nothing_to_count_is_refused():
    frame = _hand().drop(columns=["breaks", "failed", "rec_breaks"])
    with pytest.raises(ValueError, match="`floor` is None.*no limit column"):
        harm_per_campaign(frame, floor=None, sign=-1.0, budget=5)


def _campaigns(seed, *, policies=("EI", "Random"), replicates=30, trials=10, initial=3, breaks=0.15, fails=0.1):
    """Random traces of a maximising study with a reference per replicate: trials fail (f NaN) or
    break a limit (never both); a recommendation (the best value seen so far) breaks a limit at
    random, and its row's regret is then the penalty."""
    rng = np.random.default_rng(seed)
    reference = pd.Series(100.0 + rng.normal(size=replicates), index=np.arange(replicates))
    rows = []
    for policy in policies:
        for r in range(replicates):
            f = reference[r] - rng.exponential(2.0, trials)
            failed = rng.uniform(size=trials) < fails
            broke = ~failed & (rng.uniform(size=trials) < breaks)
            f[failed] = np.nan
            seen = np.where(failed, -np.inf, f)
            rec = np.maximum.accumulate(np.where(seen == np.maximum.accumulate(seen), np.arange(trials), 0))
            rec_breaks = rng.uniform(size=trials) < 0.2
            regret = np.where(rec_breaks, PENALTY, reference[r] - np.where(np.isfinite(seen[rec]), seen[rec], np.nan))
            regret = np.where(np.isnan(regret), PENALTY, regret)     # nothing seen yet: penalised too
            rec_breaks |= ~np.isfinite(seen[rec])
            rows.append(pd.DataFrame({
                "policy": policy, "replicate": r, "trial": np.arange(1, trials + 1),
                "initial": np.arange(1, trials + 1) <= initial, "history": False, "f": f,
                "breaks": broke, "failed": failed, "rec_breaks": rec_breaks, "rec_trial": rec + 1, "regret": regret}))
    return pd.concat(rows, ignore_index=True), reference


@pytest.mark.parametrize("floor", [None, 98.5])
def test_counts_match_a_recomputation_with_pandas(floor):
    # Reference: the definition applied directly with pandas (harmful = below the floor | breaks |
    # failed, over trials 1 .. budget; own = after the design), nothing of harm.py used.
    traces, reference = _campaigns(3)
    for budget in (3, 10):
        rows = traces[traces["trial"] <= budget]
        below = rows["f"] < floor if floor is not None else False
        bad = below | rows["breaks"] | rows["failed"]
        expect = rows.assign(bad=bad, own_bad=bad & ~rows["initial"]).groupby(["policy", "replicate"], sort=False).agg(
            harmful=("bad", "sum"), own_harmful=("own_bad", "sum")).reset_index()
        for ref in (reference, None):          # given (worlds.csv), and read back from the traces
            got = harm_per_campaign(traces, floor=floor, sign=-1.0, budget=budget, reference=ref)
            assert (got["harmful"].to_numpy() == expect["harmful"].to_numpy()).all()
            assert (got["own_harmful"].to_numpy() == expect["own_harmful"].to_numpy()).all()
        table = harm_table(traces, floor=floor, sign=-1.0, budgets=[budget], initial=3, reference=reference)
        assert list(table["policy"]) == ["EI", "Random"]
        means = expect.groupby("policy", sort=False)["harmful"].mean()
        assert np.allclose(table["harmful_mean"], means.to_numpy(), rtol=0, atol=1e-12)
        assert table["counted"].str.contains("breaks a limit or failed").all()
        assert table["floor"].isna().all() if floor is None else (table["floor"] == floor).all()


def test_reference_is_read_back_past_penalised_regrets():
    traces, reference = _campaigns(5)
    with_ref = harm_per_campaign(traces, floor=None, sign=-1.0, budget=10, reference=reference)
    read_back = harm_per_campaign(traces, floor=None, sign=-1.0, budget=10)
    # float64 rounding of reference - (reference - f) and of a sum of 10 terms of size ~2
    np.testing.assert_allclose(read_back["shortfall"], with_ref["shortfall"], rtol=0, atol=1e-9)
    # Negative control: without the rec_breaks column the penalised rows are read as true regrets,
    # and the read-back world's best is off by the penalty on some replicates
    plain = traces.drop(columns=["rec_breaks"])
    last = plain[plain["trial"] == 10]
    penalised = (traces.loc[last.index, "rec_breaks"]).to_numpy()
    assert penalised.any()
    wrong = harm_per_campaign(plain, floor=None, sign=-1.0, budget=10)
    assert not np.allclose(wrong["shortfall"], with_ref["shortfall"], rtol=0, atol=1e-6)
    every = traces.assign(rec_breaks=True)
    with pytest.raises(ValueError, match="cannot be read back.*every recommendation there breaks a limit"):
        harm_per_campaign(every, floor=None, sign=-1.0, budget=10)


def test_all_clear_limit_columns_leave_floor_counts_unchanged():
    # With limit columns that never flag a trial, the counts and shortfall equal the floor-only ones
    # (only `counted` is added): the floor-only path is the same arithmetic.
    traces, reference = _campaigns(7, fails=0.0, breaks=0.0)
    clear = traces.assign(rec_breaks=False, regret=(reference.loc[traces["replicate"]].to_numpy()
                                                    - traces["f"].to_numpy()))
    clear["rec_trial"] = clear["trial"]
    floor_only = harm_per_campaign(clear.drop(columns=["breaks", "failed", "rec_breaks"]), floor=98.5, sign=-1.0,
                                   budget=10)
    both = harm_per_campaign(clear, floor=98.5, sign=-1.0, budget=10)
    pd.testing.assert_frame_equal(both.drop(columns=["counted"]), floor_only)
    assert (both["counted"] == "true value below the floor 98.5, breaks a limit or failed").all()


def test_the_fourth_attitude_says_what_it_counted():
    traces, reference = _campaigns(11, replicates=40, breaks=0.05)
    # Random breaks three times as often as EI: the choice table must find the difference
    more = _campaigns(11, replicates=40, breaks=0.45)[0]
    traces = pd.concat([traces[traces["policy"] == "EI"], more[more["policy"] == "Random"]], ignore_index=True)
    harm = harm_per_campaign(traces, floor=None, sign=-1.0, budget=10, reference=reference)
    table = choice_table(traces, budget=10, target=1.0, harm=harm)
    row = table[table["attitude"] == HARM_ATTITUDE].iloc[0]
    assert row["criterion"] == "harmful trials per campaign (breaks a limit or failed) in 10 trials"
    assert row["leader"] == "EI" and row["lead"] == "clear"
