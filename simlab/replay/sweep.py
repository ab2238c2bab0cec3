"""Misspecification sweep: the study replayed with a wrongly scaled belief, on the same worlds."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from ..evidence.metrics import budget_summary
from .runner import replay
from ..study.spec import Study

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
            # stopping rules are not part of the sweep's question (it reads regret at the budgets only),
            # so nothing is recorded for them in its cells
            cells.append((lf, af, dataclasses.replace(study, belief=belief, replicates=sw.replicates, stops=())))
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
    """Failure risk (Clopper–Pearson 95 % interval) and median regret per policy, cell and budget."""
    parts = []
    for (lf, af), g in rows.groupby(["lengthscale_factor", "amplitude_factor"], sort=True):
        s = budget_summary(g, budgets=list(study.campaign.budgets), target=study.target, seed=seed)
        parts.append(s.assign(lengthscale_factor=lf, amplitude_factor=af))
    out = pd.concat(parts, ignore_index=True)
    first = ["policy", "budget", "lengthscale_factor", "amplitude_factor"]
    return out[first + [c for c in out.columns if c not in first]]


def safest_policy(summary: pd.DataFrame, *, budget: int) -> pd.DataFrame:
    """Policies ranked by their worst shortfall against the best policy of each cell (minimax regret).

    In every cell of the grid (one way the belief can be wrong) the best policy is the
    one with the lowest failure risk there; a policy's *shortfall* in that cell is its
    failure risk minus that best one (0 for the best). The safest policy is the one whose
    largest shortfall over the grid is smallest: Savage's (1951) minimax-regret rule, the
    choice a team regrets least however the belief is wrong within the grid. Ranking on
    the raw worst cell instead (Wald's minimax) can name a uniformly mediocre policy,
    such as random search, whose worst cell is least bad only because it never adapts to
    the belief; that worst cell is kept beside the shortfall. Ties go to the lower raw
    worst failure risk, then the lower mean failure risk over the grid.

    Returns
    -------
    DataFrame
        One row per policy, best first: ``rank, policy, worst_shortfall,
        shortfall_lengthscale_factor, shortfall_amplitude_factor, shortfall_best_policy``
        (the cell of the largest shortfall and the policy best there),
        ``worst_failure_risk, worst_failure_low, worst_failure_high,
        worst_lengthscale_factor, worst_amplitude_factor`` (the raw worst cell with its
        interval), ``mean_failure_risk, worst_regret_median, correct_belief_failure_risk,
        lead``. ``lead`` on the first row is ``clear`` when even the leader's pessimistic
        worst shortfall (its cells' upper interval edges against the best policies' lower
        edges) is below the runner-up's optimistic one (the reverse); otherwise ``tie``.

    References
    ----------
    Savage, L. J. (1951). The theory of statistical decision. JASA 46, 55-67.
    """
    at = summary[summary["budget"] == budget].copy()
    at["policy"] = at["policy"].astype(str)
    cell = ["lengthscale_factor", "amplitude_factor"]
    by_cell = at.groupby(cell)
    at["shortfall"] = at["failure_risk"] - by_cell["failure_risk"].transform("min")
    # Interval edges of the shortfall for the lead check only (not printed): pessimistic
    # = own upper edge against the cell's lowest lower edge, optimistic = the reverse.
    at["shortfall_high"] = (at["failure_high"] - by_cell["failure_low"].transform("min")).clip(lower=0.0)
    at["shortfall_low"] = (at["failure_low"] - by_cell["failure_high"].transform("min")).clip(lower=0.0)
    best_in_cell = at.loc[by_cell["failure_risk"].idxmin(), cell + ["policy"]].rename(
        columns={"policy": "shortfall_best_policy"})
    at = at.merge(best_in_cell, on=cell, how="left")
    g = at.groupby("policy", sort=False)
    table = pd.DataFrame({
        "worst_shortfall": g["shortfall"].max(),
        "worst_failure_risk": g["failure_risk"].max(),
        "mean_failure_risk": g["failure_risk"].mean(),
        "worst_regret_median": g["regret_median"].max(),
    })
    short = at.loc[g["shortfall"].idxmax(), ["policy", *cell, "shortfall_best_policy"]].set_index("policy")
    table = table.join(short.rename(columns={"lengthscale_factor": "shortfall_lengthscale_factor",
                                             "amplitude_factor": "shortfall_amplitude_factor"}))
    worst = at.loc[g["failure_risk"].idxmax(), ["policy", *cell, "failure_low", "failure_high"]].set_index("policy")
    table = table.join(worst.rename(columns={
        "lengthscale_factor": "worst_lengthscale_factor", "amplitude_factor": "worst_amplitude_factor",
        "failure_low": "worst_failure_low", "failure_high": "worst_failure_high"}))
    correct = at[(at["lengthscale_factor"] == 1.0) & (at["amplitude_factor"] == 1.0)]
    table["correct_belief_failure_risk"] = correct.set_index("policy")["failure_risk"].reindex(table.index)
    table = table.sort_values(["worst_shortfall", "worst_failure_risk", "mean_failure_risk"], kind="stable")
    pessimistic = g["shortfall_high"].max().reindex(table.index)
    optimistic = g["shortfall_low"].max().reindex(table.index)
    clear = len(table) > 1 and pessimistic.iloc[0] < optimistic.iloc[1]
    table["lead"] = ["clear" if clear else "tie"] + [""] * (len(table) - 1)
    table.insert(0, "rank", np.arange(1, len(table) + 1))
    columns = ["rank", "worst_shortfall", "shortfall_lengthscale_factor", "shortfall_amplitude_factor",
               "shortfall_best_policy", "worst_failure_risk", "worst_failure_low", "worst_failure_high",
               "worst_lengthscale_factor", "worst_amplitude_factor", "mean_failure_risk", "worst_regret_median",
               "correct_belief_failure_risk", "lead"]
    return table[columns].rename_axis("policy").reset_index()
