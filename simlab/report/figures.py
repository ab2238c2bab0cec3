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

from .cells import fmt_pct, unit_label
from .files import PAIRWISE, PLACEMENT, SUMMARY, SWEEP_SUMMARY, TRIALS_TO_TARGET, WITHIN_TARGET

# Where the page shows figures: after the budget table, after the first-passage table, after
# the pairwise table, after the table of where trials land, at the end of the results, and in
# the sweep's own section.
SECTIONS = ("results", "first_passage", "pairwise", "placement", "snapshot", "sweep")


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
    stem, alt = "failure_risk", "Failure risk against budget with intervals"

    def caption(self, study, success):
        return ("Share of campaigns that end above the target at each budget, with 95 % Clopper–Pearson "
                "intervals; points are shifted sideways so that intervals do not overlap.")

    def draw(self, given):
        from . import plots
        return plots.failure_figure(given.tables[SUMMARY], colors=given.colors)


class WithinTargetFigure(Figure):
    stem, alt = "within_target", "Share of campaigns within target after each trial"

    def caption(self, study, success):
        return ("Share of campaigns whose recommendation after each trial is within the target, with its "
                "95 % Clopper–Pearson band: the quantity budgets are planned on. It need not rise with every "
                "trial: a recommendation can get worse again. Dotted lines mark the study's budgets, the "
                f"dashed line the requested success level ({fmt_pct(success)} %).")

    def draw(self, given):
        from . import plots
        return plots.within_target_figure(given.tables[WITHIN_TARGET], success=given.success,
                                          budgets=given.study.campaign.budgets, colors=given.colors)


class FinalRegretFigure(Figure):
    stem, alt = "final_regret", "Regret of every campaign at the largest budget"

    def caption(self, study, success):
        return (f"Regret of every simulated campaign after {study.campaign.horizon} trials: the box spans the "
                "middle 50 %, each dot is one world. A long right tail is the risk a median hides.")

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
        return plots.reach_figure(given.tables[TRIALS_TO_TARGET], success=given.success, colors=given.colors)


class WinRateFigure(Figure):
    stem, section, alt = "win_rates", "pairwise", "Pairwise win-rate matrix"

    def applies(self, study, tables):
        return PAIRWISE in tables

    def caption(self, study, success):
        return ("Share of worlds where the row policy ends with lower regret than the column policy; "
                "a star marks a Holm-adjusted sign-test p below 0.05 (wins against losses, ties left out).")

    def draw(self, given):
        from . import plots
        return plots.win_rate_figure(given.tables[PAIRWISE], colors=given.colors)


class PlacementFigure(Figure):
    stem, section, alt = "placement", "placement", "Histograms of each policy's own trials along every input"

    def applies(self, study, tables):
        # no own trials when the initial design uses the whole budget
        return study.campaign.initial < study.campaign.horizon

    def caption(self, study, success):
        return ("Where each policy put the trials it chose itself (after the shared initial design, up to "
                f"{study.campaign.horizon} trials, every campaign pooled): one histogram per input, bars of "
                "5 % of the range, height the share of the policy's trials. The dark bar at each end is the "
                "share within 1 % of that bound; the numbers are those of the table above.")

    def draw(self, given):
        from ..evidence.placement import BAND, own_trials
        from . import plots
        space = given.study.space
        return plots.placement_figure(own_trials(given.traces), names=space.names, low=space.low, high=space.high,
                                      band=BAND, placement=given.tables.get(PLACEMENT), colors=given.colors)


class SnapshotFigure(Figure):
    stem, section, alt = "snapshot", "snapshot", "Campaign snapshot of one replicate"

    def applies(self, study, tables):
        # the snapshot shows the next trial after the initial design: none when the design uses the whole budget
        return study.campaign.initial < study.campaign.horizon

    def caption(self, study, success):
        return ("One replicate after its initial design (and any past trials): the model's mean and 95 % band "
                "for the objective, the hidden true world (dashed), each policy's acquisition scaled to 0–1, "
                "the next input each policy would choose, and where posterior function samples put the best "
                "input. "
                + ("With more than one input this is a slice through the current recommendation along the "
                   "first input; trials elsewhere are drawn at their coordinate on it. " if study.space.dim > 1
                   else "")
                + ("The model shown is the study's stated belief, before any refit." if study.refit_every else ""))

    def draw(self, given):
        from .snapshot import snapshot_figure
        return snapshot_figure(given.study, given.traces, colors=given.colors)


class SweepFigure(Figure):
    stem, section, alt = "sweep", "sweep", "Failure risk over the misspecification grid"

    def applies(self, study, tables):
        return SWEEP_SUMMARY in tables

    def caption(self, study, success):
        return "Failure risk after the largest budget in each cell of the grid, one panel per policy."

    def draw(self, given):
        from . import plots
        return plots.sweep_figure(given.tables[SWEEP_SUMMARY], budget=given.study.campaign.horizon,
                                  colors=given.colors)


FIGURES: dict[str, Figure] = {f.stem: f for f in (
    RegretFigure(), RoundsFigure(), FailureFigure(), WithinTargetFigure(), FinalRegretFigure(),
    FirstPassageFigure(), WinRateFigure(), PlacementFigure(), SnapshotFigure(), SweepFigure(),
)}
