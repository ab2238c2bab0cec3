"""Traces in; the statistics a decision rests on out: regret, reach, comparisons, budgets.

frame.py holds the conventions of the traces frame that every summary shares; intervals.py
the intervals (each with a coverage test); metrics.py regret and the budget table; reach.py
the within-target share, the budget plan and first passage; compare.py the paired comparisons;
choice.py the choice table. Every summary a caller needs is importable from here.
"""

from .choice import choice_table
from .compare import format_p, holm_adjust, pairwise
from .metrics import budget_summary, regret_at_budget, regret_curves
from .reach import (
           budget_plan,
           first_reach,
           reach_curves,
           trials_to_target_summary,
           within_target_curves,
)

__all__ = ["regret_at_budget", "regret_curves", "budget_summary", "within_target_curves", "budget_plan",
           "first_reach", "reach_curves", "trials_to_target_summary", "pairwise", "choice_table",
           "holm_adjust", "format_p"]
