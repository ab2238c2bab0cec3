"""Trials to target: the share of campaigns within target after each trial (what a team ships), the
budget plan read from it, and first passage (Kaplan-Meier curves of first meeting the target;
descriptive)."""

__all__ = ["within_target_curves", "budget_plan", "first_reach", "reach_curves", "trials_to_target_summary"]

import warnings

import numpy as np
import pandas as pd

from ..lazy import stats

from .frame import (SHARE_TOLERANCE, check_budgets, check_method, check_probability, check_target, check_traces,
                    horizons)
from .intervals import share_interval

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
    frame = check_traces(traces)
    target = check_target(target)
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
    """Kaplan-Meier share that first met the target by each trial, per policy (scipy.stats.ecdf).

    The band at trial t: where no campaign was censored before t, the share is a plain
    binomial share of the n campaigns (first passage <= t), and the band is its
    Clopper-Pearson exact interval (`simlab.evidence.metrics._share_interval`), whose coverage
    is at least the nominal level for every true share; every simlab campaign runs to
    the study's horizon, so this is the case at every trial of a study. Past a campaign
    censored earlier, the band is scipy's Greenwood band on the `method` scale; where
    the estimate is exactly 0 or 1 that band is undefined (scipy returns NaN), and the
    exact one-sided bound of the campaigns still informative is used instead: upper end
    1 - (a/2)^(1/m) at 0 with m campaigns at risk at t, lower end (a/2)^(1/m) at 1 with
    m campaigns that met the target by t (Clopper & Pearson 1934, applied to that
    risk set; an approximation under censoring).
    """
    reach = _first_reach(frame, target)
    curves = {}
    for policy in frame["policy"].cat.categories:
        rows = reach[reach["policy"] == policy]
        trials = np.arange(
            frame.loc[frame["policy"] == policy, "trial"].min(),
            frame.loc[frame["policy"] == policy, "trial"].max() + 1,
        )
        km = km_curve(rows["trials"].to_numpy(dtype=float), rows["reached"].to_numpy(), trials,
                      confidence_level=confidence_level, method=method)
        curves[policy] = pd.DataFrame(
            {
                "policy": policy,
                "trial": trials,
                "replicates": len(rows),
                "campaigns_reached": km["events"],
                "reached": km["share"],
                "reached_low": km["low"],
                "reached_high": km["high"],
            }
        )
    return curves


def km_curve(times, hit, trials, *, confidence_level=0.95, method="log-log"):
    """Kaplan-Meier share with an event by each of `trials`, and its band (scipy.stats.ecdf).

    Parameters
    ----------
    times : ndarray of float
        Each campaign's event time, or its censoring time where ``hit`` is False.
    hit : ndarray of bool
    trials : ndarray of int
        Where the curve is read.

    Returns
    -------
    dict of ndarray
        ``share``, ``low``, ``high`` and ``events`` (campaigns with an event by each trial).
        The band is built as `_km_by_policy` says (exact binomial before any censoring).
    """
    tail = (1.0 - confidence_level) / 2.0
    data = stats.CensoredData(uncensored=times[hit], right=times[~hit])
    result = stats.ecdf(data)
    share = result.cdf.evaluate(trials)
    with warnings.catch_warnings():
        # The log-log band is undefined where the share is exactly 0 or 1; scipy
        # warns and returns NaN there. Such points are filled below.
        warnings.simplefilter("ignore", RuntimeWarning)
        band = result.cdf.confidence_interval(confidence_level, method=method)
        low = band.low.evaluate(trials)
        high = band.high.evaluate(trials)
    events = np.array([np.sum(hit & (times <= t)) for t in trials])
    at_risk = np.array([np.sum(times >= t) for t in trials])
    censored_before = np.array([np.sum(~hit & (times < t)) for t in trials])
    n = len(times)
    # Censoring before t: the Greenwood band, with exact one-sided ends at 0 and 1.
    none_yet = share <= 0.0
    all_met = share >= 1.0
    low = np.where(none_yet, 0.0, low)
    high = np.where(none_yet, 1.0 - tail ** (1.0 / np.maximum(at_risk, 1)), high)
    low = np.where(all_met, tail ** (1.0 / np.maximum(events, 1)), low)
    high = np.where(all_met, 1.0, high)
    # No censoring before t: the exact binomial interval.
    exact_low, exact_high = share_interval(events, n, confidence_level)
    plain = censored_before == 0
    low = np.clip(np.where(plain, exact_low, low), 0.0, 1.0)
    high = np.clip(np.where(plain, exact_high, high), 0.0, 1.0)
    return {"share": share, "low": low, "high": high, "events": events}


def reach_curves(traces, *, target, confidence_level=0.95, method="log-log"):
    """First passage: Kaplan-Meier share of campaigns whose recommendation was within target at some trial so far.

    Descriptive only: "the first trial at which the recommendation was within target"
    is not something a real campaign can observe (it does not know its regret), and a
    recommendation can get worse afterwards. Budgets are planned on the share within
    target *after* each trial (`simlab.evidence.reach.within_target_curves`, `budget_plan`).

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    target : float
        Regret tolerance.
    confidence_level : float, default 0.95
        Level of the pointwise band.
    method : {"log-log", "linear"}, default "log-log"
        Band passed to scipy's ``confidence_interval`` at trials after some campaign
        was censored: Greenwood's variance on the log(-log) scale, which stays inside
        [0, 1] and covers better near 0 and 1 (Kalbfleisch & Prentice 2002, The
        Statistical Analysis of Failure Time Data, 2nd ed., recalled from memory), or on
        the linear scale (clipped to [0, 1]). Without earlier censoring the band is the
        exact binomial interval whatever `method` says (see Notes).

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
    scipy.stats.CensoredData. Until some campaign is censored, which in a simlab study
    happens only at the last trial, the Kaplan-Meier share is the plain share of
    campaigns with first passage <= t and its band is the Clopper-Pearson exact interval
    (at a share of exactly 0 the upper end is 1 - 0.025^(1/n) at 95 %; at 1 the lower
    end is 0.025^(1/n)). Otherwise see `method`; at 0 or 1 there an exact one-sided
    bound on the campaigns still at risk replaces the undefined Greenwood band.
    """
    frame = check_traces(traces)
    target = check_target(target)
    confidence_level = check_probability("confidence_level", confidence_level)
    method = check_method(method)
    curves = _km_by_policy(frame, target, confidence_level, method)
    out = pd.concat(curves.values(), ignore_index=True)
    out["policy"] = out["policy"].astype(object)
    return out


def _first_trial_at(trials, share, level):
    """Smallest trial with share >= level, or None."""
    hit = np.flatnonzero(share >= level - SHARE_TOLERANCE)
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
    """First passage: trials until a given share of campaigns had first been within target, per policy.

    Descriptive only, like `reach_curves`: a campaign cannot observe its first passage,
    and its recommendation can get worse again afterwards; plan budgets with `budget_plan`.

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
    frame = check_traces(traces)
    target = check_target(target)
    confidence_level = check_probability("confidence_level", confidence_level)
    method = check_method(method)
    try:
        levels = [check_probability("levels", lv, closed_high=True) for lv in levels]
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


def budget_plan(traces, *, target, success=0.9, budgets=None, confidence_level=0.95):
    """Smallest budget at which the share of campaigns shipping a recommendation within target reaches `success`.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret`` (and optionally
        ``horizon``, see `simlab.evidence.reach.within_target_curves`).
    target : float
        Regret tolerance.
    success : float, default 0.9
        Required share of campaigns whose recommendation after the budget's last trial
        is within target.
    budgets : sequence of int, optional
        Candidate budgets; by default every simulated trial. Each must lie within
        every policy's simulated trials.
    confidence_level : float, default 0.95
        Level of the interval of the share.

    Returns
    -------
    DataFrame
        One row per policy, columns ``policy, success, replicates, last_trial, budget,
        budget_optimistic, budget_conservative, reached, status, share, share_low,
        share_high, campaigns_within, budget_sustained, horizon, horizon_aware``.

        - ``budget``: the first candidate t where the within-target share after t
          reaches `success`; ``budget_optimistic`` where the upper end of its
          Clopper-Pearson interval does, ``budget_conservative`` where the lower end
          does (the budget to defend in a proposal).
        - ``budget_sustained``: the first candidate from which the share stays at or
          above `success` at every later simulated trial (equal to ``budget`` unless
          the share dips below `success` again after first reaching it).
        - Budgets are nullable integers: <NA> means "not reached within the simulated
          budget", also written in ``status`` ("reached" otherwise).
        - ``share``, ``share_low``, ``share_high`` and ``campaigns_within``: the
          within-target share at ``budget`` (or at the largest candidate when not
          reached), the same numbers as `within_target_curves` and, at the study's
          budgets, `budget_summary` (``within_target`` = 1 - ``failure_risk``).
        - ``horizon``: the budget the campaign behind that share was planned for
          (<NA> without a ``horizon`` column); ``horizon_aware``: True for a policy
          replayed once per budget. For such a policy a budget that is not one of the
          study's budgets comes from a campaign planned for a larger budget, stopped
          early.

    Notes
    -----
    The share is the status after the budget's last trial: what a team that stops
    there ships. It need not rise with the budget (a recommendation can get worse
    again), so ``budget`` is the first trial where it is reached, which is why
    ``budget_sustained`` is reported beside it. The Kaplan-Meier first-passage share
    (`reach_curves`) counts a campaign as soon as its recommendation was within target
    once and is never below this share.
    """
    frame = check_traces(traces)
    target = check_target(target)
    success = check_probability("success", success, closed_high=True)
    confidence_level = check_probability("confidence_level", confidence_level)
    candidates = None
    if budgets is not None:
        candidates = check_budgets(budgets)
        for policy, trials in frame.groupby("policy", observed=True)["trial"]:
            outside = [b for b in candidates if b < trials.min() or b > trials.max()]
            if outside:
                raise ValueError(
                    f"`budgets` {outside} lie outside the simulated trials "
                    f"{trials.min()}..{trials.max()} of policy {policy!r}"
                )
    curves = _within_curves(frame, horizons(traces), target, confidence_level)
    rows = []
    for policy in frame["policy"].cat.categories:
        curve = curves[curves["policy"] == policy]
        last_trial = int(curve["trial"].iloc[-1])
        if candidates is not None:
            curve = curve[curve["trial"].isin(candidates)]
        trials = curve["trial"].to_numpy()
        share = curve["within_target"].to_numpy()
        estimate = _first_trial_at(trials, share, success)
        optimistic = _first_trial_at(trials, curve["within_high"].to_numpy(), success)
        conservative = _first_trial_at(trials, curve["within_low"].to_numpy(), success)
        at = curve[curve["trial"] == (estimate if estimate is not None else trials[-1])].iloc[0]
        rows.append(
            {
                "policy": policy,
                "success": success,
                "replicates": int(at["replicates"]),
                "last_trial": last_trial,
                "budget": estimate,
                "budget_optimistic": optimistic,
                "budget_conservative": conservative,
                "reached": estimate is not None,
                "status": "reached" if estimate is not None else _NOT_REACHED_PLAN,
                "share": float(at["within_target"]),
                "share_low": float(at["within_low"]),
                "share_high": float(at["within_high"]),
                "campaigns_within": int(at["campaigns_within"]),
                "budget_sustained": _sustained_from(trials, share, success),
                "horizon": at["horizon"],
                "horizon_aware": bool(at["horizon_aware"]),
            }
        )
    out = pd.DataFrame(rows)
    for column in ("budget", "budget_optimistic", "budget_conservative", "budget_sustained", "horizon"):
        out[column] = pd.array([None if pd.isna(v) else int(v) for v in out[column]], dtype="Int64")
    out["policy"] = out["policy"].astype(object)
    return out


def _sustained_from(trials, share, level):
    """First trial from which share >= level holds at every later trial, or None."""
    ok = share >= level - SHARE_TOLERANCE
    if not ok.size or not ok[-1]:
        return None
    misses = np.flatnonzero(~ok)
    return int(trials[misses[-1] + 1]) if misses.size else int(trials[0])


def within_target_curves(traces, *, target, confidence_level=0.95):
    """Share of campaigns whose recommendation after each trial is within the target.

    What a team that stops after trial t ships: the recommendation it holds then.
    Budgets are planned on this share (`budget_plan`).

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``, and optionally
        ``horizon`` (the budget the row's campaign was planned for, as the runner writes it).
    target : float
        Regret tolerance: a campaign is within target after trial t if ``regret(t) <= target``.
    confidence_level : float, default 0.95
        Level of the interval.

    Returns
    -------
    DataFrame
        The ``within_target.csv`` table: one row per policy and trial, columns
        ``policy, trial, replicates, campaigns_within, within_target, within_low,
        within_high, horizon, horizon_aware``. ``within_target`` is
        ``campaigns_within / replicates`` with its Clopper-Pearson interval (the same
        numbers as `budget_summary` at the study's budgets). ``horizon`` (nullable
        integer, <NA> without that column) is the budget the campaign behind the row
        was planned for; ``horizon_aware`` is True for a policy replayed once per budget.

    Notes
    -----
    The share need not rise with t: a recommendation can get worse again when new
    trials move the model's best mean to a worse input. For a horizon-aware policy the
    runner keeps, for trials in (previous budget, budget], the rows of the campaign
    planned for that budget (`simlab.replay.runner.replay_replicate`): at each of the study's
    budgets the share comes from the campaign planned for exactly that budget; at other
    trials from the campaign planned for the next larger budget, stopped early.
    """
    frame = check_traces(traces)
    target = check_target(target)
    confidence_level = check_probability("confidence_level", confidence_level)
    return _within_curves(frame, horizons(traces), target, confidence_level)


def _within_curves(frame, horizons, target, confidence_level):
    """The `within_target_curves` table from a checked frame."""
    frame = frame.assign(within=frame["regret"] <= target)
    grouped = frame.groupby(["policy", "trial"], observed=True, sort=True)["within"]
    counts = grouped.sum().astype(np.int64)
    sizes = grouped.size().astype(np.int64)
    low, high = share_interval(counts.to_numpy(), sizes.to_numpy(), confidence_level)
    out = pd.DataFrame(
        {
            "policy": counts.index.get_level_values("policy").astype(object),
            "trial": counts.index.get_level_values("trial").to_numpy(),
            "replicates": sizes.to_numpy(),
            "campaigns_within": counts.to_numpy(),
            "within_target": counts.to_numpy() / sizes.to_numpy(),
            "within_low": low,
            "within_high": high,
        }
    )
    if horizons is None:
        out["horizon"] = pd.array([pd.NA] * len(out), dtype="Int64")
        out["horizon_aware"] = False
    else:
        index = pd.MultiIndex.from_arrays([out["policy"], out["trial"]])
        out["horizon"] = pd.array(horizons.reindex(index).to_numpy(dtype=float), dtype="Int64")
        varies = out.groupby("policy", sort=False)["horizon"].transform(lambda h: h.nunique(dropna=True) > 1)
        out["horizon_aware"] = varies.astype(bool).to_numpy()
    return out
