"""The conventions of the traces frame, shared by every summary: which columns it must have,
which rows count (trial >= 0), policy order, regret at a budget, planned horizons, and the
checks of the arguments the summaries take. Everything in evidence/ reads traces through here."""

from numbers import Integral

import numpy as np
import pandas as pd

# `n_resamples` is still accepted (and checked) by the summaries for compatibility of their
# signatures; no table resamples any more: every interval is exact or distribution-free
# (intervals.py). The defaults keep their old values, 1000 for curves and 2000 for tables.
CURVE_RESAMPLES = 1000


TABLE_RESAMPLES = 2000


# Share comparisons (KM share >= level) allow for float rounding in the product-limit
# estimate, e.g. 1 - (9/10)(8/9)...(5/6) = 0.5 up to a few ulps.
SHARE_TOLERANCE = 1e-9


KM_METHODS = ("log-log", "linear")


# ---------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------
def check_traces(traces, *, columns=("policy", "replicate", "trial", "regret")):
    """Validate a traces frame and return the rows with trial >= 0, sorted."""
    if not isinstance(traces, pd.DataFrame):
        raise ValueError(f"`traces` must be a pandas DataFrame; got {type(traces).__name__}")
    missing = [c for c in columns if c not in traces.columns]
    if missing:
        raise ValueError(f"`traces` lacks required column(s) {missing}; it has {list(traces.columns)}")
    if len(traces) == 0:
        raise ValueError("`traces` has no rows")
    trial = pd.to_numeric(traces["trial"], errors="coerce").to_numpy(dtype=float)
    if not np.all(np.isfinite(trial)) or np.any(trial != np.round(trial)):
        raise ValueError("`traces['trial']` must hold whole numbers")
    replicate = pd.to_numeric(traces["replicate"], errors="coerce").to_numpy(dtype=float)
    if not np.all(np.isfinite(replicate)) or np.any(replicate != np.round(replicate)):
        raise ValueError("`traces['replicate']` must hold whole numbers")
    regret = pd.to_numeric(traces["regret"], errors="coerce").to_numpy(dtype=float)
    if not np.all(np.isfinite(regret)):
        raise ValueError("`traces['regret']` must be finite numbers; found NaN, inf or text")
    if np.any(regret < 0):
        raise ValueError(f"`traces['regret']` must be >= 0; smallest value is {regret.min()!r}")
    if traces["policy"].isna().any():
        raise ValueError("`traces['policy']` has missing labels")
    # History rows (trial < 0) describe data gathered before the campaign; trial 0, when
    # present, is the state after the history alone. Only trial >= 0 enters the summaries.
    keep = trial >= 0
    if not keep.any():
        raise ValueError("`traces` has no rows with trial >= 0")
    frame = pd.DataFrame(
        {
            "policy": traces["policy"].to_numpy()[keep],
            "replicate": replicate[keep].astype(np.int64),
            "trial": trial[keep].astype(np.int64),
            "regret": regret[keep],
        }
    )
    if frame.duplicated(["policy", "replicate", "trial"]).any():
        dup = frame[frame.duplicated(["policy", "replicate", "trial"], keep=False)].iloc[0]
        raise ValueError(
            "`traces` must have one row per (policy, replicate, trial); "
            f"({dup['policy']!r}, {dup['replicate']}, {dup['trial']}) appears more than once"
        )
    order = policy_order(traces)
    frame["policy"] = pd.Categorical(frame["policy"], categories=order, ordered=True)
    frame = frame[frame["policy"].notna()]
    frame["policy"] = frame["policy"].cat.remove_unused_categories()
    return frame.sort_values(["policy", "replicate", "trial"], kind="stable").reset_index(drop=True)


def policy_order(traces):
    """Policy labels in category order if categorical, else in order of first appearance."""
    column = traces["policy"]
    if isinstance(column.dtype, pd.CategoricalDtype):
        present = set(column.dropna().unique())
        return [c for c in column.cat.categories if c in present]
    return list(pd.unique(column.dropna()))


def check_probability(name, value, *, closed_high=False):
    """Check 0 < value < 1 (or <= 1 when `closed_high`) and return it as float."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"`{name}` must be a number between 0 and 1; got {value!r}") from None
    ok = 0.0 < value <= 1.0 if closed_high else 0.0 < value < 1.0
    if not ok:
        rule = "0 < x <= 1" if closed_high else "0 < x < 1"
        raise ValueError(f"`{name}` must satisfy {rule}; got {value!r}")
    return value


def check_target(target):
    """Check the regret tolerance: a finite number >= 0."""
    try:
        value = float(target)
    except (TypeError, ValueError):
        raise ValueError(f"`target` must be a regret tolerance >= 0; got {target!r}") from None
    if not np.isfinite(value) or value < 0:
        raise ValueError(f"`target` must be a finite regret tolerance >= 0; got {target!r}")
    return value


def check_resamples(n_resamples):
    if not isinstance(n_resamples, Integral) or n_resamples < 100:
        raise ValueError(f"`n_resamples` must be an integer >= 100; got {n_resamples!r}")
    return int(n_resamples)


def check_method(method):
    if method not in KM_METHODS:
        raise ValueError(f"`method` must be one of {list(KM_METHODS)}; got {method!r}")
    return method


def check_budgets(budgets, name="budgets"):
    """Return a sorted tuple of distinct whole-number budgets >= 0."""
    if isinstance(budgets, Integral):
        budgets = [budgets]
    try:
        values = list(budgets)
    except TypeError:
        raise ValueError(f"`{name}` must be an integer or a sequence of integers; got {budgets!r}") from None
    if not values:
        raise ValueError(f"`{name}` must not be empty")
    for b in values:
        if not isinstance(b, Integral) or isinstance(b, bool) or b < 0:
            raise ValueError(f"`{name}` must hold whole numbers >= 0; got {b!r}")
    return tuple(sorted({int(b) for b in values}))


def grouped_cells(frame, keys):
    """Yield (n, keys_list, matrix) with cells of equal size stacked into rows."""
    by_size = {}
    for key, values in frame.groupby(keys, observed=True, sort=True)["regret"]:
        arr = values.to_numpy()
        by_size.setdefault(arr.size, ([], []))
        by_size[arr.size][0].append(key)
        by_size[arr.size][1].append(arr)
    for n, (cell_keys, arrays) in by_size.items():
        yield n, cell_keys, np.vstack(arrays)


def regret_at(frame, budget):
    campaigns = frame[["policy", "replicate"]].drop_duplicates()
    at = frame[frame["trial"] == budget][["policy", "replicate", "regret"]]
    if len(at) != len(campaigns):
        last = frame.groupby(["policy", "replicate"], observed=True)["trial"].max()
        short = last[last < budget]
        detail = (
            f"campaign {short.index[0]} ends at trial {short.iloc[0]}"
            if len(short)
            else "some campaigns have no row at that trial"
        )
        raise ValueError(f"budget {budget} is not available for every campaign: {detail}")
    return at.reset_index(drop=True)


def horizons(traces):
    """Planned horizon per (policy, trial) from a ``horizon`` column, or None without one."""
    if not isinstance(traces, pd.DataFrame) or "horizon" not in traces.columns:
        return None
    trial = pd.to_numeric(traces["trial"], errors="coerce")
    rows = traces[trial >= 0]
    horizon = pd.to_numeric(rows["horizon"], errors="coerce")
    if horizon.isna().any():
        raise ValueError("`traces['horizon']` must hold whole numbers")
    keys = [rows["policy"].astype(object), trial[trial >= 0].astype(np.int64)]
    grouped = horizon.groupby(keys)
    low, high = grouped.min(), grouped.max()
    if (low != high).any():
        policy, t = low[low != high].index[0]
        raise ValueError(
            f"`traces['horizon']` must be the same for every campaign of a policy at a trial; "
            f"policy {policy!r} has several at trial {t}"
        )
    return low.astype(np.int64)


# ---------------------------------------------------------------------------
# rows that count as a campaign's own trials (harmful trials, limits)
# ---------------------------------------------------------------------------
def campaign_trials(traces, budget):
    """The rows of trials 1 .. `budget`: what a campaign ran within that budget.

    Past trials (``[history]``: trial <= 0, or ``history`` True) never count; the initial design
    does (its trials are run too). Raises when `budget` lies beyond the traces' last trial."""
    trial = pd.to_numeric(traces["trial"])
    if budget > int(trial.max()):
        raise ValueError(f"budget {budget} is beyond the traces' last trial {int(trial.max())}")
    rows = traces[(trial >= 1) & (trial <= budget)]
    if "history" in rows.columns:
        rows = rows[~rows["history"].to_numpy(dtype=bool)]
    return rows


def flags(rows, column):
    """A column of true/false flags (bool, or 0/1) as a bool array; anything else raises."""
    values = rows[column]
    if values.dtype == bool:
        return values.to_numpy()
    numeric = pd.to_numeric(values, errors="coerce").to_numpy(dtype=float)
    bad = ~((numeric == 0.0) | (numeric == 1.0))
    if bad.any():
        raise ValueError(f"`traces[{column!r}]` must hold true/false flags; found {values[bad].iloc[0]!r}")
    return numeric == 1.0


def horizon_aware(traces, top):
    """Labels of the policies whose trials 1 .. came from campaigns planned for a budget other than
    `top` (the largest) at some trial: horizon-aware rules replayed once per budget. Empty without
    a ``horizon`` column."""
    if "horizon" not in traces.columns:
        return set()
    return set(traces.loc[traces["trial"] >= 1].groupby("policy", observed=True)["horizon"]
               .agg(lambda h: bool((h != top).any())).pipe(lambda s: s[s].index.astype(str)))
