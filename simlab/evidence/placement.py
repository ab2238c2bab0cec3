"""Where a policy's own trials land in the box: the share on its boundary and in its corners, per policy."""

from __future__ import annotations

__all__ = ["BAND", "placement_table", "own_trials", "edge_flags"]

import numpy as np
import pandas as pd

from .frame import policy_order
from .intervals import share_interval

# A trial is "on the boundary" when it lies within this fraction of an input's range of
# either bound, and "in a corner" when it does so on every input (common practice for
# reading placements; the 1 % is the choice, not a published constant).
BAND = 0.01

# Inputs come back from the unit cube in user units (low + u * range), which moves a point
# placed exactly on the band's edge by a few ulps; this much of the range absorbs that.
_ROUNDING = 1e-9


def own_trials(traces):
    """The rows of trials a policy chose itself: after the initial design, no history rows.

    Parameters
    ----------
    traces : DataFrame
        A traces frame with ``policy``, ``trial`` and ``initial`` columns (and the inputs).

    Returns
    -------
    DataFrame
        The rows with ``trial >= 1`` (history rows have ``trial <= 0``) and ``initial``
        False (the shared design is not the policy's choice), in the original order.
    """
    if not isinstance(traces, pd.DataFrame):
        raise ValueError(f"`traces` must be a pandas DataFrame; got {type(traces).__name__}")
    missing = [c for c in ("policy", "trial", "initial") if c not in traces.columns]
    if missing:
        raise ValueError(f"`traces` lacks required column(s) {missing}; it has {list(traces.columns)}")
    keep = (pd.to_numeric(traces["trial"]) >= 1).to_numpy() & ~traces["initial"].to_numpy(dtype=bool)
    if "history" in traces.columns:
        keep &= ~traces["history"].to_numpy(dtype=bool)
    return traces[keep]


def edge_flags(X, low, high, *, band=BAND):
    """Which inputs of each point lie within `band` × range of a bound.

    Parameters
    ----------
    X : ndarray of shape (n, d)
        Points in user units.
    low, high : array_like of shape (d,)
        The box.
    band : float
        Fraction of each input's range (0 < band < 0.5).

    Returns
    -------
    ndarray of bool, shape (n, d)
        ``min(x - low, high - x) <= band * (high - low)``, input by input (with a
        relative allowance of 1e-9 of the range for rounding in user units).
    """
    X = np.atleast_2d(np.asarray(X, dtype=float))
    low, high = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
    if not 0.0 < band < 0.5:
        raise ValueError(f"`band` must be between 0 and 0.5; got {band!r}")
    span = high - low
    distance = np.minimum(X - low, high - X)
    return distance <= (band + _ROUNDING) * span


def placement_table(traces, *, names, low, high, band=BAND, confidence_level=0.95):
    """Per policy, the share of its own trials on the boundary of the box and in its corners.

    Parameters
    ----------
    traces : DataFrame
        Traces of a study (user units; one column per input, named as in `names`).
    names : sequence of str
        The input columns (``study.space.names``).
    low, high : sequence of float
        The box in user units (``study.space.low``, ``study.space.high``).
    band : float, default 0.01
        How close to a bound counts as on it, as a fraction of the input's range.
    confidence_level : float, default 0.95

    Returns
    -------
    DataFrame
        One row per policy (study order): ``policy, campaigns, trials, on_boundary,
        boundary_share, boundary_low, boundary_high, in_corner, corner_share, corner_low,
        corner_high, band``. A trial is on the boundary when any input lies within
        ``band`` × range of a bound, in a corner when every input does. Lost trials count:
        the policy chose them.

    Notes
    -----
    Intervals are Clopper & Pearson (1934, Biometrika 26:404), `share_interval`, with the
    trials as the sample. Trials of one campaign are not independent (a campaign that
    goes to the edge tends to stay there), so these intervals are narrower than an
    interval over worlds would be; they say how precisely the shares are counted, not
    how they would vary between studies.
    """
    names = list(names)
    rows = own_trials(traces)
    missing = [n for n in names if n not in rows.columns]
    if missing:
        raise ValueError(f"`traces` lacks input column(s) {missing}; it has {list(traces.columns)}")
    order = policy_order(traces)
    out = []
    for policy in order:
        mine = rows[rows["policy"] == policy]
        flags = edge_flags(mine[names].to_numpy(dtype=float), low, high, band=band)
        n = len(mine)
        campaigns = int(mine["replicate"].nunique()) if "replicate" in mine.columns else 0
        out.append({"policy": policy, "campaigns": campaigns, "trials": n,
                    "on_boundary": int(flags.any(axis=1).sum()),
                    "in_corner": int(flags.all(axis=1).sum()) if flags.shape[1] else 0})
    table = pd.DataFrame(out, columns=["policy", "campaigns", "trials", "on_boundary", "in_corner"])
    n = table["trials"].to_numpy(dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        for what, count in (("boundary", "on_boundary"), ("corner", "in_corner")):
            k = table[count].to_numpy(dtype=float)
            lo, hi = share_interval(k, np.maximum(n, 1), confidence_level)
            table[f"{what}_share"] = np.where(n > 0, k / np.maximum(n, 1), np.nan)
            table[f"{what}_low"] = np.where(n > 0, lo, np.nan)
            table[f"{what}_high"] = np.where(n > 0, hi, np.nan)
    table["band"] = float(band)
    return table[["policy", "campaigns", "trials", "on_boundary", "boundary_share", "boundary_low",
                  "boundary_high", "in_corner", "corner_share", "corner_low", "corner_high", "band"]]
