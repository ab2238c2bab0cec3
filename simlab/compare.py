"""Paired comparisons of policies on shared worlds and the choice table built from them."""

__all__ = ["holm_adjust", "pairwise", "choice_table"]

from itertools import combinations

import numpy as np
import pandas as pd
from scipy import stats

# Private helpers shared with the metrics module (same package, same conventions).
from .metrics import (
    _TABLE_RESAMPLES,
    _bootstrap_interval,
    _check_budgets,
    _check_probability,
    _check_resamples,
    _check_target,
    _check_traces,
    _regret_at,
    budget_plan,
    budget_summary,
)

_ATTITUDES = (
    "lowest median regret",
    "lowest failure risk",
    "fewest trials for the requested success level",
)


def holm_adjust(p_values):
    """Holm's step-down adjusted p-values.

    Parameters
    ----------
    p_values : array_like of shape (m,)
        Unadjusted p-values, each in [0, 1].

    Returns
    -------
    ndarray of shape (m,)
        Adjusted p-values in the input order; rejecting those <= alpha controls the
        familywise error rate at alpha in the strong sense.

    Notes
    -----
    With the p-values sorted, p_(1) <= ... <= p_(m), the adjusted values are
    ``p~_(i) = max_{j <= i} min(1, (m - j + 1) p_(j))`` (Holm 1979, Scand. J. Statist.
    6:65; adjusted-p form as in Wright 1992, Biometrics 48:1005). Written here because
    scipy.stats.false_discovery_control offers only Benjamini-Hochberg/-Yekutieli.
    Ties among p-values get the same adjusted value.
    """
    p = np.asarray(p_values, dtype=float)
    if p.ndim != 1:
        raise ValueError(f"`p_values` must be one-dimensional; got shape {p.shape}")
    if np.any(~np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise ValueError(f"`p_values` must lie in [0, 1]; got {p.tolist()}")
    m = p.size
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    scaled = np.minimum(1.0, (m - np.arange(m)) * p[order])
    adjusted_sorted = np.maximum.accumulate(scaled)
    adjusted = np.empty(m)
    adjusted[order] = adjusted_sorted
    return adjusted


def _paired_statistics(d, axis=-1):
    """Median paired difference and win rate (ties halved) of differences a - b."""
    score = (d < 0) + 0.5 * (d == 0)
    return np.stack([np.median(d, axis=axis), np.mean(score, axis=axis)])


def _signed_rank_sum(d):
    """Sum of signed ranks of the non-zero differences (negative favours a)."""
    nonzero = d[d != 0]
    if nonzero.size == 0:
        return 0.0
    ranks = stats.rankdata(np.abs(nonzero))
    return float(np.sum(np.sign(nonzero) * ranks))


def _wilcoxon_p(d):
    """Two-sided Wilcoxon signed-rank p-value on the non-zero differences.

    Zero differences (ties) are dropped first (Wilcoxon's original treatment), so scipy
    uses the exact null distribution for up to 50 untied replicates without tied
    magnitudes and the normal approximation otherwise. With every difference zero no
    replicate separates the policies: p = 1 (scipy would warn and divide by zero).
    """
    nonzero = d[d != 0]
    if nonzero.size == 0:
        return 1.0
    return float(stats.wilcoxon(nonzero, alternative="two-sided").pvalue)


def _mcnemar_exact_p(only_a, only_b):
    """Exact McNemar p-value: two-sided binomial test on the discordant pairs."""
    discordant = only_a + only_b
    if discordant == 0:
        return 1.0
    return float(stats.binomtest(only_a, discordant, 0.5).pvalue)


def _favours(a, b, score):
    """Name the policy a negative `score` favours (a) or a positive one (b)."""
    return a if score < 0 else b if score > 0 else "neither"


def pairwise(traces, *, budget, target, confidence_level=0.95, n_resamples=_TABLE_RESAMPLES, seed=0):
    """Paired comparison of every pair of policies at one budget.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``. Policies are paired
        by replicate: the same replicate is the same world, initial design and noise.
    budget : int
        Trial count at which regret is compared.
    target : float
        Regret tolerance defining failure (regret(budget) > target).
    confidence_level : float, default 0.95
        Level of the bootstrap intervals.
    n_resamples : int, default 2000
        Bootstrap resamples (percentile method, over replicates).
    seed : int, numpy Generator or None, default 0
        Seed of the bootstrap.

    Returns
    -------
    DataFrame
        One row per unordered pair (a, b), a before b in policy order, columns
        ``policy_a, policy_b, budget, replicates, wins_a, wins_b, ties, win_rate,
        win_rate_low, win_rate_high, median_difference, median_difference_low,
        median_difference_high, regret_favours, regret_p_value, regret_p_holm,
        failures_a, failures_b, failures_only_a, failures_only_b, failure_favours,
        failure_p_value, failure_p_holm``.

    Notes
    -----
    - Differences are ``d = regret_a - regret_b`` per replicate; negative favours a.
    - Ties are exact equality of regret (both policies recommend points of the same
      value, common early in a campaign). They are counted in ``ties``; ``win_rate``
      is ``(wins_a + ties / 2) / replicates``, so the win rates of (a, b) and (b, a)
      sum to one. Its interval and the median difference's are percentile bootstrap
      intervals over replicates.
    - ``regret_p_value`` is the two-sided Wilcoxon signed-rank test
      (scipy.stats.wilcoxon on the non-zero differences, i.e. conditional on the untied
      replicates as McNemar's test conditions on discordant pairs; exact for up to 50
      of them); 1 when every difference is zero. ``regret_favours`` names the policy
      the signed-rank sum favours.
    - ``failure_p_value`` is McNemar's exact test: a two-sided binomial test with
      p = 1/2 on the discordant replicates (only a fails vs only b fails); 1 when there
      are none.
    - ``*_p_holm`` are Holm-adjusted over all pairs, separately for the regret family
      and the failure family.
    """
    frame = _check_traces(traces)
    (budget,) = _check_budgets(budget, name="budget")
    target = _check_target(target)
    confidence_level = _check_probability("confidence_level", confidence_level)
    n_resamples = _check_resamples(n_resamples)
    policies = list(frame["policy"].cat.categories)
    if len(policies) < 2:
        raise ValueError(f"pairwise comparison needs at least two policies; got {policies}")
    wide = _regret_at(frame, budget).pivot(index="replicate", columns="policy", values="regret")
    rows, differences = [], []
    for a, b in combinations(policies, 2):
        both = wide[[a, b]].dropna()
        ra, rb = both[a].to_numpy(), both[b].to_numpy()
        d = ra - rb
        fail_a, fail_b = ra > target, rb > target
        only_a = int(np.sum(fail_a & ~fail_b))
        only_b = int(np.sum(fail_b & ~fail_a))
        rows.append(
            {
                "policy_a": a,
                "policy_b": b,
                "budget": budget,
                "replicates": d.size,
                "wins_a": int(np.sum(d < 0)),
                "wins_b": int(np.sum(d > 0)),
                "ties": int(np.sum(d == 0)),
                "median_difference": float(np.median(d)) if d.size else np.nan,
                "regret_favours": _favours(a, b, _signed_rank_sum(d)),
                "regret_p_value": _wilcoxon_p(d) if d.size else np.nan,
                "failures_a": int(fail_a.sum()),
                "failures_b": int(fail_b.sum()),
                "failures_only_a": only_a,
                "failures_only_b": only_b,
                "failure_favours": _favours(a, b, only_a - only_b),
                "failure_p_value": _mcnemar_exact_p(only_a, only_b),
            }
        )
        differences.append(d)
    out = pd.DataFrame(rows)
    if np.any(out["replicates"] == 0):
        bad = out.loc[out["replicates"] == 0, ["policy_a", "policy_b"]].iloc[0].tolist()
        raise ValueError(f"policies {bad} share no replicate at budget {budget}; nothing to pair")
    out["win_rate"] = (out["wins_a"] + 0.5 * out["ties"]) / out["replicates"]
    # Bootstrap every pair with the same number of replicates in one vectorised call.
    rng = np.random.default_rng(seed)
    low = np.full((2, len(out)), np.nan)
    high = np.full((2, len(out)), np.nan)
    sizes = out["replicates"].to_numpy()
    for n in np.unique(sizes):
        idx = np.flatnonzero(sizes == n)
        block = np.vstack([differences[i] for i in idx])
        lo, hi = _bootstrap_interval(
            block, _paired_statistics, confidence_level=confidence_level, n_resamples=n_resamples, rng=rng
        )
        low[:, idx], high[:, idx] = lo, hi
    out["median_difference_low"], out["median_difference_high"] = low[0], high[0]
    out["win_rate_low"], out["win_rate_high"] = low[1], high[1]
    out["regret_p_holm"] = holm_adjust(out["regret_p_value"].to_numpy())
    out["failure_p_holm"] = holm_adjust(out["failure_p_value"].to_numpy())
    columns = [
        "policy_a", "policy_b", "budget", "replicates", "wins_a", "wins_b", "ties",
        "win_rate", "win_rate_low", "win_rate_high",
        "median_difference", "median_difference_low", "median_difference_high",
        "regret_favours", "regret_p_value", "regret_p_holm",
        "failures_a", "failures_b", "failures_only_a", "failures_only_b",
        "failure_favours", "failure_p_value", "failure_p_holm",
    ]  # fmt: skip
    return out[columns]


def _against_all(pairs, leader, others, favours_col, p_col):
    """The leader's comparisons with each other policy: (favoured?, adjusted p) pairs."""
    result = {}
    for other in others:
        row = pairs[
            ((pairs["policy_a"] == leader) & (pairs["policy_b"] == other))
            | ((pairs["policy_a"] == other) & (pairs["policy_b"] == leader))
        ].iloc[0]
        result[other] = (row[favours_col] == leader, float(row[p_col]))
    return result


def _statistical_verdict(comparisons, alpha, test_name):
    """'clear' if the leader is favoured with adjusted p < alpha against everyone."""
    label = f"Holm-adjusted {test_name} p"
    worst_p = max(p for _, p in comparisons.values())
    if all(favoured and p < alpha for favoured, p in comparisons.values()):
        return "clear", worst_p, f"better than every other policy ({label} <= {worst_p:.3g})"
    # Name the weakest comparison: one not favouring the leader first, then the largest p.
    weakest = max(comparisons, key=lambda o: (not comparisons[o][0], comparisons[o][1]))
    favoured, weakest_p = comparisons[weakest]
    if not favoured:
        return "tie", worst_p, f"not better than {weakest} on paired replicates ({label} = {weakest_p:.3g})"
    return "tie", worst_p, f"not separated from {weakest} ({label} = {weakest_p:.3g})"


def choice_table(
    traces,
    *,
    budget,
    target,
    success=0.9,
    alpha=0.05,
    confidence_level=0.95,
    n_resamples=_TABLE_RESAMPLES,
    seed=0,
):
    """The policy to pick under each risk attitude, and whether its lead is clear.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    budget : int
        Trial count for the regret and failure-risk attitudes.
    target : float
        Regret tolerance.
    success : float, default 0.9
        Requested chance of meeting the target, for the trials attitude.
    alpha : float, default 0.05
        Familywise level of the paired tests.
    confidence_level : float, default 0.95
        Level of the reported intervals (for the trials attitude: of the within-target share).
    n_resamples : int, default 2000
        Bootstrap resamples.
    seed : int, numpy Generator or None, default 0
        Seed of the bootstrap.

    Returns
    -------
    DataFrame
        One row per attitude (``lowest median regret``, ``lowest failure risk``,
        ``fewest trials for the requested success level``), columns ``attitude,
        criterion, leader, leader_value, leader_low, leader_high, runner_up,
        runner_up_value, runner_up_low, runner_up_high, lead, p_value, evidence``.
        ``lead`` is "clear", "tie" or, for the trials attitude, "not reached" when no
        policy reaches the success level within the simulated trials (``leader`` is
        then None). In the trials row NaN means "beyond the simulated trials": in
        ``*_value`` the policy never reaches the level, in ``*_high`` its conservative
        budget does not; ``p_value`` is NaN there (the rule uses bands, not a test).

    Notes
    -----
    Rules, applied per attitude:

    - **lowest median regret** at `budget`: leader and runner-up are the two lowest
      medians (ties broken by lower mean regret, then policy order); value and
      interval are the median and its bootstrap interval. The lead is clear when,
      against *every* other policy, the paired Wilcoxon signed-rank test is
      Holm-adjusted p < alpha (family: all pairs, as in `pairwise`) and the signed
      ranks favour the leader. ``p_value`` is the largest of those adjusted p-values.
    - **lowest failure risk** at `budget`: leader and runner-up are the two lowest
      failure shares (ties broken by lower median regret, then policy order); value
      and interval are the share and its Wilson interval. Clear when, against every
      other policy, McNemar's exact test on the discordant replicates is Holm-adjusted
      p < alpha and the leader fails alone less often.
    - **fewest trials for the requested success level**: leader and runner-up are the
      two smallest `budget_plan` budgets over all simulated trials (ties broken by the
      smaller conservative budget, then policy order; policies that never reach come
      last); value and interval are the budget and its optimistic-conservative range.
      Clear when the leader's conservative budget is finite and smaller than every
      other policy's optimistic budget (a policy whose band never reaches counts as
      beaten). Two non-overlapping 95% ranges are a stricter requirement than a 5%
      test, so this rule leans towards "tie".
    """
    frame = _check_traces(traces)
    (budget,) = _check_budgets(budget, name="budget")
    target = _check_target(target)
    success = _check_probability("success", success, closed_high=True)
    alpha = _check_probability("alpha", alpha)
    confidence_level = _check_probability("confidence_level", confidence_level)
    n_resamples = _check_resamples(n_resamples)
    policies = list(frame["policy"].cat.categories)
    if len(policies) < 2:
        raise ValueError(f"a choice needs at least two policies; got {policies}")
    rng = np.random.default_rng(seed)
    summary = budget_summary(
        frame, budgets=[budget], target=target, confidence_level=confidence_level,
        n_resamples=n_resamples, seed=rng,
    ).set_index("policy").loc[policies]  # fmt: skip
    pairs = pairwise(
        frame, budget=budget, target=target, confidence_level=confidence_level,
        n_resamples=n_resamples, seed=rng,
    )  # fmt: skip
    plan = budget_plan(frame, target=target, success=success, confidence_level=confidence_level)
    plan = plan.set_index("policy").loc[policies]
    mean_regret = _regret_at(frame, budget).groupby("policy", observed=True)["regret"].mean()
    position = {p: i for i, p in enumerate(policies)}
    rows = []

    # lowest median regret
    ranked = sorted(policies, key=lambda p: (summary.at[p, "regret_median"], mean_regret[p], position[p]))
    leader, runner = ranked[0], ranked[1]
    lead, p_value, evidence = _statistical_verdict(
        _against_all(pairs, leader, ranked[1:], "regret_favours", "regret_p_holm"), alpha, "Wilcoxon"
    )
    rows.append(
        _choice_row(_ATTITUDES[0], f"median regret at budget {budget}", summary, leader, runner,
                    ("regret_median", "median_low", "median_high"), lead, p_value, evidence)
    )  # fmt: skip

    # lowest failure risk
    ranked = sorted(
        policies, key=lambda p: (summary.at[p, "failure_risk"], summary.at[p, "regret_median"], position[p])
    )
    leader, runner = ranked[0], ranked[1]
    lead, p_value, evidence = _statistical_verdict(
        _against_all(pairs, leader, ranked[1:], "failure_favours", "failure_p_holm"), alpha, "McNemar exact"
    )
    rows.append(
        _choice_row(_ATTITUDES[1], f"share with regret > {target:g} at budget {budget}", summary, leader,
                    runner, ("failure_risk", "failure_low", "failure_high"), lead, p_value, evidence)
    )  # fmt: skip

    # fewest trials for the requested success level
    never = float("inf")

    def _trials_key(p):
        budget_p = plan.at[p, "budget"]
        conservative = plan.at[p, "budget_conservative"]
        return (
            never if pd.isna(budget_p) else int(budget_p),
            never if pd.isna(conservative) else int(conservative),
            position[p],
        )

    ranked = sorted(policies, key=_trials_key)
    criterion = f"trials until {success:.0%} of campaigns end with regret <= {target:g}"
    columns = ("budget", "budget_optimistic", "budget_conservative")
    if pd.isna(plan.at[ranked[0], "budget"]):
        last = int(plan["last_trial"].max())
        rows.append(
            _choice_row(_ATTITUDES[2], criterion, plan, None, None, columns, "not reached", np.nan,
                        f"no policy reaches {success:.0%} within the simulated {last} trials")
        )  # fmt: skip
    else:
        leader, runner = ranked[0], ranked[1]
        conservative = plan.at[leader, "budget_conservative"]
        blockers = [
            o for o in ranked[1:]
            if pd.isna(conservative)
            or (not pd.isna(plan.at[o, "budget_optimistic"]) and plan.at[o, "budget_optimistic"] <= conservative)
        ]  # fmt: skip
        if not blockers:
            lead = "clear"
            evidence = (
                f"conservative budget {int(conservative)} is below every other policy's optimistic budget"
            )
        else:
            lead = "tie"
            if pd.isna(conservative):
                evidence = "the leader's conservative budget lies beyond the simulated trials"
            else:
                other = blockers[0]
                evidence = (
                    f"ranges overlap with {other}: leader up to {int(conservative)}, "
                    f"{other} from {int(plan.at[other, 'budget_optimistic'])}"
                )
        rows.append(_choice_row(_ATTITUDES[2], criterion, plan, leader, runner, columns, lead, np.nan, evidence))
    return pd.DataFrame(rows)


def _choice_row(attitude, criterion, table, leader, runner, columns, lead, p_value, evidence):
    value, low, high = columns

    def _get(policy, column):
        if policy is None or pd.isna(table.at[policy, column]):
            return np.nan
        return float(table.at[policy, column])

    return {
        "attitude": attitude,
        "criterion": criterion,
        "leader": leader,
        "leader_value": _get(leader, value),
        "leader_low": _get(leader, low),
        "leader_high": _get(leader, high),
        "runner_up": runner,
        "runner_up_value": _get(runner, value),
        "runner_up_low": _get(runner, low),
        "runner_up_high": _get(runner, high),
        "lead": lead,
        "p_value": p_value,
        "evidence": evidence,
    }
