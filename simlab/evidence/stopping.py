"""When to stop: each [[stop]] rule applied to every campaign's trace, and what stopping costs
against running the full budget (stopping.csv), with the Kaplan-Meier distribution of the
stopping time (stopping_curves.csv)."""

__all__ = ["stopping_times", "stopping_table", "stopping_curves"]

import numpy as np
import pandas as pd

from ..stopping.rules import make_rule
from .compare import median_interval, paired_difference_interval
from .frame import check_probability, check_target
from .intervals import median_rows, share_interval
from .reach import km_curve


def stopping_times(traces, study):
    """Where each stopping rule stops each campaign, and what the campaign ships there.

    Parameters
    ----------
    traces : DataFrame
        The study's traces (columns ``policy, replicate, trial, regret, rec_trial`` and the
        ``stop_*`` columns its rules read).
    study : Study
        Its ``stops`` are applied; ``target`` decides within target.

    Returns
    -------
    DataFrame
        One row per policy, rule and replicate: ``policy, rule, replicate, trials, stopped, regret,
        regret_full, within, within_full``. ``trials`` is the first trial at or after the rule's
        ``min_trials`` after which its condition holds (``stopped`` True), or the campaign's last
        trial when it never does (``stopped`` False: the rule let the booked budget run out, a
        stopping time censored there). ``regret`` is that of the recommendation held after
        ``trials``, ``regret_full`` after the last trial.

    Notes
    -----
    A rule only decides when to stop, so a campaign stopped at t ran exactly the trials of the
    replayed campaign up to t: every rule is read off the same traces, and rules and the full
    budget are paired over the same worlds.
    """
    if not study.stops:
        raise ValueError("the study has no [[stop]] rules")
    target = check_target(study.target)
    need = {"policy", "replicate", "trial", "regret", "rec_trial"}
    missing = sorted(need - set(traces.columns))
    if missing:
        raise ValueError(f"`traces` lacks column(s) {missing}")
    rows = traces[pd.to_numeric(traces["trial"]) >= 1]
    labels = [str(p) for p in pd.unique(rows["policy"].astype(str))]
    order = [p for p in study.labels if p in labels] + [p for p in labels if p not in study.labels]
    frame = rows.assign(policy=pd.Categorical(rows["policy"].astype(str), categories=order))
    frame = frame.sort_values(["policy", "replicate", "trial"], kind="stable").reset_index(drop=True)
    keys = frame[["policy", "replicate"]]
    starts = np.flatnonzero(keys.ne(keys.shift()).any(axis=1).to_numpy())
    campaign = np.zeros(len(frame), dtype=np.int64)
    campaign[starts] = 1
    frame["campaign"] = np.cumsum(campaign) - 1
    ends = np.r_[starts[1:], len(frame)] - 1                 # each campaign's last row
    trial = frame["trial"].to_numpy()
    regret = frame["regret"].to_numpy(dtype=float)
    parts = []
    for spec in study.stops:
        rule = make_rule(spec)
        if rule.statistic is not None and rule.statistic not in frame.columns:
            raise ValueError(f"stop rule {spec.label!r} reads the column {rule.statistic!r}, which these traces lack "
                             "(replay the study with its [[stop]] rules)")
        fires = rule.holds(frame, study) & (trial >= spec.options["min_trials"])
        # first row of each campaign where the rule fires, else the campaign's last row
        first = pd.Series(np.where(fires, np.arange(len(frame)), len(frame))).groupby(frame["campaign"]).min()
        first = first.to_numpy()
        stopped = first < len(frame)
        at = np.where(stopped, first, ends)
        parts.append(pd.DataFrame({
            "policy": frame["policy"].to_numpy()[starts].astype(object),
            "rule": spec.label,
            "replicate": frame["replicate"].to_numpy()[starts].astype(np.int64),
            "trials": trial[at].astype(np.int64),
            "stopped": stopped,
            "regret": regret[at],
            "regret_full": regret[ends],
            "within": regret[at] <= target,
            "within_full": regret[ends] <= target,
        }))
    return pd.concat(parts, ignore_index=True)


def stopping_table(times, *, horizon, confidence_level=0.95):
    """stopping.csv: per policy and rule, the trials used and saved, and the cost in regret and miss risk.

    Parameters
    ----------
    times : DataFrame
        :func:`stopping_times`.
    horizon : int
        The booked (largest) budget: trials saved are ``horizon - trials``.
    confidence_level : float, default 0.95

    Returns
    -------
    DataFrame
        One row per policy and rule, columns

        - ``replicates``, ``stopped`` (campaigns the rule stopped, at the last trial at the latest),
          ``stopped_share``;
        - ``trials_median``, ``trials_q25``, ``trials_q75`` (quartiles as used by some campaign),
          ``trials_mean``: trials used (the stopping trial, or the budget when the rule never fired);
        - ``saved_median`` with ``saved_low``, ``saved_high`` (distribution-free interval of the median,
          order statistics as for regret), ``saved_mean``: trials saved against the full budget;
        - ``regret_median`` with ``median_low``, ``median_high``: regret of the recommendation at the stop;
        - ``failure_risk`` with ``failure_low``, ``failure_high`` (Clopper-Pearson): the share of campaigns
          outside the target when stopped; ``failure_full`` likewise (``full_low``, ``full_high``) for the
          same campaigns run to the full budget;
        - ``failure_difference`` = ``failure_risk - failure_full`` with ``difference_low``,
          ``difference_high``: the paired difference over the same worlds (exact nested bounds,
          `simlab.evidence.compare.paired_difference_interval`);
        - ``regret_difference`` (median of regret at the stop minus regret at the full budget, paired)
          with ``regret_difference_low``, ``regret_difference_high``;
        - ``stopped_within`` with ``stopped_within_low``, ``stopped_within_high``: among the campaigns the
          rule stopped, the share within target at the stop (a calibrated ``confident`` rule puts it at
          ``chance`` or above); NaN when it stopped none.
    """
    confidence_level = check_probability("confidence_level", confidence_level)
    rows = []
    for (policy, rule), g in times.groupby(["policy", "rule"], sort=False):
        n = len(g)
        used = g["trials"].to_numpy(dtype=float)
        saved = horizon - used
        s_low, s_high = median_rows(saved[None, :], confidence_level)
        m_low, m_high = median_rows(g["regret"].to_numpy(dtype=float)[None, :], confidence_level)
        fail, fail_full = ~g["within"].to_numpy(), ~g["within_full"].to_numpy()
        f_low, f_high = share_interval(fail.sum(), n, confidence_level)
        ff_low, ff_high = share_interval(fail_full.sum(), n, confidence_level)
        d_low, d_high = paired_difference_interval((fail & ~fail_full).sum(), (fail_full & ~fail).sum(), n,
                                                   confidence_level=confidence_level)
        diff = g["regret"].to_numpy(dtype=float) - g["regret_full"].to_numpy(dtype=float)
        r_low, r_high = median_interval(diff, confidence_level=confidence_level)
        stopped = g["stopped"].to_numpy()
        k = int(stopped.sum())
        within = int(g["within"].to_numpy()[stopped].sum())
        w_low, w_high = share_interval(within, k, confidence_level) if k else (np.nan, np.nan)
        rows.append({
            "policy": policy, "rule": rule, "replicates": n, "horizon": int(horizon),
            "stopped": k, "stopped_share": k / n,
            # quartiles as trials some campaign used (the inverse of the empirical distribution function,
            # Hyndman & Fan 1996 type 1), not interpolated between two campaigns
            "trials_median": float(np.median(used)),
            "trials_q25": float(np.quantile(used, 0.25, method="inverted_cdf")),
            "trials_q75": float(np.quantile(used, 0.75, method="inverted_cdf")), "trials_mean": float(used.mean()),
            "saved_median": float(np.median(saved)), "saved_low": float(s_low[0]), "saved_high": float(s_high[0]),
            "saved_mean": float(saved.mean()),
            "regret_median": float(np.median(g["regret"])), "median_low": float(m_low[0]),
            "median_high": float(m_high[0]),
            "failure_risk": fail.mean(), "failure_low": float(f_low), "failure_high": float(f_high),
            "failure_full": fail_full.mean(), "full_low": float(ff_low), "full_high": float(ff_high),
            "failure_difference": fail.mean() - fail_full.mean(), "difference_low": float(d_low),
            "difference_high": float(d_high),
            "regret_difference": float(np.median(diff)), "regret_difference_low": r_low,
            "regret_difference_high": r_high,
            "stopped_within": within / k if k else np.nan, "stopped_within_low": float(w_low),
            "stopped_within_high": float(w_high),
        })
    return pd.DataFrame(rows)


def stopping_curves(times, *, horizon, confidence_level=0.95):
    """stopping_curves.csv: the Kaplan-Meier share of campaigns a rule has stopped by each trial.

    A campaign the rule never stopped is right-censored at the booked budget (``horizon``), so
    the curve ends below 1 by the share the rule let run out (scipy.stats.ecdf on
    scipy.stats.CensoredData; the band as for first passage, `simlab.evidence.reach.reach_curves`).

    Returns
    -------
    DataFrame
        One row per policy, rule and trial 1 .. horizon: ``policy, rule, trial, replicates,
        campaigns_stopped, stopped, stopped_low, stopped_high``.
    """
    confidence_level = check_probability("confidence_level", confidence_level)
    trials = np.arange(1, int(horizon) + 1)
    parts = []
    for (policy, rule), g in times.groupby(["policy", "rule"], sort=False):
        km = km_curve(g["trials"].to_numpy(dtype=float), g["stopped"].to_numpy(), trials,
                      confidence_level=confidence_level)
        parts.append(pd.DataFrame({"policy": policy, "rule": rule, "trial": trials, "replicates": len(g),
                                   "campaigns_stopped": km["events"], "stopped": km["share"],
                                   "stopped_low": km["low"], "stopped_high": km["high"]}))
    return pd.concat(parts, ignore_index=True)
