"""Harmful trials: per policy and budget, the trials whose true value is worse than ``[target] floor``
(or, in a study with limits, that break a limit or fail), the share of campaigns with any, and the
shortfall of the trials themselves against the world's best."""

from __future__ import annotations

__all__ = ["harm_per_campaign", "harm_table", "harm_pairs", "count_mean_interval", "count_summary",
           "skew_mean_interval", "HARM_DIFFERENCE", "FEW", "HARM_LIMIT_COLUMNS"]

from itertools import combinations

import numpy as np
import pandas as pd

from .compare import _signed_rank_sum, _wilcoxon_p, holm_adjust
from .frame import campaign_trials, check_probability, flags, horizon_aware, policy_order
from .intervals import bounded_mean_interval, share_interval

# Smallest difference in harmful trials per campaign that matters for a clear lead: a tenth of a
# harmful trial per campaign (one in ten campaigns), as the other attitudes use a tenth of their
# own scale (our judgement, not a published constant).
HARM_DIFFERENCE = 0.1

# Below this many campaigns with a non-zero count the t interval of a mean count loses its
# coverage (70-90 % at 50 campaigns in tests/unit/test_harm.py: most campaigns are 0 and the
# sample hardly shows the tail), and the betting interval, which holds for every distribution
# on the counts' range, takes over. 10 is where the measured coverage came back to 93 % or
# more on the skewed counts tried (our choice from that simulation, not a published constant).
FEW = 10

_NEEDED = ("policy", "replicate", "trial", "initial", "f", "regret", "rec_trial")

# The traces' limit columns (simlab.columns.LIMIT_COLUMNS) that make a trial harmful wherever they
# are present, with the words harm.csv's ``counted`` column gives them: the trial broke a limit,
# or it failed (spent the budget and returned nothing). ``rec_breaks`` is about the recommendation,
# not the trial, and is counted in limits.csv.
HARM_LIMIT_COLUMNS = {"breaks": "breaks a limit", "failed": "failed"}


def _check(traces):
    if not isinstance(traces, pd.DataFrame):
        raise ValueError(f"`traces` must be a pandas DataFrame; got {type(traces).__name__}")
    missing = [c for c in _NEEDED if c not in traces.columns]
    if missing:
        raise ValueError(f"`traces` lacks required column(s) {missing}; it has {list(traces.columns)}")


def _reference(traces, sign):
    """The world's best value per replicate (user's orientation), read back from the traces.

    ``regret = sign * (f[rec] - reference)`` on every row, so ``reference = f[rec] - sign * regret``
    at any row; the rows of the last trial are used. It equals ``reference`` of worlds.csv up to
    rounding (tests/unit/test_harm.py)."""
    if "rec_breaks" in traces.columns:
        return _feasible_reference(traces, sign)
    last = traces[traces["trial"] == traces["trial"].max()]
    f = traces.set_index(["policy", "replicate", "trial"])["f"]
    keys = pd.MultiIndex.from_arrays([last["policy"].to_numpy(), last["replicate"].to_numpy(),
                                      last["rec_trial"].to_numpy()])
    best = f.reindex(keys).to_numpy(dtype=float) - sign * last["regret"].to_numpy(dtype=float)
    return pd.Series(best, index=last["replicate"].to_numpy()).groupby(level=0).first()


def _feasible_reference(traces, sign):
    """`_reference` for traces with ``rec_breaks``: where the recommendation breaks a limit its regret
    is a penalty, not ``sign * (f[rec] - reference)``, so the reference is read from the rows whose
    recommendation breaks none (any of them: they all give it, up to rounding)."""
    rows = traces[(pd.to_numeric(traces["trial"]) >= 0) & ~flags(traces, "rec_breaks")]
    f = traces.set_index(["policy", "replicate", "trial"])["f"]
    keys = pd.MultiIndex.from_arrays([rows["policy"].to_numpy(), rows["replicate"].to_numpy(),
                                      rows["rec_trial"].to_numpy()])
    best = f.reindex(keys).to_numpy(dtype=float) - sign * rows["regret"].to_numpy(dtype=float)
    best = pd.Series(best, index=rows["replicate"].to_numpy()).dropna().groupby(level=0).first()
    missing = sorted(set(traces["replicate"]) - set(best.index))
    if missing:
        raise ValueError(f"the world's best value cannot be read back from the traces for replicate(s) {missing[:5]}: "
                         "every recommendation there breaks a limit; pass `reference` (worlds.csv)")
    return best


def harm_per_campaign(traces, *, floor, sign, budget, reference=None):
    """Harmful trials and shortfall of every campaign over its first `budget` trials.

    Parameters
    ----------
    traces : DataFrame
        Traces of a study (columns ``policy, replicate, trial, initial, f, regret, rec_trial``;
        ``history`` if present; ``breaks``, ``failed`` and ``rec_breaks`` in a study with limits
        or hidden failures), ``f`` in the user's orientation.
    floor : float or None
        ``[target] floor`` in objective units; None when the study has none (then the traces must
        hold a limit column: something has to make a trial harmful).
    sign : float
        ``Study.sign``: +1 when the goal is to minimise (a trial above the floor is harmful),
        -1 when it is to maximise (a trial below the floor is harmful).
    budget : int
        Trials counted: 1 .. budget.
    reference : Series, optional
        The world's best value per replicate (``worlds.csv``: ``reference``, indexed by
        replicate); default: read back from the traces.

    Returns
    -------
    DataFrame
        One row per campaign: ``policy, replicate, trials, harmful, own_trials, own_harmful,
        shortfall, floor`` (``floor`` NaN without one), and ``counted`` (what made a trial harmful,
        in words) when the traces have limit columns. A trial is harmful when its true value is
        worse than the floor (a trial exactly at the floor is not), or, where the columns of
        :data:`HARM_LIMIT_COLUMNS` are present, when it breaks a limit or failed. ``harmful``
        counts trials 1 .. budget, the shared initial design included (its trials are run too);
        ``own_*`` only the policy's own trials after the design. Past trials (``[history]``,
        trial <= 0) never count. A lost trial counts by its true value: it was run, only its
        result was lost. ``shortfall`` is the sum over the same trials as ``harmful`` of
        ``sign * (f - reference)``: how far each trial itself fell short of the world's best,
        the in-campaign cost when every trial is a product; a trial without a true value
        (``f`` NaN, as a failed trial may be) adds nothing to it.
    """
    _check(traces)
    if sign not in (1.0, -1.0):
        raise ValueError(f"`sign` must be 1 or -1; got {sign!r}")
    limits = [c for c in HARM_LIMIT_COLUMNS if c in traces.columns]
    if floor is None and not limits:
        raise ValueError("`floor` is None and `traces` has no limit column "
                         f"({', '.join(HARM_LIMIT_COLUMNS)}): nothing would make a trial harmful")
    if floor is not None:
        floor = float(floor)
        if not np.isfinite(floor):
            raise ValueError(f"`floor` must be a finite number; got {floor!r}")
    best = _reference(traces, sign) if reference is None else pd.Series(reference)
    rows = campaign_trials(traces, budget)
    f = rows["f"].to_numpy(dtype=float)
    replicate = rows["replicate"].to_numpy()
    if not np.isin(replicate, best.index.to_numpy()).all():
        raise ValueError("`reference` has no value for some replicate of the traces")
    own = ~rows["initial"].to_numpy(dtype=bool)
    harmful = sign * (f - floor) > 0 if floor is not None else np.zeros(len(rows), dtype=bool)
    for column in limits:
        harmful = harmful | flags(rows, column)
    frame = pd.DataFrame({
        "policy": rows["policy"].astype(str).to_numpy(), "replicate": replicate,
        "harmful": harmful, "own": own, "own_harmful": harmful & own,
        "shortfall": sign * (f - best.reindex(replicate).to_numpy(dtype=float)),
    })
    per = frame.groupby(["policy", "replicate"], sort=False).agg(
        trials=("harmful", "size"), harmful=("harmful", "sum"), own_trials=("own", "sum"),
        own_harmful=("own_harmful", "sum"), shortfall=("shortfall", "sum")).reset_index()
    per["floor"] = floor if floor is not None else np.nan
    if limits:
        per["counted"] = _counted_words(floor, sign, limits)
    order = {p: i for i, p in enumerate(map(str, policy_order(traces)))}
    per = per.sort_values(["policy", "replicate"], key=lambda c: c.map(order) if c.name == "policy" else c)
    return per.reset_index(drop=True)


def _counted_words(floor, sign, limits):
    """What made a trial harmful, e.g. "true value above the floor 0.5, breaks a limit or failed"."""
    words = ([] if floor is None else [f"true value {'above' if sign > 0 else 'below'} the floor {floor:g}"])
    words += [HARM_LIMIT_COLUMNS[c] for c in limits]
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " or " + words[-1]


def skew_mean_interval(x, confidence_level):
    """Interval of a mean for a skewed sample: Student t with Hall's (1992) transformation.

    Parameters
    ----------
    x : array_like of shape (n,)
    confidence_level : float

    Returns
    -------
    low, high : float
        NaN below two values; a point when every value agrees.

    Notes
    -----
    Hall (1992), On the removal of skewness by transformation, J. R. Statist. Soc. B 54:221
    (from memory): with ``T = sqrt(n) (mean - mu) / s`` and the sample skewness ``g = m3 / s^3``,
    ``h(T) = T + c / 2 + c T^2 + c^2 T^3 / 3`` with ``c = g / (3 sqrt(n))`` is nearly
    symmetric and, unlike Johnson's (1978) correction, increasing, so ``{mu : |h(T)| <=
    t_{n-1}}`` is an interval with ends ``mean - h^-1(+-q) s / sqrt(n)``, ``h^-1(v) =
    (cbrt(1 + 3 c (v - c / 2)) - 1) / c``. Harmful counts and shortfalls are skewed to the right
    (a few bad worlds carry much of the harm), where the plain t interval is too short on the
    right: 91-92 % for 95 % at 50 campaigns on over-dispersed counts, against 94-97 % with the
    transformation (tests/unit/test_harm.py). Written here because SciPy has the t interval
    (scipy.stats.ttest_1samp) but no skewness-corrected one; symmetric samples (g = 0) give
    exactly the t interval.
    """
    from scipy import stats

    x = np.asarray(x, dtype=float)
    n = x.size
    if n < 2:
        return np.nan, np.nan
    mean, sd = float(x.mean()), float(x.std(ddof=1))
    if sd == 0.0:
        return mean, mean
    g = float(np.mean((x - mean) ** 3)) / sd**3
    c = g / (3.0 * np.sqrt(n))
    q = float(stats.t.ppf(0.5 + confidence_level / 2.0, n - 1))

    def inverse(v):
        return v if abs(c) < 1e-12 else (np.cbrt(1.0 + 3.0 * c * (v - c / 2.0)) - 1.0) / c

    scale = sd / np.sqrt(n)
    return mean - inverse(q) * scale, mean - inverse(-q) * scale


def count_mean_interval(x, low, high, confidence_level):
    """Interval of the mean of per-campaign counts (or paired differences of counts) in [low, high].

    The skewness-corrected t interval (`skew_mean_interval`) when at least :data:`FEW` values
    are non-zero, else the betting interval (`bounded_mean_interval`, coverage at least the
    nominal level for every distribution on [low, high]). Repeated studies at 50 campaigns on
    beta-binomial counts from rare to common, over-dispersed harm (tests/unit/test_harm.py) put
    its coverage at or above 93 % for 95 %; the t interval alone falls to about 70 % where harm
    is rare.
    """
    x = np.asarray(x, dtype=float)
    if np.count_nonzero(x) >= FEW:
        return skew_mean_interval(x, confidence_level)
    return bounded_mean_interval(x, low, high, confidence_level)


def count_summary(name, counts, trials, confidence_level):
    """``{name}_mean, {name}_low, {name}_high`` of per-campaign counts of trials, each in 0 .. `trials`.

    The mean over campaigns and `count_mean_interval` on [0, trials]: the one way every table
    (harm.csv, limits.csv) summarises a count of trials per campaign."""
    x = np.asarray(counts, dtype=float)
    low, high = count_mean_interval(x, 0.0, float(trials), confidence_level)
    return {f"{name}_mean": x.mean(), f"{name}_low": low, f"{name}_high": high}


def harm_table(traces, *, floor, sign, budgets, initial, reference=None, confidence_level=0.95):
    """Per policy and budget: harmful trials per campaign, campaigns with any, and the shortfall.

    Parameters
    ----------
    traces, floor, sign, reference
        As for :func:`harm_per_campaign`.
    budgets : sequence of int
        The study's budgets.
    initial : int
        ``[campaign] initial``: the shared design (counted in ``harmful``, not in ``own_harmful``).
    confidence_level : float, default 0.95

    Returns
    -------
    DataFrame
        One row per policy and budget (study order): ``policy, budget, replicates, floor,
        trials, harmful_mean, harmful_low, harmful_high, own_trials, own_harmful_mean,
        own_harmful_low, own_harmful_high, campaigns_harmed, harmed_share, harmed_low,
        harmed_high, own_campaigns_harmed, own_harmed_share, own_harmed_low, own_harmed_high,
        shortfall_mean, shortfall_low, shortfall_high, horizon_aware``, and ``counted`` (what
        made a trial harmful, in words: the floor, breaking a limit, failing) when the traces have
        limit columns; ``floor`` is NaN in a study with limits but no floor.

    Notes
    -----
    Campaigns are the independent units (one world each); a campaign's trials are not (a
    campaign that goes where the world is bad tends to stay there), so nothing here treats
    trials as independent. The mean of harmful trials per campaign has the interval of
    `count_mean_interval`: Student t over campaigns with Hall's (1992) skewness correction, or, when fewer than :data:`FEW` campaigns
    have a harmful trial (a cautious policy's counts are mostly 0, where the t interval and the
    bootstrap shrink to nothing), the betting interval of Waudby-Smith & Ramdas (2024), which
    covers whatever the distribution but allows for a rare campaign whose every trial is
    harmful, so it is wide. The shares of campaigns
    with any harmful trial are Clopper-Pearson (`share_interval`). The shortfall has no upper
    bound (a world has no largest range), so its mean has the skewness-corrected t interval
    alone (`skew_mean_interval`), checked by simulation on skewed sums.

    For a horizon-aware policy (``horizon_aware``) the traces hold, up to each smaller budget,
    the campaign planned for that budget, so its counts at a larger budget add trials of
    campaigns planned for different budgets (as ``within_target.csv`` does between budgets).
    """
    confidence_level = check_probability("confidence_level", confidence_level)
    aware = horizon_aware(traces, max(budgets))
    rows = []
    for budget in sorted(budgets):
        per = harm_per_campaign(traces, floor=floor, sign=sign, budget=budget, reference=reference)
        own_trials = max(budget - initial, 0)
        for policy, mine in per.groupby("policy", sort=False):
            n = len(mine)
            harmful = mine["harmful"].to_numpy(dtype=float)
            own = mine["own_harmful"].to_numpy(dtype=float)
            hit, own_hit = int((harmful > 0).sum()), int((own > 0).sum())
            share_lo, share_hi = share_interval(hit, n, confidence_level)
            own_share_lo, own_share_hi = share_interval(own_hit, n, confidence_level)
            short_lo, short_hi = skew_mean_interval(mine["shortfall"], confidence_level)
            rows.append({
                "policy": policy, "budget": budget, "replicates": n,
                "floor": float(floor) if floor is not None else np.nan, "trials": budget,
                **count_summary("harmful", harmful, budget, confidence_level),
                "own_trials": own_trials, **count_summary("own_harmful", own, own_trials, confidence_level),
                "campaigns_harmed": hit, "harmed_share": hit / n, "harmed_low": float(share_lo),
                "harmed_high": float(share_hi), "own_campaigns_harmed": own_hit, "own_harmed_share": own_hit / n,
                "own_harmed_low": float(own_share_lo), "own_harmed_high": float(own_share_hi),
                "shortfall_mean": float(mine["shortfall"].mean()), "shortfall_low": short_lo,
                "shortfall_high": short_hi, "horizon_aware": policy in aware,
                **({"counted": mine["counted"].iloc[0]} if "counted" in mine.columns else {}),
            })
    table = pd.DataFrame(rows)
    order = {p: i for i, p in enumerate(map(str, policy_order(traces)))}
    return table.sort_values(["policy", "budget"], key=lambda c: c.map(order) if c.name == "policy" else c,
                             kind="stable").reset_index(drop=True)


def harm_pairs(per, *, trials, initial, confidence_level=0.95):
    """Paired comparison of harmful trials per campaign for every pair of policies.

    Parameters
    ----------
    per : DataFrame
        :func:`harm_per_campaign` at one budget.
    trials : int
        That budget (the trials counted per campaign).
    initial : int
        The shared initial design.
    confidence_level : float, default 0.95

    Returns
    -------
    DataFrame
        One row per pair (a before b in policy order): ``policy_a, policy_b, replicates,
        harm_difference`` (mean over replicates of harmful_a - harmful_b; negative favours a),
        ``harm_difference_low, harm_difference_high`` (`count_mean_interval`), ``harm_favours``
        (the policy the signed ranks favour), ``harm_p_value`` (two-sided Wilcoxon signed-rank
        on the non-zero differences, as for regret in `pairwise`) and ``harm_p_holm``
        (Holm-adjusted over the pairs).

    Notes
    -----
    Both policies of a pair run the same initial design on the same world, so their difference
    comes from their own trials: it lies within +- (trials - initial) when the design's harmful
    counts agree on every replicate (they do unless the traces were edited), else within
    +- trials; that range is the bound of the betting interval when it is used.
    """
    policies = list(dict.fromkeys(per["policy"]))
    harmful = per.pivot(index="replicate", columns="policy", values="harmful")
    design = (per["harmful"] - per["own_harmful"]).groupby(per["replicate"]).nunique()
    rows = []
    for a, b in combinations(policies, 2):
        both = harmful[[a, b]].dropna()
        d = (both[a] - both[b]).to_numpy(dtype=float)
        bound = float(trials - initial if (design.loc[both.index] == 1).all() else trials)
        lo, hi = count_mean_interval(d, -bound, bound, confidence_level) if bound > 0 else (0.0, 0.0)
        score = _signed_rank_sum(d)
        rows.append({"policy_a": a, "policy_b": b, "replicates": d.size, "harm_difference": float(d.mean()),
                     "harm_difference_low": lo, "harm_difference_high": hi,
                     "harm_favours": a if score < 0 else b if score > 0 else "neither",
                     "harm_p_value": _wilcoxon_p(d)})
    out = pd.DataFrame(rows, columns=["policy_a", "policy_b", "replicates", "harm_difference", "harm_difference_low",
                                      "harm_difference_high", "harm_favours", "harm_p_value"])
    out["harm_p_holm"] = holm_adjust(out["harm_p_value"].to_numpy(dtype=float))
    return out
