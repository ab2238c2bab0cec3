"""Worlds: random-feature and grid draws have the kernel's covariance; optima are found."""

import numpy as np
import pytest
from helpers import KERNEL_NAMES, Z_MAX, central_difference, sklearn_kernel

from simlab.model.kernels import KERNELS
from simlab.rng import stream
from simlab.worlds.draws import FeatureSample, FeatureWorld, GridWorld

AMP = 1.2
MEAN = 0.4


def covariance_z_scores(values, pairs, exact, mean):
    """z-scores of the empirical covariances E[(f_a - m)(f_b - m)] across independent draws (rows
    of ``values``) against ``exact``; the sd of each estimate is computed from the sample."""
    c = values - mean
    prod = np.stack([c[:, a] * c[:, b] for a, b in pairs], 1)
    est = prod.mean(0)
    se = prod.std(0, ddof=1) / np.sqrt(len(prod))
    return (est - exact) / se


# --------------------------------------------------------------------------- feature worlds
LS2 = np.array([0.3, 0.5])
N_WORLDS = 2000
U4 = np.array([[0.2, 0.3], [0.25, 0.3], [0.5, 0.6], [0.9, 0.1]])
PAIRS = [(0, 0), (0, 1), (0, 2), (0, 3), (1, 2)]


def feature_world_values(name, n_worlds):
    k = KERNELS[name](LS2, AMP)
    return np.stack([FeatureWorld(k, MEAN, stream(2024, i, "world"))(U4) for i in range(n_worlds)])


@pytest.fixture(scope="module")
def feature_values():
    return {name: feature_world_values(name, N_WORLDS) for name in KERNEL_NAMES}


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_feature_worlds_have_the_kernel_covariance(name, feature_values):
    # Across worlds (frequencies and weights both random) the covariance is exactly the kernel:
    # Bochner's theorem, Rahimi & Recht (2007). Exact values from scikit-learn's kernel.
    ref = sklearn_kernel(name, LS2, AMP)
    exact = np.array([ref(U4[[a]], U4[[b]])[0, 0] for a, b in PAIRS])
    z = covariance_z_scores(feature_values[name], PAIRS, exact, MEAN)
    # Tolerance: 4.5 Monte Carlo sd, 20 comparisons over the kernels (false alarm ~1.4e-4, seed fixed).
    assert np.all(np.abs(z) < Z_MAX), z
    # the mean is the prior mean (sd of the mean a / sqrt(N))
    mz = (feature_values[name].mean(0) - MEAN) / (feature_values[name].std(0, ddof=1) / np.sqrt(N_WORLDS))
    assert np.all(np.abs(mz) < Z_MAX), mz


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_feature_world_covariance_negative_control(name, feature_values):
    # The same check against the kernel with 1.5x the lengthscales must fail.
    ref = sklearn_kernel(name, 1.5 * LS2, AMP)
    wrong = np.array([ref(U4[[a]], U4[[b]])[0, 0] for a, b in PAIRS])
    z = covariance_z_scores(feature_values[name], PAIRS, wrong, MEAN)
    assert np.max(np.abs(z)) > Z_MAX, z


# lags whose scaled distance r = |tau / l| is 0.3, 1 and 2 (l = 0.3, 0.5)
LAGS = np.array([[0.09, 0.0], [0.18, 0.4], [0.36, 0.8]])


def per_draw_errors(name, n_draws, F, lengthscale=LS2):
    """a^2/F sum_j cos(omega_j tau) - k(tau) for n_draws independent frequency draws, via the
    world's own feature basis (basis(0) . basis(tau))."""
    k = KERNELS[name](LS2, AMP)
    exact = sklearn_kernel(name, lengthscale, AMP)(LAGS, np.zeros((1, 2)))[:, 0]
    out = np.empty((n_draws, len(LAGS)))
    for i in range(n_draws):
        s = FeatureSample(k, MEAN, stream(7, i, "world"), n_freq=F)
        B = s.basis(np.vstack([np.zeros((1, 2)), LAGS]))
        out[i] = B[1:] @ B[0] - exact
    return out


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_feature_covariance_error_within_documented_bound(name):
    F, M = 1024, 600
    e = per_draw_errors(name, M, F)
    ref = sklearn_kernel(name, LS2, AMP)
    rho = ref(LAGS, np.zeros((1, 2)))[:, 0] / AMP**2
    rho2 = ref(2 * LAGS, np.zeros((1, 2)))[:, 0] / AMP**2
    # Exact variance of one term: Var cos(w.tau) = E[cos^2] - E[cos]^2 = (1 + rho(2 tau))/2 - rho(tau)^2
    # (cos^2 x = (1 + cos 2x)/2 with Bochner's theorem), so the per-draw error has sd
    # a^2 sqrt(Var / F).
    sd_exact = AMP**2 * np.sqrt(((1 + rho2) / 2 - rho**2) / F)
    bound = AMP**2 * np.sqrt(1 / (2 * F))   # FeatureSample's docstring: sd <= a^2 sqrt(1/(2F))
    assert np.all(sd_exact <= bound)
    # (1) unbiased: mean error within 4.5 Monte Carlo sd (sd from the sample)
    z_mean = e.mean(0) / (e.std(0, ddof=1) / np.sqrt(M))
    assert np.all(np.abs(z_mean) < Z_MAX), z_mean
    # (2) spread: the sample variance matches the exact variance; the sd of a sample variance is
    # sqrt((m4 - s^4) / M), with the fourth central moment m4 from the sample.
    s2 = e.var(0, ddof=1)
    m4 = ((e - e.mean(0)) ** 4).mean(0)
    z_var = (s2 - sd_exact**2) / np.sqrt((m4 - s2**2) / M)
    assert np.all(np.abs(z_var) < Z_MAX), z_var
    # (3) the empirical sd is within the documented bound (up to 4.5 sd of its estimate)
    assert np.all(np.sqrt(s2) <= bound * (1 + Z_MAX * np.sqrt(2 / M)))


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_feature_covariance_error_negative_controls(name):
    F, M = 1024, 600
    # Errors measured against the kernel with 1.5x the lengthscales are biased: rejected.
    e = per_draw_errors(name, M, F, lengthscale=1.5 * LS2)
    z_mean = e.mean(0) / (e.std(0, ddof=1) / np.sqrt(M))
    assert np.max(np.abs(z_mean)) > Z_MAX, z_mean
    # The spread check distinguishes the exact variance from the bound: at the shortest lag
    # the sample variance is far below the bound's a^4 / (2F).
    e = per_draw_errors(name, M, F)
    s2 = e.var(0, ddof=1)
    m4 = ((e - e.mean(0)) ** 4).mean(0)
    z_bound = (s2[0] - AMP**4 / (2 * F)) / np.sqrt((m4[0] - s2[0] ** 2) / M)
    assert abs(z_bound) > Z_MAX, z_bound


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_feature_sample_gradient_matches_finite_differences(name):
    k = KERNELS[name]([0.3, 0.5, 0.8], AMP)
    s = FeatureSample(k, MEAN, np.random.default_rng(301), n_freq=256)
    U = np.random.default_rng(302).random((6, 3))
    g = s.grad(U)
    assert g.shape == (6, 3)
    h = 1e-7
    # Source: central finite differences. Tolerance: truncation h^2 |f'''| / 6 with
    # |f'''| <= a sqrt(2F) max|omega|^3, which for the heavy-tailed matern12 frequencies can reach
    # 1e9 (1e-5 absolute); rounding eps |f| / h ~ 1e-8. Scale by the gradient's size.
    scale = AMP * np.sqrt(2 * 256) * np.abs(s.omega).max()
    fd = central_difference(s, U, h)
    tol = 1e-6 * scale + (h**2 / 6) * AMP * np.sqrt(2 * 256) * np.abs(s.omega).max() ** 3
    np.testing.assert_allclose(g, fd, rtol=0, atol=tol)
    # negative control: the gradient of another draw is rejected by the same tolerance
    other = FeatureSample(k, MEAN, np.random.default_rng(303), n_freq=256)
    assert np.max(np.abs(other.grad(U) - fd)) > tol


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_float32_basis_matches_the_float64_basis(name):
    """FeatureSample.basis32 against basis (NumPy float64 cosines and sines): within 3e-7 of a / sqrt(F)
    per feature (float32's half-ulp at 1 is 6e-8; the phase after reduction to [-pi, pi] adds up to
    pi x 6e-8), at short lengthscales where phases reach hundreds (matern12's heavy tail: thousands)."""
    k = KERNELS[name]([0.02, 0.05], AMP)
    s = FeatureSample(k, MEAN, np.random.default_rng(304), n_freq=256)
    U = np.random.default_rng(305).random((2048, 2))
    want, got = s.basis(U), s.basis32(U)
    assert got.dtype == np.float32 and got.shape == want.shape
    assert np.max(np.abs(got - want)) / s.scale < 3e-7
    assert np.max(np.abs(U @ s.omega.T)) > 100.0               # the phases the reduction is there for
    # negative control: casting the phases to float32 before the reduction misses the same bound
    P = (U @ s.omega.T).astype(np.float32)
    naive = np.hstack([np.cos(P), np.sin(P)]) * np.float32(s.scale)
    assert np.max(np.abs(naive - want)) / s.scale > 3e-7


# --------------------------------------------------------------------------- grid worlds
GRID_N = 33
LS1 = [0.2]


def grid_world(name, i, n=GRID_N, ls=LS1):
    return GridWorld(KERNELS[name](ls, AMP), MEAN, stream(99, i, "world"), n_per_dim=n)


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("d", [1, 2])
def test_grid_world_passes_through_its_grid_values(name, d):
    w = grid_world(name, 0, n=GRID_N if d == 1 else 12, ls=LS1 * d)
    r = w(w.grid) - w.values
    # The interpolant is m + K (K + jI)^-1 (f_G - m) = f_G - j alpha, so it misses each grid value by
    # exactly -j alpha_i for the jitter j the draw used (GridWorld's docstring: "up to the jitter").
    # Estimate j by least squares and check (a) it is a small nonnegative jitter (<= 1e-6 a^2)
    # and (b) what remains is float64 rounding of K alpha: <= 8 n eps (|K| |alpha| + |f_G - m|)
    # (dot-product error bound, Higham 2002, from memory).
    j = -(r @ w.alpha) / (w.alpha @ w.alpha)
    assert -1e-14 <= j <= 1e-6 * AMP**2
    K = KERNELS[name](LS1 * d, AMP)(w.grid)
    n = len(w.grid)
    bound = 8 * n * np.finfo(float).eps * (np.abs(K) @ np.abs(w.alpha) + np.abs(w.values - MEAN))
    assert np.all(np.abs(r + j * w.alpha) <= bound)
    # and in absolute terms the grid values are honoured to 1e-4 a
    np.testing.assert_allclose(w(w.grid), w.values, rtol=0, atol=1e-4 * AMP)


@pytest.fixture(scope="module")
def grid_draws():
    U_off = np.array([[0.17], [0.52]])
    out = {}
    for name in KERNEL_NAMES:
        worlds = [grid_world(name, i) for i in range(2000)]
        out[name] = (np.stack([w.values for w in worlds]), np.stack([w(U_off) for w in worlds]), worlds[0].grid, U_off)
    return out


GRID_IDX = [5, 6, 9, 14, 30]
GRID_PAIRS = [(0, 0), (0, 1), (0, 2), (0, 3), (0, 4), (2, 3)]


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_grid_world_covariance_matches_the_kernel(name, grid_draws):
    values, off, grid, U_off = grid_draws[name]
    ref = sklearn_kernel(name, LS1, AMP)
    # At grid points the draw is exact: m + L z with L L^T = K + jI, z ~ N(0, I), has covariance K + jI
    # (Rasmussen & Williams 2006, appendix A.2, from memory); j = 1e-10 a^2 is far below MC error.
    G = grid[GRID_IDX]
    exact = np.array([ref(G[[a]], G[[b]])[0, 0] for a, b in GRID_PAIRS])
    z = covariance_z_scores(values[:, GRID_IDX], GRID_PAIRS, exact, MEAN)
    assert np.all(np.abs(z) < Z_MAX), z
    # Between grid points the world is the kernel interpolant, whose covariance is the Nystrom form
    # k(u, G) K^-1 k(G, u') <= k(u, u'): it falls short by the conditional covariance given the grid
    # (computed here with scikit-learn's kernel). Allow that shortfall on top of 4.5 MC sd.
    pairs = [(0, 0), (0, 1), (1, 1)]
    Kgg = ref(grid) + 1e-10 * AMP**2 * np.eye(len(grid))
    kug = ref(U_off, grid)
    nystrom = kug @ np.linalg.solve(Kgg, kug.T)
    exact = np.array([ref(U_off[[a]], U_off[[b]])[0, 0] for a, b in pairs])
    short = np.array([exact[i] - nystrom[a, b] for i, (a, b) in enumerate(pairs)])
    assert short[0] >= -1e-9 and short[2] >= -1e-9   # a conditional variance is >= 0 (up to rounding)
    c = off - MEAN
    prod = np.stack([c[:, a] * c[:, b] for a, b in pairs], 1)
    se = prod.std(0, ddof=1) / np.sqrt(len(prod))
    assert np.all(np.abs(prod.mean(0) - exact) < Z_MAX * se + np.abs(short))


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_grid_world_covariance_negative_control(name, grid_draws):
    values, _, grid, _ = grid_draws[name]
    ref = sklearn_kernel(name, [1.5 * LS1[0]], AMP)
    G = grid[GRID_IDX]
    wrong = np.array([ref(G[[a]], G[[b]])[0, 0] for a, b in GRID_PAIRS])
    z = covariance_z_scores(values[:, GRID_IDX], GRID_PAIRS, wrong, MEAN)
    assert np.max(np.abs(z)) > Z_MAX, z


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_grid_world_gradient_matches_finite_differences(name):
    w = grid_world(name, 3, n=10, ls=[0.3, 0.4])
    U = np.random.default_rng(304).random((5, 2))
    h = 1e-6
    fd = central_difference(w, U, h)
    # Source: central finite differences; rounding eps |f| / h ~ 1e-9 |alpha|_1 a, truncation
    # h^2 |f'''| tiny away from grid points. Tolerance relative to the size of the weights.
    tol = 1e-6 * AMP * np.abs(w.alpha).sum()
    np.testing.assert_allclose(w.grad(U), fd, rtol=1e-6, atol=tol)


# --------------------------------------------------------------------------- optima
def dense_minimum(world, d, seed, n=2**13):
    """Minimum over an independent uniform random set, twice the size of the engine's own
    Sobol' search in 2-D (2^12 points) and drawn from another generator."""
    return world(np.random.default_rng(seed).random((n, d))).min()


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("replicate", [0])
@pytest.mark.slow
def test_feature_world_optimum_beats_dense_random_search(name, replicate):
    d = 2
    world = FeatureWorld(KERNELS[name]([0.25, 0.25], AMP), MEAN, stream(5, replicate, "world"))
    u, v = world.optimum(stream(5, replicate, "optimum"))
    assert u.shape == (d,) and np.all((u >= 0) & (u <= 1))
    assert world(u[None])[0] == pytest.approx(v, abs=1e-12 * AMP)
    # No finite set of points can go below the true minimum; allow float64 rounding of the value.
    assert v <= dense_minimum(world, d, 400 + replicate) + 1e-9 * AMP


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("d", [1, 2])
@pytest.mark.slow
def test_grid_world_optimum_beats_dense_random_search(name, d):
    world = grid_world(name, 7, n=64 if d == 1 else 16, ls=[0.2] * d)
    u, v = world.optimum(np.random.default_rng(305))
    assert u.shape == (d,) and np.all((u >= 0) & (u <= 1))
    # The value at u does not depend on how many points are evaluated together beyond rounding:
    # kernel entries carry ~8 eps |u/l|^2 a^2 (expanded squared distance), summed against alpha.
    eps = np.finfo(float).eps
    assert world(u[None])[0] == pytest.approx(v, abs=8 * eps * d / 0.2**2 * AMP**2 * np.abs(world.alpha).sum())
    assert v <= dense_minimum(world, d, 306) + 1e-9 * AMP


def test_optimum_check_negative_control():
    # The dense comparison has power: the best of 64 random points is not accepted as the optimum.
    world = FeatureWorld(KERNELS["matern52"]([0.25, 0.25], AMP), MEAN, stream(5, 0, "world"))
    crude = world(np.random.default_rng(307).random((64, 2))).min()
    assert not crude <= dense_minimum(world, 2, 400) + 1e-9 * AMP


def test_grid_world_jitter_is_capped_and_reported(monkeypatch):
    """GridWorld raises its jitter tenfold while the factorisation fails, warns when it rose above
    the nugget, and refuses past 1e-2 of the prior variance (common practice: jitter escalation
    with a cap, rather than a silent loop). The factorisation is made to fail on purpose."""
    from simlab.worlds import draws

    real = np.linalg.cholesky
    calls = []

    def failing(times):
        def cholesky(a):
            calls.append(1)
            if len(calls) <= times:
                raise np.linalg.LinAlgError("not positive definite (forced)")
            return real(a)
        return cholesky

    kernel = KERNELS["matern52"](np.array([0.2]), 2.0)
    monkeypatch.setattr(draws.np.linalg, "cholesky", failing(3))
    with pytest.warns(RuntimeWarning, match=r"jitter raised to 1e-07 of the prior variance"):
        w = draws.GridWorld(kernel, 0.0, np.random.default_rng(1), 64)
    assert len(calls) == 4 and np.all(np.isfinite(w.values))

    calls.clear()
    monkeypatch.setattr(draws.np.linalg, "cholesky", failing(10**6))
    with pytest.raises(ValueError, match="cannot be factored even with a jitter of 1e-2"):
        draws.GridWorld(kernel, 0.0, np.random.default_rng(1), 64)
    assert len(calls) == 9          # 1e-10 ... 1e-2: nine tries, then the refusal

    calls.clear()
    monkeypatch.setattr(draws.np.linalg, "cholesky", failing(0))
    import warnings as _w
    with _w.catch_warnings():
        _w.simplefilter("error")    # negative control: no warning when the nugget suffices
        draws.GridWorld(kernel, 0.0, np.random.default_rng(1), 64)
