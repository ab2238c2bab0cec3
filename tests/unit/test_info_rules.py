"""Information and schedule rules (pbest, mes, kg, gp-ucb, hedge) against independent computations."""

import itertools

import numpy as np
import pytest
from helpers import Z_MAX
from scipy import integrate
from scipy.optimize import brentq
from scipy.stats import norm, truncnorm

from simlab.model.gp import Posterior
from simlab.model.kernels import Matern52
from simlab.policies import (GPUCB, Context, ExpectedImprovement, GPHedge, KnowledgeGradient,
                             MaxValueEntropySearch, ProbabilityOfMinimum)
from simlab.policies.gradient import expected_min_drop, knowledge_gradient
from simlab.policies.info import max_value_information
from simlab.study.spec import StudyError, parse_study


# --------------------------------------------------------------------------- helpers
def exact_gp(kernel, mean, s2, X, y, U):
    """Posterior mean (q,) and covariance (q, q) at U by direct solves: Rasmussen & Williams
    (2006), eqs. 2.25-2.26, with the same diagonal s2 as the Posterior (noise variance plus
    nugget). Kernel values are simlab's, checked against scikit-learn in test_kernels.py."""
    K = kernel(X) + s2 * np.eye(len(X))
    Ks = kernel(U, X)
    mu = mean + Ks @ np.linalg.solve(K, y - mean)
    cov = kernel(U) - Ks @ np.linalg.solve(K, Ks.T)
    return mu, cov


def start(policy, post, pool, seed):
    policy.start(Context(pool=pool, rng=np.random.default_rng(seed), sequence=pool[:4], horizon=20,
                         posterior=post))
    return policy


def line_data(noise=0.1, X=(0.12, 0.35, 0.6, 0.9), y=(0.3, -0.8, -0.2, 0.5)):
    """A 1-D posterior on a grid pool (Matérn 5/2, lengthscale 0.2, amplitude 1)."""
    kernel = Matern52([0.2], 1.0)
    grid = np.linspace(0.0, 1.0, 41)[:, None]
    post = Posterior(kernel, 0.0, noise, pool=grid)
    post.add_many(np.array(X)[:, None], np.array(y))
    return kernel, grid, post


def plane_data(n=12, noise=0.05, seed=4):
    kernel = Matern52([0.25, 0.3], 1.0)
    rng = np.random.default_rng(seed)
    pool = rng.random((256, 2))
    post = Posterior(kernel, 0.1, noise, pool=pool)
    X = rng.random((n, 2))
    post.add_many(X, np.sin(4 * X[:, 0]) * np.cos(3 * X[:, 1]) + noise * rng.standard_normal(n))
    return kernel, pool, post


# --------------------------------------------------------------------------- max-value entropy search
def test_mes_matches_recomputed_reference_value():
    # REFERENCES.md, Wang & Jegelka (2017): maximisation form mu = 0.2, sigma = 1.3, y* = 1 gives
    # 0.4525317414 (recomputed from the published formula). Negating f gives the minimisation
    # form: mu = -0.2, f* = -1.
    v = max_value_information(np.array([-0.2]), np.array([1.3]), np.array([-1.0]))[0, 0]
    assert v == pytest.approx(0.4525317414, rel=0, abs=1e-10)
    # negative control: feeding the maximisation-form numbers unconverted gives another value
    wrong = max_value_information(np.array([0.2]), np.array([1.3]), np.array([1.0]))[0, 0]
    assert abs(wrong - 0.4525317414) > 0.1


CASES = [(0.3, 0.7, -0.4), (0.0, 1.0, 0.5), (1.0, 0.3, -2.0), (-0.5, 2.0, -0.6), (0.2, 0.1, 0.25)]


@pytest.mark.parametrize("mu, sd, fstar", CASES)
def test_mes_is_the_entropy_drop_of_the_truncated_normal(mu, sd, fstar):
    """Noise-free form = H[N(mu, sd^2)] - H[f | f >= f*]: scipy.stats.truncnorm entropy (exact
    quadrature) and a Monte Carlo entropy estimate -mean(log pdf) of truncnorm draws."""
    a = (fstar - mu) / sd
    tn = truncnorm(a, a + 60.0, loc=mu, scale=sd)        # upper limit 60 sd: mass beyond < 1e-700
    exact = norm(mu, sd).entropy() - tn.entropy()
    v = max_value_information(np.array([mu]), np.array([sd]), np.array([fstar]))[0, 0]
    assert v == pytest.approx(exact, rel=1e-9, abs=1e-12)
    draws = tn.rvs(size=100_000, random_state=np.random.default_rng(8))
    logp = tn.logpdf(draws)
    mc = norm(mu, sd).entropy() + logp.mean()
    se = logp.std(ddof=1) / np.sqrt(len(logp))
    assert abs(v - mc) < Z_MAX * se
    # negative control: truncating on the wrong side (f <= f*) is detected by the same check
    wrong = truncnorm(-np.inf, a, loc=mu, scale=sd)
    lw = wrong.logpdf(wrong.rvs(size=100_000, random_state=np.random.default_rng(9)))
    assert abs(v - (norm(mu, sd).entropy() + lw.mean())) > Z_MAX * lw.std(ddof=1) / np.sqrt(len(lw))


def noisy_entropy_drop(mu, sd, fstar, s):
    """H[y] - H[y | f >= f*] with y = f + N(0, s^2): the density of y is the convolution of the
    truncated normal with the noise (inner quad), its entropy an outer quad."""
    Z = norm.sf(fstar, mu, sd)

    def p(y):
        lo, hi = max(fstar, y - 12 * s), y + 12 * s
        if hi <= lo:
            return 0.0
        return integrate.quad(lambda f: norm.pdf(f, mu, sd) / Z * norm.pdf(y - f, 0, s), lo, hi,
                              epsabs=1e-15, epsrel=1e-12, limit=200)[0]

    def integrand(y):
        v = p(y)
        return -v * np.log(v) if v > 0 else 0.0

    lo, hi = fstar - 12 * s, mu + 12 * np.hypot(sd, s)
    H = integrate.quad(integrand, lo, hi, points=[fstar], epsabs=1e-12, epsrel=1e-10, limit=400)[0]
    return 0.5 * np.log(2 * np.pi * np.e * (sd**2 + s**2)) - H


@pytest.mark.parametrize("mu, sd, fstar, s", [(0.3, 0.7, -0.4, 0.2), (0.3, 0.7, -0.4, 1.5),
                                              (0.0, 1.0, 0.5, 0.05), (0.3, 0.7, 0.9, 0.2)])
@pytest.mark.slow
def test_noisy_mes_matches_numerical_convolution(mu, sd, fstar, s):
    v = max_value_information(np.array([mu]), np.array([sd]), np.array([fstar]), s)[0, 0]
    # nested adaptive quadrature, both tolerances about 1e-10
    assert v == pytest.approx(noisy_entropy_drop(mu, sd, fstar, s), abs=1e-7)
    # negative control: the noise-free form is measurably different at this noise
    free = max_value_information(np.array([mu]), np.array([sd]), np.array([fstar]))[0, 0]
    assert abs(free - v) > 1e-3


def test_noisy_mes_limits_and_bound():
    g = np.linspace(-30, 30, 601)
    free = max_value_information(g, np.ones_like(g), [0.0])[:, 0]
    # s -> 0 recovers the noise-free form (the gap is O(s (1 + |gamma|)^2), below 1e-4 here);
    # s -> inf carries no information
    tiny = max_value_information(g, np.ones_like(g), [0.0], 1e-7)[:, 0]
    assert np.all(np.abs(tiny - free) <= 1e-7 * (1 + np.abs(g)) ** 2)
    huge = max_value_information(g, np.ones_like(g), [0.0], 1e4)[:, 0]
    assert np.all(huge < 1e-7)
    # the bound MaxValueEntropySearch.score_pool relies on: noise never adds information
    for s in (1e-4, 1e-2, 0.1, 0.3, 1.0, 3.0, 10.0):
        noisy = max_value_information(g, np.ones_like(g), [0.0], s)[:, 0]
        assert np.all(np.isfinite(noisy)) and np.all(noisy >= -1e-12)
        assert np.all(noisy <= free + 1e-12)


def test_b_table_matches_the_special_functions():
    """The noisy information's b(u) = Phi(u) log Phi(u) / phi(u) and b'(u) = log Phi(u) + 1 + u b(u), read
    from the interpolation table, against scipy.stats.norm's logcdf and logpdf (another route to the same
    quantities: b = exp(logcdf - logpdf) logcdf) on 400,001 points of [-31.9, 31.9], and beyond the grid."""
    from simlab.policies.info import _b, _BTable

    u = np.linspace(-31.9, 31.9, 400_001)
    logp = norm.logcdf(u)
    want = np.exp(logp - norm.logpdf(u)) * logp
    dwant = logp + 1.0 + u * want
    got, dgot = _b(u, derivative=True)
    # norm.logcdf carries ~1e-15 relative, exp(logcdf - logpdf) loses |u|^2 eps ~ 1e-13 at |u| = 32, and
    # the reference b' multiplies that by |u|: the bounds are relative to b and to 1 + |u b|
    assert np.max(np.abs(got - want) / np.maximum(np.abs(want), 1e-300)) < 1e-10
    assert np.max(np.abs(dgot - dwant) / (1.0 + np.abs(u * want))) < 1e-10
    far = np.array([-60.0, -32.5, 32.5, 35.0])
    lp = norm.logcdf(far)
    np.testing.assert_allclose(_b(far), np.exp(lp - norm.logpdf(far)) * lp, rtol=1e-12)
    # negative control: a table 16 times coarser (spacing 1/4) misses the same bound
    coarse = _BTable.__new__(_BTable)
    coarse.size = 256
    coarse.__init__()
    assert np.max(np.abs(coarse(u) - want) / np.maximum(np.abs(want), 1e-300)) > 1e-10


@pytest.mark.parametrize("noise", [0.0, 0.05, 0.7])
def test_mes_derivatives_match_finite_differences(noise):
    rng = np.random.default_rng(3)
    mu = rng.normal(0.0, 1.0, 30)
    sd = rng.uniform(0.05, 1.5, 30)
    fstar = rng.normal(-1.0, 0.7, 5)
    _, dmu, dsd = max_value_information(mu, sd, fstar, noise, grad=True)
    h = 1e-5
    info = max_value_information
    num_mu = (info(mu + h, sd, fstar, noise) - info(mu - h, sd, fstar, noise)) / (2 * h)
    num_sd = (info(mu, sd + h, fstar, noise) - info(mu, sd - h, fstar, noise)) / (2 * h)
    # central differences: truncation error ~h^2 times the third derivative, below 1e-8; rounding:
    # the noisy form sums terms of size gamma^2 / 2 (up to 60 here) that cancel, so values carry
    # ~1e-13 and differences ~1e-13 / h = 1e-8. A wrong term would be off by orders more.
    np.testing.assert_allclose(dmu, num_mu, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(dsd, num_sd, rtol=1e-6, atol=1e-6)


@pytest.mark.parametrize("noise_aware", [0, 1])
def test_mes_policy_scores_and_gradient(noise_aware):
    kernel, pool, post = plane_data()
    rule = start(MaxValueEntropySearch(noise_aware=noise_aware), post, pool, 5)
    rule.prepare(post)
    assert rule.fstar.shape == (16,)
    U = np.random.default_rng(6).random((7, 2))
    a, g = rule.score(post, U, grad=True)
    # score = mean over the sampled minima of the one-point information, at moments computed
    # by direct solves (noise-free: the truncnorm entropy drop of the previous test)
    mu, cov = exact_gp(kernel, post.mean, post.s2, post.X, post.y, U)
    sd = np.sqrt(np.diag(cov))
    if noise_aware:
        expected = max_value_information(mu, sd, rule.fstar, post.noise).mean(1)
    else:
        expected = np.array([np.mean([norm(m, s).entropy() - truncnorm((f - m) / s, (f - m) / s + 60, m, s).entropy()
                                      for f in rule.fstar]) for m, s in zip(mu, sd)])
    np.testing.assert_allclose(a, expected, rtol=1e-7)
    h = 1e-6
    for j in range(2):
        e = np.zeros(2)
        e[j] = h
        num = (rule.score(post, U + e) - rule.score(post, U - e)) / (2 * h)
        np.testing.assert_allclose(g[:, j], num, rtol=1e-5, atol=1e-7)
    # the screened pool scores keep the exact best points; the rest carry an upper bound
    full = rule._value(*post.pool_moments())
    screened = rule.score_pool(post)
    k = rule.n_starts
    top = np.argsort(-full)[:k]
    assert set(np.argsort(-screened)[:k]) == set(top)
    np.testing.assert_allclose(screened[top], full[top], rtol=1e-12)
    assert np.all(screened >= full - 1e-12)


@pytest.mark.slow
def test_sampled_minima_match_exact_joint_draws():
    """Mean of the minimum over the grid and the data: pathwise draws (the rule's sampler) against
    exact joint draws from the posterior covariance (numpy Cholesky)."""
    kernel, grid, post = line_data()
    runs = 40
    means = []
    for seed in range(runs):
        rule = start(MaxValueEntropySearch(samples=500, features=1024), post, grid, seed)
        rule.prepare(post)                                   # the rule's own draws (block of one)
        means.append(rule.fstar.mean())
    means = np.array(means)
    est, se_est = means.mean(), means.std(ddof=1) / np.sqrt(runs)   # spread over feature draws too
    U = np.vstack([grid, post.X])
    mu, cov = exact_gp(kernel, post.mean, post.s2, post.X, post.y, U)
    L = np.linalg.cholesky(cov + 1e-10 * np.eye(len(U)))
    draws = mu + (L @ np.random.default_rng(1).standard_normal((len(U), 40_000))).T
    low = draws.min(1)
    se_ex = low.std(ddof=1) / np.sqrt(len(low))
    assert abs(est - low.mean()) < Z_MAX * np.hypot(se_est, se_ex)
    # negative control: minima over the prior (no data) differ clearly
    Lp = np.linalg.cholesky(kernel(U) + 1e-10 * np.eye(len(U)))
    prior_low = (Lp @ np.random.default_rng(2).standard_normal((len(U), 40_000))).min(0)
    assert abs(est - prior_low.mean()) > Z_MAX * np.hypot(se_est, prior_low.std() / 200)


def test_gumbel_minima_follow_the_independence_approximation():
    """Wang & Jegelka's approximation P(f* > z) = prod_pool Phi((mu - z) / sd): the fitted Gumbel
    law matches its quartiles, so about 1/4, 1/2, 3/4 of the sampled minima fall below them."""
    kernel, grid, post = line_data()
    rule = start(MaxValueEntropySearch(samples=1024, gumbel=1), post, grid, 11)
    draws = []
    for _ in range(4):
        rule.prepare(post)
        draws.append(rule.fstar)
    draws = np.concatenate(draws)
    mu, cov = exact_gp(kernel, post.mean, post.s2, post.X, post.y, grid)
    sd = np.sqrt(np.diag(cov))

    def cdf(z):
        return 1.0 - np.prod(norm.cdf((mu - z) / sd))

    for p in (0.25, 0.5, 0.75):
        z = brentq(lambda z, p=p: cdf(z) - p, -10, 10, xtol=1e-12)
        share = np.mean(draws <= z)
        assert abs(share - p) < Z_MAX * np.sqrt(p * (1 - p) / len(draws))
    # negative control: the quartiles of the prior's minimum (sd 1, no data) are far off
    z = brentq(lambda z: 1.0 - norm.cdf(-z) ** len(grid) - 0.5, -10, 10)
    assert abs(np.mean(draws <= z) - 0.5) > Z_MAX * np.sqrt(0.25 / len(draws))


# --------------------------------------------------------------------------- knowledge gradient
def expected_min_quad(a, b):
    """E[min_i (a_i + b_i Z)] by adaptive quadrature, split at every crossing."""
    pts = sorted({(a[j] - a[i]) / (b[i] - b[j]) for i in range(len(a)) for j in range(len(a)) if b[i] != b[j]})
    pts = [p for p in pts if -12 < p < 12]
    edges = [-12.0, *pts, 12.0]
    f = lambda z: np.min(a + b * z) * norm.pdf(z)
    return sum(integrate.quad(f, lo, hi, epsabs=1e-14, epsrel=1e-12)[0] for lo, hi in itertools.pairwise(edges))


def test_expected_min_drop_against_quadrature_and_monte_carlo():
    rng = np.random.default_rng(12)
    a = rng.normal(0, 1, (6, 7))
    b = rng.normal(0, 1, (6, 7))
    a[1, 3], b[1, 3] = a[1, 2], b[1, 2]          # a duplicated line
    b[2, :3] = 0.4                                # three lines of equal slope
    b[3] = 0.0                                    # all flat: nothing to learn
    a[4, 0] = a[4].min()
    drop = expected_min_drop(a, b)
    exact = np.array([a[r].min() - expected_min_quad(a[r], b[r]) for r in range(len(a))])
    np.testing.assert_allclose(drop, exact, rtol=1e-9, atol=1e-12)
    assert drop[3] == 0.0
    Z = np.random.default_rng(13).standard_normal(200_000)
    for r in range(len(a)):
        m = (a[r][None, :] + b[r][None, :] * Z[:, None]).min(1)
        mc = a[r].min() - m.mean()
        se = m.std(ddof=1) / np.sqrt(len(Z))
        assert abs(drop[r] - mc) < Z_MAX * se + 1e-12


def lookahead_kg(kernel, post, P, j, n_draws, rng, *, s2=None):
    """min_P mu_n - E[min_P mu_{n+1}] for one more trial at P[j]: draw y from the predictive
    distribution, refit the posterior on the n + 1 observations by direct solves (the mean is
    linear in y, so one solve serves every draw), take the minimum over P, average."""
    s2 = post.s2 if s2 is None else s2
    mu, cov = exact_gp(kernel, post.mean, post.s2, post.X, post.y, P)
    X1 = np.vstack([post.X, P[j]])
    K1 = kernel(X1) + post.s2 * np.eye(len(X1))
    H = kernel(P, X1) @ np.linalg.inv(K1)                            # (|P|, n + 1)
    y = mu[j] + np.sqrt(cov[j, j] + s2) * rng.standard_normal(n_draws)
    Y = np.column_stack([np.broadcast_to(post.y, (n_draws, post.n)), y])
    low = (post.mean + (Y - post.mean) @ H.T).min(1)
    return mu.min() - low.mean(), low.std(ddof=1) / np.sqrt(n_draws)


def test_kg_matches_brute_force_lookahead():
    """Frazier, Powell & Dayanik (2009): the value of one more trial, against Monte Carlo."""
    kernel = Matern52([0.2], 1.0)
    post = Posterior(kernel, 0.0, 0.3)
    post.add_many(np.array([[0.1], [0.45], [0.8]]), np.array([0.2, -0.5, 0.1]))
    P = np.linspace(0.0, 1.0, 7)[:, None]
    kg = knowledge_gradient(post, P)
    rng = np.random.default_rng(21)
    for j in range(len(P)):
        mc, se = lookahead_kg(kernel, post, P, j, 200_000, rng)
        assert abs(kg[j] - mc) < Z_MAX * se
    # negative control: a look-ahead that forgets the observation noise in the predictive
    # distribution of y is told apart by the same test at the most valuable candidate
    j = int(np.argmax(kg))
    mc, se = lookahead_kg(kernel, post, P, j, 200_000, rng, s2=0.0)
    assert abs(kg[j] - mc) > Z_MAX * se


def test_kg_policy_chooses_the_best_candidate_including_the_recommendation():
    _, pool, post = plane_data()
    rule = start(KnowledgeGradient(points=32), post, pool, 0)
    P = rule.candidates(post)
    assert len(P) == 33
    np.testing.assert_array_equal(P[-1], post.X[post.recommend()])
    mu, sd = post.pool_moments()
    np.testing.assert_array_equal(np.sort(np.argsort(mu - 2 * sd)[:32]),
                                  np.sort([int(np.flatnonzero((pool == p).all(1))[0]) for p in P[:-1]]))
    x = rule.choose(post, 0)
    np.testing.assert_array_equal(x, P[int(np.argmax(knowledge_gradient(post, P)))])


# --------------------------------------------------------------------------- pbest
@pytest.mark.slow
def test_pbest_matches_counting_minimisers_of_exact_joint_draws():
    """Share of posterior draws whose minimum over a 1-D grid lies at each grid point: the rule's
    pathwise feature draws against exact joint draws (numpy Cholesky of the grid covariance).

    The rule's estimate averages 40 runs with their own frequencies: random features match the
    kernel's covariance only on average over frequency draws (Rahimi & Recht 2007), and a
    single draw of 1024 frequencies errs by about a^2 / sqrt(2048) = 0.02 at any lag. The
    spread across runs measures both that and the counting error, so its standard error is
    the honest one; the exact side has the binomial standard error sqrt(p (1 - p) / N).
    """
    kernel, grid, post = line_data()
    runs, S = 40, 1000
    est = np.array([start(ProbabilityOfMinimum(samples=S, features=1024), post, grid, seed).probabilities(post)
                    for seed in range(runs)])
    p_rule, se_rule = est.mean(0), est.std(0, ddof=1) / np.sqrt(runs)
    N = 40_000

    def exact_shares(X, y, seed):
        mu, cov = exact_gp(kernel, post.mean, post.s2, X, y, grid)
        L = np.linalg.cholesky(cov + 1e-10 * np.eye(len(grid)))
        draws = mu[:, None] + L @ np.random.default_rng(seed).standard_normal((len(grid), N))
        return np.bincount(np.argmin(draws, 0), minlength=len(grid)) / N

    p_ex = exact_shares(post.X, post.y, 3)
    se = np.sqrt(se_rule**2 + p_ex * (1 - p_ex) / N)
    used = se > 0
    assert np.isclose(p_rule.sum(), 1.0) and p_ex.max() > 0.05
    assert np.all(np.abs(p_rule - p_ex)[used] < Z_MAX * se[used])
    assert np.all(p_rule[~used] == 0)
    # negative control: the posterior without the last observation is told apart
    p_wrong = exact_shares(post.X[:-1], post.y[:-1], 4)
    se_w = np.sqrt(se_rule**2 + p_wrong * (1 - p_wrong) / N)
    assert np.max(np.abs(p_rule - p_wrong) / np.maximum(se_w, 1e-12)) > Z_MAX


def test_pbest_chooses_the_most_voted_point_and_refines_a_voter():
    _, pool, post = plane_data()
    plain = start(ProbabilityOfMinimum(refine=0), post, pool, 7)
    shares = plain.probabilities(post)
    plain = start(ProbabilityOfMinimum(refine=0), post, pool, 7)     # same stream again
    x = plain.choose(post, 0)
    top = np.flatnonzero(shares == shares.max())
    if len(top) > 1:   # ties go to the highest posterior sd
        top = top[[np.argmax(post.pool_moments()[1][top])]]
    np.testing.assert_array_equal(x, pool[top[0]])
    # refine: the same vote, then the continuous minimum of a draw whose minimum lay there
    rule = start(ProbabilityOfMinimum(refine=1), post, pool, 7)
    u = rule.choose(post, 0)
    voters = [s for s in range(rule.samples)
              if np.argmin(rule.draws.path(post, s)(pool)[0]) == top[0]]
    assert voters, "the chosen pool point must have a voter"
    fg = rule.draws.path(post, voters[0])
    assert fg(u[None])[0][0] <= fg(pool[top])[0][0] + 1e-12
    assert np.max(np.abs(u - pool[top[0]])) < 0.3       # stays in the basin it started from


@pytest.mark.parametrize("cls", [ProbabilityOfMinimum, KnowledgeGradient])
def test_final_trials_switch_to_the_lowest_mean(cls):
    _, pool, post = plane_data()
    rule = start(cls(exploit_last=2), post, pool, 0)         # horizon 20: trials 18 and 19 exploit
    assert rule.horizon_aware
    x = rule.choose(post, 18)
    mu_pool, _ = post.pool_moments()
    assert post.moments(x[None])[0][0] <= mu_pool.min() + 1e-12
    y = rule.choose(post, 17)                                # not yet: the rule's own choice
    assert post.moments(y[None])[0][0] > mu_pool.min() + 1e-6


def test_pathwise_draws_follow_a_refitted_belief():
    kernel, grid, post = line_data()
    rule = start(ProbabilityOfMinimum(), post, grid, 0)
    rule.probabilities(post)
    assert rule.draws.sample.kernel is kernel
    wider = Matern52([0.5], 2.0)
    post.refit(wider, 0.3, 0.2)
    p = rule.probabilities(post)
    assert rule.draws.sample.kernel is wider and rule.draws.sample.mean == 0.3
    assert p.sum() == pytest.approx(1.0)


# --------------------------------------------------------------------------- GP-UCB
@pytest.mark.parametrize("n, delta", [(1, 0.1), (4, 0.1), (12, 0.01), (12, 0.5)])
def test_gp_ucb_width_follows_the_published_schedule(n, delta):
    kernel, pool, post = plane_data(n=n)
    rule = start(GPUCB(delta=delta), post, pool, 0)
    rule.prepare(post)
    # Srinivas et al. (2010), Theorem 1: beta_t = 2 log(|D| t^2 pi^2 / (6 delta)), t = n + 1
    t, D = n + 1, len(pool)
    beta = 2.0 * np.log(D * t**2 * np.pi**2 / (6.0 * delta))
    assert rule.beta == pytest.approx(beta, rel=1e-13)
    assert abs(rule.beta - 2.0 * np.log(D * n**2 * np.pi**2 / (6.0 * delta))) > 0.1   # t = n would differ
    mu, cov = exact_gp(kernel, post.mean, post.s2, post.X, post.y, pool)
    np.testing.assert_allclose(rule.score_pool(post), -(mu - np.sqrt(beta) * np.sqrt(np.diag(cov))), atol=1e-9)


# --------------------------------------------------------------------------- GP-Hedge
def test_hedge_picks_members_with_softmax_of_gains():
    _, pool, post = plane_data()
    rule = start(GPHedge(eta=1.5), post, pool, 0)
    rule.gains = np.array([[0.3, -1.2, 0.8]])            # a block of one campaign
    # Hoffman, Brochu & de Freitas (2011), Algorithm 1: p_j = exp(eta g_j) / sum_l exp(eta g_l)
    p = np.exp(1.5 * rule.gains[0]) / np.exp(1.5 * rule.gains[0]).sum()
    np.testing.assert_allclose(rule.probabilities()[0], p, rtol=1e-13)
    rng = np.random.default_rng(5)
    N = 20_000
    freq = np.bincount([rule.pick([rng])[0] for _ in range(N)], minlength=3) / N
    assert np.all(np.abs(freq - p) < Z_MAX * np.sqrt(p * (1 - p) / N))
    # negative control: equal odds are rejected by the same tolerance
    assert np.any(np.abs(freq - 1 / 3) > Z_MAX * np.sqrt(2 / 9 / N))


def test_hedge_gains_add_the_negated_posterior_mean_at_each_nominee():
    kernel, pool, post = plane_data(n=6)
    rule = start(GPHedge(), post, pool, 0)
    x = rule.choose(post, 0)
    first = rule.nominees[0][0].copy()                   # nominees of the block's only campaign
    np.testing.assert_array_equal(x, first[rule.picked[0]])
    ei = start(ExpectedImprovement(), post, pool, 0)
    np.testing.assert_array_equal(first[0], ei.choose(post, 0))        # members nominate as they would choose
    assert np.all(rule.gains == 0.0)
    rule.release()
    post.add(x, 0.37)
    rule.choose(post, 1)
    mu, _ = exact_gp(kernel, post.mean, post.s2, post.X, post.y, first)
    np.testing.assert_allclose(rule.gains[0], -mu, atol=1e-10)
    rule.release()
    rule.choose(post, 2)                       # nothing observed in between (a lost trial): no reward yet
    np.testing.assert_allclose(rule.gains[0], -mu, atol=1e-10)
    second, third = (n[0].copy() for n in rule.nominees)
    rule.release()
    post.add(third[rule.picked[0]], -0.2)
    rule.choose(post, 3)                       # both pending choices are rewarded now
    mu2, _ = exact_gp(kernel, post.mean, post.s2, post.X, post.y, np.vstack([second, third]))
    np.testing.assert_allclose(rule.gains[0], -mu - mu2[:3] - mu2[3:], atol=1e-10)


def test_hedge_rounds_hold_pending_trials_and_reward_after_the_round():
    kernel, pool, post = plane_data(n=6)
    rule = start(GPHedge(), post, pool, 1)
    n0 = post.n
    with post.fantasies():
        u1 = rule.choose(post, 0)
        rule.hold(post, u1)                    # the chosen member's believer adds a fantasy
        assert post.n == n0 + 1
        u2 = rule.choose(post, 1)
        assert np.all(rule.gains == 0.0)       # fantasies are not results: no reward inside a round
    rule.release()
    assert np.max(np.abs(u1 - u2)) > 1e-3      # the held trial moved the next choice
    noms = np.concatenate([n[0] for n in rule.nominees])
    post.add(u1, 0.1)
    post.add(u2, -0.3)
    rule.choose(post, 2)
    mu, _ = exact_gp(kernel, post.mean, post.s2, post.X, post.y, noms)
    np.testing.assert_allclose(rule.gains[0], -(mu[:3] + mu[3:]), atol=1e-10)


# --------------------------------------------------------------------------- study files
def study_with(policy):
    return parse_study({
        "space": {"a": [0.0, 1.0]},
        "world": {"kernel": "matern52", "lengthscale": 0.3, "amplitude": 1.0, "mean": 0.0, "noise": 0.1},
        "campaign": {"initial": 3, "budgets": [6]}, "target": {"regret": 0.1}, "policy": [policy],
    }, source="test")


@pytest.mark.parametrize("policy", [{"rule": "pbest", "samples": 0}, {"rule": "mes", "gumbel": 2},
                                    {"rule": "kg", "points": 1}, {"rule": "gp-ucb", "delta": 1.5},
                                    {"rule": "hedge", "eta": -1.0}, {"rule": "mes", "sample": 8},
                                    {"rule": "pbest", "fill": "penalize"}, {"rule": "kg", "fill": "samples"}])
def test_study_files_validate_the_new_settings(policy):
    with pytest.raises(StudyError):
        study_with(policy)


def test_study_files_fill_in_defaults():
    settings = dict(study_with({"rule": "mes"}).policies[0].settings)
    assert {k: settings[k] for k in ("samples", "features", "gumbel", "noise_aware")} == \
        {"samples": 16, "features": 128, "gumbel": 0, "noise_aware": 1}
    assert dict(study_with({"rule": "gp-ucb"}).policies[0].settings)["delta"] == 0.1
