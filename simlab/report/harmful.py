"""Harmful trials, for the results section: the floor (and, in a study with limits, breaking a limit or
failing), a table per policy at the largest budget, the policy that does least harm in one sentence,
and the cautions."""

from __future__ import annotations

__all__ = ["harm_section", "harm_words"]

import numpy as np

from ..evidence.harm import FEW
from .cells import escape, number, unit_words
from .files import HARM


def harm_words(study, *, html=True):
    """What makes a trial harmful in `study`, as a clause for the page: "its true value is above the
    floor of 0.5 MPa, it breaks a limit (viscosity below 40) or it fails (...)". With ``html=False``
    a short plain-text form for a figure's axis: "true value above 0.5 MPa, breaks a limit or fails"."""
    worse = "below" if study.goal == "maximize" else "above"
    if not html:
        parts = ([f"true value {worse} {study.floor:g} {study.units or 'objective units'}"]
                 if study.floor is not None else [])
        parts += ["breaks a limit"] * bool(study.limits) + ["fails"] * (study.world.fails_where is not None)
    else:
        parts = ([f"its true value is {worse} the floor of {number(study.floor)} {unit_words(study, study.floor)}"]
                 if study.floor is not None else [])
        if study.limits:
            parts.append(f"it breaks a limit ({escape('; '.join(limit.words() for limit in study.limits))})")
        if study.world.fails_where is not None:
            parts.append("it fails (spends its place in the budget and returns nothing)")
    return parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " or " + parts[-1]


def harm_section(study, harm, figures_html, choice=None, attitude=None):
    """The subsection "Harmful trials" (HTML); empty without ``[target] floor`` in a study without
    limits or hidden failures.

    Parameters
    ----------
    study : Study
    harm : Cells or None
        ``harm.csv`` (`simlab.evidence.harm.harm_table`) as tagged cells.
    figures_html : str
        The figures the page shows in the "harm" section.
    choice : Cells, optional
        ``choice.csv``, for the verdict of the attitude "fewest harmful trials".
    attitude : str, optional
        That attitude's name (`simlab.evidence.choice.HARM_ATTITUDE`).
    """
    if harm is None or (study.floor is None and not study.constrained):
        return ""
    frame = harm.frame
    horizon = study.campaign.horizon
    rows = [int(i) for i in np.flatnonzero(frame["budget"].to_numpy() == horizon)]
    if not rows:
        return ""
    worse = "below" if study.goal == "maximize" else "above"
    floor = f"{number(study.floor)} {unit_words(study, study.floor)}" if study.floor is not None else ""
    body = "".join(
        f"<tr><td>{harm.text(i, 'policy')}</td>"
        f"<td class='n'>{harm.sig(i, 'harmful_mean', 'harmful_low', 'harmful_high', stacked=True)}</td>"
        f"<td class='n'>{harm.sig(i, 'own_harmful_mean', 'own_harmful_low', 'own_harmful_high', stacked=True)}</td>"
        f"<td class='n'>{harm.pct(i, 'harmed_share', 'harmed_low', 'harmed_high', stacked=True)}</td>"
        f"<td class='n'>{harm.pct(i, 'own_harmed_share', 'own_harmed_low', 'own_harmed_high', stacked=True)}</td>"
        f"<td class='n'>{harm.sig(i, 'shortfall_mean', 'shortfall_low', 'shortfall_high', stacked=True)}</td></tr>"
        for i in rows)
    ranked = sorted(rows, key=lambda i: (float(frame.at[i, "harmful_mean"]), float(frame.at[i, "shortfall_mean"]), i))
    best = ranked[0]
    sentence = (f"<p><b>Least harm: {harm.text(best, 'policy')}</b> runs "
                f"{harm.sig(best, 'harmful_mean', 'harmful_low', 'harmful_high')} harmful trials per campaign in "
                f"{horizon} trials (95 % interval)")
    if len(ranked) > 1:
        nxt = ranked[1]
        sentence += (f", against {harm.sig(nxt, 'harmful_mean', 'harmful_low', 'harmful_high')} for "
                     f"{harm.text(nxt, 'policy')}, the next")
    if choice is not None and attitude is not None and attitude in set(choice.frame["attitude"]):
        j = choice.row(attitude=attitude)
        sentence += f"; its lead on paired replicates is {choice.text(j, 'lead')} (section “The choice”)"
    sentence += ".</p>"
    if study.constrained:
        what = (f"{harm_words(study)}: for a team whose every trial is a product, a trial that fails specification or cannot be used")
        against = (f"against a floor of {floor} and the limits that the study chose" if floor else
                   "against the limits that the study chose")
        feasible = (" A failed trial has no true value and adds nothing to the shortfall; the world's best is "
                    "its best value among inputs that break no limit, so a trial that breaks one can fall short "
                    "by less than nothing.")
    else:
        what = (f"its true value is {worse} the floor of {floor} (<code>[target] floor</code>): for a team whose "
                "every trial is a product, a trial that fails specification")
        against, feasible = f"against a floor of {floor} that the study chose", ""
    return "".join([
        '<h3 id="harm">Harmful trials</h3>',
        (f"<p>A trial is <i>harmful</i> when {what}. Counted per campaign over its {horizon} trials, the shared initial design of "
         f"{study.campaign.initial} included (every policy runs it, so it adds the same to each), and separately "
         "over the policy's own trials after the design; past trials never count, and a lost trial counts (it "
         "was run). <i>Shortfall</i> is the sum over the same trials of how far each fell short of the world's "
         f"best, in {unit_words(study)}: the cost inside the campaign, where regret is the cost of what is "
         f"shipped after it.{feasible} Campaigns are the independent units: means have Student t intervals over "
         f"campaigns, corrected for skewness (Hall 1992; where fewer than {FEW} campaigns had a harmful trial, the betting interval of "
         "Waudby-Smith &amp; Ramdas 2024 instead, which holds whatever the distribution but is wide), shares "
         f"exact Clopper–Pearson intervals (<code>{HARM}</code>).</p>"),
        sentence,
        ("<table><thead><tr><th>policy</th>"
         "<th class='n'>harmful trials per campaign<span class='ci'>[95 % interval]</span></th>"
         "<th class='n'>of them after the design<span class='ci'>[95 % interval]</span></th>"
         "<th class='n'>campaigns with any harmful trial<span class='ci'>[95 % interval]</span></th>"
         "<th class='n'>with any after the design<span class='ci'>[95 % interval]</span></th>"
         f"<th class='n'>shortfall per campaign ({unit_words(study)})<span class='ci'>[95 % interval]</span></th>"
         f"</tr></thead><tbody>{body}</tbody></table>"),
        figures_html,
        ('<div class="caution" id="harm-caution"><p><b>Not a safety assessment.</b> Harmful trials here are '
         f"counted on simulated worlds drawn from the study's prior, {against}; the real process may be worse "
         "where the prior is wrong, and a trial can harm in ways no "
         "single objective measures. Do not use these numbers to decide whether a trial is safe to run: that "
         "belongs to the site's safety review, its permits and local codes, and to the people licensed to "
         "run the process.</p></div>"),
    ])
