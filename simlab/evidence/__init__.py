"""Traces in; the statistics a decision rests on out: regret, reach, comparisons, budgets."""
