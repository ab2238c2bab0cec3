"""What stopping rules read, recorded after each trial: the posterior's view of the recommendation.

Both campaign loops call the same three steps, on a :class:`~simlab.model.gp.Stack` (the
one-campaign loop's `Posterior` is a Stack of one): ``plan.begin`` before the first trial,
``log.after(st, i)`` after each update, ``log.columns(b)`` at the end. Every quantity is
computed replicate by replicate from per-slice operations (elementwise ufuncs, stacked
products, reductions over a last axis) and each replicate draws from its own keyed stream
(``rng.stream(seed, replicate, "stop", policy)``), so a campaign's record has the same bits
alone or in a lockstep block (tests/unit/test_stopping.py).

Nothing is recorded, and nothing costs, when no ``[[stop]]`` rule of the study needs it:
:func:`record_plan` is None then, and the traces keep exactly their columns.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lazy import special
from ..policies.info import PathwiseDraws
from .rules import STOP_RULES

__all__ = ["RecordPlan", "StopLog", "record_plan"]

# Pool points whose lower bound mu - 5 sd lies above the lowest upper bound mu + 5 sd are left out
# of the draws (as policies.info does for its draws): such a point is a draw's minimum only when one
# of two values lies 5 sd beyond its mean, at most (m + 1) Phi(-5) = 6e-4 of the draws for a pool
# of 2048, far below the Monte Carlo error of 64 draws (0.04 at a probability of 0.9).
_SCREEN = 5.0
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)


@dataclass(frozen=True)
class RecordPlan:
    """Which columns to record, from which trial on, and the settings that shape them.

    A ``*_from`` of None means the column is not recorded. Trials are 1-based new trials.
    """

    target: float                      # [target] regret, objective units (the same in both orientations)
    chance_from: int | None = None
    draws: int = 64
    features: int = 64
    gain_from: int | None = None
    gap_from: int | None = None
    width: float = 2.0

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(name for name, start in (("stop_chance", self.chance_from), ("stop_gain", self.gain_from),
                                              ("stop_gap", self.gap_from)) if start is not None)

    def begin(self, st, pools, rngs, *, h: int, n: int) -> "StopLog":
        """The record of a block of campaigns (``st``: its belief, before the first new trial).

        pools : ndarray of shape (B, m, d); rngs : each replicate's "stop" stream; h past trials,
        n rows in all.
        """
        return StopLog(self, st, pools, rngs, h=h, n=n)


def record_plan(study) -> RecordPlan | None:
    """The record a study's ``[[stop]]`` rules need, or None when none reads the posterior.

    Each column starts at the smallest ``min_trials`` of the rules reading it: before that no rule
    may stop, so nothing is computed (NaN in the traces).
    """
    starts: dict[str, int] = {}
    settings: dict[str, object] = {}
    for spec in getattr(study, "stops", ()):
        cls = STOP_RULES[spec.rule]
        if cls.statistic is None:
            continue
        o = spec.options
        starts[cls.statistic] = min(starts.get(cls.statistic, o["min_trials"]), o["min_trials"])
        settings.update({k: o[k] for k in cls.shared})     # equal across rules: checked by the reader
    if not starts:
        return None
    return RecordPlan(target=float(study.target), chance_from=starts.get("stop_chance"),
                      gain_from=starts.get("stop_gain"), gap_from=starts.get("stop_gap"),
                      **{k: settings[k] for k in ("draws", "features", "width") if k in settings})


class StopLog:
    """The per-trial record of a block of campaigns: one (B, n) array per column, NaN where not computed."""

    def __init__(self, plan: RecordPlan, st, pools, rngs, *, h: int, n: int):
        self.plan, self.h = plan, h
        self.rngs = list(rngs)
        B = st.size
        self.values = {name: np.full((B, n), np.nan) for name in plan.columns}
        # one set of frequencies per campaign, drawn first from its stream (as pbest does)
        self.draws = ([PathwiseDraws(st, pools[b], self.rngs[b], plan.features) for b in range(B)]
                      if plan.chance_from is not None else [])

    def after(self, st, i: int) -> None:
        """Record row i (0-based) of every campaign of the block, after the belief has seen it."""
        p, t = self.plan, i - self.h + 1
        if t < 1 or st.n == 0:
            return
        want = {name: start is not None and t >= start for name, start in
                (("stop_chance", p.chance_from), ("stop_gain", p.gain_from), ("stop_gap", p.gap_from))}
        if not any(want.values()):
            return
        B = st.size
        at = np.arange(B)
        md = st.means_at_data()                                          # (B, n), as the loops' recommendation
        r = np.argmin(md, axis=-1)
        mu, sd = st.stacked_pool_moments()                               # (B, m)
        if want["stop_gain"]:
            self.values["stop_gain"][:, i] = _largest_ei(mu, sd, md[at, r][:, None])
        if want["stop_gap"]:
            w = p.width
            mud, sdd = st.stacked_moments(st._X[:, : st.n])              # (B, n) at the evaluated inputs
            lowest = np.minimum(np.min(mu - w * sd, axis=-1), np.min(mud - w * sdd, axis=-1))
            self.values["stop_gap"][:, i] = mud[at, r] + w * sdd[at, r] - lowest
        if want["stop_chance"]:
            for b in range(B):
                self.values["stop_chance"][b, i] = self._chance(st, b, int(r[b]), mu[b], sd[b])

    def _chance(self, st, b: int, r: int, mu: np.ndarray, sd: np.ndarray) -> float:
        """Share of posterior draws in which the recommendation (row r) is within the target of the
        draw's minimum over the pool and the evaluated inputs (Wilson 2024, estimated by Monte Carlo)."""
        rows = np.flatnonzero(mu - _SCREEN * sd <= np.min(mu + _SCREEN * sd))
        G, GX = self.draws[b].draw_in(st, b, self.rngs[b], self.plan.draws, rows)   # (rows, S), (n, S)
        lowest = np.minimum(G.min(axis=0), GX.min(axis=0))
        return float(np.mean(GX[r] - lowest <= self.plan.target))

    def columns(self, b: int) -> dict[str, np.ndarray]:
        """Campaign b's record: column name -> (n,) array."""
        return {name: v[b] for name, v in self.values.items()}


def _largest_ei(mu: np.ndarray, sd: np.ndarray, incumbent: np.ndarray) -> np.ndarray:
    """``max_x EI(x)`` per row, (B,), for minimisation below ``incumbent`` (B, 1).

    ``EI = (m - mu) Phi(z) + sd phi(z)``, ``z = (m - mu) / sd`` (Jones, Schonlau & Welch 1998);
    where sd = 0 it is ``max(m - mu, 0)``. Elementwise, then a maximum along the last axis, so a
    replicate's value does not depend on the block.
    """
    gain = incumbent - mu
    with np.errstate(divide="ignore", invalid="ignore"):
        z = gain / sd
        ei = gain * special.ndtr(z) + sd * _INV_SQRT_2PI * np.exp(-0.5 * z * z)
    ei = np.where(sd > 0, ei, np.maximum(gain, 0.0))
    return np.max(ei, axis=-1)
