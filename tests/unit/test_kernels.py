"""Kernels: values, input gradients, diagonal, positive semi-definiteness and spectral samples."""

import numpy as np
import pytest
from helpers import KERNEL_NAMES, central_difference, sklearn_kernel

from simlab.model.kernels import KERNELS, make_kernel

LENGTHSCALE = np.array([0.3, 0.7, 1.5])
AMPLITUDE = 1.7
EPS = np.finfo(float).eps


def test_registry_holds_the_four_kernels():
    # the study file names listed in DESIGN.md
    assert sorted(KERNELS) == sorted(KERNEL_NAMES)
    with pytest.raises(ValueError, match="sqexp"):
        make_kernel("gaussian", [0.3], 1.0)


# --------------------------------------------------------------------------- values
@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("n, m", [(7, 5), (20, 8), (90, 80)])  # up to 8 rows on one side: difference form; else expanded square
def test_values_match_sklearn(name, n, m):
    rng = np.random.default_rng(101)
    A, B = rng.random((n, 3)), rng.random((m, 3))
    k = KERNELS[name](LENGTHSCALE, AMPLITUDE)
    ref = sklearn_kernel(name, LENGTHSCALE, AMPLITUDE)
    # Source: scikit-learn RBF / Matern(nu) x ConstantKernel. Tolerance: both evaluate
    # a^2 rho(r) in float64; r differs by a few ulp (|a|^2+|b|^2-2ab loses at most
    # ~4 eps |a/l|^2 / r in r, and r >= 0.01 for these random points), so 1e-11 a^2 is ample.
    np.testing.assert_allclose(k(A, B), ref(A, B), rtol=0, atol=1e-11 * AMPLITUDE**2)


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("n", [6, 12, 100])  # 6 rows: difference form; 12 and 100: expanded square
def test_gram_matrix_matches_sklearn_including_the_diagonal(name, n):
    """k(X) with coincident pairs (the diagonal), where r = 0 exactly."""
    X = np.random.default_rng(102).random((n, 3))
    k = KERNELS[name](LENGTHSCALE, AMPLITUDE)
    ref = sklearn_kernel(name, LENGTHSCALE, AMPLITUDE)
    # Source: scikit-learn. Tolerance: float64 rounding of a^2 rho(r), 1e-11 a^2 as above;
    # at r = 0 both must give a^2 exactly up to rounding.
    np.testing.assert_allclose(k(X), ref(X), rtol=0, atol=1e-11 * AMPLITUDE**2)


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("n", [6, 12, 100])
def test_diag_equals_diagonal_of_gram_matrix(name, n):
    X = np.random.default_rng(103).random((n, 3))
    k = KERNELS[name](LENGTHSCALE, AMPLITUDE)
    # common practice (the kernel-property tests of scikit-learn): diag(X) == np.diag(k(X)).
    # Tolerance 1e-11 relative: at a == b the squared scaled distance may come out as rounding
    # noise of about 4 eps |a/l|^2 ~ 3e-14 instead of 0, which moves rho by that much for the
    # differentiable kernels (rho = 1 - c r^2 + ...); a kernel with a kink (rho = 1 - r + ...)
    # must not take the square root of that noise (1e-7), which this tolerance rejects.
    np.testing.assert_allclose(k.diag(X), np.diag(k(X)), rtol=1e-11, atol=0)
    # and both equal the prior variance (definition of a stationary kernel with rho(0) = 1)
    np.testing.assert_allclose(k.diag(X), AMPLITUDE**2, rtol=8 * EPS)


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("n", [40, 100])
def test_gram_matrix_symmetric_positive_semidefinite(name, n):
    X = np.random.default_rng(104).random((n, 3))
    k = KERNELS[name](LENGTHSCALE, AMPLITUDE)
    K = k(X)
    # Symmetry: exact in the difference form; the expanded square may differ by rounding (a few eps a^2).
    np.testing.assert_allclose(K, K.T, rtol=0, atol=16 * EPS * AMPLITUDE**2)
    # Bochner: a stationary kernel with a spectral density is positive semi-definite
    # (Rasmussen & Williams 2006, section 4.2). Eigenvalues of a symmetric matrix are computed
    # to about n eps ||K||, ||K|| <= n a^2, so allow -n^2 eps a^2.
    lam = np.linalg.eigvalsh(0.5 * (K + K.T))
    assert lam.min() >= -(n**2) * EPS * AMPLITUDE**2


def test_lengthscale_is_per_input():
    # Negative control for the anisotropic lengthscale: swapping the lengthscales changes
    # the values (so the value test above could fail if lengthscales were mixed up).
    rng = np.random.default_rng(105)
    A, B = rng.random((6, 3)), rng.random((4, 3))
    k = KERNELS["matern52"](LENGTHSCALE, AMPLITUDE)
    wrong = sklearn_kernel("matern52", LENGTHSCALE[::-1], AMPLITUDE)
    assert np.max(np.abs(k(A, B) - wrong(A, B))) > 1e-2


# --------------------------------------------------------------------------- gradient
@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_grad_matches_finite_differences(name):
    rng = np.random.default_rng(106)
    A, B = rng.random((5, 3)), rng.random((6, 3))
    k = KERNELS[name](LENGTHSCALE, AMPLITUDE)
    g = k.grad(A, B)
    assert g.shape == (5, 6, 3)
    h = 1e-6
    fd = central_difference(lambda U: k(U, B), A, h)
    # Source: central finite differences. Tolerance: truncation h^2 |k'''| / 6 ~ 1e-12 a^2 / l^3
    # plus rounding eps a^2 / h ~ 3e-10 a^2; 1e-7 a^2 / l_min leaves a wide margin.
    np.testing.assert_allclose(g, fd, rtol=1e-6, atol=1e-7 * AMPLITUDE**2 / LENGTHSCALE.min())


@pytest.mark.parametrize("name", ["sqexp", "matern32", "matern52"])
def test_grad_at_zero_distance_is_zero_for_differentiable_kernels(name):
    # At r = 0 a differentiable stationary kernel has zero gradient (its maximum);
    # central differences agree. Skipped for matern12, whose kink has no derivative.
    A = np.random.default_rng(107).random((3, 3))
    k = KERNELS[name](LENGTHSCALE, AMPLITUDE)
    g = k.grad(A, A)
    fd = central_difference(lambda U: k(U, A), A, 1e-6)
    np.testing.assert_allclose(g, fd, rtol=1e-6, atol=1e-7 * AMPLITUDE**2 / LENGTHSCALE.min())
    idx = np.arange(3)
    np.testing.assert_array_equal(g[idx, idx], 0.0)


def test_grad_negative_control():
    # The finite-difference check rejects the gradient of a kernel with another lengthscale.
    rng = np.random.default_rng(108)
    A, B = rng.random((5, 3)), rng.random((6, 3))
    k = KERNELS["matern32"](LENGTHSCALE, AMPLITUDE)
    wrong = KERNELS["matern32"](1.1 * LENGTHSCALE, AMPLITUDE)
    fd = central_difference(lambda U: k(U, B), A, 1e-6)
    assert not np.allclose(wrong.grad(A, B), fd, rtol=1e-6, atol=1e-7 * AMPLITUDE**2 / LENGTHSCALE.min())


# --------------------------------------------------------------------------- spectral samples
N_FREQ = 200_000
SPECTRAL_LS = np.array([0.4, 0.9])
# lags in input units, chosen so the scaled distance r spans 0.25 .. 2.5
TAUS = np.array([[0.1, 0.0], [0.0, 0.45], [0.3, 0.6], [0.8, 0.9], [1.0, -0.4]])


def bochner_z_scores(omega, kernel):
    """(mean cos(omega tau) - k(tau)/a^2) / (its Monte Carlo sd, from the sample), one per lag."""
    c = np.cos(omega @ TAUS.T)                         # (N, lags)
    est = c.mean(0)
    se = c.std(0, ddof=1) / np.sqrt(len(c))
    exact = kernel(TAUS, np.zeros((1, 2)))[:, 0] / kernel.variance
    return (est - exact) / se


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_spectral_samples_reproduce_the_kernel(name):
    # Bochner's theorem: k(tau) / a^2 = E[cos(omega . tau)] for omega drawn from the normalised
    # spectral density (Rahimi & Recht 2007; densities in Rasmussen & Williams 2006, section 4.2).
    # Tolerance: 4.5 Monte Carlo sd (sd from the sample); 20 comparisons in all, so a false
    # alarm has probability about 20 * 7e-6; the seed is fixed.
    k = KERNELS[name](SPECTRAL_LS, AMPLITUDE)
    omega = k.spectral(np.random.default_rng(109), N_FREQ)
    assert omega.shape == (N_FREQ, 2)
    z = bochner_z_scores(omega, k)
    assert np.all(np.abs(z) < 4.5), z


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_spectral_negative_control_other_lengthscale(name):
    # Frequencies of the same kernel with lengthscales 30% longer must be rejected.
    k = KERNELS[name](SPECTRAL_LS, AMPLITUDE)
    other = KERNELS[name](1.3 * SPECTRAL_LS, AMPLITUDE)
    z = bochner_z_scores(other.spectral(np.random.default_rng(110), N_FREQ), k)
    assert np.max(np.abs(z)) > 4.5, z


@pytest.mark.parametrize("name, other", [("matern32", "matern52"), ("matern52", "sqexp"),
                                         ("matern12", "matern32"), ("sqexp", "matern52")])
def test_spectral_negative_control_other_kernel(name, other):
    # Frequencies of a neighbouring kernel with the same lengthscales must be rejected.
    k = KERNELS[name](SPECTRAL_LS, AMPLITUDE)
    z = bochner_z_scores(KERNELS[other](SPECTRAL_LS, AMPLITUDE).spectral(np.random.default_rng(111), N_FREQ), k)
    assert np.max(np.abs(z)) > 4.5, z
