"""The answer first: one short paragraph from the decision tables, then one line per budget the study asked about.

Every number is a tagged cell (`Cells`) of choice.csv, budget_plan.csv, within_target.csv,
summary.csv, stopping.csv or limits.csv, so a test can trace each one; only the study's own settings (target, budgets,
success level) are written as plain numbers.
"""

from __future__ import annotations

__all__ = ["answer_section", "MISS_RISK_WORDS"]

import numpy as np

from ..evidence import choice as choice_rules
from .cells import Cells, escape, fmt_pct, is_missing, number, unit_words
from .files import LIMITS, STOPPING, WITHIN_TARGET
from .limits_section import limit_title

_, _ATTITUDE_FAILURE, _ = choice_rules.ATTITUDES

# The plain words for "failure risk" (the CSV column name stays failure_risk): to a safety
# committee "failure" reads as a hazard, so the page says "miss risk" and defines it once.
MISS_RISK_WORDS = "the chance a campaign ends its budget outside the target"


def _leader(study, choice):
    """(policy label, row of choice.csv or None): the lowest-miss-risk attitude's leader, or the only policy."""
    if choice is None:
        return study.labels[0], None
    i = choice.row(attitude=_ATTITUDE_FAILURE)
    if is_missing(choice.value(i, "leader")):
        return study.labels[0], None
    return str(choice.value(i, "leader")), i


def _who(study, choice, i):
    """The recommendation in words: the leader, or the tied pair and what separates them."""
    if i is None:
        only = " (the study's only policy)" if choice is None else ""
        return f"<b>Use {escape(study.labels[0])}</b>{only}."
    leader, runner = choice.text(i, "leader"), choice.text(i, "runner_up")
    if choice.value(i, "lead") == "clear":
        return (f"<b>Use {leader}</b>: it misses the target least often of the policies tried, and clearly so "
                f"(runner-up {runner}).")
    return (f"<b>Use {leader} or {runner}</b>: they are tied on the lowest miss risk — {leader} is "
            f"{choice.text(i, 'evidence')}.{_other_attitudes(choice, i)} The numbers below are {leader}'s.")


def _other_attitudes(choice, skip):
    """What else separates a tie: the other attitudes' leaders and whether their leads are clear."""
    said = []
    for j in range(len(choice.frame)):
        if j == skip or is_missing(choice.value(j, "leader")):
            continue
        verdict = "a clear lead" if choice.value(j, "lead") == "clear" else "also a tie"
        said.append(f"on {choice.text(j, 'attitude')} {choice.text(j, 'leader')} leads ({verdict})")
    return (" Other grounds: " + "; ".join(said) + " (section “The choice”).") if said else ""


def _residual(summary, within, policy, budget):
    """Miss risk at `budget` with its interval: summary.csv at a study budget, else 1 − within_target."""
    frame = summary.frame
    rows = np.flatnonzero((frame["policy"].astype(str).to_numpy() == policy)
                          & (frame["budget"].to_numpy() == budget))
    if rows.size == 1:
        return summary.pct(int(rows[0]), "failure_risk", "failure_low", "failure_high")
    j = within.row(policy=policy, trial=budget)
    return (f"{within.span(j, 'within_target', 'miss')} % [{within.span(j, 'within_high', 'miss')}–"
            f"{within.span(j, 'within_low', 'miss')} %]")


def answer_section(study, tables, summary, plan, choice, sweep, success):
    """The section "The answer" (HTML): recommendation, budget to book, how sure, residual risk, the prior."""
    within = Cells(WITHIN_TARGET, tables[WITHIN_TARGET])
    policy, i = _leader(study, choice)
    k = plan.row(policy=policy)
    horizon = study.campaign.horizon
    level = fmt_pct(success)
    target = f"{number(study.target)} {unit_words(study, study.target)}"
    parts = [f"<p>{_who(study, choice, i)} "]
    booked = horizon
    if not is_missing(plan.value(k, "budget_conservative")):
        booked = int(plan.value(k, "budget_conservative"))
        j = within.row(policy=policy, trial=booked)
        parts.append(
            f"<b>Book {plan.span(k, 'budget_conservative', 'int')} trials</b>, the conservative end of its budget "
            f"plan for {level} % success (point estimate {plan.span(k, 'budget', 'int')}): at that budget it ends "
            f"within the target of {target} in {within.pct(j, 'within_target', 'within_low', 'within_high')} of "
            f"simulated campaigns (95 % interval). The residual <i>miss risk</i> ({MISS_RISK_WORDS}) is "
            f"{_residual(summary, within, policy, booked)}. ")
    else:
        r = summary.row(policy=policy, budget=horizon)
        reached = ("" if is_missing(plan.value(k, "budget")) else
                   f"It first reaches {level} % at {plan.span(k, 'budget', 'int')} trials (95 % range "
                   f"{plan.span(k, 'budget_optimistic', 'int', missing=f'>{horizon}')} to >{horizon}), but ")
        parts.append(
            f"<b>No simulated budget can be defended for {level} % success:</b> {reached}"
            f"{'t' if reached else 'T'}he lower end of the 95 % interval of its within-target share stays below "
            f"{level} % up to the largest budget simulated. <b>Book at least {horizon} trials</b>: at {horizon} it "
            f"ends within the target of {target} in {summary.pct(r, 'within_target', 'within_low', 'within_high')} "
            f"of simulated campaigns (95 % interval), a residual <i>miss risk</i> ({MISS_RISK_WORDS}) of "
            f"{summary.pct(r, 'failure_risk', 'failure_low', 'failure_high')}. To defend a number, simulate larger "
            "budgets (<code>[campaign] budgets</code>) or more replicates. ")
    if LIMITS in tables:
        parts.append(_limit_words(study, tables[LIMITS], policy, booked))
    if STOPPING in tables:
        parts.append(_stopping_words(tables[STOPPING], policy, success))
    if sweep is not None:
        parts.append(
            "<b>The assumption most likely to change this is the prior</b> (how rough and how large the real "
            "objective's variation is). A sweep over wrong priors checked it: the policy that gives away least "
            f"there is {sweep.text(0, 'policy')}, with a lead that is {sweep.text(0, 'lead')} "
            "(section “Robustness to a wrong prior”).")
    else:
        parts.append(
            "<b>The assumption most likely to change this is the prior</b> (how rough and how large the real "
            "objective's variation is). It has <b>not</b> been checked here: "
            f"<code>simlab sweep {escape(_study_file(study))}</code> replays the study under wrong priors and adds "
            "the result to this report.")
    parts.append(" Simulated advice only: read the cautions before running any trial.</p>")
    lines = []
    for b in study.campaign.budgets:
        r = summary.row(policy=policy, budget=b)
        lines.append(f"<li>at {b} trials: {summary.text(r, 'policy')} ends within target in "
                     f"{summary.pct(r, 'within_target', 'within_low', 'within_high')} of campaigns</li>")
    asked = ", ".join(str(b) for b in study.campaign.budgets)
    return ('<section id="answer"><h2>0. The answer</h2><div class="box answer">' + "".join(parts)
            + f"<p>The budgets asked about ({asked} trials), for {escape(policy)}:</p>"
            + f'<ul class="budgets">{"".join(lines)}</ul></div></section>')


def _limit_words(study, frame, policy, budget):
    """One sentence on limits for the recommended policy at the budget to book (limits.csv holds that row)."""
    cells = Cells(LIMITS, frame)
    i = cells.row(policy=policy, budget=budget)
    fails = study.world.fails_where is not None
    counts = []
    if study.limits:
        counts.append(f"{cells.sig(i, 'breaks_mean', 'breaks_low', 'breaks_high')} trials that break a limit")
    if fails:
        counts.append(f"{cells.sig(i, 'failed_mean', 'failed_low', 'failed_high')} that fail" if counts else
                      f"{cells.sig(i, 'failed_mean', 'failed_low', 'failed_high')} trials that fail")
    return (f"<b>Limits:</b> at {budget} trials its recommendation breaks a limit"
            f"{' or lies where trials fail' if fails else ''} in "
            f"{cells.pct(i, 'rec_breaks_share', 'rec_breaks_low', 'rec_breaks_high')} of simulated campaigns, and "
            f"a campaign runs on average {' and '.join(counts)} (95 % intervals; section “{limit_title(study)}”). "
            "These limits are only as good as their priors. ")


def _stopping_words(frame, policy, success):
    """One sentence on stopping early for the recommended policy (the section "When to stop" has the rest)."""
    from .stop_section import _adopted

    stop = Cells(STOPPING, frame)
    rows = np.flatnonzero(frame["policy"].astype(str).to_numpy() == policy)
    if not rows.size:
        return ""
    i, kept = _adopted(stop, policy, success)
    accepted = fmt_pct(1 - success)
    saved = f"a median of {stop.span(i, 'saved_median', 'count')} trials"
    if kept:
        return (f"<b>Stopping early</b> with {stop.text(i, 'rule')} saves {saved} while its miss risk at the stop "
                f"stays within the accepted {accepted} % (section “When to stop”). ")
    return (f"<b>No stopping rule</b> keeps its miss risk at the stop within the accepted {accepted} %: the closest, "
            f"{stop.text(i, 'rule')}, saves {saved} at a miss risk of "
            f"{stop.pct(i, 'failure_risk', 'failure_low', 'failure_high')} (section “When to stop”). ")


def _study_file(study) -> str:
    """The study file the user named (shell-quoted when it needs it), or a placeholder when the
    study did not come from a file."""
    import shlex
    source = str(study.source)
    return shlex.quote(source) if source.endswith(".toml") else "STUDY.toml"
