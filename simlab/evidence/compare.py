"""Paired comparisons of policies on shared worlds and the choice table built from them."""

__all__ = ["holm_adjust", "paired_difference_interval", "median_interval", "format_p", "pairwise", "choice_table"]

from itertools import combinations

import numpy as np
import pandas as pd
from scipy import stats

from .frame import TABLE_RESAMPLES, check_budgets, check_probability, check_resamples, check_target, check_traces, regret_at
from .intervals import exact_bounds, median_rows
from .metrics import budget_summary
from .reach import budget_plan

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


def format_p(p):
    """A p-value as printed: two significant digits, "< 0.001" below 0.001, "—" when missing."""
    if p is None or not np.isfinite(p):
        return "\u2014"
    return "< 0.001" if p < 0.001 else f"{p:.2g}"


def paired_difference_interval(only_a, only_b, n, *, confidence_level=0.95):
    """Interval for the difference of two proportions measured on the same units.

    Parameters
    ----------
    only_a, only_b : array_like of int
        Pairs where only a (only b) has the event; the other ``n - only_a - only_b``
        pairs agree (both or neither). For a win rate the event is "ends with the lower
        regret" and ties are the agreeing pairs.
    n : array_like of int
        Pairs.
    confidence_level : float, default 0.95

    Returns
    -------
    low, high : ndarray
        Bounds on ``p_a - p_b``, within [-1, 1].

    Notes
    -----
    ``p_a - p_b = P(only a) + P(only a or agree) - 1``: the sum of two nested shares,
    each a plain binomial proportion. The bounds are the sums of their Clopper & Pearson
    (1934) exact bounds, minus one. Without agreeing pairs (a win rate with no ties) the
    two shares are one and the interval *is* Clopper-Pearson, whose coverage is at least
    the nominal level for every n and p; with agreeing pairs it is wider. Exact coverage,
    summed over every table at 50 pairs on a fine grid of the trinomial, stays at or above
    95 % (tests/unit/test_leads.py; the minimum lies on the no-ties line).

    Chosen because the percentile bootstrap covered 10 % of the time at a win rate of
    0.998 with 50 replicates (every resample all wins: zero width) and the score
    intervals (Wilson, Tango 1998) dip to 90 % there too: win rates near 1 are the common
    case when an adaptive rule meets random search.
    """
    only_a, only_b, n = (np.asarray(v, dtype=float) for v in np.broadcast_arrays(only_a, only_b, n))
    low_a, high_a = exact_bounds(only_a, n, confidence_level)
    low_ab, high_ab = exact_bounds(n - only_b, n, confidence_level)
    return low_a + low_ab - 1.0, high_a + high_ab - 1.0


def median_interval(d, *, confidence_level=0.95):
    """Distribution-free interval for the median of paired differences (order statistics).

    The bounds are the order statistics whose ranks a Binomial(n, 1/2) count brackets
    with probability >= `confidence_level` (scipy.stats.quantile_test), so the closed
    interval covers the median of any distribution, atoms (ties) included, with at least
    that probability (e.g. Conover, *Practical Nonparametric Statistics*, 3rd ed., §3.2).
    With too few differences for such ranks (fewer than 6 at 95 %) both bounds are NaN.
    Chosen over the percentile bootstrap, whose coverage for a median is not guaranteed
    at small n.
    """
    d = np.asarray(d, dtype=float)
    if d.size == 0:
        return np.nan, np.nan
    low, high = median_rows(d[None, :], confidence_level)   # the ranks of scipy.stats.quantile_test's interval
    return float(low[0]), float(high[0])


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


def _sign_test_p(wins_a, wins_b):
    """Two-sided exact sign test on the untied pairs (scipy.stats.binomtest); 1 with none."""
    untied = wins_a + wins_b
    if untied == 0:
        return 1.0
    return float(stats.binomtest(wins_a, untied, 0.5).pvalue)


def pairwise(traces, *, budget, target, confidence_level=0.95):
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
        Level of the intervals.

    Returns
    -------
    DataFrame
        One row per unordered pair (a, b), a before b in policy order, columns
        ``policy_a, policy_b, budget, replicates, wins_a, wins_b, ties, win_rate,
        win_rate_low, win_rate_high, sign_p_value, sign_p_holm, median_difference,
        median_difference_low, median_difference_high, regret_favours, regret_p_value,
        regret_p_holm, failures_a, failures_b, failures_only_a, failures_only_b,
        failure_difference, failure_difference_low, failure_difference_high,
        failure_favours, failure_p_value, failure_p_holm``.

    Notes
    -----
    - Differences are ``d = regret_a - regret_b`` per replicate; negative favours a.
    - Ties are exact equality of regret (both policies recommend points of the same
      value, common early in a campaign). They are counted in ``ties``; ``win_rate``
      is ``(wins_a + ties / 2) / replicates``, so the win rates of (a, b) and (b, a)
      sum to one. It equals ``(1 + p_win - p_loss) / 2``, so its interval is
      `paired_difference_interval` for ``p_win - p_loss`` (ties are the agreeing pairs),
      mapped the same way: Clopper-Pearson when there are no ties.
    - ``sign_p_value`` is the two-sided exact sign test of wins against losses, ties
      excluded (scipy.stats.binomtest with p = 1/2): the test of the win rate, which
      marks the win-rate matrix.
    - ``median_difference_low/high`` is the order-statistic interval of the median of
      ``d`` (`median_interval`; NaN with fewer than 6 replicates at 95 %).
    - ``regret_p_value`` is the two-sided Wilcoxon signed-rank test
      (scipy.stats.wilcoxon on the non-zero differences, i.e. conditional on the untied
      replicates as McNemar's test conditions on discordant pairs; exact for up to 50
      of them); 1 when every difference is zero. ``regret_favours`` names the policy
      the signed-rank sum favours.
    - ``failure_difference`` is ``(failures_a - failures_b) / replicates``, the paired
      difference in failure shares (negative favours a), with the interval of
      `paired_difference_interval`.
      ``failure_p_value`` is McNemar's exact test: a two-sided binomial test with
      p = 1/2 on the discordant replicates (only a fails vs only b fails); 1 when there
      are none.
    - ``*_p_holm`` are Holm-adjusted over all pairs, separately for the sign-test, the
      regret and the failure family.
    """
    frame = check_traces(traces)
    (budget,) = check_budgets(budget, name="budget")
    target = check_target(target)
    confidence_level = check_probability("confidence_level", confidence_level)
    policies = list(frame["policy"].cat.categories)
    if len(policies) < 2:
        raise ValueError(f"pairwise comparison needs at least two policies; got {policies}")
    wide = regret_at(frame, budget).pivot(index="replicate", columns="policy", values="regret")
    rows = []
    for a, b in combinations(policies, 2):
        both = wide[[a, b]].dropna()
        if both.empty:
            raise ValueError(f"policies {[a, b]} share no replicate at budget {budget}; nothing to pair")
        ra, rb = both[a].to_numpy(), both[b].to_numpy()
        d = ra - rb
        fail_a, fail_b = ra > target, rb > target
        only_a = int(np.sum(fail_a & ~fail_b))
        only_b = int(np.sum(fail_b & ~fail_a))
        wins_a, wins_b = int(np.sum(d < 0)), int(np.sum(d > 0))
        median_low, median_high = median_interval(d, confidence_level=confidence_level)
        rows.append(
            {
                "policy_a": a,
                "policy_b": b,
                "budget": budget,
                "replicates": d.size,
                "wins_a": wins_a,
                "wins_b": wins_b,
                "ties": int(np.sum(d == 0)),
                "sign_p_value": _sign_test_p(wins_a, wins_b),
                "median_difference": float(np.median(d)),
                "median_difference_low": median_low,
                "median_difference_high": median_high,
                "regret_favours": _favours(a, b, _signed_rank_sum(d)),
                "regret_p_value": _wilcoxon_p(d),
                "failures_a": int(fail_a.sum()),
                "failures_b": int(fail_b.sum()),
                "failures_only_a": only_a,
                "failures_only_b": only_b,
                "failure_favours": _favours(a, b, only_a - only_b),
                "failure_p_value": _mcnemar_exact_p(only_a, only_b),
            }
        )
    out = pd.DataFrame(rows)
    n = out["replicates"].to_numpy()
    out["win_rate"] = (out["wins_a"] + 0.5 * out["ties"]) / n
    low, high = paired_difference_interval(out["wins_a"], out["wins_b"], n, confidence_level=confidence_level)
    out["win_rate_low"], out["win_rate_high"] = (1.0 + low) / 2.0, (1.0 + high) / 2.0
    out["failure_difference"] = (out["failures_a"] - out["failures_b"]) / n
    low, high = paired_difference_interval(out["failures_only_a"], out["failures_only_b"], n,
                                           confidence_level=confidence_level)
    out["failure_difference_low"], out["failure_difference_high"] = low, high
    out["sign_p_holm"] = holm_adjust(out["sign_p_value"].to_numpy())
    out["regret_p_holm"] = holm_adjust(out["regret_p_value"].to_numpy())
    out["failure_p_holm"] = holm_adjust(out["failure_p_value"].to_numpy())
    columns = [
        "policy_a", "policy_b", "budget", "replicates", "wins_a", "wins_b", "ties",
        "win_rate", "win_rate_low", "win_rate_high", "sign_p_value", "sign_p_holm",
        "median_difference", "median_difference_low", "median_difference_high",
        "regret_favours", "regret_p_value", "regret_p_holm",
        "failures_a", "failures_b", "failures_only_a", "failures_only_b",
        "failure_difference", "failure_difference_low", "failure_difference_high",
        "failure_favours", "failure_p_value", "failure_p_holm",
    ]  # fmt: skip
    return out[columns]


def _oriented(pairs, leader, other, columns):
    """The pair's row and the (estimate, low, high) of `columns` as leader minus other."""
    row = pairs[
        ((pairs["policy_a"] == leader) & (pairs["policy_b"] == other))
        | ((pairs["policy_a"] == other) & (pairs["policy_b"] == leader))
    ].iloc[0]
    value, low, high = (float(row[c]) for c in columns)
    if row["policy_a"] != leader:
        value, low, high = -value, -high, -low
    return row, (value, low, high)


def _lead_verdict(pairs, leader, others, *, favours_col, p_col, test_name, level, alpha, effect, margin):
    """'clear' or 'tie' for a paired attitude, with the p-value and the reason.

    Clear needs, against *every* other policy: the test favours the leader, its
    Holm-adjusted p is below `level` (the attitude's share of the familywise alpha), and
    the interval of the effect (leader minus other, negative favours the leader) lies
    wholly below ``-margin``. `effect` is ``(columns, name, formatter, margin_words)``.
    """
    columns, effect_name, fmt, margin_words = effect
    checks = {}
    for other in others:
        row, (value, low, high) = _oriented(pairs, leader, other, columns)
        beyond = bool(np.isfinite(high) and high < -margin)
        checks[other] = (row[favours_col] == leader, float(row[p_col]), beyond, (value, low, high))
    worst_p = max(c[1] for c in checks.values())
    label = f"Holm-adjusted {test_name} p"
    share = f"a clear lead needs p < {level:.2g}: alpha {alpha:g} shared by the {len(_ATTITUDES)} attitudes"
    if all(f and p < level and b for f, p, b, _ in checks.values()):
        closest = max(checks, key=lambda o: checks[o][3][2])
        value, low, high = checks[closest][3]
        return "clear", worst_p, (
            f"better than every other policy ({label} {'< 0.001' if worst_p < 0.001 else '<= ' + format_p(worst_p)}"
            f", below {level:.2g}) by more than {margin_words}: {effect_name} against {closest} "
            f"{fmt(value)} [{fmt(low)} to {fmt(high)}]"
        )
    against = [o for o in checks if not checks[o][0]]
    if against:
        other = max(against, key=lambda o: checks[o][1])
        return "tie", worst_p, f"not better than {other} on paired replicates ({label} {_p_words(checks[other][1])})"
    weak = [o for o in checks if checks[o][1] >= level]
    if weak:
        other = max(weak, key=lambda o: checks[o][1])
        return "tie", worst_p, f"not separated from {other} ({label} {_p_words(checks[other][1])}; {share})"
    other = max(checks, key=lambda o: checks[o][3][2])
    value, low, high = checks[other][3]
    if not np.isfinite(high):
        return "tie", worst_p, (f"ahead of {other}, but the {effect_name} has no interval at this number "
                                "of replicates")
    return "tie", worst_p, (
        f"ahead of {other} ({label} {_p_words(checks[other][1])}), but by too little to matter: {effect_name} "
        f"{fmt(value)} [{fmt(low)} to {fmt(high)}], an interval that does not lie beyond {margin_words}"
    )


def _p_words(p):
    text = format_p(p)
    return text if text.startswith("<") else f"= {text}"


def _check_margin(name, value):
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a finite number >= 0; got {value!r}") from None
    if not np.isfinite(value) or value < 0:
        raise ValueError(f"`{name}` must be a finite number >= 0; got {value!r}")
    return value


def choice_table(
    traces,
    *,
    budget,
    target,
    difference=None,
    success=0.9,
    failure_difference=None,
    alpha=0.05,
    confidence_level=0.95,
    n_resamples=TABLE_RESAMPLES,
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
    difference : float, optional
        Smallest median paired regret difference that matters, in objective units
        (the study's ``[target] difference``); default ``target / 10``.
    success : float, default 0.9
        Requested chance of meeting the target, for the trials attitude.
    failure_difference : float, optional
        Smallest paired difference in failure shares that matters; default
        ``(1 - success) / 10``, a tenth of the failure risk the team accepts (the
        analogue of a tenth of the target regret).
    alpha : float, default 0.05
        Familywise level of the whole table: shared equally by the three attitudes.
    confidence_level : float, default 0.95
        Level of the reported intervals (for the trials attitude: of the within-target share,
        whose ranges use the attitude's share of ``alpha``).
    n_resamples : int, default 2000
        Bootstrap resamples of the median-regret interval (`budget_summary`).
    seed : int, numpy Generator or None, default 0
        Seed of that bootstrap.

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
        ``evidence`` gives the reason for the verdict in words.

    Notes
    -----
    The three attitudes read the same campaigns, so their verdicts are one family:
    each attitude gets ``alpha / 3`` (Bonferroni over attitudes), and within an attitude
    the pairs are Holm-adjusted. Some "clear" lead is then declared, when no policy is
    better than another, with probability at most about alpha (for the trials rule,
    whose bands are pointwise, this is checked by simulation: tests/unit/test_leads.py).
    A clear lead must also *matter*: its interval must lie beyond a smallest difference
    that matters. Rules, applied per attitude:

    - **lowest median regret** at `budget`: leader and runner-up are the two lowest
      medians (ties broken by lower mean regret, then policy order); value and
      interval are the median and its interval from `budget_summary`. Clear when,
      against *every* other policy, the paired Wilcoxon signed-rank test is
      Holm-adjusted p < alpha / 3 (family: all pairs, as in `pairwise`), the signed
      ranks favour the leader, and the order-statistic 95 % interval of the median
      paired difference lies wholly below ``-difference``.
    - **lowest failure risk** at `budget`: leader and runner-up are the two lowest
      failure shares (ties broken by lower median regret, then policy order); value
      and interval are the share and its interval. Clear when, against every other
      policy, McNemar's exact test is Holm-adjusted p < alpha / 3, the leader fails
      alone less often, and the 95 % interval of the paired difference in failure
      shares (`paired_difference_interval`) lies wholly below ``-failure_difference``.
    - **fewest trials for the requested success level**: leader and runner-up are the
      two smallest `budget_plan` budgets over all simulated trials (ties broken by the
      smaller conservative budget, then policy order; policies that never reach come
      last); value and interval are the budget and its optimistic-conservative range.
      Clear when, with the plan's bands at level ``1 - alpha / 3``, the leader's
      conservative budget is finite and smaller than every other policy's optimistic
      budget (a policy whose band never reaches counts as beaten). The ranges are then
      apart by at least one whole trial, the unit a team pays for, so no further
      margin is applied.
    """
    frame = check_traces(traces)
    (budget,) = check_budgets(budget, name="budget")
    target = check_target(target)
    difference = target / 10.0 if difference is None else _check_margin("difference", difference)
    success = check_probability("success", success, closed_high=True)
    failure_difference = ((1.0 - success) / 10.0 if failure_difference is None
                          else _check_margin("failure_difference", failure_difference))
    alpha = check_probability("alpha", alpha)
    confidence_level = check_probability("confidence_level", confidence_level)
    n_resamples = check_resamples(n_resamples)
    policies = list(frame["policy"].cat.categories)
    if len(policies) < 2:
        raise ValueError(f"a choice needs at least two policies; got {policies}")
    level = alpha / len(_ATTITUDES)  # Bonferroni over the attitudes
    rng = np.random.default_rng(seed)
    summary = budget_summary(
        frame, budgets=[budget], target=target, confidence_level=confidence_level,
        n_resamples=n_resamples, seed=rng,
    ).set_index("policy").loc[policies]  # fmt: skip
    pairs = pairwise(frame, budget=budget, target=target, confidence_level=confidence_level)
    plan = budget_plan(frame, target=target, success=success, confidence_level=confidence_level)
    plan = plan.set_index("policy").loc[policies]
    wide = budget_plan(frame, target=target, success=success, confidence_level=1.0 - level)
    wide = wide.set_index("policy").loc[policies]
    mean_regret = regret_at(frame, budget).groupby("policy", observed=True)["regret"].mean()
    position = {p: i for i, p in enumerate(policies)}
    rows = []

    # lowest median regret
    ranked = sorted(policies, key=lambda p: (summary.at[p, "regret_median"], mean_regret[p], position[p]))
    leader, runner = ranked[0], ranked[1]
    regret_effect = (("median_difference", "median_difference_low", "median_difference_high"),
                     "median paired regret difference", lambda v: f"{v:.3g}",
                     f"{difference:g} objective units, the smallest difference that matters")
    lead, p_value, evidence = _lead_verdict(
        pairs, leader, ranked[1:], favours_col="regret_favours", p_col="regret_p_holm", test_name="Wilcoxon",
        level=level, alpha=alpha, effect=regret_effect, margin=difference,
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
    failure_effect = (("failure_difference", "failure_difference_low", "failure_difference_high"),
                      "paired difference in failure shares", lambda v: f"{100 * v:.3g} %",
                      f"{100 * failure_difference:.3g} percentage points, the smallest difference in failure "
                      "risk that matters")
    lead, p_value, evidence = _lead_verdict(
        pairs, leader, ranked[1:], favours_col="failure_favours", p_col="failure_p_holm",
        test_name="McNemar exact", level=level, alpha=alpha, effect=failure_effect, margin=failure_difference,
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
        bands = f"with the bands at {100 * (1.0 - level):.1f} %, alpha {alpha:g} shared by the {len(_ATTITUDES)} attitudes"
        conservative = wide.at[leader, "budget_conservative"]
        blockers = [
            o for o in ranked[1:]
            if pd.isna(conservative)
            or (not pd.isna(wide.at[o, "budget_optimistic"]) and wide.at[o, "budget_optimistic"] <= conservative)
        ]  # fmt: skip
        if not blockers:
            lead = "clear"
            evidence = (f"conservative budget {int(conservative)} is below every other policy's optimistic "
                        f"budget ({bands})")
        else:
            lead = "tie"
            if pd.isna(conservative):
                evidence = f"the leader's conservative budget lies beyond the simulated trials ({bands})"
            else:
                other = blockers[0]
                evidence = (
                    f"ranges overlap with {other}: leader up to {int(conservative)}, "
                    f"{other} from {int(wide.at[other, 'budget_optimistic'])} ({bands})"
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
