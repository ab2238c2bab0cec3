"""World optima: the default search against scipy's differential evolution in 4 and 6 inputs; two searches."""

import functools

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from helpers import evolved_minimum
from simlab.model.kernels import KERNELS
from simlab.model.optimize import separated_best
from simlab.rng import stream
from simlab.worlds.replicate import world_optimum
from simlab.worlds.draws import FeatureWorld, SearchPlan, World, find_minimum, search_plan

# The bar: a miss below 1e-3 x amplitude (worlds here have amplitude 1).
MISS = 1e-3

# (inputs, kernel, lengthscale on the unit cube, world replicate): lengthscales short enough that a
# small search misses (the negative control below shows it does on these very worlds), long enough
# that differential evolution finishes in a few seconds.
WORLDS = [(4, "matern52", 0.25, 0), (4, "matern32", 0.25, 1), (4, "sqexp", 0.25, 2),
          (6, "matern52", 0.35, 0), (6, "sqexp", 0.35, 1), (6, "matern32", 0.35, 2)]


def _world(d, name, ls, i):
    return FeatureWorld(KERNELS[name]([ls] * d, 1.0), 0.0, stream(11, i, "world"))


@functools.lru_cache(maxsize=None)
def de_minimum(d, name, ls, i):
    """scipy.optimize.differential_evolution (population 20 per input, Sobol' start, 300 generations,
    float32 values), then L-BFGS-B with the world's analytic gradient (float64) from the 5 best members
    of the final population."""
    world = _world(d, name, ls, i)
    return evolved_minimum(world, d, seed=100 + i, polished=5)


@pytest.mark.slow
@pytest.mark.parametrize("d, name, ls, i", WORLDS)
def test_default_search_is_no_worse_than_differential_evolution(d, name, ls, i):
    # Reference: scipy.optimize.differential_evolution + L-BFGS-B. Tolerance: the 1e-3 x amplitude.
    w = _world(d, name, ls, i)
    with threadpool_limits(1):
        u, v = w.optimum(stream(11, i, "optimum"))
        v_de = de_minimum(d, name, ls, i)
    assert u.shape == (d,) and np.all((u >= 0.0) & (u <= 1.0))
    # the value returned is the world's own at u (up to float64 rounding of a sum of 1024 terms)
    assert w(u[None])[0] == pytest.approx(v, abs=1e-12)
    assert v <= v_de + MISS, v - v_de


@pytest.mark.slow
def test_a_small_search_fails_the_same_check():
    # Negative control: 2^8 points and one polished start (about what a naive search does) miss the
    # optimum on some of these worlds by far more than the tolerance, so the check above has power.
    misses = []
    with threadpool_limits(1):
        for d, name, ls, i in WORLDS:
            w = _world(d, name, ls, i)
            weak = SearchPlan(n_search=2**8, n_polish=1, zoom=0, zoom_points=64, half=np.full(d, 0.1),
                              separation=np.full(d, 1e-6))
            _, v_small = find_minimum(w, w.value_grad, d, stream(11, i, "optimum"), plan=weak)
            misses.append(v_small - de_minimum(d, name, ls, i))
    assert max(misses) > 100 * MISS, misses


@pytest.mark.parametrize("name", ["matern12", "matern32", "sqexp"])
def test_band_values_keep_the_low_frequencies(name):
    # Reference: the draw's own formula, m + s sum_j r_j cos(omega_j . u - phi_j), summed in float64
    # over the features with |omega_j| <= cutoff only. Tolerances: float32 rounding (values about 1e-6 x
    # amplitude; float32 phases of up to ~1e4 rad err by ~1e-3 rad, so a gradient by at most 1e-3 of
    # the bound s sum_j r_j |omega_j| on its size).
    w = FeatureWorld(KERNELS[name]([0.2, 0.3], 1.0), 0.5, np.random.default_rng(3))
    U = np.random.default_rng(4).random((50, 2))
    s = w.sample
    amp, phase = s.polar()
    for cutoff in (5.0, 20.0, np.inf):
        keep = np.linalg.norm(s.omega, axis=1) <= cutoff
        P = U @ s.omega[keep].T - phase[keep]
        want = s.mean + s.scale * np.cos(P) @ amp[keep]
        grad = -s.scale * (np.sin(P) * amp[keep]) @ s.omega[keep]
        v, g = w.band_values(U, cutoff, grad=True)
        assert np.allclose(v, want, atol=1e-4) and np.allclose(w.band_values(U, cutoff), v)
        assert np.allclose(g, grad, atol=1e-3 * s.scale * (amp[keep] * np.linalg.norm(s.omega[keep], axis=1)).sum())
    assert np.allclose(w.band_values(U, np.inf), w(U), atol=1e-4)
    # negative control: a cutoff that drops features changes the values
    assert not np.allclose(w.band_values(U, 5.0), w(U), atol=1e-4)


def test_search_grows_with_dimension_and_roughness():
    # common practice: about one basin per lengthscale cell, so the effort grows as (1 / l)^d, capped
    smooth = search_plan(2, [0.3, 0.3], np.inf)
    assert search_plan(2, [0.1, 0.1], np.inf).n_search > smooth.n_search
    assert search_plan(2, [0.1, 0.1], 0.5).n_search > search_plan(2, [0.1, 0.1], 2.5).n_search
    assert search_plan(6, [0.2] * 6, 2.5).n_polish > search_plan(2, [0.2] * 2, 2.5).n_polish
    assert search_plan(6, [0.01] * 6, 0.5).n_search == 2**18       # the cap
    assert search_plan(6, [0.01] * 6, 0.5).zoom > search_plan(6, [0.01] * 6, 2.5).zoom
    assert search_plan(6, [0.2] * 6, 1.5).descend > 0 and search_plan(6, [0.2] * 6, 2.5).descend == 0
    assert search_plan(4, [0.2] * 4, 0.5).banded and not search_plan(2, [0.2] * 2, 0.5).banded
    # smooth worlds (and Matern 3/2 in 1 or 2 inputs) climb by Newton steps instead of zooming
    assert search_plan(4, [0.2] * 4, 2.5).climb > 0 and search_plan(4, [0.2] * 4, 2.5).zoom == 0
    assert search_plan(2, [0.2] * 2, 1.5).climb > 0 and search_plan(4, [0.2] * 4, 1.5).climb == 0


def test_separated_starts_leave_the_best_basin():
    # 1-D: the 3 best of a dense set all sit in the deepest basin; separated starts must not.
    x = np.linspace(0.0, 1.0, 1001)[:, None]
    v = np.cos(6 * np.pi * x[:, 0]) + 0.1 * x[:, 0]      # minima near 1/6, 1/2, 5/6, rising to the right
    idx = separated_best(x, v, 3, [0.1])
    assert np.allclose(np.sort(x[idx, 0]), [1 / 6, 1 / 2, 5 / 6], atol=0.01)
    crowded = np.argsort(v)[:3]
    assert np.ptp(x[crowded, 0]) < 0.01                 # negative control: plain best-k crowd together


class _Coin(World):
    """A world whose 'search' returns a value drawn from the search's own stream."""

    dim = 1

    def __call__(self, U):
        return np.zeros(len(np.atleast_2d(U)))

    def optimum(self, rng):
        return np.array([0.5]), float(rng.random())


def test_two_searches_keep_the_better_value_and_report_the_gap():
    from simlab.study.spec import parse_study

    study = parse_study({"study": {"replicates": 3, "seed": 5}, "space": {"a": [0.0, 1.0]},
                         "world": {"lengthscale": 0.3, "amplitude": 1.0, "noise": 0.0},
                         "campaign": {"initial": 2, "budgets": [4]}, "target": {"regret": 0.1},
                         "policy": [{"rule": "random"}]}, source="test")
    from simlab.worlds.replicate import AGREE, EXTRA_SEARCHES
    extra_runs = 0
    for r in range(3):
        values = [float(stream(5, r, "optimum").random()), float(stream(5, r, "optimum_check").random())]
        # searches that disagree by more than AGREE x amplitude search again (up to EXTRA_SEARCHES more)
        for k in range(EXTRA_SEARCHES):
            best = sorted(values)
            if best[1] - best[0] <= AGREE:
                break
            values.append(float(stream(5, r, "optimum_extra", str(k)).random()))
        extra_runs += len(values) - 2
        u, v, gap = world_optimum(_Coin(), study, r)
        # never round in the tool's favour: the lowest (best) of the searches, and the gap to the next
        best = sorted(values)
        assert v == best[0] and gap == best[1] - best[0] and gap >= 0.0
        assert v <= min(values[:2])            # extra searches can only lower the value regret uses
    assert extra_runs > 0                      # a coin's searches disagree: the extra searches ran


def test_report_warns_when_a_gap_exceeds_one_percent_of_the_target():
    import pandas as pd

    from simlab.report.page import _optimum_warning
    from simlab.study.spec import parse_study

    study = parse_study({"study": {"replicates": 3, "seed": 5}, "space": {"a": [0.0, 1.0]},
                         "world": {"lengthscale": 0.3, "amplitude": 1.0, "noise": 0.0},
                         "campaign": {"initial": 2, "budgets": [4]}, "target": {"regret": 0.5},
                         "policy": [{"rule": "random"}]}, source="test")
    worlds = pd.DataFrame({"replicate": [0, 1, 2], "a": [0.1, 0.2, 0.3], "best_value": [0.0, 0.0, 0.0],
                           "optimum_gap": [0.0, 0.004, 0.0049], "reference": [0.0, 0.0, 0.0],
                           "reference_from_trial": [False] * 3})
    assert _optimum_warning(study, worlds) == ""          # 1 % of the target is 0.005: no gap exceeds it
    worlds.loc[1, "optimum_gap"] = 0.0051
    text = _optimum_warning(study, worlds)
    assert "World optima may be missed" in text and "1 of 3" in text
    assert 'data-src="worlds.csv" data-row="1" data-col="optimum_gap"' in text
    assert "optimum_spread" not in text                      # a folder from before the column: no sentence on it
    worlds["optimum_spread"] = [0.0, 0.03, 0.0049]
    text = _optimum_warning(study, worlds)
    assert 'data-src="worlds.csv" data-row="1" data-col="optimum_spread"' in text and "spread" in text
    assert _optimum_warning(study, None) == ""             # a folder from before worlds.csv
