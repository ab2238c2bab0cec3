"""The exchangeable level correlation and the product kernel over mixed spaces (simlab.model.levels),
against scikit-learn and linear algebra."""

import numpy as np
import pytest
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import RBF, ConstantKernel

from simlab.model.gp import Posterior
from simlab.model.levels import MixedKernel, correlation_range, exchangeable, level_matrix
from simlab.study.types import Space


def space(levels=(3,), numeric=1, stepped=False):
    """``numeric`` continuous (or stepped, 0..4 by 1) inputs, then one categorical input per entry of ``levels``."""
    names = [f"x{i}" for i in range(numeric)] + [f"c{i}" for i in range(len(levels))]
    kinds = ["stepped" if stepped else "continuous"] * numeric + ["categorical"] * len(levels)
    low = [0.0] * numeric + [0.0] * len(levels)
    high = [4.0 if stepped else 1.0] * numeric + [float(L - 1) for L in levels]
    steps = [1.0 if stepped else 0.0] * numeric + [0.0] * len(levels)
    lev = [()] * numeric + [tuple(f"l{k}" for k in range(L)) for L in levels]
    return Space(names=tuple(names), low=tuple(low), high=tuple(high), kinds=tuple(kinds), steps=tuple(steps),
                 levels=tuple(lev))


def unit_points(sp, n, seed):
    rng = np.random.default_rng(seed)
    return sp.round_unit(rng.random((n, sp.dim)))


def one_hot(sp, U):
    """The continuous columns, then each categorical input as L one-hot columns (scikit-learn's inputs)."""
    cols = [U[:, list(sp.numeric)]]
    for j in sp.categorical:
        idx = sp.level_index(U[:, j], j).astype(int)
        cols.append(np.eye(len(sp.levels[j]))[idx])
    return np.hstack(cols)


@pytest.mark.parametrize("L", [2, 3, 4, 6])
def test_positive_definite_exactly_inside_the_range(L):
    # Qian, Wu & Wu (2008): (1 - rho) I + rho 11^T is positive definite iff -1/(L-1) < rho < 1;
    # its eigenvalues are 1 + (L-1) rho and 1 - rho (checked with numpy.linalg.eigvalsh)
    lo, hi = correlation_range(L)
    assert lo == pytest.approx(-1.0 / (L - 1)) and hi == 1.0
    for rho in np.linspace(lo, hi, 41)[1:-1]:
        ev = np.linalg.eigvalsh(exchangeable(L, rho))
        assert ev.min() > 0
        assert np.allclose(sorted(ev), sorted([1 + (L - 1) * rho] + [1 - rho] * (L - 1)))
    # negative control: just outside the range the same matrix has a negative eigenvalue
    for rho in (lo - 1e-3, hi + 1e-3):
        M = (1.0 - rho) * np.eye(L) + rho
        assert np.linalg.eigvalsh(M).min() < 0
        with pytest.raises(ValueError, match="strictly between"):
            exchangeable(L, rho)


def test_product_kernel_gram_is_positive_definite_with_negative_correlations():
    # Schur product theorem: stationary kernel x exchangeable correlations stays positive definite,
    # also for rho < 0; every level combination meets every continuous point
    sp = space(levels=(3, 2), numeric=1)
    k = MixedKernel(sp, "matern52", [0.3], 1.7, (-0.45, -0.9))
    x = np.linspace(0, 1, 7)
    U = np.array([[xi, (a + 0.5) / 3, (b + 0.5) / 2] for xi in x for a in range(3) for b in range(2)])
    assert np.linalg.eigvalsh(k(U)).min() > 0
    assert np.allclose(level_matrix(sp, (-0.45, -0.9)), np.kron(exchangeable(3, -0.45), exchangeable(2, -0.9)))


@pytest.mark.parametrize("levels", [(3,), (4, 2)])
def test_kernel_equals_rbf_on_one_hot_columns(levels):
    # an RBF kernel with lengthscale l on one-hot columns is exactly exp(-1/l^2) between distinct
    # levels (squared distance 2 between two one-hot rows), so scikit-learn's RBF over
    # [continuous, one-hot] columns is the squared-exponential product kernel with that rho
    sp = space(levels=levels, numeric=2)
    lc = [0.8, 1.3][: len(levels)]
    rho = tuple(np.exp(-1.0 / np.square(lc)))
    ls = [0.3, 0.5]
    ref = ConstantKernel(2.0**2) * RBF(ls + [l for l, L in zip(lc, levels) for _ in range(L)])
    k = MixedKernel(sp, "sqexp", ls, 2.0, rho)
    A, B = unit_points(sp, 40, 1), unit_points(sp, 30, 2)
    assert np.allclose(k(A, B), ref(one_hot(sp, A), one_hot(sp, B)), rtol=1e-12, atol=1e-14)
    # negative control: the same one-hot RBF with another correlation does not match
    wrong = MixedKernel(sp, "sqexp", ls, 2.0, tuple(r * 0.9 for r in rho))
    assert not np.allclose(wrong(A, B), ref(one_hot(sp, A), one_hot(sp, B)), rtol=1e-3)


@pytest.mark.parametrize("levels", [(3,), (3, 2)])
def test_posterior_matches_sklearn_on_one_hot_inputs(levels):
    # reference: GaussianProcessRegressor (fixed hyperparameters, alpha = noise^2) on one-hot inputs;
    # simlab: its Posterior with the product kernel. Agreement to 1e-6 leaves room for simlab's
    # relative nugget (1e-10 of the prior variance) and float64 rounding in the solves.
    sp = space(levels=levels, numeric=1)
    lc = [0.9, 1.4][: len(levels)]
    rho = tuple(np.exp(-1.0 / np.square(lc)))
    amp, noise, mean = 1.5, 0.1, 3.0
    X, Q = unit_points(sp, 25, 3), unit_points(sp, 60, 4)
    rng = np.random.default_rng(5)
    y = mean + np.sin(6 * X[:, 0]) + X[:, 1] + 0.1 * rng.standard_normal(len(X))
    ref = GaussianProcessRegressor(ConstantKernel(amp**2, "fixed") * RBF([0.25] + [l for l, L in zip(lc, levels)
                                                                              for _ in range(L)], "fixed"),
                                   alpha=noise**2, optimizer=None).fit(one_hot(sp, X), y - mean)
    mu_ref, sd_ref = ref.predict(one_hot(sp, Q), return_std=True)
    post = Posterior(MixedKernel(sp, "sqexp", [0.25], amp, rho), mean, noise)
    post.add_many(X, y)
    mu, sd = post.moments(Q)
    assert np.allclose(mu, mu_ref + mean, atol=1e-6) and np.allclose(sd, sd_ref, atol=1e-6)
    # negative control: treating the level index as a real number (a plain kernel on the coordinate) differs
    from simlab.model.kernels import SquaredExponential
    plain = Posterior(SquaredExponential([0.25] + [0.5] * len(levels), amp), mean, noise)
    plain.add_many(X, y)
    assert not np.allclose(plain.moments(Q)[0], mu_ref + mean, atol=1e-2)


def test_stepped_inputs_are_rounded_inside_the_kernel():
    sp = space(levels=(2,), numeric=1, stepped=True)       # x0 in {0, 1, 2, 3, 4} on the cube {0, .25, ... 1}
    k = MixedKernel(sp, "matern32", [0.4], 1.0, (0.5,))
    a = np.array([[0.26, 0.2]])
    b = np.array([[0.37, 0.3]])                             # both round to 0.25 and level 0
    assert k(a, b)[0, 0] == pytest.approx(1.0)
    c = np.array([[0.38, 0.7]])                             # rounds to 0.5, level 1
    expect = k.base(np.array([[0.25]]), np.array([[0.5]]))[0, 0] * 0.5
    assert k(a, c)[0, 0] == pytest.approx(expect)
    K, grads = k.stacked_grad(a[None], c[None])
    assert np.all(grads[0] == 0) and np.all(grads[1] == 0)  # piecewise constant in both inputs
