"""Per-policy summaries of campaign traces: regret, within-target share and failure risk (budgets: see reach.py)."""

__all__ = [
    "regret_at_budget",
    "regret_curves",
    "budget_summary",
    "within_target_curves",
    "first_reach",
    "reach_curves",
    "trials_to_target_summary",
    "budget_plan",
]

import inspect
import math
import warnings
from numbers import Integral

import numpy as np
import pandas as pd
from scipy import stats

# Bootstrap resamples (the paired comparisons in compare.py; the tables here no longer
# resample, see regret_curves and budget_summary). The endpoints of a 95% percentile interval are the
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
    Uses scipy.stats.bootstrap, vectorised over rows (the paired comparisons of
    compare.py use it). A median should use the percentile method: BCa's acceleration
    comes from the jackknife, which is inconsistent for the median (Efron 1982, The
    Jackknife, the Bootstrap and Other Resampling Plans; recalled from memory). Where BCa
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


def _share_interval(count, n, confidence_level):
    """Clopper-Pearson exact interval of a binomial share, vectorised.

    Parameters
    ----------
    count, n : array_like of int
        Successes and trials (n >= 1), broadcast together.
    confidence_level : float

    Returns
    -------
    low, high : ndarray of float

    Notes
    -----
    Clopper & Pearson (1934, Biometrika 26:404): low = Beta quantile a/2 of
    Beta(k, n - k + 1), high = quantile 1 - a/2 of Beta(k + 1, n - k), with a = 1 -
    confidence_level; 0 when k = 0 and 1 when k = n, so at a share of exactly 0 the
    upper end is the exact one-sided bound 1 - (a/2)^(1/n) (0.0711 for 0 of 50, 95 %).
    It is scipy.stats.binomtest(...).proportion_ci(method="exact") (checked in
    tests/unit/test_metrics.py), written with scipy.stats.beta so that a whole table
    is one call. Chosen over the Wilson score interval because its coverage is at
    least the nominal level for every true share: at 50 campaigns the 95 % Wilson
    interval covers only 84 % when the true share is 0.35 % (or 99.65 %), and less than
    93 % on eight narrow ranges of shares near 0 and 1 (exact binomial sums,
    tests/unit/test_coverage.py), which is where a good policy's failure risk lives.
    """
    k = np.asarray(count, dtype=float)
    n = np.asarray(n, dtype=float)
    k, n = np.broadcast_arrays(k, n)
    tail = (1.0 - confidence_level) / 2.0
    with np.errstate(invalid="ignore", divide="ignore"):
        low = np.where(k > 0, stats.beta.ppf(tail, np.maximum(k, 1), n - k + 1), 0.0)
        high = np.where(k < n, stats.beta.ppf(1.0 - tail, k + 1, np.maximum(n - k, 1)), 1.0)
    return np.asarray(low, dtype=float), np.asarray(high, dtype=float)


def _median_ranks(n, confidence_level):
    """1-based ranks (l, u) of the order statistics bounding the median, or None.

    [X_(l), X_(u)] with l the smallest k such that P(Bin(n, 1/2) <= k) >= a/2 (a = 1 -
    confidence_level) and u = n + 1 - l covers the population median with probability
    1 - 2 P(Bin(n, 1/2) <= l - 1) >= confidence_level for every continuous distribution,
    and at least that for every other one (the interval is closed). Thompson (1936,
    Ann. Math. Statist. 7:122); these are the ranks of
    scipy.stats.quantile_test(x, p=0.5).confidence_interval() (checked in
    tests/unit/test_coverage.py). None when n is too small for any pair of order
    statistics to reach the level (n < 6 at 95 %).
    """
    tail = (1.0 - confidence_level) / 2.0
    low = int(stats.binom.ppf(tail, n, 0.5))
    if low < 1:
        return None
    return low, n + 1 - low


def _median_interval(samples, confidence_level):
    """Distribution-free interval of the median of every row of `samples` (NaN when n < 6 at 95 %)."""
    groups, n = samples.shape
    ranks = _median_ranks(n, confidence_level)
    if ranks is None:
        nan = np.full(groups, np.nan)
        return nan, nan.copy()
    ordered = np.sort(samples, axis=1)
    return ordered[:, ranks[0] - 1].copy(), ordered[:, ranks[1] - 1].copy()


def _cvar90_lower(samples, confidence_level):
    """Distribution-free lower confidence bound of CVaR-90 for every row of `samples`.

    Thomas & Learned-Miller (2019, Concentration inequalities for conditional value at
    risk, ICML), built on the Dvoretzky-Kiefer-Wolfowitz inequality with Massart's (1990,
    Ann. Probab. 18:1269) constant in its one-sided form: with probability at least 1 -
    d, the true distribution function F satisfies F(x) <= F_n(x) + e for every x, where
    e = sqrt(log(1/d) / (2n)) (valid for d <= 1/2). The distribution G = min(1, F_n + e)
    is then stochastically smaller than F, so its upper-tail mean bounds CVaR-90 from
    below: the mean of the empirical quantile function over [0.9 - e, 1 - e] (values
    below 0 would come from the quantile below the sample, which only lowers the bound;
    they are taken as 0 because regret is >= 0).

    There is no upper bound to go with it: an upper bound on a tail mean needs a known
    upper bound on the values (the construction above, mirrored, moves mass e to that
    bound), and regret has none (a world drawn from a Gaussian-process prior has no
    largest possible range). At 50 campaigns e = 0.17 > 0.1, so even a known bound would
    be the whole upper bound.

    Returns NaN for confidence levels below 1/2 (Massart's one-sided constant needs d <= 1/2).
    """
    groups, n = samples.shape
    if confidence_level < 0.5:
        return np.full(groups, np.nan)
    eps = math.sqrt(math.log(1.0 / (1.0 - confidence_level)) / (2.0 * n))
    lo, hi = 0.9 - eps, 1.0 - eps
    # The i-th smallest value (0-based) holds quantile levels [i/n, (i+1)/n]; its weight
    # is the overlap with [lo, hi] over the window's width 0.1. Overlap below level 0
    # would carry the value 0 and adds nothing.
    edges = np.arange(n + 1) / n
    weights = np.clip(np.minimum(edges[1:], hi) - np.maximum(edges[:-1], lo), 0.0, None) / 0.1
    return np.sort(samples, axis=1) @ weights


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
    """Median regret and quartiles by policy and trial, with a distribution-free interval for the median.

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``. Rows with trial < 0
        (history) are ignored; trial 0, if present, is the state after the history.
    confidence_level : float, default 0.95
        Level of the interval for the median.
    n_resamples : int, default 1000
        Accepted (and checked) so that callers written for the earlier bootstrap
        interval run unchanged; no interval of this table resamples.
    seed : int, numpy Generator or None, default 0
        Likewise accepted and unused.

    Returns
    -------
    DataFrame
        One row per policy and trial, columns ``policy, trial, replicates,
        regret_median, regret_q25, regret_q75, median_low, median_high``.
        ``regret_q25``/``regret_q75`` describe the spread across worlds (numpy's
        linear quantile rule); ``median_low``/``median_high`` is the Monte Carlo
        uncertainty of the median (NaN when a cell has too few campaigns for any
        interval at this level: fewer than 6 at 95 %).

    Notes
    -----
    The interval is the pair of order statistics of the binomial (sign-test) interval
    for the median (Thompson 1936; `_median_ranks`): coverage at least
    `confidence_level` whatever the distribution of regret, at any number of campaigns
    (96.7 % at 50 campaigns, 95 % nominal). It replaced a percentile bootstrap, whose
    coverage at 50 campaigns is measured in tests/unit/test_coverage.py.
    """
    frame = _check_traces(traces)
    confidence_level = _check_probability("confidence_level", confidence_level)
    _check_resamples(n_resamples)
    parts = []
    for n, keys, matrix in _grouped_cells(frame, ["policy", "trial"]):
        low, high = _median_interval(matrix, confidence_level)
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
    """Regret, within-target share, failure risk and tail regret of each policy at each budget.

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
        Accepted (and checked) so that callers written for the earlier bootstrap
        intervals run unchanged; no interval of this table resamples.
    seed : int, numpy Generator or None, default 0
        Likewise accepted and unused.

    Returns
    -------
    DataFrame
        One row per policy and budget, columns ``policy, budget, replicates,
        regret_median, median_low, median_high, regret_q25, regret_q75, failure_risk,
        failure_low, failure_high, reached, cvar90, cvar90_low, cvar90_high,
        within_target, within_low, within_high``. ``reached`` counts campaigns with
        ``regret(b) <= target``; ``within_target = reached / replicates`` is the share
        `within_target_curves` and `budget_plan` report, with the same interval, and
        ``failure_risk = 1 - within_target`` with ``failure_low = 1 - within_high``
        and ``failure_high = 1 - within_low``. ``cvar90_high`` is always NaN (see Notes).

    Notes
    -----
    Failure risk is the share of campaigns with regret above the target at the budget
    (status at the budget, not "ever met the target earlier": the recommendation can
    change for the worse). Its interval, and the within-target share's, is the
    Clopper-Pearson exact interval (`_share_interval`), whose coverage is at least the
    nominal level for every true share.

    The median's interval is distribution-free (binomial order statistics, see
    `regret_curves`); NaN with fewer than 6 campaigns at 95 %.

    CVaR-90 is the mean regret of the worst 10% of campaigns. With n campaigns the worst
    10% are 0.1 n campaigns' worth of probability: the floor(0.1 n) worst count fully and
    the next worst with weight 0.1 n - floor(0.1 n); for n < 10 it is the worst campaign.
    This is the empirical expected shortfall (Acerbi & Tasche 2002), equal to
    min over c of c + sum((x - c)+) / (0.1 n) (Rockafellar & Uryasev 2002).
    ``cvar90_low`` is a one-sided lower confidence bound at `confidence_level`,
    distribution-free (Thomas & Learned-Miller 2019; `_cvar90_lower`): "the tail is at
    least this bad". No upper bound is given: one that holds without assumptions needs
    a known largest possible regret, which a Gaussian-process world does not have, and
    the bootstrap intervals used before covered only about 80 % at 50 campaigns, missing
    on the high side (tests/unit/test_coverage.py).
    """
    frame = _check_traces(traces)
    budgets = _check_budgets(budgets)
    target = _check_target(target)
    confidence_level = _check_probability("confidence_level", confidence_level)
    _check_resamples(n_resamples)
    at = pd.concat(
        [_regret_at(frame, b).assign(trial=b) for b in budgets], ignore_index=True
    )
    at["policy"] = pd.Categorical(at["policy"], categories=frame["policy"].cat.categories, ordered=True)
    parts = []
    for n, keys, matrix in _grouped_cells(at, ["policy", "trial"]):
        median_low, median_high = _median_interval(matrix, confidence_level)
        q25, q50, q75 = np.quantile(matrix, [0.25, 0.5, 0.75], axis=1)
        within = np.sum(matrix <= target, axis=1)
        within_low, within_high = _share_interval(within, n, confidence_level)
        share = within / n
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
                    "failure_risk": 1.0 - share,
                    "failure_low": 1.0 - within_high,
                    "failure_high": 1.0 - within_low,
                    "reached": within,
                    "cvar90": _cvar90(matrix, axis=1),
                    "cvar90_low": _cvar90_lower(matrix, confidence_level),
                    "cvar90_high": np.nan,
                    "within_target": share,
                    "within_low": within_low,
                    "within_high": within_high,
                }
            )
        )
    return _finish(parts, frame, ["policy", "budget"])


def within_target_curves(traces, *, target, confidence_level=0.95):
    """Share of campaigns whose recommendation after each trial is within the target.

    What a team that stops after trial t ships: the recommendation it holds then.
    Budgets are planned on this share (`budget_plan`).

    Parameters
    ----------
    traces : DataFrame
        Traces with columns ``policy, replicate, trial, regret``, and optionally
        ``horizon`` (the budget the row's campaign was planned for, as the runner writes it).
    target : float
        Regret tolerance: a campaign is within target after trial t if ``regret(t) <= target``.
    confidence_level : float, default 0.95
        Level of the interval.

    Returns
    -------
    DataFrame
        The ``within_target.csv`` table: one row per policy and trial, columns
        ``policy, trial, replicates, campaigns_within, within_target, within_low,
        within_high, horizon, horizon_aware``. ``within_target`` is
        ``campaigns_within / replicates`` with its Clopper-Pearson interval (the same
        numbers as `budget_summary` at the study's budgets). ``horizon`` (nullable
        integer, <NA> without that column) is the budget the campaign behind the row
        was planned for; ``horizon_aware`` is True for a policy replayed once per budget.

    Notes
    -----
    The share need not rise with t: a recommendation can get worse again when new
    trials move the model's best mean to a worse input. For a horizon-aware policy the
    runner keeps, for trials in (previous budget, budget], the rows of the campaign
    planned for that budget (`simlab.replay.runner.replay_replicate`): at each of the study's
    budgets the share comes from the campaign planned for exactly that budget; at other
    trials from the campaign planned for the next larger budget, stopped early.
    """
    frame = _check_traces(traces)
    target = _check_target(target)
    confidence_level = _check_probability("confidence_level", confidence_level)
    return _within_curves(frame, _horizons(traces), target, confidence_level)


def _horizons(traces):
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


def _within_curves(frame, horizons, target, confidence_level):
    """The `within_target_curves` table from a checked frame."""
    frame = frame.assign(within=frame["regret"] <= target)
    grouped = frame.groupby(["policy", "trial"], observed=True, sort=True)["within"]
    counts = grouped.sum().astype(np.int64)
    sizes = grouped.size().astype(np.int64)
    low, high = _share_interval(counts.to_numpy(), sizes.to_numpy(), confidence_level)
    out = pd.DataFrame(
        {
            "policy": counts.index.get_level_values("policy").astype(object),
            "trial": counts.index.get_level_values("trial").to_numpy(),
            "replicates": sizes.to_numpy(),
            "campaigns_within": counts.to_numpy(),
            "within_target": counts.to_numpy() / sizes.to_numpy(),
            "within_low": low,
            "within_high": high,
        }
    )
    if horizons is None:
        out["horizon"] = pd.array([pd.NA] * len(out), dtype="Int64")
        out["horizon_aware"] = False
    else:
        index = pd.MultiIndex.from_arrays([out["policy"], out["trial"]])
        out["horizon"] = pd.array(horizons.reindex(index).to_numpy(dtype=float), dtype="Int64")
        varies = out.groupby("policy", sort=False)["horizon"].transform(lambda h: h.nunique(dropna=True) > 1)
        out["horizon_aware"] = varies.astype(bool).to_numpy()
    return out


# The trials-to-target functions live in reach.py; they are re-exported here so that
# `simlab.evidence.metrics` stays the one place to find every summary of the traces. The import is
# lazy (PEP 562 module __getattr__): reach.py imports this module's validation helpers, so
# importing reach at the bottom made `import simlab.evidence.reach` in a fresh interpreter circular.
_FROM_REACH = ("budget_plan", "first_reach", "reach_curves", "trials_to_target_summary")


def __getattr__(name):
    if name in _FROM_REACH:
        from . import reach
        return getattr(reach, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
