"""The page's section "When to stop": the rule a team could adopt and what it costs, in one sentence,
then every policy and stopping rule from stopping.csv (every number a tagged cell)."""

from __future__ import annotations

__all__ = ["stopping_section"]

import re

import numpy as np

from ..stopping.rules import make_rule
from .answer import _leader
from .cells import Cells, escape, fmt_pct, number, unit_words
from .files import STOPPING, STOPPING_CURVES


def _adopted(stop, policy, success):
    """(row, kept) for `policy`: the rule saving most trials among those whose miss risk at the stop
    stays within the plan's accepted risk at the upper end of its 95 % interval (kept True), or,
    when none does, the rule whose upper end comes lowest (kept False)."""
    frame = stop.frame
    rows = [int(i) for i in np.flatnonzero(frame["policy"].astype(str).to_numpy() == policy)]
    limit = 1.0 - success + 1e-12
    kept = [i for i in rows if float(frame.at[i, "failure_high"]) <= limit]
    if kept:
        return max(kept, key=lambda i: (frame.at[i, "saved_median"], frame.at[i, "saved_mean"],
                                        -frame.at[i, "failure_risk"], -i)), True
    return min(rows, key=lambda i: (frame.at[i, "failure_high"], -frame.at[i, "saved_median"], i)), False


def _points(stop, i):
    """``+3 points [−1 to +6]``: the paired difference in miss risk, in percentage points."""
    def pts(col):
        return stop.span(i, col, "points")
    return f"{pts('failure_difference')} points [{pts('difference_low')} to {pts('difference_high')}]"


def _sentence(study, stop, choice, success):
    policy, _ = _leader(study, choice)
    i, kept = _adopted(stop, policy, success)
    h = study.campaign.horizon
    saving = (f"it stops a median of {stop.span(i, 'saved_median', 'count')} trials early (95 % interval "
              f"{stop.span(i, 'saved_low', 'count')}–{stop.span(i, 'saved_high', 'count')}; "
              f"{stop.span(i, 'saved_mean', 'sig')} on average), using {stop.span(i, 'trials_median', 'count')} "
              f"(middle half {stop.span(i, 'trials_q25', 'count')}–{stop.span(i, 'trials_q75', 'count')})")
    cost = (f"its miss risk at the stop is {stop.pct(i, 'failure_risk', 'failure_low', 'failure_high')} against "
            f"{stop.pct(i, 'failure_full', 'full_low', 'full_high')} for the full budget on the same worlds "
            f"(paired difference {_points(stop, i)})")
    rule = stop.text(i, "rule")
    rows = [int(j) for j in np.flatnonzero(stop.frame["policy"].astype(str).to_numpy() == policy)]
    most = max(rows, key=lambda j: (stop.value(j, "saved_median"), stop.value(j, "saved_mean"), -j))
    if most != i and stop.value(most, "saved_median") > stop.value(i, "saved_median"):
        fewest = (f" The rule that wastes the fewest trials, {stop.text(most, 'rule')}, stops a median of "
                  f"{stop.span(most, 'saved_median', 'count')} trials early, but its miss risk at the stop is "
                  f"{stop.pct(most, 'failure_risk', 'failure_low', 'failure_high')} (paired difference "
                  f"{_points(stop, most)}).")
    else:
        fewest = " It is also the rule that wastes the fewest trials."
    if kept:
        return (f"<p><b>A team using {escape(policy)} could book {h} trials and stop with {rule}</b>, the rule that "
                f"saves the most trials of those whose miss risk at the stop stays within the {fmt_pct(1 - success)} % "
                f"the budget plan accepts (at the upper end of its 95 % interval): {saving}; {cost}.{fewest}</p>")
    return (f"<p><b>No stopping rule keeps {escape(policy)}'s miss risk at the stop within the {fmt_pct(1 - success)} % "
            f"the budget plan accepts</b> (at the upper end of its 95 % interval); the closest, {rule}, would save "
            f"trials at a price: {saving}; {cost}.{fewest} Book the full budget, or simulate a stricter rule.</p>")


def _table(study, stop):
    frame = stop.frame
    rows = []
    for i in range(len(frame)):
        within = ("—" if not int(stop.value(i, "stopped")) else
                  stop.pct(i, "stopped_within", "stopped_within_low", "stopped_within_high", stacked=True))
        rows.append(
            f"<tr><td>{stop.text(i, 'policy')}</td><td>{stop.text(i, 'rule')}</td>"
            f"<td class='n'>{stop.span(i, 'trials_median', 'count')}<span class='ci'>{stop.span(i, 'trials_q25', 'count')}–"
            f"{stop.span(i, 'trials_q75', 'count')}</span></td>"
            f"<td class='n'>{stop.span(i, 'saved_median', 'count')}<span class='ci'>[{stop.span(i, 'saved_low', 'count')}–"
            f"{stop.span(i, 'saved_high', 'count')}]</span></td>"
            f"<td class='n'>{stop.span(i, 'stopped_share', 'pct')} %</td>"
            f"<td class='n'>{stop.sig(i, 'regret_median', 'median_low', 'median_high', stacked=True)}</td>"
            f"<td class='n'>{stop.pct(i, 'failure_risk', 'failure_low', 'failure_high', stacked=True)}</td>"
            f"<td class='n'>{stop.pct(i, 'failure_full', 'full_low', 'full_high', stacked=True)}</td>"
            f"<td class='n'>{stop.span(i, 'failure_difference', 'points')}<span class='ci'>[{stop.span(i, 'difference_low', 'points')} to "
            f"{stop.span(i, 'difference_high', 'points')}]</span></td>"
            f"<td class='n'>{within}</td></tr>")
    return ("<table><thead><tr><th>policy</th><th>stop rule</th>"
            "<th class='n'>trials used<span class='ci'>median; middle half</span></th>"
            "<th class='n'>trials saved<span class='ci'>median [95 %]</span></th>"
            "<th class='n'>campaigns stopped early</th>"
            f"<th class='n'>regret at the stop ({unit_words(study)})<span class='ci'>median [95 %]</span></th>"
            "<th class='n'>miss risk at the stop<span class='ci'>[95 %]</span></th>"
            "<th class='n'>miss risk, full budget<span class='ci'>[95 %]</span></th>"
            "<th class='n'>difference (points)<span class='ci'>paired [95 %]</span></th>"
            "<th class='n'>within target when stopped<span class='ci'>[95 %]</span></th>"
            f"</tr></thead><tbody>{''.join(rows)}</tbody></table>")


def _rule_words(study, spec):
    """``label: confident (chance 0.9) from trial 7 on: stops when ...``, the settings in the words as their values."""
    rule = make_rule(spec)
    name = "" if spec.label == spec.rule else f"<code>{escape(spec.label)}</code>: "
    settings = spec.options

    def value(m):        # a setting named in the description reads as its value (``chance`` -> 0.9)
        key = m.group(1)
        return f"{settings[key]:g}" if isinstance(settings.get(key), (int, float)) else f"<code>{key}</code>"

    what = re.sub(r"`([^`]+)`", value, escape(rule.description))
    return f"{name}{escape(rule.words(study))}, from trial {spec.options['min_trials']} on: {what}"


def stopping_section(study, tables, choice, figures, success):
    """The section (HTML), or "" for a study without [[stop]] rules. `figures`: the section's figures."""
    if STOPPING not in tables:
        return ""
    stop = Cells(STOPPING, tables[STOPPING])
    rules = "".join(f"<li>{_rule_words(study, s)}</li>" for s in study.stops)
    return (
        '<section id="stopping"><h2>6. When to stop</h2>'
        + _sentence(study, stop, choice, success)
        + f"<p>Each rule below was applied to every simulated campaign after each trial, seeing only what the team "
          f"would see (the trials and the belief), and the campaign was stopped at the first trial it fired; where it "
          f"never fired, the campaign used all {study.campaign.horizon} trials. The recommendation held at the stop "
          f"is what the team would ship; its regret and miss risk are compared with the same campaign run to the "
          f"full budget, world by world. Target: {number(study.target)} {unit_words(study, study.target)}.</p>"
        + f"<ul>{rules}</ul>"
        + _table(study, stop)
        + figures
        + ("<p>The Kaplan–Meier distribution of each rule's stopping time (campaigns it never stopped censored at "
           f"the full budget) is in <code>{STOPPING_CURVES}</code>. A rule that reads the belief (confident, "
           "small-gain, bound-gap) trusts the study's prior: with a wrong prior it may stop too early, so read "
           "these numbers with the robustness section's.</p>")
        + "</section>")
