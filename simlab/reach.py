"""Trials-to-target: Kaplan-Meier curves of reaching the target, their quantiles and the budget plan."""

__all__ = ["first_reach", "reach_curves", "trials_to_target_summary", "budget_plan"]

import warnings

import numpy as np
import pandas as pd
from scipy import stats

from .metrics import (  # shared validation and conventions of the statistics layer
    _SHARE_TOLERANCE,
    _check_budgets,
    _check_method,
    _check_probability,
    _check_target,
    _check_traces,
)

_NOT_REACHED_PLAN = "not reached within the simulated budget"


def first_reach(traces, *, target):
    """First trial at which each campaign meets the target, censored at its last trial.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    target : float
        Regret tolerance; a campaign meets it at trial t if ``regret(t) <= target``.

    Returns
    -------
    DataFrame
        One row per campaign, columns ``policy, replicate, trials, reached``:
        ``trials`` is the first trial meeting the target when ``reached`` is True,
        otherwise the campaign's last trial (right-censored). A campaign that already
        meets the target after its history alone has ``trials == 0``.
    """
    frame = _check_traces(traces)
    target = _check_target(target)
    return _first_reach(frame, target)


def _first_reach(frame, target):
    keys = ["policy", "replicate"]
    last = frame.groupby(keys, observed=True, sort=True)["trial"].max()
    first = frame[frame["regret"] <= target].groupby(keys, observed=True, sort=True)["trial"].min()
    reached = last.index.isin(first.index)
    trials = np.where(reached, first.reindex(last.index).to_numpy(), last.to_numpy())
    out = pd.DataFrame(
        {
            "policy": last.index.get_level_values("policy").astype(object),
            "replicate": last.index.get_level_values("replicate").to_numpy(),
            "trials": trials.astype(np.int64),
            "reached": reached,
        }
    )
    return out


def _km_by_policy(frame, target, confidence_level, method):
    """Kaplan-Meier share reached by each trial, per policy (scipy.stats.ecdf)."""
    reach = _first_reach(frame, target)
    curves = {}
    for policy in frame["policy"].cat.categories:
        rows = reach[reach["policy"] == policy]
        times = rows["trials"].to_numpy(dtype=float)
        hit = rows["reached"].to_numpy()
        data = stats.CensoredData(uncensored=times[hit], right=times[~hit])
        result = stats.ecdf(data)
        trials = np.arange(
            frame.loc[frame["policy"] == policy, "trial"].min(),
            frame.loc[frame["policy"] == policy, "trial"].max() + 1,
        )
        share = result.cdf.evaluate(trials)
        with warnings.catch_warnings():
            # The log-log band is undefined where the share is exactly 0 or 1 (no event
            # yet, or every campaign still observed has met the target); scipy warns and
            # returns NaN there. We fill those points with the estimate itself.
            warnings.simplefilter("ignore", RuntimeWarning)
            band = result.cdf.confidence_interval(confidence_level, method=method)
            low = band.low.evaluate(trials)
            high = band.high.evaluate(trials)
        low = np.clip(np.where(np.isnan(low), share, low), 0.0, 1.0)
        high = np.clip(np.where(np.isnan(high), share, high), 0.0, 1.0)
        events = np.array([np.sum(hit & (times <= t)) for t in trials])
        curves[policy] = pd.DataFrame(
            {
                "policy": policy,
                "trial": trials,
                "replicates": len(rows),
                "campaigns_reached": events,
                "reached": share,
                "reached_low": low,
                "reached_high": high,
            }
        )
    return curves


def reach_curves(traces, *, target, confidence_level=0.95, method="log-log"):
    """Kaplan-Meier share of campaigns that have met the target by each trial.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    target : float
        Regret tolerance.
    confidence_level : float, default 0.95
        Level of the pointwise band.
    method : {"log-log", "linear"}, default "log-log"
        Band passed to scipy's ``confidence_interval``: Greenwood's variance on the
        log(-log) scale, which stays inside [0, 1] and covers better near 0 and 1
        (Kalbfleisch & Prentice 2002, The Statistical Analysis of Failure Time Data,
        2nd ed., recalled from memory), or on the linear scale (clipped to [0, 1]).

    Returns
    -------
    DataFrame
        The ``trials_to_target.csv`` table: one row per policy and trial (from the
        policy's first trial >= 0 to its last), columns ``policy, trial, replicates,
        campaigns_reached, reached, reached_low, reached_high``; ``reached`` is the
        Kaplan-Meier share that has met the target by that trial.

    Notes
    -----
    A campaign that never meets the target is right-censored at its last trial, so a
    share never rises on a campaign's silence. Computed with scipy.stats.ecdf on
    scipy.stats.CensoredData. Where the estimate is exactly 0 or 1 the band has zero
    width (the formula is undefined there); read such points as "no campaign has yet
    met the target" / "every observed campaign has".
    """
    frame = _check_traces(traces)
    target = _check_target(target)
    confidence_level = _check_probability("confidence_level", confidence_level)
    method = _check_method(method)
    curves = _km_by_policy(frame, target, confidence_level, method)
    out = pd.concat(curves.values(), ignore_index=True)
    out["policy"] = out["policy"].astype(object)
    return out


def _first_trial_at(trials, share, level):
    """Smallest trial with share >= level, or None."""
    hit = np.flatnonzero(share >= level - _SHARE_TOLERANCE)
    return int(trials[hit[0]]) if hit.size else None


def _quantile_row(curve, level, candidates=None):
    """Trials for the KM share to reach `level`, with the band-crossing interval."""
    if candidates is not None:
        curve = curve[curve["trial"].isin(candidates)]
    trials = curve["trial"].to_numpy()
    estimate = _first_trial_at(trials, curve["reached"].to_numpy(), level)
    optimistic = _first_trial_at(trials, curve["reached_high"].to_numpy(), level)
    conservative = _first_trial_at(trials, curve["reached_low"].to_numpy(), level)
    return estimate, optimistic, conservative, curve


def trials_to_target_summary(traces, *, target, levels=(0.5, 0.9), confidence_level=0.95, method="log-log"):
    """Trials needed for a given share of campaigns to meet the target, per policy.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    target : float
        Regret tolerance.
    levels : sequence of float, default (0.5, 0.9)
        Shares of campaigns: 0.5 gives the median trials-to-target, 0.9 the 90th
        percentile.
    confidence_level : float, default 0.95
        Level of the Kaplan-Meier band the interval is read from.
    method : {"log-log", "linear"}, default "log-log"
        Band on which the interval is read (see `reach_curves`).

    Returns
    -------
    DataFrame
        One row per policy and level (long format), columns ``policy, level,
        replicates, last_trial, trials, trials_low, trials_high, reached, status``.
        ``trials`` is the smallest trial with Kaplan-Meier share >= level;
        ``trials_low`` is where the band's upper edge reaches the level and
        ``trials_high`` where its lower edge does. Trial counts are nullable
        integers: <NA> means the curve (or band edge) does not reach the level within
        the simulated trials, i.e. "more than ``last_trial``". ``reached`` says whether
        ``trials`` exists and ``status`` is "reached" or "not reached".

    Notes
    -----
    The quantile is the smallest t with share(t) >= level, so the median is the
    first trial where the estimated share not yet at target falls to 0.5 or below
    (common practice; Kleinbaum & Klein's 6-MP median of 23 weeks follows it). Reading
    the interval off the pointwise band is the band-crossing construction of
    Brookmeyer & Crowley (1982, Biometrics 38:29) in its simplest form.
    """
    frame = _check_traces(traces)
    target = _check_target(target)
    confidence_level = _check_probability("confidence_level", confidence_level)
    method = _check_method(method)
    try:
        levels = [_check_probability("levels", lv, closed_high=True) for lv in levels]
    except TypeError:
        raise ValueError(f"`levels` must be a sequence of shares; got {levels!r}") from None
    if not levels:
        raise ValueError("`levels` must not be empty")
    curves = _km_by_policy(frame, target, confidence_level, method)
    rows = []
    for policy, curve in curves.items():
        for level in levels:
            estimate, optimistic, conservative, _ = _quantile_row(curve, level)
            rows.append(
                {
                    "policy": policy,
                    "level": level,
                    "replicates": int(curve["replicates"].iloc[0]),
                    "last_trial": int(curve["trial"].iloc[-1]),
                    "trials": estimate,
                    "trials_low": optimistic,
                    "trials_high": conservative,
                    "reached": estimate is not None,
                    "status": "reached" if estimate is not None else "not reached",
                }
            )
    out = pd.DataFrame(rows)
    for column in ("trials", "trials_low", "trials_high"):
        out[column] = pd.array(out[column].tolist(), dtype="Int64")
    out["policy"] = out["policy"].astype(object)
    return out


def budget_plan(traces, *, target, success=0.9, budgets=None, confidence_level=0.95, method="log-log"):
    """Smallest budget at which the chance of meeting the target reaches `success`.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    target : float
        Regret tolerance.
    success : float, default 0.9
        Required chance that a campaign has met the target by the budget.
    budgets : sequence of int, optional
        Candidate budgets; by default every simulated trial. Each must lie within
        every policy's simulated trials.
    confidence_level : float, default 0.95
        Level of the Kaplan-Meier band.
    method : {"log-log", "linear"}, default "log-log"
        Band (see `reach_curves`).

    Returns
    -------
    DataFrame
        One row per policy, columns ``policy, success, replicates, last_trial, budget,
        budget_optimistic, budget_conservative, reached, status, share, share_low,
        share_high``. ``budget`` is the first candidate where the Kaplan-Meier share
        reaches `success`; ``budget_optimistic`` where the band's upper edge does and
        ``budget_conservative`` where its lower edge does (the budget to defend in a
        proposal). Budgets are nullable integers: <NA> means "not reached within the
        simulated budget", also written in ``status``. ``share`` and its band are the
        Kaplan-Meier share at ``budget``, or at the largest candidate when not reached.

    Notes
    -----
    "Met the target by budget b" means regret(t) <= target at some trial t <= b (the
    Kaplan-Meier reading). It can differ from 1 - failure risk in `budget_summary`,
    which looks at regret(b) alone, when a later recommendation is worse.
    """
    frame = _check_traces(traces)
    target = _check_target(target)
    success = _check_probability("success", success, closed_high=True)
    confidence_level = _check_probability("confidence_level", confidence_level)
    method = _check_method(method)
    candidates = None
    if budgets is not None:
        candidates = _check_budgets(budgets)
        for policy, trials in frame.groupby("policy", observed=True)["trial"]:
            outside = [b for b in candidates if b < trials.min() or b > trials.max()]
            if outside:
                raise ValueError(
                    f"`budgets` {outside} lie outside the simulated trials "
                    f"{trials.min()}..{trials.max()} of policy {policy!r}"
                )
    curves = _km_by_policy(frame, target, confidence_level, method)
    rows = []
    for policy, curve in curves.items():
        estimate, optimistic, conservative, shown = _quantile_row(curve, success, candidates)
        at = shown[shown["trial"] == (estimate if estimate is not None else shown["trial"].iloc[-1])].iloc[0]
        rows.append(
            {
                "policy": policy,
                "success": success,
                "replicates": int(curve["replicates"].iloc[0]),
                "last_trial": int(curve["trial"].iloc[-1]),
                "budget": estimate,
                "budget_optimistic": optimistic,
                "budget_conservative": conservative,
                "reached": estimate is not None,
                "status": "reached" if estimate is not None else _NOT_REACHED_PLAN,
                "share": float(at["reached"]),
                "share_low": float(at["reached_low"]),
                "share_high": float(at["reached_high"]),
            }
        )
    out = pd.DataFrame(rows)
    for column in ("budget", "budget_optimistic", "budget_conservative"):
        out[column] = pd.array(out[column].tolist(), dtype="Int64")
    out["policy"] = out["policy"].astype(object)
    return out
