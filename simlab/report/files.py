"""The names of the files a report writes into a results folder (decision tables, figures, page).

One place for them: the report writes them, the page tags every number with them, and the
results folder (`simlab.replay.store`) knows them as simlab's own files, which `--fresh` may
delete.
"""

SUMMARY = "summary.csv"
WITHIN_TARGET = "within_target.csv"
TRIALS_TO_TARGET = "trials_to_target.csv"
TRIALS_TO_TARGET_SUMMARY = "trials_to_target_summary.csv"
PAIRWISE = "pairwise.csv"
CHOICE = "choice.csv"
BUDGET_PLAN = "budget_plan.csv"
PLACEMENT = "placement.csv"
HARM = "harm.csv"               # only with [target] floor, or limits (Study.constrained)
LIMITS = "limits.csv"           # only with limits or hidden failures (Study.constrained)
STOPPING = "stopping.csv"
STOPPING_CURVES = "stopping_curves.csv"
REPORT = "report.html"
SWEEP_SUMMARY = "sweep/sweep.csv"
SWEEP_RANKING = "sweep/ranking.csv"
WORLDS = "worlds.csv"
FIGURES = "figures"

# what a report writes at the top of the folder (worlds.csv and the sweep's files are the runner's)
TABLES = (SUMMARY, TRIALS_TO_TARGET, TRIALS_TO_TARGET_SUMMARY, PAIRWISE, CHOICE, BUDGET_PLAN, WITHIN_TARGET, PLACEMENT,
          STOPPING, STOPPING_CURVES, REPORT, HARM, LIMITS)
FIGURE_FORMATS = ("png", "svg")
