"""Every figure of the report, one small class each, in the order the page shows them.

A figure declares its file name (``stem``: ``figures/STEM.png`` and ``.svg``), where the page
shows it (``section``), its alt text, whether it applies to a study, its caption, and its one
method, :meth:`Figure.draw`. The report draws every figure of :data:`FIGURES` that applies,
the page places each under its section in registry order, and the results folder counts the
files as simlab's own. Adding a figure is one class here and one line in :data:`FIGURES`
(DEVELOPERS.md shows a worked example). matplotlib is imported only inside ``draw``.
"""

from __future__ import annotations

__all__ = ["Figure", "FigureInput", "FIGURES", "SECTIONS"]

from dataclasses import dataclass
from typing import Any, ClassVar

import pandas as pd

from .cells import fmt_pct, number, unit_label, unit_words
from .files import HARM, PAIRWISE, PLACEMENT, STOPPING, SUMMARY, SWEEP_SUMMARY, TRIALS_TO_TARGET, WITHIN_TARGET

# Where the page shows figures: after the budget table, after the first-passage table, after
# the pairwise table, after the table of where trials land, after the harmful trials (with a
# floor), at the end of the results, in the sweep's own section, and in "When to stop".
SECTIONS = ("results", "first_passage", "pairwise", "placement", "harm", "snapshot", "sweep", "stopping")


@dataclass(frozen=True)
class FigureInput:
    """What a figure may draw from: the study, its traces, the decision tables, the policies' colours."""

    study: Any
    traces: pd.DataFrame
    tables: dict[str, pd.DataFrame]
    success: float
    seed: int
    colors: dict[str, str]


class Figure:
    """One figure of the report. Subclasses set the class attributes and implement :meth:`draw`."""

    stem: ClassVar[str] = ""
    section: ClassVar[str] = "results"
    alt: ClassVar[str] = ""
    # False: applies() reads only the study and draw() only the study and traces, never the decision
    # tables, so workers may draw the figure while the tables are still being made
    needs_tables: ClassVar[bool] = True
    slow: ClassVar[bool] = False    # about a second or more on the demo: handed to a worker first

    def applies(self, study, tables) -> bool:
        """Whether the study has this figure (default: always)."""
        return True

    def caption(self, study, success) -> str:
        """The caption under the figure (HTML)."""
        raise NotImplementedError

    def draw(self, given: FigureInput):
        """The matplotlib figure."""
        raise NotImplementedError


class RegretFigure(Figure):
    stem, alt = "regret", "Median regret against trial for each policy, log scale"
    needs_tables = False

    def caption(self, study, success):
        return ("Median regret of the recommendation after each trial (line) and the middle 50 % of campaigns "
                "(band). Dotted lines mark the budgets, the dashed line the target. The initial design is "
                "shared, so all policies coincide there.")

    def draw(self, given):
        from ..evidence import metrics
        from . import plots
        s = given.study
        return plots.regret_figure(metrics.regret_curves(given.traces, seed=given.seed), target=s.target,
                                   budgets=s.campaign.budgets, initial=s.campaign.initial, colors=given.colors,
                                   units=unit_label(s))


class RoundsFigure(Figure):
    stem, alt = "regret_rounds", "Median regret against round for each policy, log scale"
    needs_tables = False

    def applies(self, study, tables):
        return study.campaign.batch > 1

    def caption(self, study, success):
        return (f"The same after each round of {study.campaign.batch} trials evaluated together: when a round "
                "takes a week, this is the calendar a team lives by.")

    def draw(self, given):
        """Regret after each round (the last trial of the round)."""
        from ..evidence import metrics
        from . import plots
        s, traces = given.study, given.traces
        q = s.campaign.batch
        ends = traces[(traces["trial"] >= 1) & ((traces["trial"] % q == 0) | (traces["trial"] == s.campaign.horizon))]
        by_round = ends.assign(trial=(ends["trial"] - 1) // q + 1)
        rounds = sorted({-(-b // q) for b in s.campaign.budgets})
        return plots.regret_figure(metrics.regret_curves(by_round, seed=given.seed), target=s.target, budgets=rounds,
                                   colors=given.colors, unit="round", units=unit_label(s),
                                   initial=-(-s.campaign.initial // q) if s.campaign.initial else None)


class FailureFigure(Figure):
    stem, alt = "failure_risk", "Miss risk after each trial with its 95 % band"

    def caption(self, study, success):
        return ("Miss risk after each trial: the share of campaigns whose recommendation after that trial is "
                f"more than the target ({number(study.target)} {unit_words(study, study.target)}) short of the "
                "best, with its 95 % Clopper–Pearson band. It is one minus the within-target share that budgets "
                "are planned on (<code>within_target.csv</code>), and it need not fall with every trial: a "
                "recommendation can get worse again. Dotted lines mark the study's budgets, the dashed line "
                f"the largest miss risk the budget plan accepts ({fmt_pct(1 - success)} %, for "
                f"{fmt_pct(success)} % success). Every policy is drawn at its own trials; line style and marker "
                "tell them apart in black and white.")

    def draw(self, given):
        from . import plots
        s = given.study
        return plots.failure_figure(given.tables[WITHIN_TARGET], success=given.success, budgets=s.campaign.budgets,
                                    initial=s.campaign.initial, target=s.target, units=unit_label(s),
                                    colors=given.colors)


class RetiredFigure(Figure):
    """A figure earlier versions drew: never drawn now, but its files in an older results folder
    are still simlab's own (so ``--fresh`` may remove them rather than refuse the folder)."""

    def __init__(self, stem):
        self.stem = stem

    def applies(self, study, tables):
        return False


class FinalRegretFigure(Figure):
    stem, alt = "final_regret", "Regret of every campaign at the largest budget"
    needs_tables = False

    def caption(self, study, success):
        return (f"Regret of every simulated campaign after {study.campaign.horizon} trials, one dot per world. "
                "The box spans the middle 50 % of campaigns (the quartiles of the results table), the thick line "
                "is the median, and the whiskers reach from the 10th to the 90th percentile: the dots right of "
                "the whisker are the worst 10 % of campaigns, whose mean is the CVaR-90 of the table. A long "
                "right tail is the risk a median hides.")

    def draw(self, given):
        from ..evidence import metrics
        from . import plots
        s = given.study
        final = metrics.regret_at_budget(given.traces, budget=s.campaign.horizon)
        return plots.final_regret_figure(final, target=s.target, budget=s.campaign.horizon, colors=given.colors,
                                         units=unit_label(s))


class FirstPassageFigure(Figure):
    stem, section = "trials_to_target", "first_passage"
    alt = "Share of campaigns that had been within target by each trial"

    def caption(self, study, success):
        return ("First passage: Kaplan–Meier share of campaigns whose recommendation had been within the "
                "target at some trial so far, with its 95 % band (exact binomial while no campaign is "
                "censored); never below the within-target share. The dashed line is the requested success "
                f"level ({fmt_pct(success)} %).")

    def draw(self, given):
        from . import plots
        s = given.study
        return plots.reach_figure(given.tables[TRIALS_TO_TARGET], success=given.success, initial=s.campaign.initial,
                                  target=s.target, units=unit_label(s), colors=given.colors)


class WinRateFigure(Figure):
    stem, section, alt = "win_rates", "pairwise", "Pairwise win-rate matrix"

    def applies(self, study, tables):
        return PAIRWISE in tables

    def caption(self, study, success):
        return ("Share of worlds where the row policy ends with lower regret than the column policy (ties "
                "count half); a star marks a Holm-adjusted sign-test p below 0.05 (wins against losses, ties left out).")

    def draw(self, given):
        from . import plots
        return plots.win_rate_figure(given.tables[PAIRWISE], colors=given.colors)


class PlacementFigure(Figure):
    stem, section, alt = "placement", "placement", "Histograms of each policy's own trials along every input"
    slow = True

    def applies(self, study, tables):
        # no own trials when the initial design uses the whole budget
        return study.campaign.initial < study.campaign.horizon

    def caption(self, study, success):
        space = study.space
        text = ("Where each policy put the trials it chose itself (after the shared initial design, up to "
                f"{study.campaign.horizon} trials, every campaign pooled): one histogram per input, bars of "
                "5 % of the range, height the share of the policy's trials.")
        if space.library is not None:
            return text + (" A categorical column has one bar per level. A library's rows are the allowed "
                           "trials, so nothing is counted at a column's ends.")
        text += (" The dark bar at each end is the share within 1 % of that bound; the numbers are those of the "
                 "table above.")
        if space.kinds:
            text += (" A stepped or categorical input has one bar per allowed value (no bound: the boundary and "
                     "corner shares count the inputs with a range only), and a log-scaled input is binned and "
                     "bounded in its logarithm.")
        return text

    def draw(self, given):
        from ..evidence.placement import BAND, own_trials
        from . import plots
        space = given.study.space
        return plots.placement_figure(own_trials(given.traces), names=space.names, low=space.low, high=space.high,
                                      band=BAND, placement=given.tables.get(PLACEMENT), colors=given.colors,
                                      space=space if space.kinds else None)


class HarmFigure(Figure):
    stem, section = "harm", "harm"
    alt = "Median final regret against harmful trials per campaign, one point per policy"

    def applies(self, study, tables):
        return HARM in tables

    def caption(self, study, success):
        if study.constrained:
            from .harmful import harm_words
            counted = f"a trial is harmful when {harm_words(study)}"
        else:
            counted = f"true value worse than the floor of {number(study.floor)} {unit_words(study)}"
        return (f"Each policy after {study.campaign.horizon} trials: the mean number of harmful trials per "
                f"campaign ({counted}, the "
                "shared initial design included) against the median regret of what it recommends, with the 95 % "
                f"intervals of both (<code>{HARM}</code>, <code>{SUMMARY}</code>). Cautious rules sit to the "
                "left, bold ones lower down; the dashed line is the target.")

    def draw(self, given):
        from . import plots
        s = given.study
        what = None
        if s.constrained:
            from .harmful import harm_words
            what = harm_words(s, html=False)
        return plots.harm_figure(given.tables[HARM], given.tables[SUMMARY], budget=s.campaign.horizon,
                                 target=s.target, floor=s.floor, colors=given.colors, units=unit_label(s), what=what)


class SnapshotFigure(Figure):
    stem, section, alt = "snapshot", "snapshot", "Campaign snapshot of one replicate"
    needs_tables = False
    slow = True

    def applies(self, study, tables):
        # the snapshot shows the next trial after the initial design: none when the design uses the whole budget
        return study.campaign.initial < study.campaign.horizon

    def caption(self, study, success):
        return ("One replicate after its initial design (and any past trials): the model's mean and 95 % band "
                "for the objective, the hidden true world (dashed), each policy's acquisition scaled to 0–1, "
                "the next input each policy would choose, and where posterior function samples put the best "
                "input. "
                + ("With more than one input this is a slice through the current recommendation along the "
                   "first input with a range (the other inputs held at the values in the title): the recommended "
                   "trial lies "
                   "on it, and the other trials, run elsewhere, are drawn in grey at their coordinate on this "
                   "input with the value observed there (projected), so they need not sit near the curves. "
                   if study.space.dim > 1 else "")
                + ("The model shown is the study's stated belief, before any refit." if study.refit_every else "")
                + (" The slice runs between the library's rows: the curves show the belief and the prior's world "
                   "there, but every trial is one of the rows." if study.space.library is not None else ""))

    def draw(self, given):
        from .snapshot import snapshot_figure
        return snapshot_figure(given.study, given.traces, colors=given.colors)


class SweepFigure(Figure):
    stem, section, alt = "sweep", "sweep", "Failure risk over the misspecification grid"

    def applies(self, study, tables):
        return SWEEP_SUMMARY in tables

    def caption(self, study, success):
        return ("Miss risk after the largest budget in each cell of the grid, one panel per policy; the outlined "
                "cell is the study's own belief, and every cell meets the same worlds.")

    def draw(self, given):
        from . import plots
        s = given.study
        return plots.sweep_figure(given.tables[SWEEP_SUMMARY], budget=s.campaign.horizon, target=s.target,
                                  units=unit_label(s), colors=given.colors)


class StoppingFigure(Figure):
    stem, section, alt = "stopping", "stopping", "Trials saved against miss risk at the stop, per policy and stopping rule"

    def applies(self, study, tables):
        return STOPPING in tables

    def caption(self, study, success):
        return ("Each filled point is one policy stopped by one rule (marker), on the same worlds: across, the "
                "median number of trials it saves against the full budget of "
                f"{study.campaign.horizon} (order-statistic 95 % interval); up, the miss risk of the recommendation "
                "held when it stops (Clopper–Pearson 95 % interval). The hollow point at 0 is the same policy run to "
                "the full budget; the dashed line is the largest miss risk the budget plan accepts "
                f"({fmt_pct(1 - success)} %). Points far right and low are rules that save trials cheaply "
                "(<code>stopping.csv</code>).")

    def draw(self, given):
        from . import plots
        s = given.study
        return plots.stopping_figure(given.tables[STOPPING], success=given.success, target=s.target,
                                     units=unit_label(s), colors=given.colors)


FIGURES: dict[str, Figure] = {f.stem: f for f in (
    RegretFigure(), RoundsFigure(), FailureFigure(), FinalRegretFigure(),
    FirstPassageFigure(), WinRateFigure(), PlacementFigure(), HarmFigure(), SnapshotFigure(), SweepFigure(), StoppingFigure(),
    # simlab 0.4 drew the within-target share as a figure of its own: the miss-risk figure is its complement
    RetiredFigure("within_target"),
)}
