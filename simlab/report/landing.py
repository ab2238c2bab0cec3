"""Where trials land, for the results section: the placement table and a sentence for every policy that
spends more than a third of its own trials on the boundary of the box."""

from __future__ import annotations

__all__ = ["BOUNDARY_HEAVY", "placement_section"]

from .cells import fmt_pct
from .files import PLACEMENT

# More than this share of a policy's own trials on the boundary earns a sentence (the issue's
# "more than a third"; a judgement, not a published constant).
BOUNDARY_HEAVY = 1.0 / 3.0


def placement_section(study, placement, figures_html):
    """The subsection "Where the policies put their trials" (HTML).

    Parameters
    ----------
    study : Study
    placement : Cells
        ``placement.csv`` (`simlab.evidence.placement.placement_table`) as tagged cells.
    figures_html : str
        The figures the page shows in the "placement" section.
    """
    space = study.space
    if space.library is not None:         # no boundary to report (evidence.placement.box_view)
        return ("<h3>Where the policies put their trials</h3><p>Every trial is one of the library's rows, the "
                "allowed trials, so no share at the ends of a column is reported: a row there is no sign that the "
                "search space is drawn too small. The figure shows how each policy spread its own trials over "
                "the columns.</p>" + figures_html)
    bounded = [j for j in space.numeric if j not in space.discrete]   # inputs with a boundary
    if not bounded:
        return ("<h3>Where the policies put their trials</h3><p>No input has a range (every one is stepped or "
                "categorical), so no boundary share is reported; the figure shows how each policy spread its own "
                "trials over the allowed values.</p>" + figures_html)
    frame = placement.frame
    band = fmt_pct(float(frame["band"].iloc[0])) if len(frame) else "1"
    rows, heavy = [], []
    for i in range(len(frame)):
        if int(frame.at[i, "trials"]) == 0:
            continue
        rows.append(f"<tr><td>{placement.text(i, 'policy')}</td>"
                    f"<td class='n'>{placement.span(i, 'trials', 'int')}</td>"
                    f"<td class='n'>{placement.pct(i, 'boundary_share', 'boundary_worlds_low', 'boundary_worlds_high', stacked=True)}</td>"
                    f"<td class='n'>{placement.pct(i, 'corner_share', 'corner_worlds_low', 'corner_worlds_high', stacked=True)}</td></tr>")
        if float(frame.at[i, "boundary_share"]) > BOUNDARY_HEAVY:
            heavy.append(i)
    if not rows:
        return ""
    random_edge = 1.0 - (1.0 - 2.0 * float(frame["band"].iloc[0])) ** len(bounded)
    which = ("on any input" if len(bounded) == space.dim else
             "on any input with a range (" + ", ".join(space.names[j] for j in bounded) + "; stepped and "
             "categorical inputs have no boundary, and a log-scaled one is measured in its logarithm)")
    parts = [
        "<h3>Where the policies put their trials</h3>",
        (f"<p>Of the trials each policy chose itself (after the shared initial design; past trials left out), the "
         f"share <i>on the boundary</i> of the search box — within {band} % of an input's range of its low or "
         f"high bound, {which} — and <i>in a corner</i> — that close to a bound on every such input. Uniformly "
         f"random trials would land on the boundary {fmt_pct(random_edge)} % of the time. The intervals allow "
         "for campaigns that differ from one another: a campaign that goes to the edge tends to stay there, so "
         "the trials are not independent. They are Clopper–Pearson intervals at the effective number of "
         "trials (Korn &amp; Graubard 1998); the plain intervals over trials, several times narrower, are in "
         f"<code>{PLACEMENT}</code> too.</p>"),
        ("<table><thead><tr><th>policy</th><th class='n'>own trials</th>"
         "<th class='n'>on the boundary<span class='ci'>[95 % interval]</span></th>"
         "<th class='n'>in a corner<span class='ci'>[95 % interval]</span></th>"
         f"</tr></thead><tbody>{''.join(rows)}</tbody></table>"),
    ]
    if heavy:
        said = "".join(
            f"<li><b>{placement.text(i, 'policy')}</b> spends "
            f"{placement.pct(i, 'boundary_share', 'boundary_worlds_low', 'boundary_worlds_high')} of its own trials on the "
            f"boundary and {placement.pct(i, 'corner_share', 'corner_worlds_low', 'corner_worlds_high')} in corners.</li>"
            for i in heavy)
        who = "These policies spend more than a third of their" if len(heavy) > 1 else \
            "This policy spends more than a third of its"
        parts.append(
            f'<div class="caution" id="boundary-heavy"><p><b>Trials at the edge of the box.</b> {who} own trials '
            "on the boundary:</p>"
            f"<ul>{said}</ul><p>Model-based rules go to the edges because the model is least sure there. On a "
            "real process the edges of the box are often where equipment, materials or people are at their "
            "limits: check that every setting on the boundary, and every corner, is safe and meaningful to run, "
            "and whether the box is drawn where it should be (an optimum the campaigns keep pressing against "
            "may lie outside it).</p></div>")
    parts.append(figures_html)
    return "".join(parts)
