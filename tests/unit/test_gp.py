"""Gaussian-process posterior: moments, log marginal likelihood, incremental updates, jitter."""

import warnings

import numpy as np
import pytest
from helpers import KERNEL_NAMES, central_difference, sklearn_regressor

import simlab.model.gp
from simlab.model.gp import NUGGET, Posterior
from simlab.model.kernels import KERNELS, SquaredExponential

LS = np.array([0.3, 0.5])
AMP = 1.3
MEAN = 0.7
NOISE = 0.1


def sklearn_gp(name, X, y, *, noise, amplitude=AMP, lengthscale=LS, mean=MEAN):
    """scikit-learn's regressor with the same model: constant prior mean subtracted, the
    same diagonal (noise variance plus the nugget NUGGET * a^2), no refitting."""
    return sklearn_regressor(name, X, y, lengthscale=lengthscale, amplitude=amplitude, mean=mean,
                             diagonal=noise**2 + NUGGET * amplitude**2)


def data(n, seed, d=2):
    rng = np.random.default_rng(seed)
    X = rng.random((n, d))
    y = MEAN + AMP * np.sin(5 * X[:, 0]) * np.cos(3 * X[:, -1]) + NOISE * rng.standard_normal(n)
    return X, y


# --------------------------------------------------------------------------- against scikit-learn
@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_moments_and_evidence_match_sklearn(name):
    X, y = data(15, 201)
    Q = np.random.default_rng(202).random((30, 2))
    post = Posterior(KERNELS[name](LS, AMP), MEAN, NOISE)
    post.add_many(X, y)
    gpr = sklearn_gp(name, X, y, noise=NOISE)
    mu_ref, sd_ref = gpr.predict(Q, return_std=True)
    mu, sd = post.moments(Q)
    # Source: scikit-learn GaussianProcessRegressor (Rasmussen & Williams 2006, Algorithm 2.1).
    # Tolerance: both factor K + s2 I with s2 >= 0.01, condition number <= 1 + n a^2 / s2 ~ 2.6e3,
    # so results agree to about cond * eps ~ 1e-12 relative; allow 1e-9.
    np.testing.assert_allclose(mu, mu_ref + MEAN, rtol=1e-9, atol=1e-9 * AMP)
    np.testing.assert_allclose(sd, sd_ref, rtol=1e-9, atol=1e-9 * AMP)
    np.testing.assert_allclose(post.log_marginal_likelihood(), gpr.log_marginal_likelihood_value_, rtol=1e-9)
    # Posterior mean at the evaluated inputs, computed without new solves.
    np.testing.assert_allclose(post.mean_at_data(), gpr.predict(X) + MEAN, rtol=1e-9, atol=1e-9 * AMP)


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_noise_free_posterior_matches_sklearn_and_interpolates(name):
    """noise = 0: only the nugget is on the diagonal, so K is nearly singular for smooth kernels."""
    X, y = data(10, 203)
    y = MEAN + AMP * np.sin(5 * X[:, 0]) * np.cos(3 * X[:, 1])
    Q = np.random.default_rng(204).random((20, 2))
    post = Posterior(KERNELS[name](LS, AMP), MEAN, 0.0)
    post.add_many(X, y)
    gpr = sklearn_gp(name, X, y, noise=0.0)
    mu_ref, sd_ref = gpr.predict(Q, return_std=True)
    mu, sd = post.moments(Q)
    cond = np.linalg.cond(gpr.kernel_(X) + NUGGET * AMP**2 * np.eye(len(X)))
    # Source: scikit-learn. Tolerance: two backward-stable Cholesky solves agree to about
    # cond * eps relative (Higham 2002, from memory); 10 cond eps times the data scale.
    tol = max(10 * cond * np.finfo(float).eps, 1e-12) * AMP
    np.testing.assert_allclose(mu, mu_ref + MEAN, rtol=0, atol=tol)
    np.testing.assert_allclose(sd, sd_ref, rtol=0, atol=np.sqrt(tol * AMP))  # sd = sqrt(var): error sqrt(tol)
    # Interpolation at noise-free training points (common practice; scikit-learn's own kernel
    # tests check the same): the mean misses y by at most nugget * a^2 * |alpha|.
    alpha = np.linalg.solve(gpr.kernel_(X) + NUGGET * AMP**2 * np.eye(len(X)), y - MEAN)
    np.testing.assert_allclose(post.mean_at_data(), y, rtol=0,
                               atol=2 * NUGGET * AMP**2 * np.abs(alpha).max() + tol)


def test_log_marginal_likelihood_worked_example():
    # Source: REFERENCES.md, Rasmussen & Williams (2006) Algorithm 2.1, recomputed value.
    X = np.array([[0.1], [0.35], [0.5], [0.8]])
    y = np.array([0.2, -0.4, 0.1, 0.9])
    ref = -3.63315963160204
    # Tolerance: our diagonal carries an extra NUGGET * a^2 = 1e-10. d log p / d s2 =
    # (alpha^T alpha - tr (K + s2 I)^-1) / 2, and with s2 >= 0.01: |alpha|^2 <= |y|^2 / s2^2 = 1.02e4,
    # tr <= n / s2 = 400, so log p moves by at most 1e-10 * 5.3e3 = 5.3e-7. Allow 1e-6.
    tol = 1e-6
    for incremental in (False, True):
        post = Posterior(SquaredExponential([0.3], 1.0), 0.0, 0.1)
        if incremental:
            for x, v in zip(X, y):
                post.add(x, v)
        else:
            post.add_many(X, y)
        assert abs(post.log_marginal_likelihood() - ref) < tol
    # Negative control: lengthscale 0.33 instead of 0.3 is rejected by the same tolerance.
    wrong = Posterior(SquaredExponential([0.33], 1.0), 0.0, 0.1)
    wrong.add_many(X, y)
    assert abs(wrong.log_marginal_likelihood() - ref) > tol


# --------------------------------------------------------------------------- incremental updates
@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_incremental_updates_equal_refactorisation(name):
    X, y = data(25, 205)
    pool = np.random.default_rng(206).random((200, 2))   # 25 x 200 > 4096 pairs: both kernel code paths
    Q = np.random.default_rng(207).random((15, 2))
    k = KERNELS[name](LS, AMP)
    one = Posterior(k, MEAN, 0.05, pool=pool, capacity=25)
    for x, v in zip(X, y):
        one.add(x, v)
    batch = Posterior(k, MEAN, 0.05, pool=pool, capacity=25)
    batch.add_many(X, y)
    # Same model, two factorisations (row-by-row vs LAPACK): they agree to cond * eps with
    # cond <= 1 + n a^2 / s2 ~ 1.7e4, i.e. ~4e-12; allow 1e-9 in units of a.
    tol = dict(rtol=1e-9, atol=1e-9 * AMP)
    np.testing.assert_allclose(one.L, batch.L, **tol)
    np.testing.assert_allclose(one.L, np.linalg.cholesky(k(X) + one.s2 * np.eye(25)), **tol)  # numpy's Cholesky
    for a, b in zip(one.pool_moments(), batch.pool_moments()):
        np.testing.assert_allclose(a, b, **tol)
    for a, b in zip(one.moments(Q), batch.moments(Q)):
        np.testing.assert_allclose(a, b, **tol)
    np.testing.assert_allclose(one.mean_at_data(), batch.mean_at_data(), **tol)
    np.testing.assert_allclose(one.log_marginal_likelihood(), batch.log_marginal_likelihood(), rtol=1e-9)
    # pool moments equal moments at the pool points, and both equal scikit-learn
    gpr = sklearn_gp(name, X, y, noise=0.05)
    mu_ref, sd_ref = gpr.predict(pool, return_std=True)
    mu, sd = one.pool_moments()
    np.testing.assert_allclose(mu, mu_ref + MEAN, **tol)
    np.testing.assert_allclose(sd, sd_ref, **tol)


def test_capacity_grows_beyond_initial_allocation():
    X, y = data(30, 208)
    pool = np.random.default_rng(209).random((40, 2))
    k = KERNELS["matern52"](LS, AMP)
    post = Posterior(k, MEAN, NOISE, pool=pool, capacity=1)
    for x, v in zip(X[:11], y[:11]):
        post.add(x, v)
    post.add_many(X[11:], y[11:])                       # grows again inside add_many
    gpr = sklearn_gp("matern52", X, y, noise=NOISE)
    mu_ref, sd_ref = gpr.predict(pool, return_std=True)
    mu, sd = post.pool_moments()
    assert post.n == 30
    np.testing.assert_array_equal(post.X, X)
    np.testing.assert_array_equal(post.y, y)
    # Source: scikit-learn; tolerance as in test_moments_and_evidence_match_sklearn.
    np.testing.assert_allclose(mu, mu_ref + MEAN, rtol=1e-9, atol=1e-9 * AMP)
    np.testing.assert_allclose(sd, sd_ref, rtol=1e-9, atol=1e-9 * AMP)
    np.testing.assert_allclose(post.log_marginal_likelihood(), gpr.log_marginal_likelihood_value_, rtol=1e-9)


def test_empty_posterior_is_the_prior():
    post = Posterior(KERNELS["matern32"](LS, AMP), MEAN, NOISE, pool=np.full((3, 2), 0.5))
    mu, sd = post.moments(np.random.default_rng(210).random((4, 2)))
    np.testing.assert_array_equal(mu, MEAN)   # definition of the prior
    np.testing.assert_allclose(sd, AMP)
    pmu, psd = post.pool_moments()
    np.testing.assert_array_equal(pmu, MEAN)
    np.testing.assert_allclose(psd, AMP)


# --------------------------------------------------------------------------- gradients
@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("noise", [NOISE, 0.0])
def test_moment_gradients_match_finite_differences(name, noise):
    X, y = data(10, 211)
    Q = np.random.default_rng(212).random((8, 2))
    assert np.min(np.linalg.norm(Q[:, None] - X[None], axis=-1)) > 0.02  # away from the data (matern12 kink)
    post = Posterior(KERNELS[name](LS, AMP), MEAN, noise)
    post.add_many(X, y)
    mu, sd, dmu, dsd = post.moments(Q, grad=True)
    h = 1e-6
    fd_mu = central_difference(lambda U: post.moments(U)[0], Q, h)
    fd_sd = central_difference(lambda U: post.moments(U)[1], Q, h)
    # Source: central finite differences. Tolerance: truncation h^2 |f'''| / 6 with |f'''| up to
    # ~a |alpha|_1 / l^3 (1e-9 here) plus rounding eps |f| / h ~ 3e-10 a; allow 1e-6 relative + 1e-6 a.
    np.testing.assert_allclose(dmu, fd_mu, rtol=1e-6, atol=1e-6 * AMP)
    np.testing.assert_allclose(dsd, fd_sd, rtol=1e-6, atol=1e-6 * AMP)
    # moments(grad=True) returns the same mu and sd as moments()
    np.testing.assert_array_equal(mu, post.moments(Q)[0])
    np.testing.assert_array_equal(sd, post.moments(Q)[1])


def test_moment_gradient_negative_control():
    # The same finite-difference check rejects the gradient of a posterior with another lengthscale.
    X, y = data(10, 211)
    Q = np.random.default_rng(212).random((8, 2))
    post = Posterior(KERNELS["matern52"](LS, AMP), MEAN, NOISE)
    post.add_many(X, y)
    wrong = Posterior(KERNELS["matern52"](1.1 * LS, AMP), MEAN, NOISE)
    wrong.add_many(X, y)
    fd_mu = central_difference(lambda U: post.moments(U)[0], Q, 1e-6)
    assert not np.allclose(wrong.moments(Q, grad=True)[2], fd_mu, rtol=1e-6, atol=1e-6 * AMP)


# --------------------------------------------------------------------------- duplicates and jitter
@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_duplicate_noise_free_inputs_are_absorbed_by_the_nugget(name):
    """Exact repeats with zero noise: the nugget keeps the factorisation finite."""
    X, _ = data(6, 213)
    f = MEAN + np.sin(4 * X[:, 0])
    k = KERNELS[name](LS, AMP)
    pool = np.vstack([X, np.random.default_rng(214).random((10, 2))])
    one = Posterior(k, MEAN, 0.0, pool=pool)
    for i in [0, 1, 2, 3, 4, 5, 2, 2, 4]:
        one.add(X[i], f[i])
    batch = Posterior(k, MEAN, 0.0, pool=pool)
    batch.add_many(X[[0, 1, 2, 3, 4, 5, 2, 2, 4]], f[[0, 1, 2, 3, 4, 5, 2, 2, 4]])
    for post in (one, batch):
        mu, sd = post.moments(X)
        pmu, psd = post.pool_moments()
        for v in (mu, sd, pmu, psd, post.mean_at_data(), [post.log_marginal_likelihood()]):
            assert np.all(np.isfinite(v))
        # Interpolation (common practice): with only the nugget 1e-10 a^2 on the diagonal the mean
        # at an evaluated input misses y by O(nugget * |alpha|) and the sd is O(sqrt(nugget) a) = 1e-5 a.
        np.testing.assert_allclose(mu, f, rtol=0, atol=1e-6 * AMP)
        assert np.all(sd < 1e-4 * AMP)
        np.testing.assert_allclose(pmu[:6], f, rtol=0, atol=1e-6 * AMP)


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("how", ["add", "add_many"])
def test_jitter_warning_when_the_gram_matrix_is_singular(name, how, monkeypatch):
    """Without the nugget, noise-free duplicates make K singular: the posterior must raise a
    RuntimeWarning naming the jitter it added, and stay finite."""
    monkeypatch.setattr(simlab.model.gp, "NUGGET", 0.0)
    X, _ = data(5, 215)
    Xd = np.vstack([X, X])
    f = MEAN + np.sin(4 * Xd[:, 0])
    post = Posterior(KERNELS[name](LS, AMP), MEAN, 0.0, pool=X)
    with pytest.warns(RuntimeWarning, match="jitter"):
        if how == "add":
            for x, v in zip(Xd, f):
                post.add(x, v)
        else:
            post.add_many(Xd, f)
    assert post.jitter > 0
    mu, sd = post.moments(X)
    pmu, psd = post.pool_moments()
    for v in (mu, sd, pmu, psd, post.mean_at_data(), [post.log_marginal_likelihood()]):
        assert np.all(np.isfinite(v))
    # still interpolates, now to within the jitter's effect: sd ~ sqrt(jitter) a (jitter <= 1e-2)
    tol = 10 * np.sqrt(post.jitter) * AMP
    np.testing.assert_allclose(mu, f[:5], rtol=0, atol=tol)
    np.testing.assert_allclose(pmu, f[:5], rtol=0, atol=tol)


def test_no_warning_for_distinct_inputs():
    # Negative control for the warning check: a well-posed posterior adds no jitter and stays silent.
    X, y = data(20, 216)
    post = Posterior(KERNELS["matern52"](LS, AMP), MEAN, NOISE)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        for x, v in zip(X, y):
            post.add(x, v)
        post.add_many(X[:3] + 0.01, y[:3])
    assert post.jitter == 0.0
