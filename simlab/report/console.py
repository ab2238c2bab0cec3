"""What the command line prints: the budget table, one line on limits, shares with intervals, budgets, durations."""

from __future__ import annotations

import pandas as pd

from .cells import fmt_pct, fmt_sig, unit_label
from .files import LIMITS

__all__ = ["budget_table", "budget_text", "duration", "pct_interval", "limits_line"]


def duration(seconds: float) -> str:
    if seconds < 10:
        return f"{seconds:.1f} s"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def pct_interval(value, low, high) -> str:
    """A share and its interval as the report prints them: ``86.5 % [74-94 %]``."""
    return f"{fmt_pct(value)} % [{fmt_pct(low)}-{fmt_pct(high)} %]"


def budget_text(value, *, above: int) -> str:
    """A budget, or "> last simulated trial" where the curve never gets there."""
    return f">{above}" if pd.isna(value) else f"{int(value)}"


def budget_table(study, summary) -> str:
    """Median regret with quartiles, and the share within the target with its exact (Clopper-Pearson) interval."""
    lines = [f"simple regret of the recommendation ({unit_label(study)}; target: regret <= {study.target:g})", ""]
    header = (f"{'policy':<20} {'budget':>6}  {'median regret [q25, q75]':<30} "
              f"{'within target [95% interval]':>28}")
    lines += [header, "-" * len(header)]
    for row in summary.itertuples():
        band = f"{row.regret_median:.3g} [{row.regret_q25:.3g}, {row.regret_q75:.3g}]"
        within = pct_interval(row.within_target, row.within_low, row.within_high)
        lines.append(f"{str(row.policy)[:20]:<20} {row.budget:>6}  {band:<30} {within:>28}")
    return "\n".join(lines)


def limits_line(study, limits) -> str:
    """One line on limits after the largest budget, per policy: the share of campaigns whose recommendation
    breaks a limit, with its exact interval, and the mean trials per campaign that break a limit and that
    fail (each where the study has it), from limits.csv (`simlab.evidence.limits.limit_table`)."""
    horizon = study.campaign.horizon
    rows = limits[(limits["budget"] == horizon) & limits["study_budget"].astype(bool)]
    kinds = [(c, w) for c, w, on in (("breaks_mean", "break a limit", bool(study.limits)),
                                     ("failed_mean", "fail", study.world.fails_where is not None)) if on]
    parts = []
    for k, row in enumerate(rows.itertuples()):
        share = pct_interval(row.rec_breaks_share, row.rec_breaks_low, row.rec_breaks_high)
        means = [fmt_sig(getattr(row, c)) for c, _ in kinds]
        if k == 0:
            counts = " and ".join(f"{m} trials per campaign that {w}" if i == 0 else f"{m} that {w}"
                                  for i, (m, (_, w)) in enumerate(zip(means, kinds)))
            parts.append(f"{row.policy} recommends a setting that breaks a limit in {share} of campaigns and runs {counts}")
        else:
            parts.append(f"{row.policy} {share} and {' and '.join(means)}")
    return f"limits after {horizon} trials: " + "; ".join(parts) + f" ({LIMITS})"
