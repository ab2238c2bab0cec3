"""The HTML page of the report: sections, tables and every number tagged with its CSV cell."""

from __future__ import annotations

__all__ = ["render"]

import base64
import re

import numpy as np

from ..evidence import choice
from ..evidence.harm import HARM_DIFFERENCE
from .answer import MISS_RISK_WORDS, answer_section
from .cells import Cells, escape, fmt_pct, is_missing, number, unit_words
from .describe import _assumptions, _cautions, _limits, _question
from .figures import FIGURES as FIGURE_REGISTRY
from .files import (BUDGET_PLAN, CHOICE, FIGURES, HARM, LIMITS, PAIRWISE, PLACEMENT, STOPPING, STOPPING_CURVES,
                    SUMMARY, SWEEP_RANKING, SWEEP_SUMMARY, TRIALS_TO_TARGET, TRIALS_TO_TARGET_SUMMARY, WITHIN_TARGET,
                    WORLDS)
from .harmful import harm_section, harm_words
from .landing import placement_section
from .limits_section import limits_section
from .stop_section import stopping_section

_ATTITUDE_REGRET, _ATTITUDE_FAILURE, _ATTITUDE_TRIALS = choice.ATTITUDES
_ATTITUDE_HARM = choice.HARM_ATTITUDE


# ---------------------------------------------------------------------------
# the report
# ---------------------------------------------------------------------------
_CSS = """
:root { --ink: #1b1b1b; --muted: #5a5a5a; --rule: #d0d0d0; --tint: #f3f6f9; --warn: #fff6e5; }
* { box-sizing: border-box; }
body { font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif;
       color: var(--ink); max-width: 62rem; margin: 2rem auto 4rem; padding: 0 1.25rem; }
h1 { font-size: 1.6rem; margin: 0 0 .2rem; }
h2 { font-size: 1.25rem; margin: 2.2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 2px solid var(--ink); }
h3 { font-size: 1.05rem; margin: 1.6rem 0 .4rem; }
p, li { max-width: 50rem; }
.meta { color: var(--muted); margin: 0 0 1rem; }
.box { background: var(--tint); border-left: 4px solid #0072B2; padding: .7rem 1rem; margin: 1rem 0; }
.caution { background: var(--warn); border-left: 4px solid #D55E00; padding: .7rem 1rem; margin: 1rem 0; }
table { border-collapse: collapse; margin: .6rem 0 1.2rem; font-size: .88rem; }
th, td { padding: .25rem .6rem; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top; }
th { border-bottom: 1.5px solid var(--ink); font-weight: 600; }
table.kv th { border-bottom: 1px solid var(--rule); padding-right: 1.2rem; }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
td.n, td:first-child { white-space: nowrap; }
.ci { display: block; color: var(--muted); font-size: .82em; font-weight: normal; }
tr.group td { background: var(--tint); font-weight: 600; }
thead { display: table-header-group; }
figure { margin: 1rem 0 1.6rem; }
figure img { max-width: 100%; height: auto; display: block; border: 1px solid var(--rule); }
figcaption { color: var(--muted); font-size: .88rem; margin-top: .4rem; max-width: 50rem; }
.choice li { margin-bottom: .5rem; }
.lead-clear { font-weight: 600; }
.lead-tie { font-weight: 600; color: #8a4b00; }
code { font-size: .9em; }
footer { margin-top: 3rem; color: var(--muted); font-size: .85rem; border-top: 1px solid var(--rule); padding-top: .5rem; }
@page { size: A4; margin: 14mm 13mm; }
@media print {
  body { font-size: 9.5pt; line-height: 1.38; max-width: none; margin: 0; padding: 0; }
  h1 { font-size: 15pt; }
  h2 { font-size: 12pt; margin: .9rem 0 .35rem; }
  h3 { font-size: 10.5pt; margin: .7rem 0 .25rem; }
  p, li { max-width: none; margin: .3rem 0; }
  .box, .caution { padding: .35rem .7rem; margin: .5rem 0; }
  /* tables may run on to the next page (their heading row repeats); rows, figures and boxes may not */
  h2, h3 { break-after: avoid; page-break-after: avoid; }
  figure, tr, .box, .caution, .choice li { break-inside: avoid; page-break-inside: avoid; }
  table { font-size: 8pt; margin: .3rem 0 .6rem; }
  th, td { padding: .1rem .35rem; }
  th { font-size: 7.5pt; }
  td .ci { display: inline; font-size: 1em; }
  td .ci::before { content: " "; }
  table.pairs td { white-space: nowrap; }
  figure { margin: .4rem 0 .7rem; }
  figure img { border: none; width: auto; max-width: 100%; max-height: 12.5cm; }
  figcaption { font-size: 8pt; margin-top: .15rem; max-width: none; }
  .box, .caution, tr.group td { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  footer { margin-top: 1rem; }
}
"""


def render(study, tables, images, *, success):
    """The whole report.html text from the decision tables and the SVG bytes of the figures."""
    from .. import __version__

    summary = Cells(SUMMARY, tables[SUMMARY])
    plan = Cells(BUDGET_PLAN, tables[BUDGET_PLAN])
    reach = Cells(TRIALS_TO_TARGET_SUMMARY, tables[TRIALS_TO_TARGET_SUMMARY])
    pairs = Cells(PAIRWISE, tables[PAIRWISE]) if PAIRWISE in tables else None
    choice = Cells(CHOICE, tables[CHOICE]) if CHOICE in tables else None
    sweep = Cells(SWEEP_RANKING, tables[SWEEP_RANKING]) if SWEEP_RANKING in tables else None
    placement = Cells(PLACEMENT, tables[PLACEMENT]) if PLACEMENT in tables else None
    harm = Cells(HARM, tables[HARM]) if HARM in tables else None
    limits = Cells(LIMITS, tables[LIMITS]) if LIMITS in tables else None
    title = f"Choosing a policy and a trial budget: {study.name}"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{escape(title)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<header><h1>{escape(title)}</h1>",
        (f'<p class="meta">simlab {escape(__version__)} · root seed {study.seed} · {study.replicates} simulated '
         "worlds, each met by every policy</p></header>"),
        answer_section(study, tables, summary, plan, choice, sweep, success),
        _choice_section(study, summary, choice, success),
        _plan_section(study, plan, success),
        stopping_section(study, tables, choice, _figures_in("stopping", study, images, success), success),
        _optimum_warning(study, tables.get(WORLDS)),
        _results(study, summary, reach, pairs, images, success, placement, harm=harm, choice=choice, limits=limits),
        _sweep_section(study, sweep, images, tables.get(SWEEP_SUMMARY)) if sweep is not None else "",
        _limits(study),
        _cautions(),
        _question(study, success),     # the appendix: the question as asked, the assumptions and method
        _assumptions(study, __version__),
        _files_section(pairs is not None, bool(images), sweep is not None, placement is not None, harm is not None,
                       bool(study.stops), has_limits=limits is not None, constrained=study.constrained),
        (f"<footer>Written by simlab {escape(__version__)} from the stored traces of study "
         f"“{escape(study.name)}”. Rebuilding it from the same traces and seed gives the same numbers.</footer>"),
        "</body></html>",
    ]
    return _number_sections("\n".join(p for p in parts if p) + "\n")


def _optimum_warning(study, worlds):
    """A caution when the best two independent searches for a world's optimum differ by > 1 % of the target."""
    if worlds is None or "optimum_gap" not in worlds or not len(worlds):
        return ""
    limit = 0.01 * study.target
    gaps = worlds["optimum_gap"].to_numpy(dtype=float)
    wide = np.flatnonzero(gaps > limit)
    if not wide.size:
        return ""
    cells = Cells(WORLDS, worlds)
    worst = int(np.argmax(gaps))
    spread = ""
    if "optimum_spread" in worlds:
        spreads = worlds["optimum_spread"].to_numpy(dtype=float)
        widest = int(np.argmax(spreads))
        spread = (f" The searches' values spread (worst minus best) by up to "
                  f"{cells.span(widest, 'optimum_spread', 'sig')} {unit_words(study)} (replicate "
                  f"{cells.span(widest, 'replicate', 'int')}, column <code>optimum_spread</code>): where every "
                  "search found a different value, the best is likely short of the true optimum by more than the "
                  "gap between the best two.")
    return (f'<div class="caution"><p><b>World optima may be missed.</b> On {wide.size} of {len(gaps)} '
            f"replicates the best two of the independent searches for the world's optimum (two, and up to four "
            f"more while they disagreed) still differed by more than 1 % of the "
            f"target ({number(limit)} {unit_words(study, limit)}); the largest gap is {cells.span(worst, 'optimum_gap', 'sig')} {unit_words(study)} on replicate "
            f"{cells.span(worst, 'replicate', 'int')} (column <code>optimum_gap</code> of <code>{WORLDS}</code>).{spread} "
            "Regret is measured against the better search and every input a campaign evaluated, but where the "
            "searches disagree the true optimum may be better still: regret there may be understated, "
            "and more so for policies that never came near it. Rough or short-lengthscale priors in several "
            "inputs cause this; treat small regrets and high success shares on those worlds with care.</p></div>")


def _number_sections(text):
    """Number the <h2> headings 1, 2, ... in order (optional sections shift the rest)."""
    counter = iter(range(1, 100))
    return re.sub(r"<h2>\d+\. ", lambda m: f"<h2>{next(counter)}. ", text)


def _sweep_section(study, ranking, images, cells=None):
    """Robustness to a wrong prior: the misspecification sweep, if one was run.

    The world count comes from sweep.csv (``simlab sweep --replicates N`` overrides the
    study's ``[sweep] replicates``, and the stored study.toml does not know it)."""
    frame = ranking.frame
    first = 0
    lead = str(frame.at[first, "lead"])
    verdict = ("its lead over the next policy is clear even at the pessimistic ends of the cells' intervals"
               if lead == "clear" else
               "its lead is not clear once each cell's 95 % intervals are allowed for, so treat the top "
               "policies as a tie and consider more replicates")
    rows = "".join(
        f"<tr><td>{ranking.text(i, 'rank')}</td><td>{ranking.text(i, 'policy')}</td>"
        f"<td class='n'>{ranking.span(i, 'worst_shortfall', 'pct')} points"
        f"<span class='ci'>at ×{ranking.span(i, 'shortfall_lengthscale_factor', 'sig')}, "
        f"×{ranking.span(i, 'shortfall_amplitude_factor', 'sig')} (best there: "
        f"{ranking.text(i, 'shortfall_best_policy')})</span></td>"
        f"<td class='n'>{ranking.pct(i, 'worst_failure_risk', 'worst_failure_low', 'worst_failure_high', stacked=True)}</td>"
        f"<td class='n'>×{ranking.span(i, 'worst_lengthscale_factor', 'sig')}, "
        f"×{ranking.span(i, 'worst_amplitude_factor', 'sig')}</td>"
        f"<td class='n'>{ranking.span(i, 'mean_failure_risk', 'pct')} %</td>"
        f"<td class='n'>{ranking.span(i, 'correct_belief_failure_risk', 'pct')} %</td></tr>"
        for i in range(len(frame)))
    sw = study.sweep
    if cells is not None and "replicates" in cells.columns and len(cells):
        table = Cells(SWEEP_SUMMARY, cells)
        worlds = table.span(int(np.argmax(table.frame["replicates"].to_numpy())), "replicates", "int")
    else:
        worlds = str(sw.replicates)
    factors = lambda v: ", ".join(f"×{x:g}" for x in v)
    return (
        '<section id="sweep"><h2>0. Robustness to a wrong prior</h2>'
        f"<p>The study was replayed with the belief's lengthscales scaled by {escape(factors(sw.lengthscale))} and its "
        f"amplitude by {escape(factors(sw.amplitude))}, on the same {worlds} worlds in every cell, to see which "
        "policy still meets the target when the team's prior is wrong.</p>"
        "<p>In each cell the best policy is the one with the lowest miss risk (failure risk: the share of campaigns ending outside the target) there; a policy's "
        "<i>shortfall</i> in the cell is how many percentage points of miss risk it gives away to that best "
        "policy. The safest policy is the one whose largest shortfall over the grid is smallest (minimax "
        "regret, Savage 1951): whichever way the belief is wrong, choosing it costs least against the choice "
        "that would have been best. The raw worst cell is shown beside it; ranking on it alone can favour a "
        "policy that is mediocre everywhere, such as random search.</p>"
        f"<p><strong>Safest across the grid: {ranking.text(first, 'policy')}</strong> — it falls at most "
        f"{ranking.span(first, 'worst_shortfall', 'pct')} percentage points short of the best policy of any "
        f"cell after {study.campaign.horizon} trials (its worst miss risk is "
        f"{ranking.pct(first, 'worst_failure_risk', 'worst_failure_low', 'worst_failure_high')}); "
        f"{escape(verdict)}.</p>"
        "<table><thead><tr><th>rank</th><th>policy</th><th class='n'>worst shortfall<br><small>against the "
        "cell's best</small></th><th class='n'>worst miss risk<br><small>[95 % interval]</small></th>"
        "<th class='n'>worst cell<br><small>(lengthscale, amplitude)</small></th><th class='n'>mean over the grid</th>"
        "<th class='n'>with the study's own belief</th></tr></thead>"
        f"<tbody>{rows}</tbody></table>"
        + _figures_in("sweep", study, images, None)
        + "</section>"
    )


def _figures_in(section, study, images, success):
    """The figures the page shows in `section`, in registry order (those drawn for this study)."""
    parts = []
    for stem, fig in FIGURE_REGISTRY.items():
        if fig.section != section or stem not in images:
            continue
        # An SVG data URI rather than inline SVG: vector (sharp when printed), and the ids matplotlib
        # gives clip paths cannot clash between figures.
        data = base64.b64encode(images[stem]).decode("ascii")
        parts.append(f'<figure id="fig-{stem}"><img src="data:image/svg+xml;base64,{data}" alt="{escape(fig.alt)}">'
                     f"<figcaption>{fig.caption(study, success)}</figcaption></figure>")
    return "".join(parts)


def _summary_table(study, summary):
    frame = summary.frame
    rows = []
    for b in study.campaign.budgets:
        rows.append(f'<tr class="group"><td colspan="7">after {b} trials</td></tr>')
        for i in np.flatnonzero(frame["budget"].to_numpy() == b):
            i = int(i)
            rows.append(
                f"<tr><td>{summary.text(i, 'policy')}</td>"
                f"<td class='n'>{summary.span(i, 'replicates', 'int')}</td>"
                f"<td class='n'>{summary.sig(i, 'regret_median', 'median_low', 'median_high', stacked=True)}</td>"
                f"<td class='n'>{summary.span(i, 'regret_q25', 'sig')}–{summary.span(i, 'regret_q75', 'sig')}</td>"
                f"<td class='n'>{summary.pct(i, 'within_target', 'within_low', 'within_high', stacked=True)}</td>"
                f"<td class='n'>{summary.pct(i, 'failure_risk', 'failure_low', 'failure_high', stacked=True)}</td>"
                f"<td class='n'>{summary.span(i, 'cvar90', 'sig')}"
                f"<span class='ci'>≥ {summary.span(i, 'cvar90_low', 'sig')}</span></td></tr>"
            )
    return (
        "<table><thead><tr><th>policy</th><th class='n'>campaigns</th>"
        f"<th class='n'>median regret ({unit_words(study)})<span class='ci'>[95 % interval]</span></th>"
        f"<th class='n'>middle 50 % of campaigns ({unit_words(study)})</th>"
        "<th class='n'>within target<span class='ci'>[95 % interval]</span></th>"
        "<th class='n'>miss risk (failure risk)<span class='ci'>[95 % interval]</span></th>"
        f"<th class='n'>worst 10 % average, CVaR-90 ({unit_words(study)})<span class='ci'>95 % lower bound</span></th>"
        f"</tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )


def _trials_range(cells, row, low, high, last):
    """``10–14``, or ``10 to >15`` when the band's far edge lies beyond the simulated trials."""
    ends = []
    for column in (low, high):
        ends.append(cells.span(row, column, "int", missing=f">{last}"))
    dash = " to " if is_missing(cells.value(row, high)) or is_missing(cells.value(row, low)) else "–"
    return dash.join(ends)


def _reach_table(reach):
    frame = reach.frame
    levels = list(dict.fromkeys(frame["level"].tolist()))
    head = "".join(f"<th class='n'>first trial by which {fmt_pct(lv)} % had been within target [95 % range]</th>"
                   for lv in levels)
    rows = []
    for policy in dict.fromkeys(frame["policy"].astype(str)):
        cells = []
        for lv in levels:
            i = reach.row(policy=policy, level=lv)
            last = int(reach.value(i, "last_trial"))
            if is_missing(reach.value(i, "trials")):
                cells.append(f"<td class='n'>{reach.span(i, 'trials', 'int', missing='not reached')} "
                             f"(within {last})</td>")
            else:
                cells.append(f"<td class='n'>{reach.span(i, 'trials', 'int')} "
                             f"[{_trials_range(reach, i, 'trials_low', 'trials_high', last)}]</td>")
        first = reach.row(policy=policy, level=levels[0])
        rows.append(f"<tr><td>{reach.text(first, 'policy')}</td>{''.join(cells)}</tr>")
    return (f"<table><thead><tr><th>policy</th>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>")


def _pairwise_table(study, pairs):
    frame = pairs.frame
    rows = []
    for i in range(len(frame)):
        rows.append(
            f"<tr><td>{pairs.text(i, 'policy_a')}</td><td>{pairs.text(i, 'policy_b')}</td>"
            f"<td class='n'>{pairs.pct(i, 'win_rate', 'win_rate_low', 'win_rate_high', stacked=True)}</td>"
            f"<td class='n'>{pairs.sig(i, 'median_difference', 'median_difference_low', 'median_difference_high', stacked=True)}</td>"
            f"<td>{pairs.text(i, 'regret_favours')}</td>"
            f"<td class='n'>{pairs.span(i, 'sign_p_holm', 'p')}</td>"
            f"<td class='n'>{pairs.span(i, 'regret_p_holm', 'p')}</td>"
            f"<td class='n'>{pairs.span(i, 'failures_only_a', 'int')} / {pairs.span(i, 'failures_only_b', 'int')}</td>"
            f"<td class='n'>{pairs.span(i, 'failure_p_holm', 'p')}</td></tr>"
        )
    return (
        "<table class='pairs'><thead><tr><th>policy A</th><th>policy B</th>"
        "<th class='n'>A wins (win rate: share of worlds A ends lower)<span class='ci'>[95 % interval]</span></th>"
        f"<th class='n'>median regret A − B ({unit_words(study)})<span class='ci'>[95 % interval]</span></th>"
        "<th>favoured</th>"
        "<th class='n'>sign test p (Holm)</th><th class='n'>Wilcoxon p (Holm)</th>"
        "<th class='n'>only A / only B miss</th><th class='n'>McNemar p (Holm)</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def _results(study, summary, reach, pairs, images, success, placement=None, *, harm=None, choice=None, limits=None):
    horizon = study.campaign.horizon
    parts = [
        '<section id="results"><h2>3. Results and risks</h2>',
        (f"<p><i>Regret</i> is the shortfall of the recommended setting from the world's best value, in "
         f"{unit_words(study)} (0 is perfect). <i>Within target</i> is the share of campaigns whose recommendation "
         "after the budget's last trial is within the target: what a team that stops there would ship. "
         f"<i>Miss risk</i> (<code>failure_risk</code> in the files) is the rest: {MISS_RISK_WORDS}. "
         "<i>Worst 10 % average</i> (CVaR-90) is the mean regret of the worst tenth of campaigns. "
         f"The target is {number(study.target)} {unit_words(study, study.target)}. Intervals are 95 % "
         "intervals of the simulation's own uncertainty (a finite number of worlds); they do not cover "
         "doubts about the prior. They are built to hold at the study's size: the median's from order "
         "statistics (binomial, distribution-free), the shares' exact (Clopper–Pearson). For the mean of "
         "the worst 10 % only a lower bound is given (distribution-free, from the Dvoretzky–Kiefer–Wolfowitz "
         "inequality; Thomas &amp; Learned-Miller 2019): no method gives an upper bound that holds without "
         "knowing the largest possible regret, which these worlds do not have. The tail may be worse than "
         "the figure shown; it is at least as bad as the bound.</p>"),
        "<h3>Regret, within-target share and miss risk at each budget</h3>",
        _summary_table(study, summary),
        _figures_in("results", study, images, success),
        "<h3>First passage (descriptive only)</h3>",
        ("<p>The first trial at which a campaign's recommendation was within the target. A real campaign "
         "cannot observe this (it does not know its regret), and its recommendation can get worse again "
         "afterwards, so these numbers are <b>not budgets</b>: budgets come from the share within target "
         "after the budget's last trial (section “Budget plan”). Campaigns never within target in the "
         "simulated trials are censored (Kaplan–Meier).</p>"),
        _reach_table(reach),
        _figures_in("first_passage", study, images, success),
    ]
    if pairs is not None:
        parts += [
            f"<h3>Policies compared on the same worlds (after {horizon} trials)</h3>",
            ("<p>Every policy met the same worlds, so policies are compared replicate by replicate. "
             "“A wins” is the share of worlds where A ends with lower regret (ties count half), with "
             "an exact (Clopper–Pearson-based) interval; the median regret difference has a distribution-free (order-statistic) "
             "interval. p-values are Holm-adjusted over all pairs: the exact sign test of A's wins against "
             "B's (ties left out) for the win rate, Wilcoxon signed-rank for regret, McNemar's exact test "
             "for missing the target.</p>"),
            _pairwise_table(study, pairs),
            _figures_in("pairwise", study, images, success),
        ]
    if placement is not None:
        parts.append(placement_section(study, placement, _figures_in("placement", study, images, success)))
    parts.append(harm_section(study, harm, _figures_in("harm", study, images, success), choice, _ATTITUDE_HARM))
    parts.append(limits_section(study, limits))
    parts.append(_figures_in("snapshot", study, images, success))
    parts.append("</section>")
    return "".join(parts)


def _lead_sentence(choice, i):
    lead = choice.value(i, "lead")
    leader = choice.text(i, "leader")
    evidence = choice.text(i, "evidence")
    if choice.value(i, "attitude") == _ATTITUDE_TRIALS:
        # The trials rule compares bands; its evidence is a clause of its own.
        reason = f"{leader}'s {evidence}" if lead == "clear" else evidence
    else:
        reason = f"{leader} is {evidence}"
    if lead == "clear":
        return f' <span class="lead-clear">Clear lead:</span> {reason}.'
    if lead == "tie":
        return (f' <span class="lead-tie">Tie:</span> {reason}; on this evidence treat the '
                "leading policies as equally good and choose on other grounds.")
    return f" {reason}."


def _choice_section(study, summary, choice, success):
    frame = summary.frame
    horizon = study.campaign.horizon
    items = []
    for b in study.campaign.budgets:
        rows = [int(i) for i in np.flatnonzero(frame["budget"].to_numpy() == b)]
        rows.sort(key=lambda i: (float(summary.value(i, "failure_risk")), i))
        phrases = []
        for k, i in enumerate(rows):
            risk = summary.pct(i, "failure_risk", "failure_low", "failure_high")
            who = summary.text(i, "policy")
            phrases.append(f"{who} misses the target in {risk} of simulated campaigns" if k == 0
                           else f"{who} in {risk}")
        items.append(f"<li>With {b} trials, {'; '.join(phrases)}.</li>")
    parts = ['<section id="choice"><h2>4. The choice</h2>',
             "<h3>Miss risk at each budget</h3>", f'<ul class="choice">{"".join(items)}</ul>']
    if choice is None:
        parts.append("<p>The study has a single policy, so there is nothing to choose between.</p></section>")
        return "".join(parts)
    parts.append(f"<h3>The leading policy under each attitude to risk (after {horizon} trials)</h3>")
    sentences = []
    for i in range(len(choice.frame)):
        attitude = choice.value(i, "attitude")
        leader, runner = choice.text(i, "leader"), choice.text(i, "runner_up")
        if attitude == _ATTITUDE_REGRET:
            s = (f"<b>If the typical outcome matters most</b> (lowest median regret): {leader} ends with a "
                 f"median regret of {choice.sig(i, 'leader_value', 'leader_low', 'leader_high')} "
                 f"{unit_words(study)} after {horizon} trials; the runner-up, {runner}, "
                 f"{choice.sig(i, 'runner_up_value', 'runner_up_low', 'runner_up_high')}.")
        elif attitude == _ATTITUDE_FAILURE:
            s = (f"<b>If missing the target is what must be avoided</b> (lowest miss risk): with "
                 f"{horizon} trials, {leader} misses the target in "
                 f"{choice.pct(i, 'leader_value', 'leader_low', 'leader_high')} of simulated campaigns; "
                 f"{runner} in {choice.pct(i, 'runner_up_value', 'runner_up_low', 'runner_up_high')}.")
        elif attitude == _ATTITUDE_TRIALS:
            if is_missing(choice.value(i, "leader")):
                s = (f"<b>If trials are what is scarce</b> (fewest trials for {fmt_pct(success)} % success): "
                     f"at no simulated budget up to {horizon} trials do {fmt_pct(success)} % of any policy's "
                     "campaigns end within the target.")
                sentences.append(f"<li>{s} {choice.text(i, 'evidence')}.</li>")
                continue
            s = (f"<b>If trials are what is scarce</b> (fewest trials for {fmt_pct(success)} % of campaigns "
                 f"to end within the target): {leader} needs {_choice_trials(choice, i, 'leader', horizon)}; "
                 f"{runner} needs {_choice_trials(choice, i, 'runner_up', horizon)}.")
        elif attitude == _ATTITUDE_HARM:
            counted = (f"a trial is harmful when {harm_words(study)}" if study.constrained else
                       f"true value {'below' if study.goal == 'maximize' else 'above'} the floor of "
                       f"{number(study.floor)} {unit_words(study, study.floor)}")
            s = (f"<b>If every trial that fails specification is costly</b> (fewest harmful trials, "
                 f"{counted}): {leader} runs "
                 f"{choice.sig(i, 'leader_value', 'leader_low', 'leader_high')} harmful trials per campaign in "
                 f"{horizon} trials; {runner} "
                 f"{choice.sig(i, 'runner_up_value', 'runner_up_low', 'runner_up_high')}.")
        else:
            s = f"<b>{escape(attitude)}</b> ({choice.text(i, 'criterion')}): {leader}; runner-up {runner}."
        sentences.append(f"<li>{s}{_lead_sentence(choice, i)}</li>")
    parts.append(f'<ul class="choice">{"".join(sentences)}</ul>')
    parts.append(_clear_rule(study, success, attitudes=len(choice.frame)))
    parts.append("</section>")
    return "".join(parts)


def _clear_rule(study, success, attitudes=len(choice.ATTITUDES)):
    """What "clear" means in the choice table, with the study's own thresholds (`attitudes`: rows of choice.csv)."""
    level = 0.05 / attitudes
    count = {3: "three", 4: "four"}.get(attitudes, str(attitudes))
    harm = ("; for harmful trials the 95 % interval of the mean paired difference in harmful trials per campaign "
            f"must lie beyond {number(HARM_DIFFERENCE)} (a tenth of a harmful trial per campaign)"
            if attitudes > len(choice.ATTITUDES) else "")
    return (
        "<p>“Clear” needs the leader to beat every other policy on the paired replicates, by a margin that "
        f"matters. The {count} attitudes read the same campaigns, so they share one 5 % error budget "
        f"(Bonferroni): each needs a Holm-adjusted p below {level:.2g}, and the budget plan's bands are "
        f"widened to {100 * (1 - level):.1f} % for the trials attitude. With policies that are really equally "
        "good, some “clear” lead then appears in at most about 5 % of studies. On top of that, for the typical "
        "outcome the 95 % interval of the median paired regret difference must lie beyond "
        f"<b>{number(study.lead_difference)}</b> {unit_words(study, study.lead_difference)} (<code>[target] difference</code>), and for "
        "miss risk the 95 % interval of the paired difference in failure shares must lie beyond "
        f"{number(100 * (1 - success) / 10)} percentage points (a tenth of the {fmt_pct(1 - success)} % failure "
        f"risk accepted); for trials the ranges must be apart, i.e. by at least one whole trial{harm}. Otherwise the "
        "report says “tie” and gives the reason: more replicates may separate the policies, the difference may "
        "be too small to act on, or they may be equally good.</p>"
    )


def _choice_trials(choice, i, who, horizon):
    value = choice.value(i, f"{who}_value")
    if is_missing(value):
        return (f"{choice.span(i, f'{who}_value', 'int', missing=f'more than {horizon}')} trials "
                "(not reached within the simulated budget)")
    return (f"{choice.span(i, f'{who}_value', 'int')} trials (95 % range "
            f"{_trials_range(choice, i, f'{who}_low', f'{who}_high', horizon)})")


def _plan_section(study, plan, success):
    frame = plan.frame
    rows = []
    for i in range(len(frame)):
        last = int(plan.value(i, "last_trial"))
        if is_missing(plan.value(i, "budget")):
            budget = f"{plan.span(i, 'budget', 'int', missing='not reached')}"
            span = "—"
            share = (f"{plan.pct(i, 'share', 'share_low', 'share_high')} after trial {last}")
            stays = "—"
        else:
            budget = plan.span(i, "budget", "int")
            span = _trials_range(plan, i, "budget_optimistic", "budget_conservative", last)
            share = plan.pct(i, "share", "share_low", "share_high")
            stays = (f"not held: below again by trial {last}" if is_missing(plan.value(i, "budget_sustained"))
                     else plan.span(i, "budget_sustained", "int"))
        rows.append(f"<tr><td>{plan.text(i, 'policy')}</td><td class='n'>{budget}</td><td class='n'>{span}</td>"
                    f"<td class='n'>{share}</td><td class='n'>{stays}</td><td>{plan.text(i, 'status')}</td></tr>")
    aware = [str(p) for p, a in zip(frame["policy"], frame.get("horizon_aware", [False] * len(frame))) if a]
    horizon_note = ""
    if aware:
        budgets = ", ".join(str(b) for b in study.campaign.budgets)
        horizon_note = (
            f"<p>{escape(', '.join(aware))} plan{'s' if len(aware) == 1 else ''} ahead for the budget, so "
            f"{'it was' if len(aware) == 1 else 'they were'} replayed once per study budget ({budgets}). "
            "At those budgets the share comes from the campaign planned for exactly that budget; at a trial "
            "between them, from the campaign planned for the next larger budget, stopped early, which a team "
            "planning that smaller budget would not run. Prefer a budget the study simulated.</p>")
    return (
        f'<section id="budget-plan"><h2>5. Budget plan</h2>'
        f"<p>The smallest budget at which at least {fmt_pct(success)} % of simulated campaigns end within the "
        "target: the recommendation a campaign holds after its last trial, which is what a team ships. "
        "The range runs from the budget where the upper end of the share's 95 % interval (Clopper–Pearson) "
        "reaches that level to where its lower end does. "
        "<b>To defend a budget in a proposal, quote the upper end of the range</b>: it allows for the "
        "simulation's own uncertainty. The share need not rise with every trial, because a recommendation "
        "can get worse again; a budget is reported only where the share is reached, and the next column "
        "says from which trial on it stays at or above the level through every later simulated trial. "
        "These are the same shares as in the results table and <code>simlab plan</code>.</p>"
        "<table><thead><tr><th>policy</th><th class='n'>budget</th><th class='n'>95 % range</th>"
        "<th class='n'>within target at that budget [95 %]</th><th class='n'>stays at or above from</th>"
        "<th>status</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>{horizon_note}</section>"
    )


def _files_section(has_pairs, has_figures, has_sweep=False, has_placement=False, has_harm=False, has_stops=False, *,
                   has_limits=False, constrained=False):
    files = [
        (SUMMARY, "regret, within-target share, failure risk and CVaR-90 per policy and budget"),
        (WITHIN_TARGET, "share of campaigns within target after each trial, with its interval: budgets are "
                        "planned on it"),
        (BUDGET_PLAN, "smallest budget at which the requested share of campaigns ends within target, per policy"),
        (TRIALS_TO_TARGET, "first passage (descriptive only): Kaplan–Meier share of campaigns whose "
                           "recommendation had been within target at some trial so far; a real campaign cannot "
                           "observe this"),
        (TRIALS_TO_TARGET_SUMMARY, "first passage (descriptive only): trials until half, and the requested "
                                   "share, of campaigns had first been within target"),
    ]
    if has_pairs:
        files += [(PAIRWISE, "paired comparison of every two policies at the largest budget"),
                  (CHOICE, "the leading policy under each attitude to risk")]
    if has_placement:
        files.append((PLACEMENT, "share of each policy's own trials on the boundary of the box and in its corners"))
    if has_harm:
        counted = ("worse than [target] floor, breaking a limit or failing" if constrained else
                   "worse than [target] floor")
        files.append((HARM, f"harmful trials per campaign ({counted}), campaigns with any, and the "
                            "trials' own shortfall, per policy and budget"))
    if has_limits:
        files.append((LIMITS, "trials that break a limit and trials that fail per campaign, and the share of "
                              "campaigns whose recommendation breaks a limit, per policy and budget (also at the "
                              "budget each policy's plan books)"))
    if has_stops:
        files += [(STOPPING, "per policy and stopping rule: trials used and saved, regret and miss risk at the stop, "
                             "the paired difference against the full budget"),
                  (STOPPING_CURVES, "Kaplan–Meier share of campaigns each rule has stopped by each trial (censored "
                                    "at the full budget)")]
    if has_sweep:
        files += [(SWEEP_SUMMARY, "failure risk and median regret per policy, budget and cell of the sweep"),
                  (SWEEP_RANKING, "policies ranked by their worst shortfall against each cell's best policy "
                                  "(minimax regret), with the raw worst cell")]
    if has_figures:
        files.append((f"{FIGURES}/", "every figure as PNG and SVG"))
    items = "".join(f"<li><code>{escape(name)}</code>: {escape(what)}</li>" for name, what in files)
    return ('<section id="files"><h2>8. Files next to this report</h2>'
            "<p>Every number in this report is read from these files, rounded for display.</p>"
            f"<ul>{items}</ul></section>")
