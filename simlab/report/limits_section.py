"""Limits and failed trials, for the results section: what the study limits, how many trials break a
limit or fail per campaign, how often the recommendation breaks a limit at each budget, and the caution."""

from __future__ import annotations

__all__ = ["limits_section", "limit_title"]

import numpy as np

from ..evidence.harm import FEW
from .cells import escape, fmt_pct
from .files import LIMITS, SUMMARY


def limit_title(study):
    """The subsection's heading: "Limits and failed trials", or the half the study has."""
    if study.limits and study.world.fails_where is not None:
        return "Limits and failed trials"
    return "Limits" if study.limits else "Failed trials"


def _what(study):
    """The study's limits and hidden failures in words (settings of the study file, not results)."""
    parts = []
    if study.limits:
        named = ", ".join(f"<b>{escape(limit.words())}</b>" for limit in study.limits)
        several = len(study.limits) > 1
        parts.append(
            f"The study sets {len(study.limits)} limit{'s' if several else ''} (<code>[[limit]]</code>): "
            f"{named}, {'each ' if several else ''}a quantity measured with every trial and drawn, for each world, "
            "from its own prior. A trial <i>breaks a limit</i> when its true value of a limited quantity lies "
            "beyond the bound.")
    fails = study.world.fails_where
    if fails is not None:
        parts.append(
            f"In about {fmt_pct(fails.share)} % of the space, a region drawn for each world and unknown to the "
            "campaign, a trial <i>fails</i> (<code>[world] fails_where</code>): it spends its place in the budget "
            "and returns nothing, so it breaks no limit either.")
    where = " or lies where trials fail" if fails is not None else ""
    parts.append(
        f"A recommendation <i>breaks a limit</i> when the setting the campaign would ship breaks one{where}: that "
        "campaign has failed at that budget, whatever its regret, and its regret counts as the world's worst "
        f"regret among settings that break no limit (<code>{SUMMARY}</code>).")
    return " ".join(parts)


def _best_and_next(cells, rows, column, low, high, kind, per):
    """The policy lowest in `column` among `rows` and the next one, with their values and intervals
    ("EI (0.4 [0–1.9] per campaign), then Random (2.0 [1.3–3.1])")."""
    frame = cells.frame
    ranked = sorted(rows, key=lambda i: (float(frame.at[i, column]), i))
    show = (lambda i: cells.pct(i, column, low, high)) if kind == "pct" else (lambda i: cells.sig(i, column, low, high))
    text = f"{cells.text(ranked[0], 'policy')} ({show(ranked[0])} {per})"
    if len(ranked) > 1:
        text += f", then {cells.text(ranked[1], 'policy')} ({show(ranked[1])})"
    return text


def limits_section(study, limits):
    """The subsection on limits and failed trials (HTML); empty unless the study is constrained.

    Parameters
    ----------
    study : Study
    limits : Cells or None
        ``limits.csv`` (`simlab.evidence.limits.limit_table`) as tagged cells.
    """
    if limits is None or not study.constrained:
        return ""
    frame = limits.frame
    asked = frame["study_budget"].to_numpy(dtype=bool)
    horizon = study.campaign.horizon
    last = [int(i) for i in np.flatnonzero(asked & (frame["budget"].to_numpy() == horizon))]
    if not last:
        return ""
    breaks, fails = bool(study.limits), study.world.fails_where is not None
    if not (frame["rec_breaks"].to_numpy()[last] > 0).any():
        # nobody's recommendation broke a limit: a ranking of zeros would read as a lead
        worst = max(last, key=lambda i: float(frame.at[i, "rec_breaks_high"]))
        lead = [f"<b>After {horizon} trials</b>, no policy's recommendation broke a limit in any simulated campaign "
                f"(for any policy, at most {limits.span(worst, 'rec_breaks_high', 'pct')} % of campaigns would, the "
                "upper end of the 95 % interval)"]
    else:
        lead = [f"<b>After {horizon} trials</b>, the recommendation breaks a limit least often with "
                + _best_and_next(limits, last, "rec_breaks_share", "rec_breaks_low", "rec_breaks_high", "pct",
                                 "of campaigns")]
    if breaks:
        lead.append("fewest trials break a limit with "
                    + _best_and_next(limits, last, "breaks_mean", "breaks_low", "breaks_high", "sig", "per campaign"))
    if fails:
        lead.append("fewest trials fail with "
                    + _best_and_next(limits, last, "failed_mean", "failed_low", "failed_high", "sig", "per campaign"))
    sentence = "<p>" + "; ".join(lead) + " (95 % intervals).</p>"

    head = ["<th>policy</th>"]
    if breaks:
        head += ["<th class='n'>trials that break a limit, per campaign<span class='ci'>[95 % interval]</span></th>",
                 "<th class='n'>of them after the design<span class='ci'>[95 % interval]</span></th>"]
    if fails:
        head += ["<th class='n'>failed trials per campaign<span class='ci'>[95 % interval]</span></th>",
                 "<th class='n'>of them after the design<span class='ci'>[95 % interval]</span></th>"]
    head.append("<th class='n'>campaigns whose recommendation breaks a limit<span class='ci'>[95 % interval]</span></th>")
    body = []
    for budget in study.campaign.budgets:
        body.append(f'<tr class="group"><td colspan="{len(head)}">after {budget} trials</td></tr>')
        for i in np.flatnonzero(asked & (frame["budget"].to_numpy() == budget)):
            i = int(i)
            cells = [f"<td>{limits.text(i, 'policy')}</td>"]
            if breaks:
                cells += [f"<td class='n'>{limits.sig(i, 'breaks_mean', 'breaks_low', 'breaks_high', stacked=True)}</td>",
                          f"<td class='n'>{limits.sig(i, 'own_breaks_mean', 'own_breaks_low', 'own_breaks_high', stacked=True)}</td>"]
            if fails:
                cells += [f"<td class='n'>{limits.sig(i, 'failed_mean', 'failed_low', 'failed_high', stacked=True)}</td>",
                          f"<td class='n'>{limits.sig(i, 'own_failed_mean', 'own_failed_low', 'own_failed_high', stacked=True)}</td>"]
            cells.append(f"<td class='n'>{limits.pct(i, 'rec_breaks_share', 'rec_breaks_low', 'rec_breaks_high', stacked=True)}</td>")
            body.append(f"<tr>{''.join(cells)}</tr>")
    counted = (
        f"Trials are counted per campaign over its first trials up to each budget, the shared initial design of "
        f"{study.campaign.initial} included (every policy runs it), and separately over the policy's own trials "
        "after the design; past trials never count. They also count as harmful trials (“Harmful trials” above, "
        "and the attitude “fewest harmful trials” in “The choice”). Campaigns are the independent units: means "
        "have Student t intervals over campaigns, corrected for skewness (Hall 1992; where fewer than "
        f"{FEW} campaigns had such a trial, the betting interval of Waudby-Smith &amp; Ramdas 2024, which holds "
        "whatever the distribution but is wide), shares exact Clopper–Pearson intervals "
        f"(<code>{LIMITS}</code>).")
    fails_words = ""
    if fails:
        fails_words = (f"; the failing region (about {fmt_pct(study.world.fails_where.share)} % of the space) is "
                       "drawn the same way, from a prior whose lengthscale the study chose")
    return "".join([
        f'<h3 id="limit-breaks">{limit_title(study)}</h3>',
        f"<p>{_what(study)}</p>",
        sentence,
        f"<table><thead><tr>{''.join(head)}</tr></thead><tbody>{''.join(body)}</tbody></table>",
        f"<p>{counted}</p>",
        ('<div class="caution" id="limits-caution"><p><b>Limits are only as good as their priors.</b> Each '
         "limited quantity here is simulated: drawn for every world from the prior the study gives it, "
         f"independently of the objective{fails_words}. Where the real quantity is rougher, larger, closer to its "
         "bound or tied to the objective, real campaigns will break limits more often than these numbers say, and "
         "a limit the study does not state is not checked at all. These counts compare policies; they do not show "
         "that any trial or setting is safe. That belongs to the site's safety review, its permits and local "
         "codes, and to the people licensed to run the process; keep a qualified person responsible for "
         "approving each trial.</p></div>"),
    ])
