"""Intervals with known coverage at a study's size: Clopper-Pearson shares, order-statistic
medians, the DKW lower bound of CVaR-90 and exact bounds of nested shares (win rates). Each is
checked by repeated studies in tests/unit/test_coverage.py and tests/unit/test_leads.py."""

import math

import numpy as np

from ..lazy import special, stats


def cvar90(x, axis=-1):
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


def wilson_interval(count, n, confidence_level):
    """Wilson score interval without continuity correction (Newcombe 1998, method 3).

    scipy.stats.binomtest(...).proportion_ci(method='wilson') is this interval: it
    reproduces Newcombe's Table I (checked in tests/unit/test_metrics.py).
    """
    ci = stats.binomtest(int(count), int(n)).proportion_ci(
        confidence_level=confidence_level, method="wilson"
    )
    return float(ci.low), float(ci.high)


def share_interval(count, n, confidence_level):
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
    tests/unit/test_metrics.py), written with the beta quantile ``special.betaincinv`` (what
    scipy.stats.beta.ppf computes) so that a whole table is one call, without importing
    scipy.stats (about 1 s) before a results table can be printed. Chosen over the Wilson score interval because its coverage is at
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
        low = np.where(k > 0, special.betaincinv(np.maximum(k, 1), n - k + 1, tail), 0.0)
        high = np.where(k < n, special.betaincinv(k + 1, np.maximum(n - k, 1), 1.0 - tail), 1.0)
    return np.asarray(low, dtype=float), np.asarray(high, dtype=float)


def bounded_mean_interval(x, low, high, confidence_level, *, grid=2001, cap=0.75):
    """Interval for the mean of independent values known to lie in [low, high], by betting.

    Parameters
    ----------
    x : array_like of shape (n,)
        The values (e.g. harmful trials per campaign, one value per campaign), in their order
        of sampling (replicate order: independent worlds).
    low, high : float
        Bounds every value respects whatever the world (e.g. 0 and the trials counted).
    confidence_level : float
    grid : int
        Candidate means tried between `low` and `high`; each end moves out by one grid step
        so that the interval contains the exact one.
    cap : float in (0, 1)
        Largest bet as a share of the wealth that may be lost (the paper's c).

    Returns
    -------
    low, high : float
        NaN for an empty sample; (low, low) when ``high == low``.

    Notes
    -----
    Waudby-Smith & Ramdas (2024), Estimating means of bounded random variables by betting, J. R.
    Statist. Soc. B 86:1 (arXiv:2010.09686), the hedged capital process with the
    predictable plug-in bets tuned for a fixed n (their Section 4 and Remark on fixed-time
    intervals, from memory): values scaled to u in [0, 1]; for a candidate mean m,
    ``K+(m) = prod(1 + l+_i (u_i - m))`` and ``K-(m) = prod(1 - l-_i (u_i - m))`` with
    ``l_i = sqrt(2 log(2 / a) / (n s2_{i-1}))``, ``s2_t = (1/4 + sum_{j<=t} (u_j - mu_j)^2) / (t + 1)``,
    ``mu_t = (1/2 + sum_{j<=t} u_j) / (t + 1)``, truncated to ``l+ <= cap / m`` and
    ``l- <= cap / (1 - m)`` so that no factor is below ``1 - cap``. At the true mean both are
    non-negative martingales of mean 1, so by Markov's inequality ``max(K+, K-) / 2 >= 1 / a``
    happens with probability at most ``a``: the candidates kept, an interval (K+ falls and K-
    rises with m), cover with probability at least ``1 - a`` for every distribution on
    [low, high] and every n. Written here because neither SciPy nor the project's other
    libraries offer a mean interval with guaranteed coverage at small n: the t interval and
    the bootstrap have none near the ends of the range, where a cautious policy's harmful
    counts sit (all zero in most campaigns: both then give a zero-width interval), which
    tests/unit/test_harm.py shows by simulation.
    """
    x = np.asarray(x, dtype=float).ravel()
    low, high = float(low), float(high)
    if x.size == 0:
        return np.nan, np.nan
    if not high >= low or not np.all(np.isfinite(x)):
        raise ValueError(f"`x` must be finite and `high` >= `low`; got low={low!r}, high={high!r}")
    span = high - low
    if span == 0.0:
        return low, low
    u = (x - low) / span
    if u.min() < -1e-9 or u.max() > 1 + 1e-9:
        raise ValueError(f"every value must lie in [{low:g}, {high:g}]; got {x.min():g} to {x.max():g}")
    u = np.clip(u, 0.0, 1.0)
    n = u.size
    a = 1.0 - confidence_level
    t = np.arange(1, n + 1)
    mu = (0.5 + np.cumsum(u)) / (t + 1)
    s2 = (0.25 + np.cumsum((u - mu) ** 2)) / (t + 1)
    s2_before = np.concatenate([[0.25], s2[:-1]])          # predictable: from the values before i only
    bet = np.sqrt(2.0 * np.log(2.0 / a) / (n * s2_before))
    m = np.linspace(0.0, 1.0, grid)[:, None]
    with np.errstate(divide="ignore"):
        up = np.minimum(bet, cap / m)
        down = np.minimum(bet, cap / (1.0 - m))
    log_up = np.log1p(up * (u - m)).sum(axis=1)
    log_down = np.log1p(-down * (u - m)).sum(axis=1)
    rejected = np.maximum(log_up, log_down) + np.log(0.5) >= np.log(1.0 / a)
    kept = np.flatnonzero(~rejected)
    if kept.size == 0:                       # narrower than a grid step: around the least wealth
        best = int(np.argmin(np.maximum(log_up, log_down)))
        kept = np.array([best])
    lo, hi = max(int(kept[0]) - 1, 0), min(int(kept[-1]) + 1, grid - 1)
    return low + span * float(m[lo, 0]), low + span * float(m[hi, 0])


def median_ranks(n, confidence_level):
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
    low = _binom_ppf(tail, n, 0.5)
    if low < 1:
        return None
    return low, n + 1 - low


def _binom_ppf(q: float, n: int, p: float) -> int:
    """The smallest k with ``P(Bin(n, p) <= k) >= q``: scipy.stats.binom.ppf's own steps (its ``_ppf``:
    ``ceil(bdtrik)``, then one step down where the CDF already reaches q), from scipy.special so that
    printing a results table does not import scipy.stats."""
    k = max(math.ceil(float(special.bdtrik(q, n, p))), 0)
    return k - 1 if k >= 1 and float(special.bdtr(k - 1, n, p)) >= q else k


def median_rows(samples, confidence_level):
    """Distribution-free interval of the median of every row of `samples` (NaN when n < 6 at 95 %)."""
    groups, n = samples.shape
    ranks = median_ranks(n, confidence_level)
    if ranks is None:
        nan = np.full(groups, np.nan)
        return nan, nan.copy()
    ordered = np.sort(samples, axis=1)
    return ordered[:, ranks[0] - 1].copy(), ordered[:, ranks[1] - 1].copy()


def cvar90_lower(samples, confidence_level):
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


def exact_bounds(k, n, confidence_level):
    """Clopper-Pearson bounds of k successes in n, elementwise.

    The beta-quantile form (lower ``B(a/2; k, n-k+1)``, upper ``B(1-a/2; k+1, n-k)``,
    0 and 1 at the ends) is what scipy.stats.binomtest(...).proportion_ci(method="exact")
    computes one table at a time: :func:`share_interval`, every pair in one call
    (tests/unit/test_leads.py checks the two agree).
    """
    return share_interval(k, n, confidence_level)
