"""Limits and hidden failures: per policy and budget, the trials that break a limit or fail, and the
campaigns whose recommendation breaks a limit (limits.csv)."""

from __future__ import annotations

__all__ = ["limit_per_campaign", "limit_table"]

import numpy as np
import pandas as pd

from ..columns import LIMIT_COLUMNS
from .frame import campaign_trials, check_budgets, check_probability, flags, horizon_aware, policy_order
from .harm import count_summary
from .intervals import share_interval

_NEEDED = ("policy", "replicate", "trial", "initial") + LIMIT_COLUMNS


def _check(traces):
    if not isinstance(traces, pd.DataFrame):
        raise ValueError(f"`traces` must be a pandas DataFrame; got {type(traces).__name__}")
    missing = [c for c in _NEEDED if c not in traces.columns]
    if missing:
        raise ValueError(f"`traces` lacks required column(s) {missing} (a study with limits or hidden failures "
                         f"records {list(LIMIT_COLUMNS)}); it has {list(traces.columns)}")


def limit_per_campaign(traces, *, budget):
    """Trials that break a limit or fail, and whether the recommendation breaks a limit, per campaign.

    Parameters
    ----------
    traces : DataFrame
        Traces of a study with limits or hidden failures: ``policy, replicate, trial, initial``
        and the flags ``failed, breaks, rec_breaks`` (`simlab.columns.LIMIT_COLUMNS`);
        ``history`` if present.
    budget : int
        Trials counted: 1 .. budget.

    Returns
    -------
    DataFrame
        One row per campaign (policy order, then replicate): ``policy, replicate, trials,
        breaks, failed, own_trials, own_breaks, own_failed, rec_breaks``. ``breaks`` and
        ``failed`` count trials 1 .. budget, the shared initial design included (its trials are
        run too; a design trial can fail); ``own_*`` only the policy's own trials after the
        design. Past trials (trial <= 0) never count. ``rec_breaks`` is the flag of the row at
        trial == budget: the recommendation the campaign ends that budget with breaks a limit
        or lies where trials fail.

    Raises
    ------
    ValueError
        When a column is missing or not made of flags, a trial is flagged both failed and
        breaking a limit (a failed trial returned nothing to break a limit with), or a campaign
        has no row at trial == budget.
    """
    _check(traces)
    rows = campaign_trials(traces, budget)
    breaks, failed = flags(rows, "breaks"), flags(rows, "failed")
    both = breaks & failed
    if both.any():
        at = rows.iloc[int(np.flatnonzero(both)[0])]
        raise ValueError("a failed trial cannot break a limit (it returned nothing), but `traces` flags both "
                         f"at policy {at['policy']!r}, replicate {at['replicate']}, trial {at['trial']}")
    own = ~rows["initial"].to_numpy(dtype=bool)
    frame = pd.DataFrame({
        "policy": rows["policy"].astype(str).to_numpy(), "replicate": rows["replicate"].to_numpy(),
        "breaks": breaks, "failed": failed, "own": own, "own_breaks": breaks & own, "own_failed": failed & own,
    })
    per = frame.groupby(["policy", "replicate"], sort=False).agg(
        trials=("breaks", "size"), breaks=("breaks", "sum"), failed=("failed", "sum"), own_trials=("own", "sum"),
        own_breaks=("own_breaks", "sum"), own_failed=("own_failed", "sum")).reset_index()
    last = traces[pd.to_numeric(traces["trial"]) == budget]
    ending = pd.DataFrame({"policy": last["policy"].astype(str).to_numpy(), "replicate": last["replicate"].to_numpy(),
                           "rec_breaks": flags(last, "rec_breaks")})
    per = per.merge(ending, on=["policy", "replicate"], how="left", validate="one_to_one")
    if per["rec_breaks"].isna().any():
        gap = per[per["rec_breaks"].isna()].iloc[0]
        raise ValueError(f"campaign ({gap['policy']!r}, replicate {gap['replicate']}) has no row at trial {budget}")
    per["rec_breaks"] = per["rec_breaks"].astype(bool)
    order = {p: i for i, p in enumerate(map(str, policy_order(traces)))}
    per = per.sort_values(["policy", "replicate"], key=lambda c: c.map(order) if c.name == "policy" else c,
                          kind="stable")
    return per.reset_index(drop=True)


def limit_table(traces, study, *, budgets=None, confidence_level=0.95):
    """Per policy and budget: trials that break a limit or fail per campaign, and how often the
    recommendation breaks a limit (limits.csv).

    Parameters
    ----------
    traces : DataFrame
        Traces of `study` with the limit columns (see :func:`limit_per_campaign`).
    study : Study
        A study with limits or hidden failures (``study.constrained``); its ``campaign.initial``
        marks the shared design, its ``campaign.budgets`` the budgets asked about.
    budgets : sequence of int, optional
        Budgets to summarise; default the study's. The report adds the budget each policy's plan
        books, so that the page's answer can quote that budget's row.
    confidence_level : float, default 0.95

    Returns
    -------
    DataFrame
        One row per policy and budget (policy order, then budget): ``policy, budget,
        study_budget`` (the budget is one of ``[campaign] budgets``), ``replicates, trials,
        breaks_mean, breaks_low, breaks_high, failed_mean, failed_low, failed_high, own_trials,
        own_breaks_mean, own_breaks_low, own_breaks_high, own_failed_mean, own_failed_low,
        own_failed_high, rec_breaks`` (campaigns whose recommendation at the budget breaks a
        limit or lies where trials fail), ``rec_breaks_share, rec_breaks_low, rec_breaks_high,
        horizon_aware``.

    Notes
    -----
    Campaigns are the independent units, as for harmful trials (`simlab.evidence.harm.harm_table`,
    whose summary of counts this shares: `simlab.evidence.harm.count_summary`): the mean count per
    campaign has Student t's interval with Hall's (1992) skewness correction, or, when fewer than
    `simlab.evidence.harm.FEW` campaigns have a non-zero count, the betting interval of
    Waudby-Smith & Ramdas (2024) on [0, trials counted]; the share of campaigns whose
    recommendation breaks a limit has the Clopper-Pearson interval (`share_interval`). Both are
    checked by repeated studies in tests/unit/test_limits.py.

    For a horizon-aware policy (``horizon_aware``) the counts at a budget add trials of
    campaigns planned for different budgets (see `harm_table`); ``rec_breaks`` at a study
    budget is always that budget's own campaign.
    """
    if not study.constrained:
        raise ValueError(f"study {study.name!r} has no [[limit]] and no [world] fails_where: no trial can break a "
                         "limit or fail, so there is nothing to count")
    confidence_level = check_probability("confidence_level", confidence_level)
    asked = set(study.campaign.budgets)
    budgets = check_budgets(study.campaign.budgets if budgets is None else budgets)
    initial = study.campaign.initial
    aware = horizon_aware(traces, study.campaign.horizon)
    rows = []
    for budget in budgets:
        per = limit_per_campaign(traces, budget=budget)
        own_trials = max(budget - initial, 0)
        for policy, mine in per.groupby("policy", sort=False):
            n = len(mine)
            k = int(mine["rec_breaks"].sum())
            low, high = share_interval(k, n, confidence_level)
            rows.append({
                "policy": policy, "budget": budget, "study_budget": budget in asked, "replicates": n,
                "trials": budget,
                **count_summary("breaks", mine["breaks"], budget, confidence_level),
                **count_summary("failed", mine["failed"], budget, confidence_level),
                "own_trials": own_trials,
                **count_summary("own_breaks", mine["own_breaks"], own_trials, confidence_level),
                **count_summary("own_failed", mine["own_failed"], own_trials, confidence_level),
                "rec_breaks": k, "rec_breaks_share": k / n, "rec_breaks_low": float(low),
                "rec_breaks_high": float(high), "horizon_aware": policy in aware,
            })
    table = pd.DataFrame(rows)
    order = {p: i for i, p in enumerate(map(str, policy_order(traces)))}
    return table.sort_values(["policy", "budget"], key=lambda c: c.map(order) if c.name == "policy" else c,
                             kind="stable").reset_index(drop=True)
