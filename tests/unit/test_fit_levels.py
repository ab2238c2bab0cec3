"""Fits of the product kernel over levels (simlab.model.fit_levels): the likelihood against scikit-learn on
one-hot columns, its gradient against finite differences, leave-one-out against refits, and recovery
of a known level correlation with a negative control."""

import numpy as np
import pytest
from helpers import KERNEL_NAMES
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern

from simlab.model.fit_levels import _Objective, fit_mixed, mixed_log_likelihood, mixed_loo
from simlab.model.gp import NUGGET

COUNTS = (3, 2)


def data(seed, n=40, rho=(0.6, 0.3), ls=0.3, amp=1.2, noise=0.15, mean=2.0):
    """One continuous input and two categorical ones (3 and 2 levels), drawn exactly (Cholesky) from the
    product kernel written here with scikit-learn's Matern(5/2) and numpy."""
    rng = np.random.default_rng(seed)
    x = rng.random((n, 1))
    lev = np.column_stack([rng.integers(0, L, n) for L in COUNTS])
    K = amp**2 * Matern(ls, nu=2.5)(x)
    for k, r in enumerate(rho):
        K = K * np.where(lev[:, k, None] == lev[None, :, k], 1.0, r)
    y = mean + np.linalg.cholesky(K + 1e-10 * np.eye(n)) @ rng.standard_normal(n) + noise * rng.standard_normal(n)
    return x, lev, y


def one_hot(lev):
    return np.column_stack([(lev[:, k, None] == np.arange(L)).astype(float) for k, L in enumerate(COUNTS)])


def test_likelihood_equals_scikit_learn_on_one_hot_columns():
    """Reference: scikit-learn's GaussianProcessRegressor.log_marginal_likelihood with an RBF kernel on the
    continuous input and one-hot columns. Two distinct levels differ in two one-hot columns, so an RBF of
    lengthscale l there gives exp(-2 / (2 l^2)) = exp(-1 / l^2): an exchangeable correlation
    rho = exp(-1 / l^2), i.e. l = (-1 / log rho)^(1/2) (issue 15). Zero mean in scikit-learn, so it is
    given y - mean; noise variance and the relative nugget are its ``alpha``. float64 rounding through a
    40 x 40 Cholesky agrees to ~1e-12 relative; 1e-9 leaves room. Negative control: another rho differs."""
    x, lev, y = data(3)
    ls, amp, mean, noise, rho = 0.25, 1.3, 2.0, 0.15, np.array([0.6, 0.3])
    ours = mixed_log_likelihood("sqexp", x, lev, COUNTS, y, lengthscale=[ls], amplitude=amp, mean=mean,
                                noise=noise, rho=rho)
    hot = np.sqrt(-1.0 / np.log(rho))
    scales = np.concatenate([[ls], np.repeat(hot, COUNTS)])
    kernel = ConstantKernel(amp**2, "fixed") * RBF(scales, "fixed")
    gpr = GaussianProcessRegressor(kernel, alpha=noise**2 + NUGGET * amp**2, optimizer=None)
    ref = gpr.fit(np.column_stack([x, one_hot(lev)]), y - mean).log_marginal_likelihood_value_
    assert ours == pytest.approx(ref, rel=1e-9, abs=1e-9)
    wrong = mixed_log_likelihood("sqexp", x, lev, COUNTS, y, lengthscale=[ls], amplitude=amp, mean=mean,
                                 noise=noise, rho=[0.5, 0.3])
    assert wrong != pytest.approx(ref, rel=1e-9, abs=1e-9)


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_gradient_matches_finite_differences(name):
    """Central differences of step 1e-5 in each search coordinate (log l, log a, log s, t_1, t_2, mean):
    truncation error h^2 f''' / 6 ~ 1e-10 x |f'''| (Nocedal & Wright 2006, section 8.1) and rounding
    ~ 1e-16 |lml| / h ~ 1e-10; a tolerance of 1e-5 relative (1e-6 absolute) covers both."""
    x, lev, y = data(5, n=25)
    obj = _Objective(name, x, lev, COUNTS, y)
    t0 = np.array([np.log(0.3), np.log(1.1), np.log(0.2), 0.4, -0.7, 1.8])

    def lml(t):
        rho = obj.lows + (1 - obj.lows) / (1 + np.exp(-t[3:5]))
        return obj(np.exp(t[:1]), np.exp(t[1]), t[5], np.exp(t[2]), rho, grad=True)

    value, g, _ = lml(t0)
    h = 1e-5
    for i in range(len(t0)):
        e = np.zeros(len(t0))
        e[i] = h
        fd = (lml(t0 + e)[0] - lml(t0 - e)[0]) / (2 * h)
        assert g[i] == pytest.approx(fd, rel=1e-5, abs=1e-6), (name, i)


def test_leave_one_out_equals_refits():
    """The closed form (Rasmussen & Williams 2006, eq. 5.12) against n conditionings done directly on the
    Gram matrix written here: each y_i given the other n - 1 (eq. 2.23-2.24 with noise on the diagonal)."""
    x, lev, y = data(7, n=20)
    hyper = dict(lengthscale=[0.3], amplitude=1.1, mean=1.9, noise=0.2, rho=[0.5, -0.4])
    loo = mixed_loo("matern52", x, lev, COUNTS, y, **hyper)
    K = 1.1**2 * Matern(0.3, nu=2.5)(x) * np.where(lev[:, 0, None] == lev[None, :, 0], 1, 0.5) \
        * np.where(lev[:, 1, None] == lev[None, :, 1], 1, -0.4)
    K += (0.2**2 + NUGGET * 1.1**2) * np.eye(20)
    for i in range(20):
        rest = np.arange(20) != i
        w = np.linalg.solve(K[np.ix_(rest, rest)], K[rest, i])
        assert loo.mean[i] == pytest.approx(1.9 + w @ (y[rest] - 1.9), rel=1e-8)
        assert loo.sd[i] ** 2 == pytest.approx(K[i, i] - K[i, rest] @ w, rel=1e-8)


def recovered(rho, seeds=range(8)):
    """Fitted rho from data of 200 points, one continuous input (lengthscale 0.08) and 3 levels."""
    out = []
    for seed in seeds:
        rng = np.random.default_rng(100 + seed)
        x, lev = rng.random((200, 1)), rng.integers(0, 3, (200, 1))
        K = Matern(0.08, nu=2.5)(x) * np.where(lev == lev.T, 1.0, rho)
        y = 3.0 + np.linalg.cholesky(K + 1e-10 * np.eye(200)) @ rng.standard_normal(200) \
            + 0.1 * rng.standard_normal(200)
        fit = fit_mixed("matern52", x, lev, (3,), y, restarts=3, rng=np.random.default_rng(seed))
        assert -0.5 < fit.level_correlation[0] < 1.0
        out.append(fit.level_correlation[0])
    return np.array(out)


@pytest.mark.slow
def test_level_correlation_is_recovered():
    """Data drawn with rho = 0.6: the mean fitted rho over 8 fixed seeds lies within 0.13 of 0.6.

    Spread, measured over 20 seeds of the same design (2026-12-03, this code): sd 0.117 of one fit,
    mean 0.561 (maximum likelihood leans a little low with 3 levels); the mean of 8 then has sd
    0.117 / sqrt(8) = 0.041, and 0.13 is 3 of those (a bias of 0.04 included). Negative control:
    data drawn with rho = -0.3 (fitted -0.32 +- 0.055 over 20 seeds) are not fitted as 0.6: the same
    check fails for them.
    """
    assert abs(recovered(0.6).mean() - 0.6) < 0.13
    assert abs(recovered(-0.3).mean() - 0.6) > 0.13


def test_every_input_categorical_and_bad_arguments():
    rng = np.random.default_rng(2)
    lev = rng.integers(0, 3, (30, 1))
    y = np.where(lev[:, 0] == 1, 1.0, 0.0) + 0.1 * rng.standard_normal(30)
    fit = fit_mixed("matern52", np.empty((30, 0)), lev, (3,), y, restarts=2, rng=rng)
    assert fit.lengthscale == () and len(fit.level_correlation) == 1
    with pytest.raises(ValueError, match=r"rho must lie in \(-1/\(L-1\), 1\)"):
        mixed_log_likelihood("sqexp", np.empty((30, 0)), lev, (3,), y, lengthscale=[], amplitude=1.0, mean=0.0,
                             noise=0.1, rho=[-0.5])
    with pytest.raises(ValueError, match="level indices 0 .. 1"):
        fit_mixed("sqexp", np.empty((30, 0)), lev, (2,), y, rng=rng)
