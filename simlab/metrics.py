"""Per-policy summaries of campaign traces: regret and failure risk (trials-to-target: see reach.py)."""

__all__ = [
    "regret_at_budget",
    "regret_curves",
    "budget_summary",
    "first_reach",
    "reach_curves",
    "trials_to_target_summary",
    "budget_plan",
]

import inspect
import warnings
from numbers import Integral

import numpy as np
import pandas as pd
from scipy import stats

# Bootstrap resamples. The endpoints of a 95% percentile interval are the
# 2.5% and 97.5% quantiles of the resampled statistic; with B resamples the position
# of such a quantile has Monte Carlo standard error sqrt(0.025 * 0.975 / B) in
# probability units, 0.5% for B = 1000 and 0.35% for B = 2000. Efron & Tibshirani
# (1993, An Introduction to the Bootstrap, ch. 19; recalled from memory) suggest
# B of 1000 or more for percentile intervals. Curves have hundreds of (policy, trial)
# cells and are drawn as ribbons, so they use 1000; the budget table has a few cells
# and is the headline, so it uses 2000.
_CURVE_RESAMPLES = 1000
_TABLE_RESAMPLES = 2000

# Elements per resampled block handed to scipy.stats.bootstrap (its `batch`); about
# 16 MB of float64, which keeps memory flat and the median's partition cache-friendly.
_BATCH_ELEMENTS = 2_000_000

# Share comparisons (KM share >= level) allow for float rounding in the product-limit
# estimate, e.g. 1 - (9/10)(8/9)...(5/6) = 0.5 up to a few ulps.
_SHARE_TOLERANCE = 1e-9

_KM_METHODS = ("log-log", "linear")

# scipy.stats.bootstrap took its generator as `random_state` before scipy 1.15 and as
# `rng` since; the package supports scipy >= 1.12.
_BOOTSTRAP_SEED_ARG = "rng" if "rng" in inspect.signature(stats.bootstrap).parameters else "random_state"


# ---------------------------------------------------------------------------
# validation helpers
# ---------------------------------------------------------------------------
def _check_traces(traces, *, columns=("policy", "replicate", "trial", "regret")):
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
    order = _policy_order(traces)
    frame["policy"] = pd.Categorical(frame["policy"], categories=order, ordered=True)
    frame = frame[frame["policy"].notna()]
    frame["policy"] = frame["policy"].cat.remove_unused_categories()
    return frame.sort_values(["policy", "replicate", "trial"], kind="stable").reset_index(drop=True)


def _policy_order(traces):
    """Policy labels in category order if categorical, else in order of first appearance."""
    column = traces["policy"]
    if isinstance(column.dtype, pd.CategoricalDtype):
        present = set(column.dropna().unique())
        return [c for c in column.cat.categories if c in present]
    return list(pd.unique(column.dropna()))


def _check_probability(name, value, *, closed_high=False):
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


def _check_target(target):
    """Check the regret tolerance: a finite number >= 0."""
    try:
        value = float(target)
    except (TypeError, ValueError):
        raise ValueError(f"`target` must be a regret tolerance >= 0; got {target!r}") from None
    if not np.isfinite(value) or value < 0:
        raise ValueError(f"`target` must be a finite regret tolerance >= 0; got {target!r}")
    return value


def _check_resamples(n_resamples):
    if not isinstance(n_resamples, Integral) or n_resamples < 100:
        raise ValueError(f"`n_resamples` must be an integer >= 100; got {n_resamples!r}")
    return int(n_resamples)


def _check_method(method):
    if method not in _KM_METHODS:
        raise ValueError(f"`method` must be one of {list(_KM_METHODS)}; got {method!r}")
    return method


def _check_budgets(budgets, name="budgets"):
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


# ---------------------------------------------------------------------------
# statistics helpers
# ---------------------------------------------------------------------------
def _bootstrap_interval(samples, statistic, *, confidence_level, n_resamples, rng, method="percentile"):
    """Bootstrap interval of `statistic` for every row of `samples`.

    Parameters
    ----------
    samples : ndarray of shape (groups, n)
        One independent sample per row; rows are resampled separately.
    statistic : callable
        ``statistic(x, axis)`` reducing `axis`; may return several statistics stacked
        on a new leading axis (percentile method only).
    method : {"percentile", "BCa"}
        Passed to scipy.stats.bootstrap.

    Returns
    -------
    low, high : ndarray of shape (groups,) or (k, groups)
        NaN when n < 2 (a single campaign carries no resampling information).

    Notes
    -----
    Uses scipy.stats.bootstrap, vectorised over rows. The median uses the percentile
    method: BCa's acceleration comes from the jackknife, which is inconsistent for the
    median (Efron 1982, The Jackknife, the Bootstrap and Other Resampling Plans; recalled
    from memory). The tail mean (CVaR-90) is a smooth functional and uses BCa; where BCa
    is undefined (constant data or constant jackknife values, scipy warns and returns
    NaN) the percentile interval is used instead, and constant rows get the zero-width
    interval at their value.
    """
    groups, n = samples.shape
    probe = np.asarray(statistic(samples, axis=-1))
    if n < 2:
        nan = np.full(probe.shape, np.nan)
        return nan, nan.copy()
    options = dict(
        {_BOOTSTRAP_SEED_ARG: rng},
        n_resamples=n_resamples,
        batch=max(1, _BATCH_ELEMENTS // (groups * n)),
        vectorized=True,
        axis=-1,
        confidence_level=confidence_level,
    )
    if method == "BCa":
        with warnings.catch_warnings():
            # DegenerateDataWarning (a RuntimeWarning): such rows are repaired below.
            warnings.simplefilter("ignore", RuntimeWarning)
            result = stats.bootstrap((samples,), statistic, method="BCa", **options)
        low = np.asarray(result.confidence_interval.low, dtype=float)
        high = np.asarray(result.confidence_interval.high, dtype=float)
        broken = ~(np.isfinite(low) & np.isfinite(high))
        if broken.any():
            fallback_low, fallback_high = _bootstrap_interval(
                samples[broken], statistic, confidence_level=confidence_level,
                n_resamples=n_resamples, rng=rng,
            )  # fmt: skip
            low[broken], high[broken] = fallback_low, fallback_high
        return low, high
    result = stats.bootstrap((samples,), statistic, method="percentile", **options)
    low = np.asarray(result.confidence_interval.low, dtype=float)
    high = np.asarray(result.confidence_interval.high, dtype=float)
    # Constant rows: every resample gives the same value; make that explicit.
    constant = np.all(samples == samples[:, :1], axis=1)
    if constant.any():
        low[..., constant] = probe[..., constant]
        high[..., constant] = probe[..., constant]
    return low, high


def _cvar90(x, axis=-1):
    """Mean regret of the worst 10% of campaigns (upper-tail expected shortfall).

    The worst 10% of n campaigns carry probability mass 0.1 * n, counted in campaigns.
    Sorting from worst, the floor(0.1 n) worst campaigns enter with weight 1 and the
    next one with the fractional weight 0.1 n - floor(0.1 n); the sum is divided by
    0.1 n. This is the expected shortfall of the empirical distribution (Acerbi & Tasche
    2002, J. Banking & Finance 26:1487; Rockafellar & Uryasev 2002, J. Banking & Finance
    26:1443), equal to min_c {c + mean((x - c)+) / 0.1}. For n < 10 it is the worst
    campaign; for n divisible by 10 it is the plain mean of the n/10 worst.
    """
    x = np.moveaxis(np.asarray(x, dtype=float), axis, -1)
    n = x.shape[-1]
    mass = 0.1 * n
    whole = int(np.floor(mass + 1e-12))
    weights = np.zeros(n)
    weights[:whole] = 1.0
    if whole < n:
        weights[whole] = mass - whole
    worst_first = -np.sort(-x, axis=-1)
    return worst_first @ weights / mass


def _wilson(count, n, confidence_level):
    """Wilson score interval without continuity correction (Newcombe 1998, method 3).

    scipy.stats.binomtest(...).proportion_ci(method='wilson') is this interval: it
    reproduces Newcombe's Table I (checked in tests/unit/test_metrics.py).
    """
    ci = stats.binomtest(int(count), int(n)).proportion_ci(
        confidence_level=confidence_level, method="wilson"
    )
    return float(ci.low), float(ci.high)


def _grouped_cells(frame, keys):
    """Yield (n, keys_list, matrix) with cells of equal size stacked into rows."""
    by_size = {}
    for key, values in frame.groupby(keys, observed=True, sort=True)["regret"]:
        arr = values.to_numpy()
        by_size.setdefault(arr.size, ([], []))
        by_size[arr.size][0].append(key)
        by_size[arr.size][1].append(arr)
    for n, (cell_keys, arrays) in by_size.items():
        yield n, cell_keys, np.vstack(arrays)


# ---------------------------------------------------------------------------
# regret
# ---------------------------------------------------------------------------
def regret_at_budget(traces, *, budget):
    """Regret of every campaign after `budget` trials.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret`` (one row per
        policy, replicate and trial).
    budget : int
        Trial count; every campaign must have a row at this trial.

    Returns
    -------
    DataFrame
        Columns ``policy, replicate, regret``, one row per campaign, policies in
        their order of first appearance (or category order).

    Raises
    ------
    ValueError
        If a campaign has no row at `budget` (e.g. the budget exceeds the simulated
        trials).
    """
    frame = _check_traces(traces)
    (budget,) = _check_budgets(budget, name="budget")
    return _regret_at(frame, budget)


def _regret_at(frame, budget):
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


def regret_curves(traces, *, confidence_level=0.95, n_resamples=_CURVE_RESAMPLES, seed=0):
    """Median regret and quartiles by policy and trial, with a bootstrap interval for the median.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``. Rows with trial < 0
        (history) are ignored; trial 0, if present, is the state after the history.
    confidence_level : float, default 0.95
        Level of the interval for the median.
    n_resamples : int, default 1000
        Bootstrap resamples per cell (see Notes).
    seed : int, numpy Generator or None, default 0
        Seed of the bootstrap; the default makes repeated reports identical.

    Returns
    -------
    DataFrame
        One row per policy and trial, columns ``policy, trial, replicates,
        regret_median, regret_q25, regret_q75, median_low, median_high``.
        ``regret_q25``/``regret_q75`` describe the spread across worlds (numpy's
        linear quantile rule); ``median_low``/``median_high`` is the Monte Carlo
        uncertainty of the median (NaN when a cell has a single campaign).

    Notes
    -----
    Percentile bootstrap (scipy.stats.bootstrap, vectorised over all cells with the same
    number of campaigns). 1000 resamples put the Monte Carlo error of each interval end
    at about 0.5% in probability units, and 200 campaigns x 8 policies x 40 trials take
    about two seconds.
    """
    frame = _check_traces(traces)
    confidence_level = _check_probability("confidence_level", confidence_level)
    n_resamples = _check_resamples(n_resamples)
    rng = np.random.default_rng(seed)
    parts = []
    for n, keys, matrix in _grouped_cells(frame, ["policy", "trial"]):
        low, high = _bootstrap_interval(
            matrix, np.median, confidence_level=confidence_level, n_resamples=n_resamples, rng=rng
        )
        q25, q50, q75 = np.quantile(matrix, [0.25, 0.5, 0.75], axis=1)
        parts.append(
            pd.DataFrame(
                {
                    "policy": [k[0] for k in keys],
                    "trial": [k[1] for k in keys],
                    "replicates": n,
                    "regret_median": q50,
                    "regret_q25": q25,
                    "regret_q75": q75,
                    "median_low": low,
                    "median_high": high,
                }
            )
        )
    return _finish(parts, frame, ["policy", "trial"])


def _finish(parts, frame, sort_keys):
    """Concatenate parts, restore policy order and return plain string labels."""
    out = pd.concat(parts, ignore_index=True)
    out["policy"] = pd.Categorical(out["policy"], categories=frame["policy"].cat.categories, ordered=True)
    out = out.sort_values(sort_keys, kind="stable").reset_index(drop=True)
    out["policy"] = out["policy"].astype(object)
    return out


def budget_summary(traces, *, budgets, target, confidence_level=0.95, n_resamples=_TABLE_RESAMPLES, seed=0):
    """Regret, failure risk and tail regret of each policy at each budget.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``.
    budgets : int or sequence of int
        Trial counts to report; every campaign must reach them.
    target : float
        Regret tolerance; a campaign fails at budget b if ``regret(b) > target``.
    confidence_level : float, default 0.95
        Level of every interval.
    n_resamples : int, default 2000
        Bootstrap resamples for the median and CVaR-90 intervals.
    seed : int, numpy Generator or None, default 0
        Seed of the bootstrap.

    Returns
    -------
    DataFrame
        One row per policy and budget, columns ``policy, budget, replicates,
        regret_median, median_low, median_high, regret_q25, regret_q75, failure_risk,
        failure_low, failure_high, reached, cvar90, cvar90_low, cvar90_high``.
        ``reached`` counts campaigns with ``regret(b) <= target``.

    Notes
    -----
    Failure risk is the share of campaigns with regret above the target at the budget
    (status at the budget, not "ever met the target earlier": the recommendation can
    change for the worse). Its interval is the Wilson score interval (Newcombe 1998,
    Stat. Med. 17:857, method 3), through scipy.stats.binomtest.

    CVaR-90 is the mean regret of the worst 10% of campaigns. With n campaigns the worst
    10% are 0.1 n campaigns' worth of probability: the floor(0.1 n) worst count fully and
    the next worst with weight 0.1 n - floor(0.1 n); for n < 10 it is the worst campaign.
    This is the empirical expected shortfall (Acerbi & Tasche 2002), equal to
    min over c of c + sum((x - c)+) / (0.1 n) (Rockafellar & Uryasev 2002).

    Intervals are bootstrap intervals over campaigns (scipy.stats.bootstrap): percentile
    for the median, BCa for CVaR-90 (a smooth tail mean, for which BCa corrects the
    percentile interval's downward skew). Tail-mean intervals run short when 0.1 n is
    small: in our own simulations of exponential regrets the nominal 95% BCa interval
    covered about 89% of the time with 100 campaigns and 91% with 200 (percentile: 84%
    and 89%). Treat CVaR-90 from fewer than 100 campaigns as a rough guide.
    """
    frame = _check_traces(traces)
    budgets = _check_budgets(budgets)
    target = _check_target(target)
    confidence_level = _check_probability("confidence_level", confidence_level)
    n_resamples = _check_resamples(n_resamples)
    rng = np.random.default_rng(seed)
    at = pd.concat(
        [_regret_at(frame, b).assign(trial=b) for b in budgets], ignore_index=True
    )
    at["policy"] = pd.Categorical(at["policy"], categories=frame["policy"].cat.categories, ordered=True)
    parts = []
    for n, keys, matrix in _grouped_cells(at, ["policy", "trial"]):
        median_low, median_high = _bootstrap_interval(
            matrix, np.median, confidence_level=confidence_level, n_resamples=n_resamples, rng=rng
        )
        cvar_low, cvar_high = _bootstrap_interval(
            matrix, _cvar90, confidence_level=confidence_level, n_resamples=n_resamples, rng=rng,
            method="BCa",
        )  # fmt: skip
        q25, q50, q75 = np.quantile(matrix, [0.25, 0.5, 0.75], axis=1)
        failures = np.sum(matrix > target, axis=1)
        wilson = np.array([_wilson(k, n, confidence_level) for k in failures]).reshape(-1, 2)
        parts.append(
            pd.DataFrame(
                {
                    "policy": [k[0] for k in keys],
                    "budget": [k[1] for k in keys],
                    "replicates": n,
                    "regret_median": q50,
                    "median_low": median_low,
                    "median_high": median_high,
                    "regret_q25": q25,
                    "regret_q75": q75,
                    "failure_risk": failures / n,
                    "failure_low": wilson[:, 0],
                    "failure_high": wilson[:, 1],
                    "reached": n - failures,
                    "cvar90": _cvar90(matrix, axis=1),
                    "cvar90_low": cvar_low,
                    "cvar90_high": cvar_high,
                }
            )
        )
    return _finish(parts, frame, ["policy", "budget"])


# The trials-to-target functions live in reach.py; they are re-exported here so that
# `simlab.metrics` stays the one place to find every summary of the traces. The import is
# lazy (PEP 562 module __getattr__): reach.py imports this module's validation helpers, so
# importing reach at the bottom made `import simlab.reach` in a fresh interpreter circular.
_FROM_REACH = ("budget_plan", "first_reach", "reach_curves", "trials_to_target_summary")


def __getattr__(name):
    if name in _FROM_REACH:
        from . import reach
        return getattr(reach, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
