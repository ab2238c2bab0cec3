"""Where a policy's own trials land in the box: the share on its boundary and in its corners, per policy."""

from __future__ import annotations

__all__ = ["BAND", "placement_table", "own_trials", "edge_flags", "effective_trials", "box_view"]

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


def box_view(traces, space):
    """The inputs that have a boundary, for :func:`placement_table`: (frame, names, low, high).

    Only continuous and log inputs have one (a stepped input's ends are two of its few values,
    and a categorical input has no order), and a [candidates] library has none. A log input is measured in ``log x``, where its prior
    is stationary, so "within 1 % of a bound" means 1 % of its log range.
    """
    from ..study.types import LOG
    if space.library is not None:       # the rows are the allowed trials: a row at a column's end is no sign
        return traces, [], [], []       # that the space is too small, so a library has no boundary to report
    names = [space.names[j] for j in space.numeric if j not in space.discrete]
    logs = [space.names[j] for j in range(space.dim) if space.kind(j) == LOG]
    view = traces.copy() if logs else traces
    for name in logs:
        view[name] = np.log(pd.to_numeric(view[name]))
    bounds = {space.names[j]: (space.low[j], space.high[j]) for j in range(space.dim)}
    low = [np.log(bounds[n][0]) if n in logs else bounds[n][0] for n in names]
    high = [np.log(bounds[n][1]) if n in logs else bounds[n][1] for n in names]
    return view, names, low, high


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


def effective_trials(counts, trials, confidence_level=0.95):
    """Korn-Graubard effective number of trials of a share pooled over campaigns.

    Parameters
    ----------
    counts, trials : ndarray of shape (R,)
        Per campaign: trials that hit (e.g. on the boundary) and own trials.
    confidence_level : float

    Returns
    -------
    float
        ``n* = p (1 - p) / v``, with ``p`` the pooled share and ``v`` its between-campaign
        (ratio-estimator) variance ``R / (R - 1) * sum((k_r - p m_r)^2) / n^2``, at most
        the number of trials ``n``, then times ``(z / t_{R-1})^2`` for the R - 1 degrees of
        freedom the variance has; ``n`` when ``p`` is 0 or 1 or ``v`` is 0; NaN with fewer
        than two campaigns (nothing to estimate the variance from).

    Notes
    -----
    Korn & Graubard (1998), Confidence intervals for proportions with small expected number
    of positive counts estimated from survey data, Survey Methodology 24:193 (from memory):
    the Clopper-Pearson interval of ``n* p`` hits in ``n*`` trials. Trials of one campaign
    are not independent (a campaign that goes to the edge tends to stay there): on the demo
    study the variance between campaigns is 7 to 21 times the binomial one, so the plain
    interval over trials would be 3 to 4.6 times too narrow for the share a repeated study
    would see. tests/unit/test_placement.py checks the coverage of both by simulation.
    """
    from scipy import stats

    k, m = np.asarray(counts, dtype=float), np.asarray(trials, dtype=float)
    R, n = k.size, float(m.sum())
    if R < 2 or n <= 0:
        return np.nan
    p = k.sum() / n
    v = R / (R - 1) * np.sum((k - p * m) ** 2) / n**2
    if p <= 0.0 or p >= 1.0 or v <= 0.0:
        return n
    tail = 1.0 - (1.0 - confidence_level) / 2.0
    ratio = (stats.norm.ppf(tail) / stats.t.ppf(tail, R - 1)) ** 2
    return min(n, p * (1.0 - p) / v) * ratio


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
        One row per policy (study order): ``policy, campaigns, trials``, then for the
        boundary (``on_boundary``, ``boundary_*``) and the corners (``in_corner``,
        ``corner_*``): the count, the share, ``_low``/``_high`` the Clopper-Pearson interval
        over trials, ``_effective`` the effective number of trials and ``_worlds_low`` /
        ``_worlds_high`` the interval that allows for campaigns differing (NaN with one
        campaign); and ``band``. A trial is on the boundary when any input lies within
        ``band`` × range of a bound, in a corner when every input does. Lost trials count:
        the policy chose them.

    Notes
    -----
    ``_low``/``_high`` are Clopper & Pearson (1934, Biometrika 26:404), `share_interval`,
    with the trials as the sample: how precisely this study's trials were counted. Trials
    of one campaign are not independent (a campaign that goes to the edge tends to stay
    there), so for the share a repeated study would see use ``_worlds_low``/``_worlds_high``:
    Clopper-Pearson at the Korn-Graubard effective number of trials (`effective_trials`).
    """
    names = list(names)
    rows = own_trials(traces)
    missing = [n for n in names if n not in rows.columns]
    if missing:
        raise ValueError(f"`traces` lacks input column(s) {missing}; it has {list(traces.columns)}")
    order = policy_order(traces)
    replicate = rows["replicate"] if "replicate" in rows.columns else pd.Series(0, index=rows.index)
    out = []
    for policy in order:
        mine = rows["policy"] == policy
        flags = edge_flags(rows.loc[mine, names].to_numpy(dtype=float), low, high, band=band)
        hits = pd.DataFrame({"replicate": replicate[mine].to_numpy(), "boundary": flags.any(axis=1),
                             "corner": flags.all(axis=1) if flags.shape[1] else False})
        per = hits.groupby("replicate").agg(trials=("boundary", "size"), boundary=("boundary", "sum"),
                                            corner=("corner", "sum"))
        row = {"policy": policy, "campaigns": len(per), "trials": len(hits),
               "on_boundary": int(hits["boundary"].sum()), "in_corner": int(hits["corner"].sum())}
        for what in ("boundary", "corner"):
            row[f"{what}_effective"] = effective_trials(per[what], per["trials"], confidence_level)
        out.append(row)
    table = pd.DataFrame(out, columns=["policy", "campaigns", "trials", "on_boundary", "in_corner",
                                       "boundary_effective", "corner_effective"])
    n = table["trials"].to_numpy(dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        for what, count in (("boundary", "on_boundary"), ("corner", "in_corner")):
            k = table[count].to_numpy(dtype=float)
            share = np.where(n > 0, k / np.maximum(n, 1), np.nan)
            lo, hi = share_interval(k, np.maximum(n, 1), confidence_level)
            table[f"{what}_share"] = share
            table[f"{what}_low"] = np.where(n > 0, lo, np.nan)
            table[f"{what}_high"] = np.where(n > 0, hi, np.nan)
            eff = table[f"{what}_effective"].to_numpy(dtype=float)
            ok = np.isfinite(eff) & (eff > 0)
            lo, hi = share_interval(np.where(ok, share * eff, 0.0), np.where(ok, eff, 1.0), confidence_level)
            table[f"{what}_worlds_low"] = np.where(ok, lo, np.nan)
            table[f"{what}_worlds_high"] = np.where(ok, hi, np.nan)
    table["band"] = float(band)
    return table[["policy", "campaigns", "trials", "on_boundary", "boundary_share", "boundary_low", "boundary_high",
                  "boundary_effective", "boundary_worlds_low", "boundary_worlds_high", "in_corner", "corner_share",
                  "corner_low", "corner_high", "corner_effective", "corner_worlds_low", "corner_worlds_high", "band"]]
