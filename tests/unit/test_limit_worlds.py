"""The worlds of limits and failures (simlab.worlds.limits): a limit's correlation with the objective across
worlds, the failing share of the space, and the dump of both."""

import tomllib

import numpy as np
import pytest
from scipy import stats

from simlab.study.dump import dump_study
from simlab.study.spec import parse_study
from simlab.worlds.limits import make_limits
from simlab.worlds.replicate import make_world

STUDY = """
[study]
name = "kiln"
goal = "{goal}"
replicates = 300
seed = 5
[space]
temp = [0.0, 10.0]
time = [0.0, 5.0]
[world]
lengthscale = [3.0, 1.5]
amplitude = 2.0
mean = 10.0
noise = 0.1
{fails}
[campaign]
initial = 4
budgets = [8]
[target]
regret = 0.1
[[limit]]
name = "shrinkage"
below = 1.0
lengthscale = [3.0, 1.5]
amplitude = 0.5
mean = 0.8
correlation = {rho}
[[policy]]
rule = "ei"
"""


def study(rho=0.0, goal="minimize", fails=""):
    return parse_study(tomllib.loads(STUDY.format(rho=rho, goal=goal, fails=fails)), source="kiln.toml")


def values(s, U, worlds=300):
    """The objective (user orientation) and the limit at inputs U in each of `worlds` replicates."""
    f, g = [], []
    for r in range(worlds):
        world = make_world(s, r)
        limits = make_limits(s, r, world)
        f.append(s.sign * world(U))
        g.append(limits.quantities[0](U))
    return np.array(f), np.array(g)


@pytest.mark.parametrize("rho, goal", [(0.6, "minimize"), (-0.4, "maximize")])
def test_a_limit_correlates_with_the_objective_as_stated(rho, goal):
    """Reference: Pearson's correlation across 300 worlds at three inputs, with its 99 % Fisher-z interval
    (scipy.stats.pearsonr(...).confidence_interval; Fisher 1915), must hold the stated rho; the limit's
    mean and sd across worlds match its prior (t and chi-square 99 % intervals, scipy.stats). Negative
    control: rho = 0 worlds, whose interval must exclude the stated rho."""
    U = np.array([[0.2, 0.3], [0.5, 0.5], [0.9, 0.1]])
    f, g = values(study(rho, goal), U)
    _, g0 = values(study(0.0, goal), U)
    for j in range(len(U)):
        low, high = stats.pearsonr(f[:, j], g[:, j]).confidence_interval(0.99)
        assert low <= rho <= high, (j, low, high)
        low0, high0 = stats.pearsonr(f[:, j], g0[:, j]).confidence_interval(0.99)
        assert not low0 <= rho <= high0
        mean_ci = stats.ttest_1samp(g[:, j], 0.8).confidence_interval(0.99)
        assert mean_ci.low <= 0.8 <= mean_ci.high
        n = len(g)
        var = g[:, j].var(ddof=1)
        assert (n - 1) * var / stats.chi2.ppf(0.995, n - 1) <= 0.25 <= (n - 1) * var / stats.chi2.ppf(0.005, n - 1)


def test_the_failing_share_is_the_stated_share():
    """Reference: the definition ([world] fails_where share): over 20 worlds, the share of 2,000 uniform
    inputs per world that fail is the stated 0.2 within the binomial 99.9 % interval (Clopper-Pearson,
    scipy.stats.binomtest) widened by the threshold's own error (2^14 Sobol' points: below 0.01)."""
    s = study(fails="fails_where = { share = 0.2, lengthscale = [2.0, 1.0] }")
    rng = np.random.default_rng(0)
    failed, total = 0, 0
    for r in range(20):
        limits = make_limits(s, r, make_world(s, r))
        U = rng.random((2000, 2))
        failed += int(limits.fails(U).sum())
        total += len(U)
    ci = stats.binomtest(failed, total).proportion_ci(0.999)
    assert ci.low - 0.01 <= 0.2 <= ci.high + 0.01


def test_correlation_is_read_checked_and_dumped():
    s = study(0.6)
    assert s.limits[0].correlation == 0.6
    again = parse_study(tomllib.loads(dump_study(s)), source="again")
    assert again == s
    assert "correlation" not in dump_study(study(0.0))       # written only when set
    from simlab.study.types import StudyError
    with pytest.raises(StudyError, match="limit\\[0\\].correlation"):
        study(1.0)
