"""Per-policy summaries of campaign traces: regret curves and the budget table (median regret,
within-target share, failure risk, CVaR-90). The shipped share per trial and the budget plan
are in reach.py; the intervals in intervals.py."""

__all__ = ["regret_at_budget", "regret_curves", "budget_summary"]


import numpy as np
import pandas as pd

from .frame import (CURVE_RESAMPLES, TABLE_RESAMPLES, check_budgets, check_probability, check_resamples,
                    check_target, check_traces, grouped_cells, regret_at)
from .intervals import cvar90, cvar90_lower, median_rows, share_interval


# ---------------------------------------------------------------------------
# regret
# ---------------------------------------------------------------------------
def regret_at_budget(traces, *, budget):
    """Regret of every campaign after `budget` trials.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret`` (one row per
        policy, replicate and trial).
    budget : int
        Trial count; every campaign must have a row at this trial.

    Returns
    -------
    DataFrame
        Columns ``policy, replicate, regret``, one row per campaign, policies in
        their order of first appearance (or category order).

    Raises
    ------
    ValueError
        If a campaign has no row at `budget` (e.g. the budget exceeds the simulated
        trials).
    """
    frame = check_traces(traces)
    (budget,) = check_budgets(budget, name="budget")
    return regret_at(frame, budget)


def regret_curves(traces, *, confidence_level=0.95, n_resamples=CURVE_RESAMPLES, seed=0):
    """Median regret and quartiles by policy and trial, with a distribution-free interval for the median.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``. Rows with trial < 0
        (history) are ignored; trial 0, if present, is the state after the history.
    confidence_level : float, default 0.95
        Level of the interval for the median.
    n_resamples : int, default 1000
        Accepted (and checked) so that callers written for the earlier bootstrap
        interval run unchanged; no interval of this table resamples.
    seed : int, numpy Generator or None, default 0
        Likewise accepted and unused.

    Returns
    -------
    DataFrame
        One row per policy and trial, columns ``policy, trial, replicates,
        regret_median, regret_q25, regret_q75, median_low, median_high``.
        ``regret_q25``/``regret_q75`` describe the spread across worlds (numpy's
        linear quantile rule); ``median_low``/``median_high`` is the Monte Carlo
        uncertainty of the median (NaN when a cell has too few campaigns for any
        interval at this level: fewer than 6 at 95 %).

    Notes
    -----
    The interval is the pair of order statistics of the binomial (sign-test) interval
    for the median (Thompson 1936; `median_ranks`): coverage at least
    `confidence_level` whatever the distribution of regret, at any number of campaigns
    (96.7 % at 50 campaigns, 95 % nominal). It replaced a percentile bootstrap, whose
    coverage at 50 campaigns is measured in tests/unit/test_coverage.py.
    """
    frame = check_traces(traces)
    confidence_level = check_probability("confidence_level", confidence_level)
    check_resamples(n_resamples)
    parts = []
    for n, keys, matrix in grouped_cells(frame, ["policy", "trial"]):
        low, high = median_rows(matrix, confidence_level)
        q25, q50, q75 = np.quantile(matrix, [0.25, 0.5, 0.75], axis=1)
        parts.append(
            pd.DataFrame(
                {
                    "policy": [k[0] for k in keys],
                    "trial": [k[1] for k in keys],
                    "replicates": n,
                    "regret_median": q50,
                    "regret_q25": q25,
                    "regret_q75": q75,
                    "median_low": low,
                    "median_high": high,
                }
            )
        )
    return _finish(parts, frame, ["policy", "trial"])


def _finish(parts, frame, sort_keys):
    """Concatenate parts, restore policy order and return plain string labels."""
    out = pd.concat(parts, ignore_index=True)
    out["policy"] = pd.Categorical(out["policy"], categories=frame["policy"].cat.categories, ordered=True)
    out = out.sort_values(sort_keys, kind="stable").reset_index(drop=True)
    out["policy"] = out["policy"].astype(object)
    return out


def budget_summary(traces, *, budgets, target, confidence_level=0.95, n_resamples=TABLE_RESAMPLES, seed=0):
    """Regret, within-target share, failure risk and tail regret of each policy at each budget.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    budgets : int or sequence of int
        Trial counts to report; every campaign must reach them.
    target : float
        Regret tolerance; a campaign fails at budget b if ``regret(b) > target``.
    confidence_level : float, default 0.95
        Level of every interval.
    n_resamples : int, default 2000
        Accepted (and checked) so that callers written for the earlier bootstrap
        intervals run unchanged; no interval of this table resamples.
    seed : int, numpy Generator or None, default 0
        Likewise accepted and unused.

    Returns
    -------
    DataFrame
        One row per policy and budget, columns ``policy, budget, replicates,
        regret_median, median_low, median_high, regret_q25, regret_q75, failure_risk,
        failure_low, failure_high, reached, cvar90, cvar90_low, cvar90_high,
        within_target, within_low, within_high``. ``reached`` counts campaigns with
        ``regret(b) <= target``; ``within_target = reached / replicates`` is the share
        `within_target_curves` and `budget_plan` report, with the same interval, and
        ``failure_risk = 1 - within_target`` with ``failure_low = 1 - within_high``
        and ``failure_high = 1 - within_low``. ``cvar90_high`` is always NaN (see Notes).

    Notes
    -----
    Failure risk is the share of campaigns with regret above the target at the budget
    (status at the budget, not "ever met the target earlier": the recommendation can
    change for the worse). Its interval, and the within-target share's, is the
    Clopper-Pearson exact interval (`share_interval`), whose coverage is at least the
    nominal level for every true share.

    The median's interval is distribution-free (binomial order statistics, see
    `regret_curves`); NaN with fewer than 6 campaigns at 95 %.

    CVaR-90 is the mean regret of the worst 10% of campaigns. With n campaigns the worst
    10% are 0.1 n campaigns' worth of probability: the floor(0.1 n) worst count fully and
    the next worst with weight 0.1 n - floor(0.1 n); for n < 10 it is the worst campaign.
    This is the empirical expected shortfall (Acerbi & Tasche 2002), equal to
    min over c of c + sum((x - c)+) / (0.1 n) (Rockafellar & Uryasev 2002).
    ``cvar90_low`` is a one-sided lower confidence bound at `confidence_level`,
    distribution-free (Thomas & Learned-Miller 2019; `cvar90_lower`): "the tail is at
    least this bad". No upper bound is given: one that holds without assumptions needs
    a known largest possible regret, which a Gaussian-process world does not have, and
    the bootstrap intervals used before covered only about 80 % at 50 campaigns, missing
    on the high side (tests/unit/test_coverage.py).
    """
    frame = check_traces(traces)
    budgets = check_budgets(budgets)
    target = check_target(target)
    confidence_level = check_probability("confidence_level", confidence_level)
    check_resamples(n_resamples)
    at = pd.concat(
        [regret_at(frame, b).assign(trial=b) for b in budgets], ignore_index=True
    )
    at["policy"] = pd.Categorical(at["policy"], categories=frame["policy"].cat.categories, ordered=True)
    parts = []
    for n, keys, matrix in grouped_cells(at, ["policy", "trial"]):
        median_low, median_high = median_rows(matrix, confidence_level)
        q25, q50, q75 = np.quantile(matrix, [0.25, 0.5, 0.75], axis=1)
        within = np.sum(matrix <= target, axis=1)
        within_low, within_high = share_interval(within, n, confidence_level)
        share = within / n
        parts.append(
            pd.DataFrame(
                {
                    "policy": [k[0] for k in keys],
                    "budget": [k[1] for k in keys],
                    "replicates": n,
                    "regret_median": q50,
                    "median_low": median_low,
                    "median_high": median_high,
                    "regret_q25": q25,
                    "regret_q75": q75,
                    "failure_risk": 1.0 - share,
                    "failure_low": 1.0 - within_high,
                    "failure_high": 1.0 - within_low,
                    "reached": within,
                    "cvar90": cvar90(matrix, axis=1),
                    "cvar90_low": cvar90_lower(matrix, confidence_level),
                    "cvar90_high": np.nan,
                    "within_target": share,
                    "within_low": within_low,
                    "within_high": within_high,
                }
            )
        )
    return _finish(parts, frame, ["policy", "budget"])
