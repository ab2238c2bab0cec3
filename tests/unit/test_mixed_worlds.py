"""World draws over mixed spaces (simlab.worlds.mixed): the covariance of many draws against the product
kernel within Monte Carlo error, rounding of stepped inputs, and optima over level combinations."""

import numpy as np
import pytest

from simlab.model.levels import MixedKernel
from simlab.study.types import Space
from simlab.worlds.draws import FeatureWorld
from simlab.model.kernels import Matern52
from simlab.worlds.mixed import LibraryWorld, MixedWorld


def space(levels, numeric=1, stepped=0):
    """``numeric`` continuous inputs, ``stepped`` stepped inputs (0..4 by 1), then categorical inputs."""
    names = [f"x{i}" for i in range(numeric)] + [f"s{i}" for i in range(stepped)] + [f"c{i}" for i in range(len(levels))]
    kinds = ["continuous"] * numeric + ["stepped"] * stepped + ["categorical"] * len(levels)
    high = [1.0] * numeric + [4.0] * stepped + [float(L - 1) for L in levels]
    steps = [0.0] * numeric + [1.0] * stepped + [0.0] * len(levels)
    lev = [()] * (numeric + stepped) + [tuple(f"l{k}" for k in range(L)) for L in levels]
    return Space(names=tuple(names), low=(0.0,) * len(names), high=tuple(high), kinds=tuple(kinds),
                 steps=tuple(steps), levels=tuple(lev))


def points(sp, xs):
    """Every level combination at each continuous coordinate in xs: (len(xs) * K, d)."""
    combos = np.array(np.meshgrid(*[sp.grid(j) for j in sp.categorical], indexing="ij")).reshape(len(sp.categorical), -1).T
    return np.array([[x, *c] for x in xs for c in combos])


def covariance_z(sp, rho, rho_model, n_worlds, seed):
    """Largest |empirical - model covariance| / its Monte Carlo sd over all pairs of points.

    The sd of a sample covariance of N jointly Gaussian draws is sqrt((C_ii C_jj + C_ij^2) / N)
    (Anderson 2003, *An Introduction to Multivariate Statistical Analysis*, section 3.3, from memory;
    the random-feature frequencies add a little more spread, covered by the margin of the bound).
    """
    k = MixedKernel(sp, "matern52", [0.4], 1.0, rho)
    U = points(sp, [0.1, 0.35])
    rng = np.random.default_rng(seed)
    Y = np.array([MixedWorld(k, 0.0, rng, n_freq=64)(U) for _ in range(n_worlds)])
    emp = Y.T @ Y / n_worlds                        # the mean is known (0)
    C = MixedKernel(sp, "matern52", [0.4], 1.0, rho_model)(U)
    sd = np.sqrt((np.outer(np.diag(C), np.diag(C)) + C**2) / n_worlds)
    return np.max(np.abs(emp - C) / sd)


# 4000 worlds: the covariance of two unit-variance points has MC sd <= sqrt(2 / 4000) = 0.022. The
# largest of the 21 (one input, 6 points) or 78 (two inputs, 12 points) z-scores of correlated
# entries stays below 4.5 with probability > 0.999 (Bonferroni on 78 normal tails: 78 x 6.8e-6);
# the negative controls move every cross-level entry by 0.3 x k(u, u') >= 0.3 x 0.6, i.e. z > 8.
@pytest.mark.parametrize("levels,rho,wrong", [
    ((3,), (0.6,), (0.3,)),
    ((3, 2), (0.6, -0.4), (0.6, -0.1)),
])
def test_draws_have_the_product_covariance(levels, rho, wrong):
    sp = space(levels)
    assert covariance_z(sp, rho, rho, 4000, seed=11) < 4.5
    # negative control: the same draws against another level correlation
    assert covariance_z(sp, rho, wrong, 4000, seed=11) > 4.5


def test_stepped_inputs_are_rounded_and_optimum_covers_every_combination():
    sp = space((3,), numeric=1, stepped=1)
    k = MixedKernel(sp, "matern52", [0.3, 0.5], 1.0, (0.5,))
    world = MixedWorld(k, 2.0, np.random.default_rng(3), n_freq=256)
    U = np.random.default_rng(4).random((200, 3))
    assert np.array_equal(world(U), world(sp.round_unit(U)))
    u, v = world.optimum(np.random.default_rng(5))
    assert np.isclose(world(u[None])[0], v)
    # reference: a dense grid of the continuous input at every stepped value and level (2001 x 5 x 3)
    x = np.linspace(0, 1, 2001)
    grid = np.array([[xi, s, c] for s in sp.grid(1) for c in sp.grid(2) for xi in x])
    dense = world(grid).min()
    assert v <= dense + 1e-9
    # the search lands on allowed values: stepped on the grid, level at its centre
    assert np.isclose(u[1], sp.round_unit(u[None])[0, 1]) and np.isclose(u[2], sp.round_unit(u[None])[0, 2])
    # negative control: the best of one level only is not the optimum in general; here it is worse
    # than the best level for at least one of the three levels
    per_level = [world(grid[np.isclose(grid[:, 2], c)]).min() for c in sp.grid(2)]
    assert max(per_level) > v + 1e-6


def test_discrete_space_is_enumerated_exactly():
    sp = space((3, 2), numeric=0, stepped=1)
    k = MixedKernel(sp, "matern52", [0.5], 1.0, (0.2, 0.7))
    world = MixedWorld(k, 0.0, np.random.default_rng(8), n_freq=128)
    u, v = world.optimum(np.random.default_rng(9))
    every = np.array([[s, a, b] for s in sp.grid(0) for a in sp.grid(1) for b in sp.grid(2)])
    assert v == world(every).min() and len(every) == 30


def test_library_world_optimum_is_the_best_row():
    base = FeatureWorld(Matern52([0.3, 0.3], 1.0), 0.0, np.random.default_rng(1), 256)
    rows = np.random.default_rng(2).random((300, 2))
    world = LibraryWorld(base, rows)
    u, v = world.optimum(np.random.default_rng(0))
    values = base(rows)
    assert v == values.min() and np.array_equal(u, rows[np.argmin(values)])
    # a continuous search of the same world goes lower than the best row (the library is a constraint)
    assert base.optimum(np.random.default_rng(0))[1] < v


STUDY = """
[study]
name = "seeding"
replicates = 2
seed = 4
[space]
cooling_rate = [0.1, 2.0]
stages = { low = 1, high = 3, step = 1 }
seed_load = { low = 0.01, high = 10.0, scale = "log" }
solvent = { levels = ["acetone", "water"] }
[world]
lengthscale = [0.8, 1.0, 2.0]
amplitude = 1.0
noise = 0.1
level_correlation = 0.5
features = 128
[campaign]
initial = 3
budgets = [5]
[target]
regret = 0.1
[[policy]]
rule = "random"
"""


def read(tmp_path, text):
    p = tmp_path / "s.toml"
    p.write_text(text, encoding="utf-8")
    from simlab.study.spec import load_study
    return load_study(p, runnable=False)


def test_study_worlds_over_a_mixed_space(tmp_path):
    from simlab.model.levels import mixed_kernel
    from simlab.worlds.replicate import make_world, world_optimum
    s = read(tmp_path, STUDY)
    w0, again, w1 = make_world(s, 0), make_world(s, 0), make_world(s, 1)
    U = np.random.default_rng(0).random((50, 4))
    assert isinstance(w0, MixedWorld) and np.array_equal(w0(U), again(U)) and not np.allclose(w0(U), w1(U))
    u, v, gap = world_optimum(w0, s, 0)
    assert np.isclose(w0(u[None])[0], v) and gap >= 0 and v <= w0(U).min()
    # log input: the kernel is stationary in log(seed_load): 0.01 -> 0.1 correlates as 1 -> 10
    k = mixed_kernel(s.world.prior, s.space)
    pts = s.space.to_unit(np.array([[1.0, 1.0, d, 0.0] for d in (0.01, 0.1, 1.0, 10.0)]))
    K = k(pts)
    assert np.isclose(K[0, 1], K[2, 3]) and not np.isclose(K[0, 1], K[1, 3])


def test_mixed_worlds_refuse_what_they_cannot_do(tmp_path):
    from simlab.study.spec import StudyError
    many = STUDY.replace('solvent = { levels = ["acetone", "water"] }',
                         'solvent = { levels = ["a", "b", "c", "d", "e", "f", "g", "h", "i", "j", "k", "l"] }').replace(
        "high = 3, step = 1", "high = 7, step = 1")
    for text, field in [(many, "space: 84 combinations"),
                        (STUDY.replace("features = 128", 'method = "grid"'), "world.method"),
                        (STUDY.replace("features = 128", "lengthscale_within = 2.0"), "world.lengthscale_within")]:
        with pytest.raises(StudyError, match=field):
            read(tmp_path, text)
