"""Repeated-study coverage of every interval simlab's tables print (limits.csv included), at 50 replicates, with
negative controls."""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from simlab.evidence import intervals, reach
from simlab.evidence import metrics

N = 50          # replicates per simulated study: the size the issue asks about
STUDIES = 2000  # repeated studies per check
NOMINAL = 0.95
FLOOR = 0.93    # every interval labelled 95 % must cover at least this often (study rule)
# Monte Carlo standard error of a coverage near 0.95 estimated from 2000 studies:
# sqrt(0.95 * 0.05 / 2000) = 0.0049. An interval whose true coverage is >= 0.95 falls
# below 0.93 only 4 standard errors down (p < 1e-4); the negative controls sit far below
# (coverage 0.84 or less), so the floor tells the two apart with room either side.
MC_SE = math.sqrt(NOMINAL * (1 - NOMINAL) / STUDIES)


def _one_cell_traces(values):
    """Traces with one 'policy' per simulated study (row of `values`), all at trial 1."""
    studies, n = values.shape
    return pd.DataFrame(
        {
            "policy": np.repeat([f"s{i:04d}" for i in range(studies)], n),
            "replicate": np.tile(np.arange(n), studies),
            "trial": 1,
            "regret": values.ravel(),
        }
    )


def _covered(low, high, truth):
    return float(np.mean((np.asarray(low) <= truth) & (truth <= np.asarray(high))))


# Regret distributions with a known median and CVaR-90 (the mean of the worst 10 %).
def _lognormal_cvar(mu, sigma, alpha=0.1):
    # E[X | X > q_{1-alpha}] for a lognormal: exp(mu + sigma^2 / 2) Phi(sigma - z) / alpha,
    # z = Phi^-1(1 - alpha) (standard result, e.g. Norton, Khokhlov & Uryasev 2021,
    # Ann. Oper. Res. 299; recomputed below by quadrature).
    z = stats.norm.ppf(1 - alpha)
    return math.exp(mu + sigma**2 / 2) * stats.norm.cdf(sigma - z) / alpha


def _gamma_cvar(shape, alpha=0.1):
    # E[X; X > q] = shape * P(Gamma(shape + 1) > q) for a unit-scale gamma (common practice:
    # x f_k(x) = k f_{k+1}(x)).
    q = stats.gamma.ppf(1 - alpha, shape)
    return shape * stats.gamma.sf(q, shape + 1) / alpha


DISTRIBUTIONS = {
    # name: (sampler(rng, size), true median, true CVaR-90)
    "exponential": (lambda rng, size: rng.exponential(size=size), math.log(2), math.log(10) + 1),
    "lognormal": (lambda rng, size: rng.lognormal(0.0, 1.0, size=size), 1.0, _lognormal_cvar(0.0, 1.0)),
    "gamma(0.5)": (lambda rng, size: rng.gamma(0.5, size=size), stats.gamma.median(0.5), _gamma_cvar(0.5)),
}


def test_true_cvar_values_agree_with_quadrature():
    # The closed forms above against the definition (1/0.1) * integral of the quantile
    # function over [0.9, 1] (Acerbi & Tasche 2002), by scipy.integrate.quad.
    for dist, cvar in ((stats.expon(), math.log(10) + 1), (stats.lognorm(1.0), _lognormal_cvar(0.0, 1.0)),
                       (stats.gamma(0.5), _gamma_cvar(0.5))):
        value, _ = integrate.quad(lambda u: dist.ppf(u), 0.9, 1.0, limit=200)
        assert value / 0.1 == pytest.approx(cvar, rel=1e-6)


# ---------------------------------------------------------------------------
# median regret: distribution-free order-statistic interval
# ---------------------------------------------------------------------------
def test_median_ranks_match_scipy_quantile_test():
    rng = np.random.default_rng(7)
    for n in (5, 6, 10, 37, 50, 60, 200):
        x = rng.exponential(size=(1, n))
        low, high = intervals.median_rows(x, 0.95)
        ci = stats.quantile_test(x[0], q=float(np.median(x)), p=0.5).confidence_interval(0.95)
        if np.isnan(ci.low):
            assert np.isnan(low[0]) and np.isnan(high[0]) and n < 6
        else:
            assert (low[0], high[0]) == (ci.low, ci.high)


@pytest.mark.parametrize("name", list(DISTRIBUTIONS) + ["zeros and exponential"])
def test_median_interval_covers(name):
    rng = np.random.default_rng(101)
    if name == "zeros and exponential":
        # Ties, as real regrets have (a campaign that found the optimum has regret 0):
        # 30 % zeros, else exponential(1); median = Exp quantile at (0.5 - 0.3) / 0.7.
        values = np.where(rng.uniform(size=(STUDIES, N)) < 0.3, 0.0, rng.exponential(size=(STUDIES, N)))
        truth = -math.log(1 - 0.2 / 0.7)
    else:
        sampler, truth, _ = DISTRIBUTIONS[name]
        values = sampler(rng, (STUDIES, N))
    summary = metrics.budget_summary(_one_cell_traces(values), budgets=[1], target=1.0)
    coverage = _covered(summary["median_low"], summary["median_high"], truth)
    # exact coverage for a continuous distribution: 1 - 2 P(Bin(50, 1/2) <= 17) = 0.967
    assert coverage >= FLOOR, (name, coverage, MC_SE)
    # Negative control: the same interval at an 80 % level, labelled 95 %, fails.
    narrow = metrics.budget_summary(_one_cell_traces(values), budgets=[1], target=1.0, confidence_level=0.8)
    assert _covered(narrow["median_low"], narrow["median_high"], truth) < FLOOR


# ---------------------------------------------------------------------------
# failure risk and within-target share: Clopper-Pearson
# ---------------------------------------------------------------------------
def _exact_coverage(low, high, n, shares):
    """Coverage of an interval rule (arrays indexed by the count 0..n), by exact binomial sums."""
    k = np.arange(n + 1)
    pmf = stats.binom.pmf(k[None, :], n, shares[:, None])
    inside = (low[None, :] <= shares[:, None]) & (shares[:, None] <= high[None, :])
    return (pmf * inside).sum(axis=1)


def test_share_interval_exact_coverage_at_50():
    # Every true share on a fine grid: the coverage is a finite binomial sum, so this is the
    # repeated-study coverage with no Monte Carlo error at all.
    shares = np.linspace(0.0002, 0.9998, 5000)
    k = np.arange(N + 1)
    low, high = intervals.share_interval(k, N, 0.95)
    coverage = _exact_coverage(low, high, N, shares)
    assert coverage.min() >= 0.95 - 1e-9  # Clopper & Pearson (1934): never below nominal
    # Negative control: the Wilson score interval (Newcombe 1998, method 3) dips to 0.84
    # near a share of 0.35 % (Brown, Cai & DasGupta 2001, Stat. Sci. 16:101, Fig. 5, describe
    # the same dips near 0 and 1).
    wilson = np.array([intervals.wilson_interval(i, N, 0.95) for i in k])
    wilson_coverage = _exact_coverage(wilson[:, 0], wilson[:, 1], N, shares)
    assert wilson_coverage.min() < FLOOR


@pytest.mark.parametrize("risk", [0.0035, 0.02, 0.1, 0.5])
def test_failure_risk_interval_covers_in_repeated_studies(risk):
    # Exponential(1) regrets and a target with P(regret > target) = risk.
    rng = np.random.default_rng(int(risk * 1e4))
    values = rng.exponential(size=(STUDIES, N))
    target = -math.log(risk)
    summary = metrics.budget_summary(_one_cell_traces(values), budgets=[1], target=target)
    assert _covered(summary["failure_low"], summary["failure_high"], risk) >= FLOOR
    assert _covered(summary["within_low"], summary["within_high"], 1 - risk) >= FLOOR
    if risk == 0.0035:
        # Negative control on the same studies: Wilson (exact coverage 0.84 here).
        failures = np.sum(values > target, axis=1)
        wilson = np.array([intervals.wilson_interval(f, N, 0.95) for f in failures])
        assert _covered(wilson[:, 0], wilson[:, 1], risk) < FLOOR


def test_within_target_share_covers_at_every_trial():
    # Regret after trial t: exponential(1) * exp(-0.4 t), so P(within target 0.1 after t)
    # = 1 - exp(-0.1 exp(0.4 t)): from 0.14 at trial 1 to 1 - 5e-8 at trial 12.
    trials, studies, target = 12, 1000, 0.1
    rng = np.random.default_rng(5)
    base = rng.exponential(size=(studies, N, trials))
    regret = base * np.exp(-0.4 * np.arange(1, trials + 1))
    traces = pd.DataFrame(
        {
            "policy": np.repeat([f"s{i:04d}" for i in range(studies)], N * trials),
            "replicate": np.tile(np.repeat(np.arange(N), trials), studies),
            "trial": np.tile(np.arange(1, trials + 1), studies * N),
            "regret": regret.ravel(),
        }
    )
    curves = reach.within_target_curves(traces, target=target)
    truth = 1 - np.exp(-target * np.exp(0.4 * curves["trial"].to_numpy()))
    inside = (curves["within_low"] <= truth) & (truth <= curves["within_high"])
    by_trial = inside.groupby(curves["trial"]).mean()
    # 1000 studies per trial: Monte Carlo se 0.0069, so 0.93 is 2.9 se below 0.95.
    assert (by_trial >= FLOOR).all(), by_trial.to_dict()
    # Negative control: a zero-width band at shares of exactly 1 (trial 12: all 50 within
    # target in most studies) never covers a true share below 1.
    share = curves["within_target"]
    low0 = np.where(share >= 1.0, share, curves["within_low"])
    inside0 = (low0 <= truth) & (truth <= curves["within_high"])
    assert inside0.groupby(curves["trial"]).mean().min() < FLOOR


# ---------------------------------------------------------------------------
# CVaR-90: DKW lower bound; the old BCa interval as the negative control
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("name", list(DISTRIBUTIONS))
def test_cvar90_lower_bound_covers(name):
    sampler, _, truth = DISTRIBUTIONS[name]
    rng = np.random.default_rng(202)
    values = sampler(rng, (STUDIES, N))
    summary = metrics.budget_summary(_one_cell_traces(values), budgets=[1], target=1.0)
    assert summary["cvar90_high"].isna().all()  # no upper bound is claimed
    coverage = float(np.mean(summary["cvar90_low"] <= truth))
    assert coverage >= FLOOR, (name, coverage)
    # Negative control: the plain estimate read as a lower bound (e = 0) fails.
    assert float(np.mean(summary["cvar90"] <= truth)) < FLOOR


@pytest.mark.slow
def test_old_bca_cvar_interval_fails_the_same_test():
    # The interval simlab printed before: BCa bootstrap of the empirical CVaR-90
    # (scipy.stats.bootstrap). 500 studies (Monte Carlo se 0.01) keep the run short.
    sampler, _, truth = DISTRIBUTIONS["exponential"]
    rng = np.random.default_rng(303)
    values = sampler(rng, (500, N))
    with np.errstate(all="ignore"):
        result = stats.bootstrap((values,), intervals.cvar90, method="BCa", n_resamples=999, axis=-1,
                                 vectorized=True, rng=np.random.default_rng(1))
    ci = result.confidence_interval
    coverage = _covered(ci.low, ci.high, truth)
    assert coverage < FLOOR, coverage  # about 0.82 here, missing on the high side
    assert np.mean(ci.high < truth) > np.mean(ci.low > truth)


# ---------------------------------------------------------------------------
# Kaplan-Meier first-passage band, including shares of exactly 0 and 1
# ---------------------------------------------------------------------------
FIRST_PASSAGE_CDF = np.array([0.003, 0.01, 0.03, 0.08, 0.15, 0.3, 0.5, 0.7, 0.85, 0.93, 0.97, 0.99, 0.995,
                              0.998, 0.999])


def _first_passage_traces(rng, studies):
    """Campaigns whose regret drops below 0.5 for good at a first trial T with known CDF."""
    trials = len(FIRST_PASSAGE_CDF)
    first = np.searchsorted(FIRST_PASSAGE_CDF, rng.uniform(size=(studies, N)), side="right") + 1
    t = np.arange(1, trials + 1)
    regret = np.where(t[None, None, :] >= first[:, :, None], 0.0, 1.0)
    return pd.DataFrame(
        {
            "policy": np.repeat([f"s{i:04d}" for i in range(studies)], N * trials),
            "replicate": np.tile(np.repeat(np.arange(N), trials), studies),
            "trial": np.tile(t, studies * N),
            "regret": regret.ravel(),
        }
    )


@pytest.mark.slow
def test_kaplan_meier_band_covers_at_every_trial_including_0_and_1():
    studies = 1000  # Monte Carlo se 0.0069 per trial
    curves = reach.reach_curves(_first_passage_traces(np.random.default_rng(9), studies), target=0.5)
    truth = FIRST_PASSAGE_CDF[curves["trial"].to_numpy() - 1]
    inside = (curves["reached_low"] <= truth) & (truth <= curves["reached_high"])
    by_trial = inside.groupby(curves["trial"]).mean()
    assert (by_trial >= FLOOR).all(), by_trial.to_dict()
    # At trial 1 (true share 0.3 %) most studies see no campaign at the target; the
    # upper end there is the exact one-sided bound 1 - 0.025^(1/50).
    first = curves[curves["trial"] == 1]
    none = first["reached"] == 0
    assert none.mean() > 0.8
    assert np.allclose(first.loc[none, "reached_high"], 1 - 0.025 ** (1 / N), rtol=1e-12)
    # Negative control: the old band, replaced by the estimate where the share is 0 or 1.
    share = curves["reached"]
    edge = (share == 0) | (share == 1)
    low0, high0 = np.where(edge, share, curves["reached_low"]), np.where(edge, share, curves["reached_high"])
    inside0 = pd.Series((low0 <= truth) & (truth <= high0))
    assert inside0.groupby(curves["trial"].to_numpy()).mean().min() < FLOOR


# ---------------------------------------------------------------------------
# limits.csv: trials that break a limit or fail per campaign, and the share of campaigns whose
# recommendation breaks a limit (simlab.evidence.limits.limit_table, read through the table)
# ---------------------------------------------------------------------------
LIMIT_TRIALS, LIMIT_INITIAL = 12, 4
# 1000 studies: Monte Carlo se of a coverage near 0.95 is 0.0069, so 0.93 is 2.9 se below it.
# Fewer than the 2000 above because the betting interval (taken where fewer than FEW campaigns have
# a non-zero count) costs about 2 ms a call.
LIMIT_STUDIES = 1000
# Each campaign (one world) draws its own chance that a trial fails, pf ~ Beta(fail), and that a
# trial which did not fail breaks a limit, pb ~ Beta(breaks), independently: campaigns differ, so the
# counts are over-dispersed, as a policy on a world with a large infeasible region runs many such
# trials and one on a friendlier world few. After the initial design the policy's own trials fail
# with chance `learn` * pf (a policy that learns where trials fail). The recommendation at the budget
# breaks a limit with chance `rec`, independently of the counts (the Clopper-Pearson interval
# depends on the count of such campaigns alone).
LIMIT_LAWS = {
    # name: (fail Beta (a, b), breaks Beta (a, b), learn, rec)
    "rare breaks, common failures": ((2.0, 8.0), (0.02, 2.0), 0.3, 0.02),
    "rare failures, some breaks": ((0.05, 5.0), (0.1, 3.0), 0.5, 0.1),
    "bold": ((0.3, 3.0), (0.5, 2.0), 1.0, 0.35),
}


def _limit_truth(fail, breaks, learn, rec):
    """Expected counts per campaign under a law of LIMIT_LAWS (linearity of expectation over the
    trials; pf and pb independent, so E[(1 - c pf) pb] = (1 - c E pf) E pb; common practice)."""
    ef, eb = fail[0] / sum(fail), breaks[0] / sum(breaks)
    design, own = LIMIT_INITIAL, LIMIT_TRIALS - LIMIT_INITIAL
    return {"failed": design * ef + own * learn * ef, "own_failed": own * learn * ef,
            "breaks": eb * (design * (1 - ef) + own * (1 - learn * ef)), "own_breaks": eb * own * (1 - learn * ef),
            "rec_breaks": rec}


def _limit_traces(rng, law):
    fail, breaks, learn, rec = law
    S, T = LIMIT_STUDIES, LIMIT_TRIALS
    trial = np.arange(1, T + 1)
    pf = rng.beta(*fail, size=(S, N, 1))
    pb = rng.beta(*breaks, size=(S, N, 1))
    failed = rng.uniform(size=(S, N, T)) < np.where(trial > LIMIT_INITIAL, learn * pf, pf)
    broke = ~failed & (rng.uniform(size=(S, N, T)) < pb)
    ending = np.zeros((S, N, T), dtype=bool)
    ending[:, :, -1] = rng.uniform(size=(S, N)) < rec
    return pd.DataFrame({
        "policy": np.repeat([f"s{i:04d}" for i in range(S)], N * T),
        "replicate": np.tile(np.repeat(np.arange(N), T), S),
        "trial": np.tile(trial, S * N), "initial": np.tile(trial <= LIMIT_INITIAL, S * N),
        "failed": failed.ravel(), "breaks": broke.ravel(), "rec_breaks": ending.ravel(),
    })


@pytest.fixture(scope="module", params=list(LIMIT_LAWS))
def limit_studies(request):
    from studies import constrained, study_with

    from simlab.evidence.limits import limit_table

    base = {"study": {"name": "limits-coverage", "replicates": N, "seed": 1},
            "space": {"die_temp": [180.0, 240.0]},
            "world": {"kernel": "matern52", "lengthscale": 15.0, "amplitude": 1.0, "mean": 0.0, "noise": 0.1},
            "campaign": {"initial": LIMIT_INITIAL, "budgets": [LIMIT_TRIALS], "pool": 64},
            "target": {"regret": 0.1}, "policy": [{"rule": "ei", "label": "EI"}]}
    study = constrained(study_with(base))
    law = LIMIT_LAWS[request.param]
    traces = _limit_traces(np.random.default_rng(sorted(LIMIT_LAWS).index(request.param) + 31), law)
    return request.param, traces, limit_table(traces, study), _limit_truth(*law)


def test_limit_table_intervals_cover(limit_studies):
    name, _, table, truth = limit_studies
    for column, value in truth.items():
        coverage = _covered(table[f"{column}_low"], table[f"{column}_high"], value)
        assert coverage >= FLOOR, (name, column, coverage)
    # the estimates themselves are unbiased: the mean over studies within 4 Monte Carlo se of the truth
    for column in ("breaks", "failed", "own_breaks", "own_failed"):
        means = table[f"{column}_mean"]
        assert abs(means.mean() - truth[column]) <= 4 * means.std() / math.sqrt(LIMIT_STUDIES) + 1e-12, column
    assert abs(table["rec_breaks_share"].mean() - truth["rec_breaks"]) <= 4 * table["rec_breaks_share"].std() / math.sqrt(
        LIMIT_STUDIES)


# The intervals limits.csv does not use, each where it fails (coverage measured at these seeds):
# "t" is Student t over campaigns (scipy.stats.ttest_1samp) without the switch to the betting
# interval, which has zero width on a sample of zeros; "pooled" is Clopper-Pearson over the pooled
# trials, as if a campaign's trials were independent (they share the campaign's world); "wald" is
# p +- 1.96 sqrt(p (1 - p) / n) for the share of campaigns whose recommendation breaks a limit, zero
# width at 0 of 50 (Brown, Cai & DasGupta 2001, Stat. Sci. 16:101). Bars: 0.88 and 0.80, far below
# the 0.93 the intervals in use meet and above the measured values by 5 se or more.
LIMIT_CONTROLS = {
    "rare breaks, common failures": [("breaks", "t", 0.88), ("breaks", "pooled", 0.80), ("rec_breaks", "wald", 0.88)],
    # measured 0.69, 0.74, 0.63
    "rare failures, some breaks": [("failed", "t", 0.88), ("breaks", "pooled", 0.80)],   # 0.77, 0.74
    "bold": [("breaks", "pooled", 0.80), ("failed", "pooled", 0.80)],                    # 0.68, 0.73
}


def test_limit_intervals_they_replace_under_cover(limit_studies):
    name, traces, table, truth = limit_studies
    for column, control, bar in LIMIT_CONTROLS[name]:
        if control == "wald":
            share = table["rec_breaks_share"].to_numpy()
            half = 1.96 * np.sqrt(share * (1 - share) / N)
            low, high = share - half, share + half
        else:
            counts = traces.groupby(["policy", "replicate"], sort=False)[column].sum().to_numpy(dtype=float)
            counts = counts.reshape(LIMIT_STUDIES, N)
            if control == "t":
                ci = stats.ttest_1samp(counts, 0.0, axis=1).confidence_interval(0.95)
                flat = counts.std(axis=1) == 0      # ttest_1samp gives NaN there: the interval is the point
                low, high = np.where(flat, counts[:, 0], ci.low), np.where(flat, counts[:, 0], ci.high)
            else:
                low, high = intervals.share_interval(counts.sum(axis=1), LIMIT_TRIALS * N, 0.95)
                low, high = LIMIT_TRIALS * low, LIMIT_TRIALS * high
        assert _covered(low, high, truth[column]) < bar, (name, column, control)
