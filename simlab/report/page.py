"""The HTML page of the report: sections, tables and every number tagged with its CSV cell."""

from __future__ import annotations

__all__ = ["render"]

import base64
import html
import math
import re

import numpy as np
import pandas as pd

from ..evidence import choice, compare

SUMMARY = "summary.csv"
WITHIN_TARGET = "within_target.csv"
TRIALS_TO_TARGET = "trials_to_target.csv"
TRIALS_TO_TARGET_SUMMARY = "trials_to_target_summary.csv"
PAIRWISE = "pairwise.csv"
CHOICE = "choice.csv"
BUDGET_PLAN = "budget_plan.csv"
REPORT = "report.html"
SWEEP_SUMMARY = "sweep/sweep.csv"
SWEEP_RANKING = "sweep/ranking.csv"
WORLDS = "worlds.csv"
FIGURES = "figures"

# Figure stems in report order.
_FIGURE_STEMS = ("regret", "regret_rounds", "failure_risk", "within_target", "trials_to_target", "final_regret",
                 "win_rates", "snapshot", "sweep")

_KERNEL_NAMES = {
    "sqexp": "squared exponential",
    "matern12": "Matérn 1/2 (exponential)",
    "matern32": "Matérn 3/2",
    "matern52": "Matérn 5/2",
}
_RULES = {
    "random": "uniformly random inputs (baseline)",
    "sobol": "non-adaptive space filling (scrambled Sobol' sequence)",
    "mean": "pure exploitation: lowest posterior mean",
    "lcb": "optimistic confidence bound",
    "pi": "probability of improvement",
    "ei": "expected improvement",
    "thompson": "Thompson sampling (one posterior sample per trial)",
    "pbest": "most probable location of the minimum, from posterior samples",
    "mes": "max-value entropy search",
    "kg": "knowledge gradient",
    "gp-ucb": "confidence bound with the GP-UCB width schedule",
    "hedge": "portfolio of EI, PI and the confidence bound, weighted by past gains",
}
_ATTITUDE_REGRET, _ATTITUDE_FAILURE, _ATTITUDE_TRIALS = choice.ATTITUDES



# ---------------------------------------------------------------------------
# number formatting: every number shown is tagged with its CSV cell
# ---------------------------------------------------------------------------
def _missing(value):
    return value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value))


def _fmt_sig(value):
    """Three significant digits, plain decimals between 1e-4 and 1e6, a true minus sign."""
    v = float(value)
    if v == 0.0:
        return "0"
    magnitude = math.floor(math.log10(abs(v)))
    text = f"{v:.3g}" if magnitude < -4 or magnitude >= 6 else f"{v:.{max(2 - magnitude, 0)}f}"
    return "\u2212" + text[1:] if text.startswith("-") else text


def _fmt_pct(value):
    """A share as a percentage: whole percent, one decimal near 0 % and 100 %."""
    v = 100.0 * float(value)
    if 0.0 < v < 1.0 or 99.0 < v < 100.0:
        return f"{v:.1f}"
    return f"{v:.0f}"


def _fmt_int(value):
    return str(round(float(value)))


def _fmt_p(value):
    """Two significant digits; "< 0.001" below 0.001 (compare.format_p)."""
    return compare.format_p(float(value))


_FORMATS = {"sig": _fmt_sig, "pct": _fmt_pct, "int": _fmt_int, "p": _fmt_p}


class _Cells:
    """Formats cells of one CSV table as tagged spans."""

    def __init__(self, name, frame):
        self.name, self.frame = name, frame.reset_index(drop=True)

    def row(self, **keys):
        """Index of the single row matching the key columns."""
        mask = np.ones(len(self.frame), dtype=bool)
        for column, value in keys.items():
            mask &= self.frame[column].astype(str).to_numpy() == str(value)
        found = np.flatnonzero(mask)
        if found.size != 1:
            raise ValueError(f"{self.name}: expected one row for {keys}, found {found.size}")
        return int(found[0])

    def value(self, row, column):
        return self.frame.at[row, column]

    def span(self, row, column, kind, *, missing="—"):
        """The cell as ``<span class="v" data-src data-row data-col [data-unit]>text</span>``."""
        value = self.frame.at[row, column]
        unit = ' data-unit="%"' if kind == "pct" else ""
        text = html.escape(missing) if _missing(value) else html.escape(_FORMATS[kind](value))
        return (f'<span class="v" data-src="{self.name}" data-row="{row}" data-col="{html.escape(column)}"'
                f'{unit}>{text}</span>')

    def text(self, row, column):
        """A text cell, escaped and tagged (e.g. labels, status, evidence)."""
        value = self.frame.at[row, column]
        shown = "" if _missing(value) else html.escape(str(value))
        return (f'<span class="t" data-src="{self.name}" data-row="{row}" data-col="{html.escape(column)}">'
                f"{shown}</span>")

    def pct(self, row, column, low, high, *, stacked=False):
        """``12 % [8–17 %]`` from three share columns (interval on its own line if `stacked`)."""
        interval = f"[{self.span(row, low, 'pct')}–{self.span(row, high, 'pct')} %]"
        if stacked:
            return f"{self.span(row, column, 'pct')} %<span class='ci'>{interval}</span>"
        return f"{self.span(row, column, 'pct')} % {interval}"

    def sig(self, row, column, low, high, *, stacked=False):
        """``0.25 [0.1–0.4]`` from three columns (interval on its own line if `stacked`)."""
        values = [self.frame.at[row, c] for c in (low, high)]
        signed = any(not _missing(v) and float(v) < 0 for v in values)
        dash = " to " if signed else "–"  # "−0.5–−0.1" reads badly
        interval = f"[{self.span(row, low, 'sig')}{dash}{self.span(row, high, 'sig')}]"
        if stacked:
            return f"{self.span(row, column, 'sig')}<span class='ci'>{interval}</span>"
        return f"{self.span(row, column, 'sig')} {interval}"


def _e(text):
    return html.escape(str(text), quote=True)


def _num(value):
    """A number from the study file (not a result), shown as written."""
    return _e(f"{value:g}")


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
@page { size: A4; margin: 16mm 14mm; }
@media print {
  body { font-size: 10pt; max-width: none; margin: 0; padding: 0; }
  h2 { margin-top: 1.2rem; }
  h2, h3 { break-after: avoid; page-break-after: avoid; }
  figure, table, tr, .box, .caution, .choice li { break-inside: avoid; page-break-inside: avoid; }
  figure img { border: none; max-height: 24cm; width: auto; max-width: 100%; }
  .box, .caution, tr.group td { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
"""


def render(study, tables, images, *, success):
    """The whole report.html text from the decision tables and the PNG bytes of the figures."""
    from .. import __version__

    summary = _Cells(SUMMARY, tables[SUMMARY])
    plan = _Cells(BUDGET_PLAN, tables[BUDGET_PLAN])
    reach = _Cells(TRIALS_TO_TARGET_SUMMARY, tables[TRIALS_TO_TARGET_SUMMARY])
    pairs = _Cells(PAIRWISE, tables[PAIRWISE]) if PAIRWISE in tables else None
    choice = _Cells(CHOICE, tables[CHOICE]) if CHOICE in tables else None
    sweep = _Cells(SWEEP_RANKING, tables[SWEEP_RANKING]) if SWEEP_RANKING in tables else None
    title = f"Choosing a policy and a trial budget: {study.name}"
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<header><h1>{_e(title)}</h1>",
        (f'<p class="meta">simlab {_e(__version__)} · root seed {study.seed} · {study.replicates} simulated '
         "worlds, each met by every policy</p></header>"),
        _question(study, success),
        _assumptions(study, __version__),
        _optimum_warning(study, tables.get(WORLDS)),
        _results(study, summary, reach, pairs, images, success),
        _choice_section(study, summary, choice, success),
        _plan_section(study, plan, success),
        _sweep_section(study, sweep, images, tables.get(SWEEP_SUMMARY)) if sweep is not None else "",
        _limits(study),
        _cautions(),
        _files_section(pairs is not None, bool(images), sweep is not None),
        (f"<footer>Written by simlab {_e(__version__)} from the stored traces of study "
         f"“{_e(study.name)}”. Rebuilding it from the same traces and seed gives the same numbers.</footer>"),
        "</body></html>",
    ]
    return _number_sections("\n".join(p for p in parts if p) + "\n")


def _optimum_warning(study, worlds):
    """A caution when two independent searches for a world's optimum disagreed by > 1 % of the target."""
    if worlds is None or "optimum_gap" not in worlds or not len(worlds):
        return ""
    limit = 0.01 * study.target
    gaps = worlds["optimum_gap"].to_numpy(dtype=float)
    wide = np.flatnonzero(gaps > limit)
    if not wide.size:
        return ""
    cells = _Cells(WORLDS, worlds)
    worst = int(np.argmax(gaps))
    return (f'<div class="caution"><p><b>World optima may be missed.</b> On {wide.size} of {len(gaps)} '
            f"replicates two independent searches for the world's optimum disagreed by more than 1 % of the "
            f"target ({_num(limit)}); the largest gap is {cells.span(worst, 'optimum_gap', 'sig')} on replicate "
            f"{cells.span(worst, 'replicate', 'int')} (column <code>optimum_gap</code> of <code>{WORLDS}</code>). "
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
        table = _Cells(SWEEP_SUMMARY, cells)
        worlds = table.span(int(np.argmax(table.frame["replicates"].to_numpy())), "replicates", "int")
    else:
        worlds = str(sw.replicates)
    factors = lambda v: ", ".join(f"×{x:g}" for x in v)
    return (
        '<section id="sweep"><h2>0. Robustness to a wrong prior</h2>'
        f"<p>The study was replayed with the belief's lengthscales scaled by {_e(factors(sw.lengthscale))} and its "
        f"amplitude by {_e(factors(sw.amplitude))}, on the same {worlds} worlds in every cell, to see which "
        "policy still meets the target when the team's prior is wrong.</p>"
        "<p>In each cell the best policy is the one with the lowest failure risk there; a policy's "
        "<i>shortfall</i> in the cell is how many percentage points of failure risk it gives away to that best "
        "policy. The safest policy is the one whose largest shortfall over the grid is smallest (minimax "
        "regret, Savage 1951): whichever way the belief is wrong, choosing it costs least against the choice "
        "that would have been best. The raw worst cell is shown beside it; ranking on it alone can favour a "
        "policy that is mediocre everywhere, such as random search.</p>"
        f"<p><strong>Safest across the grid: {ranking.text(first, 'policy')}</strong> — it falls at most "
        f"{ranking.span(first, 'worst_shortfall', 'pct')} percentage points short of the best policy of any "
        f"cell after {study.campaign.horizon} trials (its worst failure risk is "
        f"{ranking.pct(first, 'worst_failure_risk', 'worst_failure_low', 'worst_failure_high')}); "
        f"{_e(verdict)}.</p>"
        "<table><thead><tr><th>rank</th><th>policy</th><th class='n'>worst shortfall<br><small>against the "
        "cell's best</small></th><th class='n'>worst failure risk<br><small>[95 % interval]</small></th>"
        "<th class='n'>worst cell<br><small>(lengthscale, amplitude)</small></th><th class='n'>mean over the grid</th>"
        "<th class='n'>with the study's own belief</th></tr></thead>"
        f"<tbody>{rows}</tbody></table>"
        + (_figure(images, "sweep", "Failure risk over the misspecification grid",
                   "Failure risk after the largest budget in each cell of the grid, one panel per policy.")
           if "sweep" in images else "")
        + "</section>"
    )


def _question(study, success):
    goal = "maximise" if study.goal == "maximize" else "minimise"
    inputs = ", ".join(f"<b>{_e(n)}</b> from {_num(lo)} to {_num(hi)}"
                       for n, lo, hi in zip(study.space.names, study.space.low, study.space.high))
    budgets = ", ".join(str(b) for b in study.campaign.budgets)
    return (
        '<section id="question"><h2>1. The question</h2>'
        f'<div class="box"><p>A campaign will {goal} an objective by choosing settings of '
        f"{len(study.space.names)} input{'s' if study.space.dim > 1 else ''}: {inputs} "
        "(in the units of the study file). "
        f"Which acquisition policy should it use, and how many trials should it ask for: {budgets}?</p>"
        f"<p>Success means the recommended setting ends within <b>{_num(study.target)}</b> objective units "
        "of the best value the process can reach (simple regret ≤ target). "
        f"The requested chance of success for the budget plan is {_fmt_pct(success)} %.</p></div>"
        "<p>To answer it, simlab drew many possible objectives (“worlds”) from the prior below, replayed "
        "a complete campaign with every policy on each world — with the same initial design, candidate "
        "pool and noise for every policy — and counted how often and how quickly each policy's "
        "recommendation met the target.</p></section>"
    )


def _prior_rows(prior, study):
    ls = ", ".join(f"{_e(n)} {_num(v)}" for n, v in zip(study.space.names, prior.lengthscale))
    return (
        f"<tr><th>kernel</th><td>{_e(_KERNEL_NAMES.get(prior.kernel, prior.kernel))}</td></tr>"
        f"<tr><th>lengthscale (input units)</th><td>{ls}</td></tr>"
        f"<tr><th>amplitude (prior sd)</th><td>{_num(prior.amplitude)}</td></tr>"
        f"<tr><th>mean</th><td>{_num(prior.mean)}</td></tr>"
        f"<tr><th>observation noise sd</th><td>{_num(prior.noise)}</td></tr>"
    )


def _noise_words(w):
    """How the simulated observations depart from the truth, in words."""
    kind = getattr(w, "noise_kind", "gaussian")
    words = (f"Student-t noise ({_num(getattr(w, 'noise_df', 5.0))} degrees of freedom, heavier tails) "
             f"scaled to sd {_num(w.noise)}" if kind == "student" else f"Gaussian noise of sd {_num(w.noise)}")
    growth = getattr(w, "noise_growth", 0.0)
    if growth:
        words += f", growing with the response (growth {_num(growth)} per prior amplitude)"
    lost = getattr(w, "lost", 0.0)
    if lost:
        words += f"; each trial is lost (budget spent, nothing observed) with probability {_num(lost)}"
    return words


def _world_section(study):
    w = study.world
    if w.function is not None:
        from ..worlds.functions import FUNCTIONS

        fn = FUNCTIONS[w.function]
        return (f"<p>Every replicate uses the published test function <b>{_e(fn.name)}</b> "
                f"({_e(fn.source)}) on its published domain, observed with {_noise_words(w)}. The replicates "
                "differ only in the initial design, candidate pool and noise, so the spread of results "
                "reflects the campaigns, not a range of possible objectives.</p>")
    how = (f"random Fourier features ({w.features} frequencies: continuous functions)"
           if w.method == "features" else f"exact joint draws on a grid of {w.grid} points per input")
    rows = _prior_rows(w.prior, study)
    within = [(name, getattr(w, f"{name}_within", 1.0)) for name in ("lengthscale", "amplitude")]
    for name, factor in within:
        if factor != 1.0:
            rows += (f"<tr><th>{name} uncertainty</th><td>each world draws its own {name}: 95 % within a "
                     f"factor {_num(factor)} of the value above</td></tr>")
    rows += f"<tr><th>observations</th><td>{_noise_words(w)}</td></tr>"
    history = getattr(study, "history", None)
    past = ""
    if history is not None:
        past = (f"<p>Every world is conditioned on the <b>{history.size} trials already run</b> (response "
                f"column “{_e(history.response)}”), and every campaign starts from them; they do not count "
                "toward the budgets.</p>")
    return (f"<p>Each replicate's objective is a draw from this Gaussian-process prior, made with "
            f"{_e(how)}:</p><table class='kv'>{rows}</table>{past}")


def _assumptions(study, version):
    w = study.world
    refit = getattr(study, "refit_every", 0)
    if w.prior is not None and study.belief == w.prior:
        belief = ("<p>The campaigns' model (belief) starts as <b>the same prior</b>: every policy knows exactly "
                  "how the worlds were made. That is the favourable case; a belief that is wrong about "
                  "smoothness, amplitude or noise is not tested here.</p>")
    else:
        belief = ("<p>The campaigns' model (belief) starts from:</p>"
                  f"<table class='kv'>{_prior_rows(study.belief, study)}</table>")
    belief += (f"<p>Its hyperparameters are refitted by maximum likelihood every {refit} trials.</p>" if refit
               else "<p>Its hyperparameters stay fixed for the whole campaign (no refitting).</p>")
    space = "".join(f"<tr><td>{_e(n)}</td><td class='n'>{_num(lo)}</td><td class='n'>{_num(hi)}</td></tr>"
                    for n, lo, hi in zip(study.space.names, study.space.low, study.space.high))
    policies = "".join(
        f"<tr><td>{_e(p.label)}</td><td>{_e(p.rule)}</td><td>{_e(_RULES.get(p.rule, ''))}</td>"
        f"<td>{_e(_settings(p))}</td></tr>"
        for p in study.policies
    )
    c = study.campaign
    batch = getattr(c, "batch", 1)
    rounds = (f"<tr><th>trials per round</th><td>{batch}, all chosen before any result of the round is "
              "back</td></tr>" if batch > 1 else "")
    return (
        '<section id="assumptions"><h2>2. Assumptions</h2>'
        "<h3>Worlds</h3>" + _world_section(study) + "<h3>Belief</h3>" + belief +
        "<h3>Search space</h3><table><thead><tr><th>input</th><th class='n'>low</th><th class='n'>high</th>"
        f"</tr></thead><tbody>{space}</tbody></table>"
        "<h3>Policies</h3><table><thead><tr><th>label</th><th>rule</th><th>what it does</th><th>settings</th>"
        f"</tr></thead><tbody>{policies}</tbody></table>"
        "<h3>Campaigns</h3><table class='kv'>"
        f"<tr><th>goal</th><td>{_e(study.goal)}</td></tr>"
        f"<tr><th>initial design</th><td>{c.initial} trials ({_e(c.design)}), shared by every policy and "
        "counted in the budget</td></tr>"
        f"<tr><th>budgets</th><td>{', '.join(str(b) for b in c.budgets)} trials</td></tr>"
        f"{rounds}"
        f"<tr><th>target</th><td>simple regret ≤ {_num(study.target)} objective units</td></tr>"
        f"<tr><th>candidate pool</th><td>{c.pool} quasi-random inputs, best few polished</td></tr>"
        f"<tr><th>replicates</th><td>{study.replicates} worlds</td></tr>"
        f"<tr><th>root seed</th><td>{study.seed}</td></tr>"
        f"<tr><th>simlab version</th><td>{_e(version)}</td></tr>"
        "</table></section>"
    )


def _settings(spec):
    """A policy's settings that differ from the rule's defaults, e.g. ``width = 3``."""
    from ..policies import POLICIES

    options = getattr(POLICIES.get(spec.rule), "options", {})
    shown = []
    for key, value in spec.settings:
        if key in options and value == options[key].default:
            continue
        shown.append(f"{key} = {value:g}" if isinstance(value, (int, float)) and not isinstance(value, bool)
                     else f"{key} = {value}")
    return ", ".join(shown) or "defaults"


def _figure(images, stem, alt, caption):
    if stem not in images:
        return ""
    data = base64.b64encode(images[stem]).decode("ascii")
    return (f'<figure id="fig-{stem}"><img src="data:image/png;base64,{data}" alt="{_e(alt)}">'
            f"<figcaption>{caption}</figcaption></figure>")


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
        "<th class='n'>median regret<span class='ci'>[95 % interval]</span></th>"
        "<th class='n'>middle 50 % of campaigns</th>"
        "<th class='n'>within target<span class='ci'>[95 % interval]</span></th>"
        "<th class='n'>failure risk<span class='ci'>[95 % interval]</span></th>"
        "<th class='n'>mean of worst 10 % (CVaR-90)<span class='ci'>95 % lower bound</span></th>"
        f"</tr></thead><tbody>{''.join(rows)}</tbody></table>"
    )


def _trials_range(cells, row, low, high, last):
    """``10–14``, or ``10 to >15`` when the band's far edge lies beyond the simulated trials."""
    ends = []
    for column in (low, high):
        ends.append(cells.span(row, column, "int", missing=f">{last}"))
    dash = " to " if _missing(cells.value(row, high)) or _missing(cells.value(row, low)) else "–"
    return dash.join(ends)


def _reach_table(reach):
    frame = reach.frame
    levels = list(dict.fromkeys(frame["level"].tolist()))
    head = "".join(f"<th class='n'>first trial by which {_fmt_pct(lv)} % had been within target [95 % range]</th>"
                   for lv in levels)
    rows = []
    for policy in dict.fromkeys(frame["policy"].astype(str)):
        cells = []
        for lv in levels:
            i = reach.row(policy=policy, level=lv)
            last = int(reach.value(i, "last_trial"))
            if _missing(reach.value(i, "trials")):
                cells.append(f"<td class='n'>{reach.span(i, 'trials', 'int', missing='not reached')} "
                             f"(within {last})</td>")
            else:
                cells.append(f"<td class='n'>{reach.span(i, 'trials', 'int')} "
                             f"[{_trials_range(reach, i, 'trials_low', 'trials_high', last)}]</td>")
        first = reach.row(policy=policy, level=levels[0])
        rows.append(f"<tr><td>{reach.text(first, 'policy')}</td>{''.join(cells)}</tr>")
    return (f"<table><thead><tr><th>policy</th>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>")


def _pairwise_table(pairs):
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
        "<table><thead><tr><th>policy A</th><th>policy B</th>"
        "<th class='n'>A wins<span class='ci'>[95 % interval]</span></th>"
        "<th class='n'>median regret A − B<span class='ci'>[95 % interval]</span></th><th>favoured</th>"
        "<th class='n'>sign test p (Holm)</th><th class='n'>Wilcoxon p (Holm)</th>"
        "<th class='n'>only A / only B miss</th><th class='n'>McNemar p (Holm)</th></tr></thead>"
        f"<tbody>{''.join(rows)}</tbody></table>"
    )


def _results(study, summary, reach, pairs, images, success):
    horizon = study.campaign.horizon
    parts = [
        '<section id="results"><h2>3. Results</h2>',
        ("<p>Regret is the shortfall of the recommended setting from the world's best value, in objective "
         "units (0 is perfect). <i>Within target</i> is the share of campaigns whose recommendation after "
         "the budget's last trial is within the target: what a team that stops there would ship. Failure "
         "risk is the rest, the share still above the target when the budget is spent. Intervals are 95 % "
         "intervals of the simulation's own uncertainty (a finite number of worlds); they do not cover "
         "doubts about the prior. They are built to hold at the study's size: the median's from order "
         "statistics (binomial, distribution-free), the shares' exact (Clopper–Pearson). For the mean of "
         "the worst 10 % only a lower bound is given (distribution-free, from the Dvoretzky–Kiefer–Wolfowitz "
         "inequality; Thomas &amp; Learned-Miller 2019): no method gives an upper bound that holds without "
         "knowing the largest possible regret, which these worlds do not have. The tail may be worse than "
         "the figure shown; it is at least as bad as the bound.</p>"),
        "<h3>Regret, within-target share and failure risk at each budget</h3>",
        _summary_table(study, summary),
        _figure(images, "regret", "Median regret against trial for each policy, log scale",
                "Median regret of the recommendation after each trial (line) and the middle 50 % of campaigns "
                "(band). Dotted lines mark the budgets, the dashed line the target. The initial design is "
                "shared, so all policies coincide there."),
        (_figure(images, "regret_rounds", "Median regret against round for each policy, log scale",
                 f"The same after each round of {study.campaign.batch} trials evaluated together: when a round "
                 "takes a week, this is the calendar a team lives by.") if "regret_rounds" in images else ""),
        _figure(images, "failure_risk", "Failure risk against budget with intervals",
                "Share of campaigns that end above the target at each budget, with 95 % Clopper–Pearson "
                "intervals; points are shifted sideways so that intervals do not overlap."),
        _figure(images, "within_target", "Share of campaigns within target after each trial",
                "Share of campaigns whose recommendation after each trial is within the target, with its "
                "95 % Clopper–Pearson band: the quantity budgets are planned on. It need not rise with every "
                "trial: a recommendation can get worse again. Dotted lines mark the study's budgets, the "
                f"dashed line the requested success level ({_fmt_pct(success)} %)."),
        _figure(images, "final_regret", "Regret of every campaign at the largest budget",
                f"Regret of every simulated campaign after {horizon} trials: the box spans the middle 50 %, "
                "each dot is one world. A long right tail is the risk a median hides."),
        "<h3>First passage (descriptive only)</h3>",
        ("<p>The first trial at which a campaign's recommendation was within the target. A real campaign "
         "cannot observe this (it does not know its regret), and its recommendation can get worse again "
         "afterwards, so these numbers are <b>not budgets</b>: budgets come from the share within target "
         "after the budget's last trial (section “Budget plan”). Campaigns never within target in the "
         "simulated trials are censored (Kaplan–Meier).</p>"),
        _reach_table(reach),
        _figure(images, "trials_to_target", "Share of campaigns that had been within target by each trial",
                "First passage: Kaplan–Meier share of campaigns whose recommendation had been within the "
                "target at some trial so far, with its 95 % band (exact binomial while no campaign is "
                "censored); never below the within-target share. The dashed line is the requested success "
                f"level ({_fmt_pct(success)} %)."),
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
            _pairwise_table(pairs),
            _figure(images, "win_rates", "Pairwise win-rate matrix",
                    "Share of worlds where the row policy ends with lower regret than the column policy; "
                    "a star marks a Holm-adjusted sign-test p below 0.05 (wins against losses, ties left out)."),
        ]
    parts.append(_figure(
        images, "snapshot", "Campaign snapshot of one replicate",
        "One replicate after its initial design (and any past trials): the model's mean and 95 % band for "
        "the objective, the "
        "hidden true world (dashed), each policy's acquisition scaled to 0–1, the next input each policy "
        "would choose, and where posterior function samples put the best input. "
        + ("With more than one input this is a slice through the current recommendation along the first "
           "input; trials elsewhere are drawn at their coordinate on it. " if study.space.dim > 1 else "")
        + ("The model shown is the study's stated belief, before any refit." if getattr(study, "refit_every", 0)
           else "")))
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
             "<h3>Failure risk at each budget</h3>", f'<ul class="choice">{"".join(items)}</ul>']
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
                 f"median regret of {choice.sig(i, 'leader_value', 'leader_low', 'leader_high')} objective "
                 f"units after {horizon} trials; the runner-up, {runner}, "
                 f"{choice.sig(i, 'runner_up_value', 'runner_up_low', 'runner_up_high')}.")
        elif attitude == _ATTITUDE_FAILURE:
            s = (f"<b>If missing the target is what must be avoided</b> (lowest failure risk): with "
                 f"{horizon} trials, {leader} misses the target in "
                 f"{choice.pct(i, 'leader_value', 'leader_low', 'leader_high')} of simulated campaigns; "
                 f"{runner} in {choice.pct(i, 'runner_up_value', 'runner_up_low', 'runner_up_high')}.")
        elif attitude == _ATTITUDE_TRIALS:
            if _missing(choice.value(i, "leader")):
                s = (f"<b>If trials are what is scarce</b> (fewest trials for {_fmt_pct(success)} % success): "
                     f"at no simulated budget up to {horizon} trials do {_fmt_pct(success)} % of any policy's "
                     "campaigns end within the target.")
                sentences.append(f"<li>{s} {choice.text(i, 'evidence')}.</li>")
                continue
            s = (f"<b>If trials are what is scarce</b> (fewest trials for {_fmt_pct(success)} % of campaigns "
                 f"to end within the target): {leader} needs {_choice_trials(choice, i, 'leader', horizon)}; "
                 f"{runner} needs {_choice_trials(choice, i, 'runner_up', horizon)}.")
        else:
            s = f"<b>{_e(attitude)}</b> ({choice.text(i, 'criterion')}): {leader}; runner-up {runner}."
        sentences.append(f"<li>{s}{_lead_sentence(choice, i)}</li>")
    parts.append(f'<ul class="choice">{"".join(sentences)}</ul>')
    parts.append(_clear_rule(study, success))
    parts.append("</section>")
    return "".join(parts)


def _clear_rule(study, success):
    """What "clear" means in the choice table, with the study's own thresholds."""
    level = 0.05 / len(choice.ATTITUDES)
    return (
        "<p>“Clear” needs the leader to beat every other policy on the paired replicates, by a margin that "
        "matters. The three attitudes read the same campaigns, so they share one 5 % error budget "
        f"(Bonferroni): each needs a Holm-adjusted p below {level:.2g}, and the budget plan's bands are "
        f"widened to {100 * (1 - level):.1f} % for the trials attitude. With policies that are really equally "
        "good, some “clear” lead then appears in at most about 5 % of studies. On top of that, for the typical "
        "outcome the 95 % interval of the median paired regret difference must lie beyond "
        f"<b>{_num(study.lead_difference)}</b> objective units (<code>[target] difference</code>), and for "
        "failure risk the 95 % interval of the paired difference in failure shares must lie beyond "
        f"{_num(100 * (1 - success) / 10)} percentage points (a tenth of the {_fmt_pct(1 - success)} % failure "
        "risk accepted); for trials the ranges must be apart, i.e. by at least one whole trial. Otherwise the "
        "report says “tie” and gives the reason: more replicates may separate the policies, the difference may "
        "be too small to act on, or they may be equally good.</p>"
    )


def _choice_trials(choice, i, who, horizon):
    value = choice.value(i, f"{who}_value")
    if _missing(value):
        return (f"{choice.span(i, f'{who}_value', 'int', missing=f'more than {horizon}')} trials "
                "(not reached within the simulated budget)")
    return (f"{choice.span(i, f'{who}_value', 'int')} trials (95 % range "
            f"{_trials_range(choice, i, f'{who}_low', f'{who}_high', horizon)})")


def _plan_section(study, plan, success):
    frame = plan.frame
    rows = []
    for i in range(len(frame)):
        last = int(plan.value(i, "last_trial"))
        if _missing(plan.value(i, "budget")):
            budget = f"{plan.span(i, 'budget', 'int', missing='not reached')}"
            span = "—"
            share = (f"{plan.pct(i, 'share', 'share_low', 'share_high')} after trial {last}")
            stays = "—"
        else:
            budget = plan.span(i, "budget", "int")
            span = _trials_range(plan, i, "budget_optimistic", "budget_conservative", last)
            share = plan.pct(i, "share", "share_low", "share_high")
            stays = (f"not held: below again by trial {last}" if _missing(plan.value(i, "budget_sustained"))
                     else plan.span(i, "budget_sustained", "int"))
        rows.append(f"<tr><td>{plan.text(i, 'policy')}</td><td class='n'>{budget}</td><td class='n'>{span}</td>"
                    f"<td class='n'>{share}</td><td class='n'>{stays}</td><td>{plan.text(i, 'status')}</td></tr>")
    aware = [str(p) for p, a in zip(frame["policy"], frame.get("horizon_aware", [False] * len(frame))) if a]
    horizon_note = ""
    if aware:
        budgets = ", ".join(str(b) for b in study.campaign.budgets)
        horizon_note = (
            f"<p>{_e(', '.join(aware))} plan{'s' if len(aware) == 1 else ''} ahead for the budget, so "
            f"{'it was' if len(aware) == 1 else 'they were'} replayed once per study budget ({budgets}). "
            "At those budgets the share comes from the campaign planned for exactly that budget; at a trial "
            "between them, from the campaign planned for the next larger budget, stopped early, which a team "
            "planning that smaller budget would not run. Prefer a budget the study simulated.</p>")
    return (
        f'<section id="budget-plan"><h2>5. Budget plan</h2>'
        f"<p>The smallest budget at which at least {_fmt_pct(success)} % of simulated campaigns end within the "
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


def _limits(study):
    belief_note = ""
    if study.world.prior is not None and study.belief == study.world.prior:
        belief_note = ("<li><b>The model starts exactly right here.</b> The campaigns' model starts as the prior "
                       "the worlds came from; a real campaign's model is always somewhat wrong, so real regret "
                       "is usually worse. Run the study again with a different <code>[belief]</code> to see "
                       "how much.</li>")
    return (
        '<section id="limits"><h2>6. What the simulation does not cover</h2><ul>'
        "<li><b>The prior may be wrong.</b> Every number above is about objectives drawn from the stated "
        "prior (or the stated test function). If the real objective is rougher, smoother, noisier or shaped "
        "differently, the ranking of policies and the budgets can change.</li>"
        + belief_note
        + _noise_limit(study.world)
        + "<li><b>Safety constraints are not modelled.</b> Every input in the box is assumed safe to run; "
        "limits on temperature, pressure, dose or any other hazard are not part of the simulation, and "
        + ("trials fail only at random, never because of the setting chosen."
           if getattr(study.world, "lost", 0.0) else "every trial is assumed to return a measurement.")
        + "</li>"
        + ("<li><b>Refits follow one recipe.</b> The model is refitted by maximum likelihood on a fixed "
           "schedule; a team that refits differently, or by judgement, may see different campaigns.</li>"
           if getattr(study, "refit_every", 0) else
           "<li><b>The model is not refitted.</b> Its hyperparameters stay fixed during a campaign; a real "
           "campaign that re-estimates them may behave differently, especially early.</li>")
        + "<li><b>Intervals are Monte Carlo uncertainty only.</b> They shrink with more replicates; they say "
        "nothing about whether the assumptions hold.</li>"
        "</ul></section>"
    )


def _noise_limit(w):
    kind = getattr(w, "noise_kind", "gaussian")
    if kind == "gaussian" and not getattr(w, "noise_growth", 0.0):
        return ("<li><b>Noise is Gaussian with a fixed standard deviation.</b> Outliers, drift of equipment or "
                "materials over the campaign, and noise that depends on the setting are not modelled.</li>")
    return (f"<li><b>The noise model is the one stated</b> ({_noise_words(w)}). Drift of equipment or "
            "materials over the campaign, and other noise shapes, are not modelled.</li>")


def _cautions():
    return (
        '<section id="cautions"><h2>7. Cautions</h2><div class="caution">'
        "<p>This report comes from simulation. It can help choose a policy and argue for a budget; it does "
        "not show that any trial is safe. Where trials can hurt people, animals or the environment — for "
        "example clinical dosing, chemical processes at temperature or pressure, or field releases — a "
        "simulated recommendation is no substitute for the safety case: follow local codes and "
        "regulations, obtain ethics review where it applies, and rely on licensed professional practice. "
        "Never let a policy propose a trial outside the limits those set, and keep a qualified person "
        "responsible for approving each trial.</p></div></section>"
    )


def _files_section(has_pairs, has_figures, has_sweep=False):
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
    if has_sweep:
        files += [(SWEEP_SUMMARY, "failure risk and median regret per policy, budget and cell of the sweep"),
                  (SWEEP_RANKING, "policies ranked by their worst shortfall against each cell's best policy "
                                  "(minimax regret), with the raw worst cell")]
    if has_figures:
        files.append((f"{FIGURES}/", "every figure as PNG and SVG"))
    items = "".join(f"<li><code>{_e(name)}</code>: {_e(what)}</li>" for name, what in files)
    return ('<section id="files"><h2>8. Files next to this report</h2>'
            "<p>Every number in this report is read from these files, rounded for display.</p>"
            f"<ul>{items}</ul></section>")
