"""Misspecification sweep: the study replayed with a wrongly scaled belief, on the same worlds."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from .metrics import budget_summary
from .runner import replay
from .spec import Study

__all__ = ["sweep_cells", "run_sweep", "summarize_sweep", "safest_policy"]


def sweep_cells(study: Study) -> list[tuple[float, float, Study]]:
    """One study per (lengthscale factor, amplitude factor) of ``study.sweep``.

    Only the belief changes: worlds, designs, pools and noise are keyed by replicate, so
    every cell meets exactly the same worlds as the unscaled study.
    """
    sw, b = study.sweep, study.belief
    cells = []
    for lf in sw.lengthscale:
        for af in sw.amplitude:
            belief = dataclasses.replace(b, lengthscale=tuple(v * lf for v in b.lengthscale),
                                         amplitude=b.amplitude * af)
            cells.append((lf, af, dataclasses.replace(study, belief=belief, replicates=sw.replicates)))
    return cells


def run_sweep(study: Study, *, jobs: int = 1, progress=None) -> pd.DataFrame:
    """Replay every cell of the sweep; rows at the study's budgets only.

    Returns
    -------
    DataFrame
        The traces columns ``policy, replicate, trial, regret, regret_seen`` at each budget,
        plus ``lengthscale_factor`` and ``amplitude_factor``.
    """
    frames = []
    budgets = list(study.campaign.budgets)
    for lf, af, cell in sweep_cells(study):
        t = replay(cell, jobs=jobs, progress=progress)
        t = t.loc[t["trial"].isin(budgets), ["policy", "replicate", "trial", "regret", "regret_seen"]]
        frames.append(t.assign(lengthscale_factor=lf, amplitude_factor=af))
    out = pd.concat(frames, ignore_index=True)
    out["policy"] = pd.Categorical(out["policy"].astype(str), categories=list(study.labels))
    return out


def summarize_sweep(rows: pd.DataFrame, study: Study, *, seed: int = 0) -> pd.DataFrame:
    """Failure risk (Wilson 95 % interval) and median regret per policy, cell and budget."""
    parts = []
    for (lf, af), g in rows.groupby(["lengthscale_factor", "amplitude_factor"], sort=True):
        s = budget_summary(g, budgets=list(study.campaign.budgets), target=study.target, seed=seed)
        parts.append(s.assign(lengthscale_factor=lf, amplitude_factor=af))
    out = pd.concat(parts, ignore_index=True)
    first = ["policy", "budget", "lengthscale_factor", "amplitude_factor"]
    return out[first + [c for c in out.columns if c not in first]]


def safest_policy(summary: pd.DataFrame, *, budget: int) -> pd.DataFrame:
    """Policies ranked by their worst failure risk over the grid at one budget.

    The safest policy is the one whose *worst* cell is least bad (a minimax choice: it
    holds up however the belief is wrong within the grid); ties go to the lower mean
    failure risk over the grid, then to the lower worst-cell median regret. Column
    ``lead`` on the first row says whether that lead is ``clear`` (its worst-cell Wilson
    interval lies wholly below the runner-up's) or a ``tie``.
    """
    at = summary[summary["budget"] == budget]
    g = at.groupby("policy", observed=True, sort=False)
    table = pd.DataFrame({
        "worst_failure_risk": g["failure_risk"].max(),
        "mean_failure_risk": g["failure_risk"].mean(),
        "worst_regret_median": g["regret_median"].max(),
    })
    correct = at[(at["lengthscale_factor"] == 1.0) & (at["amplitude_factor"] == 1.0)]
    table["correct_belief_failure_risk"] = correct.set_index("policy")["failure_risk"].reindex(table.index)
    worst_cell = at.loc[at.groupby("policy", observed=True)["failure_risk"].idxmax(),
                        ["policy", "lengthscale_factor", "amplitude_factor", "failure_low", "failure_high"]]
    table = table.join(worst_cell.set_index("policy").rename(columns={
        "lengthscale_factor": "worst_lengthscale_factor", "amplitude_factor": "worst_amplitude_factor",
        "failure_low": "worst_failure_low", "failure_high": "worst_failure_high"}))
    table = table.sort_values(["worst_failure_risk", "mean_failure_risk", "worst_regret_median"])
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    # The lead is clear only when the leader's worst-cell Wilson interval lies wholly below
    # the runner-up's (a conservative check: non-overlapping 95 % intervals).
    clear = len(table) > 1 and table["worst_failure_high"].iloc[0] < table["worst_failure_low"].iloc[1]
    table["lead"] = ["clear" if clear else "tie"] + [""] * (len(table) - 1)
    return table.reset_index().rename(columns={"index": "policy"})
