"""`Trace`: what one campaign did, trial by trial, and the arrays both campaign loops fill.

The one-campaign loop (campaign.py) and the lockstep loop (lockstep.py) start the same way:
the past trials come first in every trace and in the belief (:func:`past_trials`), and the
record is four arrays of one row per trial (:func:`allocate`, with a leading block axis for
lockstep). The runner turns traces into the traces table (runner._columns).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Trace", "past_trials", "allocate", "fill_round"]


@dataclass
class Trace:
    """Per-trial record of one campaign, internal orientation, unit-cube inputs.

    Attributes
    ----------
    U : ndarray of shape (h + budget, d)
        Evaluated inputs: h past trials (if any), then the campaign's own.
    y, f : ndarray of shape (h + budget,)
        Observed and noise-free values.
    rec : ndarray of shape (h + budget,)
        0-based row index (into these arrays) of the recommendation after each row: the
        observed input with the lowest posterior mean (the row itself while nothing has
        been observed yet). ``y`` is NaN for lost trials.
    stats : dict of str to ndarray of shape (h + budget,)
        What the study's stopping rules read after each row (``simlab.stopping.record``; columns
        ``stop_*``, NaN where not computed); empty when no rule needs the posterior.
    limits : dict of str to ndarray of shape (h + budget,)
        With [[limit]]s or fails_where (``simlab.columns.LIMIT_COLUMNS``): ``failed``, ``breaks`` and
        ``rec_breaks`` per row, bool; empty otherwise.
    """

    U: np.ndarray
    y: np.ndarray
    f: np.ndarray
    rec: np.ndarray
    stats: dict = field(default_factory=dict)
    limits: dict = field(default_factory=dict)


def past_trials(history, d: int) -> tuple[np.ndarray, np.ndarray]:
    """The trials already run as (inputs (h, d), observations (h,)); empty arrays when none."""
    return history if history is not None else (np.empty((0, d)), np.empty(0))


def allocate(n: int, d: int, *block: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Uninitialised U, y, f, rec for n rows of d inputs (with leading axes `block`, e.g. (B,))."""
    return (np.empty((*block, n, d)), np.empty((*block, n)), np.empty((*block, n)),
            np.empty((*block, n), dtype=int))


def fill_round(policy, belief, ts: range, pick, hold) -> list[np.ndarray]:
    """Choose every trial of a round before any of its results is back, in both loops: ``pick(t)``
    each trial in turn, ``hold(belief, chosen)`` each pending one but the last (believer, liar,
    penalizer, the member that chose...) inside ``belief.fantasies()``, then ``policy.release()``.
    A round of one holds nothing and has no fantasies to undo."""
    if len(ts) == 1:
        return [pick(ts[0])]
    chosen = []
    with belief.fantasies():
        for k, t in enumerate(ts):
            chosen.append(pick(t))
            if k + 1 < len(ts):
                hold(belief, chosen[-1])
    policy.release()
    return chosen
