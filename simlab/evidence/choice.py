"""The choice table: the leading policy under each of three attitudes (lowest median regret,
lowest failure risk, fewest trials), with the evidence for its lead. The three attitudes look
at the same campaigns, so they share one error budget (alpha / 3, Holm within each), and a lead
counts as clear only when it also exceeds the difference that matters."""

__all__ = ["ATTITUDES", "HARM_ATTITUDE", "choice_table"]

import numpy as np
import pandas as pd

from .compare import format_p, pairwise
from .frame import (TABLE_RESAMPLES, check_budgets, check_probability, check_resamples, check_target, check_traces,
                    regret_at)
from .metrics import budget_summary
from .reach import budget_plan

ATTITUDES = (
    "lowest median regret",
    "lowest failure risk",
    "fewest trials for the requested success level",
)
# The fourth attitude, only when the study gives a [target] floor or has limits (Study.constrained:
# a trial that breaks a limit or fails is harmful); then alpha is shared by four.
HARM_ATTITUDE = "fewest harmful trials"


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


def _lead_verdict(pairs, leader, others, *, favours_col, p_col, test_name, level, alpha, effect, margin,
                  attitudes=len(ATTITUDES)):
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
    share = f"a clear lead needs p < {level:.2g}: alpha {alpha:g} shared by the {attitudes} attitudes"
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


def _unit_words(units, value):
    """The objective's unit in a sentence: `units` as given, else "objective unit(s)" (singular for exactly 1)."""
    if units:
        return units
    return "objective unit" if value == 1 else "objective units"


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
    units=None,
    harm=None,
    harm_difference=None,
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
    units : str, optional
        The objective's unit for the evidence sentences (the study's ``[study] units``);
        default "objective unit(s)".
    harm : DataFrame, optional
        Harmful trials of every campaign at `budget`
        (`simlab.evidence.harm.harm_per_campaign`, for a study with ``[target] floor`` or with
        limits and hidden failures, where a trial that breaks a limit or fails is harmful too):
        adds the attitude "fewest harmful trials", and alpha is then shared by four attitudes.
    harm_difference : float, optional
        Smallest difference in mean harmful trials per campaign that matters; default
        `simlab.evidence.harm.HARM_DIFFERENCE` (0.1, a tenth of a harmful trial per campaign).

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
    - **fewest harmful trials** (only with `harm`): leader and runner-up are the two lowest
      means of harmful trials per campaign at `budget` (ties broken by lower mean shortfall,
      then policy order); value and interval are the mean and its interval
      (`simlab.evidence.harm.harm_table`). Clear when, against every other policy, the
      paired Wilcoxon signed-rank test on the per-replicate differences of harmful counts is
      Holm-adjusted p < alpha / 4, the signed ranks favour the leader, and the 95 % interval
      of the mean paired difference (`simlab.evidence.harm.harm_pairs`) lies wholly below
      ``-harm_difference``.
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
    attitudes = len(ATTITUDES) + (harm is not None)
    level = alpha / attitudes  # Bonferroni over the attitudes
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
                     f"{difference:g} {_unit_words(units, difference)}, the smallest difference that matters")
    lead, p_value, evidence = _lead_verdict(
        pairs, leader, ranked[1:], favours_col="regret_favours", p_col="regret_p_holm", test_name="Wilcoxon",
        level=level, alpha=alpha, effect=regret_effect, margin=difference, attitudes=attitudes,
    )
    rows.append(
        _choice_row(ATTITUDES[0], f"median regret at budget {budget}", summary, leader, runner,
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
        attitudes=attitudes,
    )
    rows.append(
        _choice_row(ATTITUDES[1], f"share with regret > {target:g} at budget {budget}", summary, leader,
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
            _choice_row(ATTITUDES[2], criterion, plan, None, None, columns, "not reached", np.nan,
                        f"no policy reaches {success:.0%} within the simulated {last} trials")
        )  # fmt: skip
    else:
        leader, runner = ranked[0], ranked[1]
        bands = f"with the bands at {100 * (1.0 - level):.1f} %, alpha {alpha:g} shared by the {attitudes} attitudes"
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
        rows.append(_choice_row(ATTITUDES[2], criterion, plan, leader, runner, columns, lead, np.nan, evidence))
    if harm is not None:
        rows.append(_harm_row(harm, policies, budget=budget, level=level, alpha=alpha, attitudes=attitudes,
                              confidence_level=confidence_level, margin=harm_difference))
    return pd.DataFrame(rows)


def _harm_row(harm, policies, *, budget, level, alpha, attitudes, confidence_level, margin):
    """The row of the attitude "fewest harmful trials" (see `choice_table`)."""
    from .harm import HARM_DIFFERENCE, count_mean_interval, harm_pairs

    margin = HARM_DIFFERENCE if margin is None else _check_margin("harm_difference", margin)
    harm = harm[harm["policy"].isin(policies)]
    missing = [p for p in policies if p not in set(harm["policy"])]
    if missing:
        raise ValueError(f"`harm` has no campaigns of policies {missing}")
    trials = int(harm["trials"].max())
    if trials != budget:
        raise ValueError(f"`harm` counts {trials} trials per campaign, not the budget {budget}")
    initial = int((harm["trials"] - harm["own_trials"]).min())
    rows = {}
    for policy, mine in harm.groupby("policy", sort=False):
        x = mine["harmful"].to_numpy(dtype=float)
        low, high = count_mean_interval(x, 0.0, float(trials), confidence_level)
        rows[policy] = {"harmful_mean": x.mean(), "harmful_low": low, "harmful_high": high,
                        "shortfall": float(mine["shortfall"].mean())}
    table = pd.DataFrame.from_dict(rows, orient="index").loc[policies]
    position = {p: i for i, p in enumerate(policies)}
    ranked = sorted(policies, key=lambda p: (table.at[p, "harmful_mean"], table.at[p, "shortfall"], position[p]))
    pairs = harm_pairs(harm, trials=trials, initial=initial, confidence_level=confidence_level)
    effect = (("harm_difference", "harm_difference_low", "harm_difference_high"),
              "mean paired difference in harmful trials per campaign", lambda v: f"{v:.3g}",
              f"{margin:g} harmful trials per campaign, the smallest difference that matters")
    lead, p_value, evidence = _lead_verdict(
        pairs, ranked[0], ranked[1:], favours_col="harm_favours", p_col="harm_p_holm", test_name="Wilcoxon",
        level=level, alpha=alpha, effect=effect, margin=margin, attitudes=attitudes,
    )
    if "counted" in harm.columns:       # a study with limits: what harm_per_campaign counted, in its words
        floor = f" ({harm['counted'].iloc[0]})"
    elif "floor" in harm.columns:
        floor = f" (true value worse than the floor {float(harm['floor'].iloc[0]):g})"
    else:
        floor = ""
    return _choice_row(HARM_ATTITUDE, f"harmful trials per campaign{floor} in {budget} trials", table, ranked[0],
                       ranked[1], ("harmful_mean", "harmful_low", "harmful_high"), lead, p_value, evidence)


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
