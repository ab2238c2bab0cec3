"""Decision files of a study: summary CSVs, figures and one self-contained HTML report."""

from __future__ import annotations

__all__ = ["ReportFiles", "write_outputs", "report_steps"]

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..evidence import choice, compare, frame, metrics, reach
from ..columns import LIMIT_COLUMNS
from ..evidence.harm import harm_per_campaign, harm_table
from ..evidence.limits import limit_table
from ..evidence.placement import box_view, placement_table
from ..replay.store import atomic_write
from .figures import FIGURES as FIGURE_REGISTRY
from .figures import FigureInput
from .files import (BUDGET_PLAN, CHOICE, FIGURES, HARM, LIMITS, PAIRWISE, PLACEMENT, REPORT, STOPPING,
                    STOPPING_CURVES, SUMMARY, SWEEP_RANKING, SWEEP_SUMMARY, TRIALS_TO_TARGET, TRIALS_TO_TARGET_SUMMARY,
                    WITHIN_TARGET, WORLDS)
from .page import render


@dataclass(frozen=True)
class ReportFiles:
    """Paths written by :func:`write_outputs` (None where a file does not apply)."""

    folder: Path
    summary: Path
    trials_to_target: Path
    trials_to_target_summary: Path
    budget_plan: Path
    pairwise: Path | None
    choice: Path | None
    report: Path
    figures: tuple[Path, ...] = field(default=())
    within_target: Path | None = None   # within_target.csv (always written; a default keeps old callers working)
    placement: Path | None = None       # placement.csv (always written; a default keeps old callers working)
    harm: Path | None = None            # harm.csv (only with [target] floor or limits)
    limits: Path | None = None          # limits.csv (only with limits or hidden failures: Study.constrained)
    stopping: Path | None = None        # stopping.csv, only for a study with [[stop]] rules
    stopping_curves: Path | None = None  # stopping_curves.csv, likewise

    def paths(self) -> tuple[Path, ...]:
        """Every file written, CSVs first, then figures, then the report."""
        tables = (self.summary, self.within_target, self.trials_to_target, self.trials_to_target_summary,
                  self.budget_plan, self.pairwise, self.choice, self.placement, self.harm, self.limits,
                  self.stopping, self.stopping_curves)
        return tuple(p for p in tables if p is not None) + self.figures + (self.report,)


def report_steps(*, figures=True):
    """Number of times :func:`write_outputs` calls its `progress` callback."""
    return 9 + (len(FIGURE_REGISTRY) if figures else 0) + 1


# ---------------------------------------------------------------------------
# the entry point
# ---------------------------------------------------------------------------
def write_outputs(folder, study, traces, *, success=0.9, figures=True, seed=0, progress=None, jobs=1):
    """Compute the decision tables of a study and write them, its figures and report.html.

    Parameters
    ----------
    folder : path
        Results folder (created if missing). Existing files of the same names are
        replaced atomically.
    study : Study
        The resolved study the traces come from.
    traces : DataFrame
        Traces of the study (``simlab.run_study(...).traces`` or ``load_results``).
    success : float, default 0.9
        Requested chance of meeting the target, for the budget plan and the choice table.
    figures : bool, default True
        Also draw the figures (PNG and SVG in ``figures/``) and embed them in the report (as SVG).
    seed : int, default 0
        Seed of the bootstrap intervals; the same seed gives the same files.
    progress : callable, optional
        Called with 1 after each step; :func:`report_steps` gives the number of steps
        (e.g. ``progress=tqdm(total=report_steps()).update``). With workers, a figure's step
        comes when its files are written, in the order the workers finish.
    jobs : int, default 1
        Processes that draw and render the figures (-1: every core). With more than one, joblib's
        loky workers (those the replay left running, when there are as many) each draw whole
        figures from the same inputs and hand back their PNG and SVG bytes, which this process
        writes; 1 draws them here, one after another. The files are the same for any value.

    Returns
    -------
    ReportFiles
        Paths of ``summary.csv`` (`simlab.evidence.metrics.budget_summary` over the study's
        budgets), ``within_target.csv`` (`within_target_curves`: the share of campaigns
        whose recommendation after each trial is within target, which budgets are
        planned on), ``budget_plan.csv`` (`budget_plan`), the secondary first-passage
        tables ``trials_to_target.csv`` (`reach_curves`) and ``trials_to_target_summary.csv``
        (`trials_to_target_summary`, median and the success level),
        ``pairwise.csv`` (at the largest budget) and ``choice.csv`` (both only with two
        or more policies), ``harm.csv`` (`simlab.evidence.harm.harm_table`, only with
        ``[target] floor`` or limits: a trial that breaks a limit or fails is harmful too),
        ``limits.csv`` (`simlab.evidence.limits.limit_table`, only for a study with limits or
        hidden failures, at the study's budgets and at the budget each policy's plan books),
        the figures and ``report.html``.

    Notes
    -----
    Every number in report.html is formatted from the same DataFrames that are written
    to the CSV files, and each carries the file, row and column it comes from
    (``data-src``, ``data-row``, ``data-col``), so the report can be checked against
    the files.
    """
    success = frame.check_probability("success", success, closed_high=True)
    if study.constrained and not set(LIMIT_COLUMNS) <= set(traces.columns):
        missing = [c for c in LIMIT_COLUMNS if c not in traces.columns]
        raise ValueError(f"study {study.name!r} has limits or hidden failures, but `traces` lacks the column(s) "
                         f"{missing} that record them")
    folder = Path(folder)
    step = progress if progress is not None else (lambda n: None)
    # with workers, the figures that read no table are drawn while this process makes the tables
    early = _start_early_figures(study, traces, success=success, seed=seed, jobs=jobs) if figures else None
    try:
        tables, paths = _decision_tables(folder, study, traces, success=success, seed=seed, step=step)
    except BaseException:
        _stop_figure_workers(None if early is None else early[1])
        raise

    images, figure_paths = {}, []
    if figures:
        for stem, (png, svg) in _figure_files(folder / FIGURES, study, traces, tables, success=success, seed=seed,
                                              jobs=jobs, step=step, early=early).items():
            figure_paths += [png, svg]
            images[stem] = svg.read_bytes()   # the page embeds the SVG: vector, sharp in print

    text = render(study, tables, images, success=success)
    report = folder / REPORT
    atomic_write(report, lambda p: p.write_text(text, encoding="utf-8"))
    step(1)
    return ReportFiles(
        folder=folder, summary=paths[SUMMARY], trials_to_target=paths[TRIALS_TO_TARGET],
        trials_to_target_summary=paths[TRIALS_TO_TARGET_SUMMARY], budget_plan=paths[BUDGET_PLAN],
        pairwise=paths.get(PAIRWISE), choice=paths.get(CHOICE), report=report, figures=tuple(figure_paths),
        within_target=paths[WITHIN_TARGET], placement=paths[PLACEMENT], harm=paths.get(HARM), limits=paths.get(LIMITS),
        stopping=paths.get(STOPPING), stopping_curves=paths.get(STOPPING_CURVES),
    )


def _decision_tables(folder, study, traces, *, success, seed, step):
    """Compute the decision tables and write their CSVs; (tables, paths), both keyed by file name.
    Also reads the folder's sweep and worlds tables where there are any (the page shows them)."""
    target, budgets, horizon = study.target, list(study.campaign.budgets), study.campaign.horizon
    several = len(study.policies) >= 2

    def _write_csv(frame, name):
        path = folder / name
        atomic_write(path, lambda p: frame.to_csv(p, index=False))
        return path

    tables = {}
    tables[SUMMARY] = metrics.budget_summary(traces, budgets=budgets, target=target, seed=seed)
    paths = {SUMMARY: _write_csv(tables[SUMMARY], SUMMARY)}
    step(1)
    tables[WITHIN_TARGET] = reach.within_target_curves(traces, target=target)
    paths[WITHIN_TARGET] = _write_csv(tables[WITHIN_TARGET], WITHIN_TARGET)
    step(1)
    tables[TRIALS_TO_TARGET] = reach.reach_curves(traces, target=target)
    paths[TRIALS_TO_TARGET] = _write_csv(tables[TRIALS_TO_TARGET], TRIALS_TO_TARGET)
    step(1)
    tables[TRIALS_TO_TARGET_SUMMARY] = reach.trials_to_target_summary(traces, target=target,
                                                                        levels=_levels(success))
    paths[TRIALS_TO_TARGET_SUMMARY] = _write_csv(tables[TRIALS_TO_TARGET_SUMMARY], TRIALS_TO_TARGET_SUMMARY)
    step(1)
    tables[BUDGET_PLAN] = reach.budget_plan(traces, target=target, success=success)
    paths[BUDGET_PLAN] = _write_csv(tables[BUDGET_PLAN], BUDGET_PLAN)
    step(1)
    harm = None
    if study.floor is not None or study.constrained:   # harmful trials (no step of its own: it is quick)
        reference = _reference(folder)
        tables[HARM] = harm_table(traces, floor=study.floor, sign=study.sign, budgets=budgets,
                                  initial=study.campaign.initial, reference=reference)
        paths[HARM] = _write_csv(tables[HARM], HARM)
        harm = harm_per_campaign(traces, floor=study.floor, sign=study.sign, budget=horizon, reference=reference)
    if study.constrained:   # limits and failed trials (quick too), also at each plan's booked budget for the answer
        booked = tables[BUDGET_PLAN]["budget_conservative"].dropna().astype(int)
        tables[LIMITS] = limit_table(traces, study, budgets=sorted(set(budgets) | {int(b) for b in booked}))
        paths[LIMITS] = _write_csv(tables[LIMITS], LIMITS)
    if several:
        tables[PAIRWISE] = compare.pairwise(traces, budget=horizon, target=target)
        paths[PAIRWISE] = _write_csv(tables[PAIRWISE], PAIRWISE)
        step(1)
        tables[CHOICE] = choice.choice_table(traces, budget=horizon, target=target, success=success, seed=seed,
                                              difference=study.lead_difference, units=study.units or None,
                                              harm=harm)
        paths[CHOICE] = _write_csv(tables[CHOICE], CHOICE)
        step(1)
    else:
        step(2)  # nothing to compare with a single policy
    space = study.space
    view, names, low, high = box_view(traces, space)
    tables[PLACEMENT] = placement_table(view, names=names, low=low, high=high)
    paths[PLACEMENT] = _write_csv(tables[PLACEMENT], PLACEMENT)
    step(1)
    if study.stops:
        from ..evidence import stopping

        times = stopping.stopping_times(traces, study)
        tables[STOPPING] = stopping.stopping_table(times, horizon=horizon)
        tables[STOPPING_CURVES] = stopping.stopping_curves(times, horizon=horizon)
        paths[STOPPING] = _write_csv(tables[STOPPING], STOPPING)
        paths[STOPPING_CURVES] = _write_csv(tables[STOPPING_CURVES], STOPPING_CURVES)
    step(1)

    if (folder / SWEEP_RANKING).is_file() and (folder / SWEEP_SUMMARY).is_file():
        # a misspecification sweep of this study was run (simlab sweep): report it too
        tables[SWEEP_RANKING] = pd.read_csv(folder / SWEEP_RANKING)
        tables[SWEEP_SUMMARY] = pd.read_csv(folder / SWEEP_SUMMARY)

    if (folder / WORLDS).is_file():
        tables[WORLDS] = pd.read_csv(folder / WORLDS)   # the runner's per-replicate optima (optimum_gap)

    return tables, paths


def _reference(folder):
    """The world's best value per replicate from the folder's worlds.csv, or None (harm.py then reads
    it back from the traces)."""
    path = Path(folder) / WORLDS
    if not path.is_file():
        return None
    worlds = pd.read_csv(path)
    return worlds.set_index("replicate")["reference"] if "reference" in worlds.columns else None


def _levels(success):
    """Shares for the trials-to-target summary: the median and the requested success level."""
    return (0.5,) if success == 0.5 else (0.5, success)


def _figure_workers(jobs):
    """How many processes draw the figures: at most one per registered figure."""
    from ..replay.workers import workers
    return min(workers(jobs), len(FIGURE_REGISTRY))


def _start_early_figures(study, traces, *, success, seed, jobs):
    """With more than one job, hand the workers the figures that read no decision table
    (``Figure.needs_tables``), slow ones first, so that they draw (and, in fresh workers, import
    matplotlib and the drawing code, about 1 s the first time) while this process makes the tables.
    Returns ``(stems, generator)`` for :func:`_figure_files` to drain, or None with one job."""
    n = _figure_workers(jobs)
    if n <= 1:
        return None
    stems = _handout([stem for stem, fig in FIGURE_REGISTRY.items() if not fig.needs_tables and fig.applies(study, {})])
    if not stems:
        return None
    from .style import policy_colors

    given = FigureInput(study=study, traces=traces, tables={}, success=success, seed=seed,
                        colors=policy_colors(study.labels))
    return stems, _in_workers(n, given, stems)


def _handout(stems):
    """The order figures go to workers: slow ones first (``Figure.slow``), otherwise registry order, so that
    the last figure to finish is a short one."""
    return sorted(stems, key=lambda stem: not FIGURE_REGISTRY[stem].slow)


def _in_workers(n, given, stems):
    """joblib's generator of ``(stem, png, svg)`` for `stems` drawn by n workers from `given`.

    One figure per task (0.25-1.25 s each on the demo). The bytes come back as each figure finishes
    and are written by the caller: every file is this process's atomic write, and a stopped worker
    leaves nothing half-written. The inputs travel as one pickle: given as they are, joblib would
    memmap the traces' arrays (past its 1 MB threshold) into a temporary folder whose removal at the
    end of the call waits for the workers to let go of it (the demo's last figure arrived 1.0 s
    late); max_nbytes=None avoids that too, but loky then replaces the replay's workers with new ones.
    """
    import pickle

    from joblib import delayed

    packed = pickle.dumps(given, protocol=pickle.HIGHEST_PROTOCOL)
    return _parallel(n)(delayed(_rendered_in_worker)(packed, stem) for stem in stems)


def _parallel(n):
    """joblib's Parallel for the figures: one task at a time, results as they finish, and otherwise the
    replay's settings, so that its idle workers are reused (loky starts new ones when, say,
    max_nbytes differs)."""
    from joblib import Parallel

    return Parallel(n_jobs=n, batch_size=1, return_as="generator_unordered")


def _stop_figure_workers(running):
    """Leave a joblib generator early (an error here, Ctrl-C or SIGTERM): cancel what it still runs and
    stop the workers, so that none outlives the report."""
    from ..replay.workers import stop_local_workers

    if running is not None:
        with warnings.catch_warnings():
            # joblib warns when a generator is left with tasks still running: here that is the point
            warnings.filterwarnings("ignore", message=r".*tasks which were still being processed",
                                    category=UserWarning)
            running.close()
        stop_local_workers()


def _figure_files(folder, study, traces, tables, *, success, seed, jobs, step, early=None):
    """Draw and write every registered figure that applies; {stem: (png, svg)} in registry order.

    `step` is called once per registered figure: at once for those that do not apply, after its
    files are written for the others. `early`: :func:`_start_early_figures`'s figures, already in
    the workers' hands; the others are handed out once those are written."""
    from .style import policy_colors, write_figure

    given = FigureInput(study=study, traces=traces, tables=tables, success=success, seed=seed,
                        colors=policy_colors(study.labels))
    stems = [stem for stem, fig in FIGURE_REGISTRY.items() if fig.applies(study, tables)]
    if len(stems) < len(FIGURE_REGISTRY):
        step(len(FIGURE_REGISTRY) - len(stems))
    written = {}
    if early is None and (_figure_workers(jobs) <= 1 or len(stems) <= 1):   # here, one after another
        for stem in stems:
            written[stem] = write_figure(folder, stem, *_rendered(given, stem))
            step(1)
        return written

    def write_all(running):
        try:
            for stem, png, svg in running:
                written[stem] = write_figure(folder, stem, png, svg)
                step(1)
        except BaseException:
            _stop_figure_workers(running)
            raise

    if early is not None:              # drained before the rest are handed out: one hand-out at a time
        write_all(early[1])
    rest = _handout([stem for stem in stems if stem not in written])
    if rest:
        write_all(_in_workers(_figure_workers(jobs), given, rest))
    return {stem: written[stem] for stem in stems}


def _rendered(given, stem):
    """The PNG and SVG bytes of the registered figure `stem`, drawn from `given`."""
    from .style import figure_bytes

    return figure_bytes(FIGURE_REGISTRY[stem].draw(given))


def _rendered_in_worker(packed, stem):
    """:func:`_rendered` in a worker, from the pickled inputs: (stem, png, svg), so that results can
    arrive in any order."""
    import pickle

    return (stem, *_rendered(pickle.loads(packed), stem))
