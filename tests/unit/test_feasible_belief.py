"""A campaign's belief about its limits (simlab.model.feasible): the chance of feasibility against a
Monte Carlo estimate from the limits' posteriors (scikit-learn's regressor, sampled) and scikit-learn's
classifier, its gradient against central differences, the classifier's prior against quadrature, and
the recommendation drawn from inputs believed feasible."""

import numpy as np
import pytest
from helpers import Z_MAX, central_difference, sklearn_kernel, sklearn_regressor
from scipy.special import expit
from sklearn.gaussian_process import GaussianProcessClassifier

from simlab.model.feasible import FailureModel, FeasibleBelief, LimitModel, success_prior_mean
from simlab.model.gp import Posterior
from simlab.model.kernels import make_kernel

LS, NOISE = [0.3, 0.45], 0.1
# Two limits (a pressure that must stay below 1.0, a temperature that must stay above -0.5), both
# constructed here: kernel, prior mean, amplitude, bound, sign.
LIMITS = [("matern52", 0.2, 1.0, 1.0, 1.0), ("sqexp", 0.0, 0.8, -0.5, -1.0)]


def make(failure=None, chance=0.95, seed=4, n=14):
    rng = np.random.default_rng(seed)
    X, U = rng.random((n, 2)), rng.random((40, 2))
    values = np.column_stack([np.sin(4 * X[:, 0]) + X[:, 1], np.cos(3 * X[:, 1]) - 0.6 * X[:, 0]])
    worked = X[:, 0] + 0.3 * X[:, 1] < 0.8
    models = [LimitModel(make_kernel(k, LS, a), mean, NOISE, bound, sign) for k, mean, a, bound, sign in LIMITS]
    belief = FeasibleBelief(models, failure, pool=U, capacity=n, chance=chance)
    for x, w, v in zip(X, worked, values):
        belief.add(x, worked=bool(w) if failure is not None else True, values=v)
    return belief, X, worked if failure is not None else np.ones(n, bool), values, U


def monte_carlo(X, worked, values, U, draws=20_000, use_data=True):
    """P(every limit holds) at U from joint posterior draws of each limit: scikit-learn's regressor with the
    same fixed kernel and noise, sample_y (draws of the noise-free function), limits independent."""
    ok = np.ones((len(U), draws), dtype=bool)
    for j, (k, mean, a, bound, sign) in enumerate(LIMITS):
        Xj, yj = (X[worked], values[worked, j]) if use_data else (X[:1], np.array([mean]))
        diag = NOISE**2 if use_data else 1e6          # without data: one observation of infinite noise
        gpr = sklearn_regressor(k, Xj, yj, lengthscale=LS, amplitude=a, mean=mean, diagonal=diag)
        f = gpr.sample_y(U, draws, random_state=100 + j) + mean
        ok &= sign * (f - bound) <= 0
    return ok.mean(axis=1)


def test_chance_matches_monte_carlo_of_the_posteriors():
    """Reference: the share of 20,000 joint posterior draws (scikit-learn's GaussianProcessRegressor with
    the same fixed kernels, sample_y) in which both limits hold, at 40 inputs. Monte Carlo sd
    sqrt(p (1 - p) / 20000) <= 0.0035; each point within Z_MAX = 4.5 sd of it (plus 1e-3 for sample_y's
    covariance jitter)."""
    belief, X, worked, values, U = make()
    p = np.exp(belief.log_chance(U))
    mc = monte_carlo(X, worked, values, U)
    tol = Z_MAX * np.sqrt(np.maximum(mc * (1 - mc), 1e-4) / 20_000) + 1e-3
    assert np.all(np.abs(p - mc) <= tol), np.abs(p - mc).max()
    assert ((p > 0.1) & (p < 0.9)).sum() >= 5 and p.max() > 0.9 and p.min() < 0.01   # all kinds of inputs
    assert np.allclose(np.exp(belief.pool_log_chance()), p)   # the pool path is the same arithmetic


def test_negative_control_prior_draws_do_not_match():
    """Negative control (must fail the check above): draws from the limits' priors, ignoring the data."""
    belief, X, worked, values, U = make()
    p = np.exp(belief.log_chance(U))
    mc = monte_carlo(X, worked, values, U, use_data=False)
    tol = Z_MAX * np.sqrt(np.maximum(mc * (1 - mc), 1e-4) / 20_000) + 1e-3
    assert not np.all(np.abs(p - mc) <= tol)


def test_chance_with_failures_is_the_classifier_times_the_limits():
    """Reference: scikit-learn's GaussianProcessClassifier (Laplace, the same fixed kernel, prior mean 0)
    on the trials that worked or failed, times the Monte Carlo chance of the limits fed only the trials
    that worked. Tolerance: the Monte Carlo one above (the classifier agrees to 1e-6, test_classify.py)."""
    kernel = make_kernel("matern52", [0.3, 0.3], 3.0)
    belief, X, worked, values, U = make(failure=FailureModel(kernel, 0.0))
    gpc = GaussianProcessClassifier(kernel=sklearn_kernel("matern52", [0.3, 0.3], 3.0, fixed=True),
                                    optimizer=None).fit(X, worked.astype(int))
    success = gpc.predict_proba(U)[:, 1]
    mc = monte_carlo(X, worked, values, U)
    p = np.exp(belief.log_chance(U))
    tol = success * (Z_MAX * np.sqrt(np.maximum(mc * (1 - mc), 1e-4) / 20_000) + 1e-3) + 1e-6
    assert np.all(np.abs(p - success * mc) <= tol)
    assert (~worked).sum() >= 3 and worked.sum() >= 3


def test_gradient_matches_central_differences():
    """Reference: central differences (Nocedal & Wright 2006, section 8.1), h = 1e-6: truncation ~1e-12,
    rounding ~1e-16 / 1e-6 = 1e-10 of the values' scale; 1e-6 relative leaves room."""
    belief, *_ , U = make(failure=FailureModel(make_kernel("matern52", [0.3, 0.3], 3.0), 0.5))
    U = U[:12]
    value, grad = belief.log_chance(U, grad=True)
    numeric = central_difference(lambda V: belief.log_chance(V), U, 1e-6)
    assert np.allclose(value, belief.log_chance(U))
    assert np.abs(grad - numeric).max() <= 1e-6 * max(1.0, np.abs(numeric).max())


@pytest.mark.parametrize("share", [0.05, 0.2, 0.5, 0.8])
def test_classifier_prior_gives_the_failing_share(share):
    """Reference: E[sigmoid(f)], f ~ N(m, 3^2), by 80-point Gauss-Hermite quadrature (numpy's hermegauss,
    exact to far below 1e-8 for this smooth integrand) equals 1 - share within the erf sum's 4.4e-4
    (classify.py: its largest distance to the sigmoid)."""
    m = success_prior_mean(share)
    nodes, weights = np.polynomial.hermite_e.hermegauss(80)
    chance = (weights * expit(m + 3.0 * nodes)).sum() / weights.sum()
    assert chance == pytest.approx(1 - share, abs=4.4e-4)


def test_recommendation_comes_from_inputs_believed_feasible():
    """Constructed: three evaluated inputs, the lowest objective mean at one the limit belief holds
    infeasible; it is skipped for the next lowest believed feasible; with the bar above every chance,
    the input most likely feasible is shipped (common practice: Gelbart et al. 2014 recommend from the
    believed-feasible set)."""
    X = np.array([[0.1, 0.1], [0.5, 0.5], [0.9, 0.9]])
    pool = np.random.default_rng(0).random((64, 2))
    lm = LimitModel(make_kernel("matern52", [0.2, 0.2], 1.0), 0.0, 0.01, 0.0, 1.0)   # value must stay below 0
    post = Posterior(make_kernel("matern52", [0.2, 0.2], 1.0), 0.0, 0.01, pool=pool, capacity=4)
    for x, y in zip(X, [-2.0, -1.0, 0.5]):
        post.add(x, y)
    for chance, expect in [(0.95, 1), (0.99999999, 1)]:
        belief = FeasibleBelief([lm], None, pool=pool, capacity=4, chance=chance)
        for x, g in zip(X, [3.0, -3.0, -0.5]):       # the best objective breaks the limit clearly
            belief.add(x, worked=True, values=[g])
        assert belief.recommend(post) == expect
    belief = FeasibleBelief([lm], None, pool=pool, capacity=4, chance=0.95)
    for x, g in zip(X, [3.0, 2.0, 0.05]):           # nothing clearly feasible: the least unlikely, input 2
        belief.add(x, worked=True, values=[g])
    assert not belief.trusted(X).any() and belief.recommend(post) == 2


def test_sampled_limits_hold_as_often_as_the_belief_says():
    """Thompson sampling's joint draws (FeasibleBelief.sample_pool): at each pool point the share of 2,000
    draws in which the limits hold is the analytic product of Phi(z) (the limits), and the share in which
    the classifier's sampled latent is >= 0 is Phi(mean / sd) of its Laplace posterior (R&W 2006, Algorithm
    3.2, lines 4-6; checked against scikit-learn in test_classify.py). Monte Carlo sd <= 0.011; the draws'
    1024 random features add a covariance error of about 2.2 % of the prior variance (README [world]
    features); tolerance Z_MAX sd + 0.03. Negative control: the classifier's averaged probability
    (logistic, not the latent's sign) is not what the draws estimate where the latent is uncertain."""
    from scipy.stats import norm
    kernel = make_kernel("matern52", [0.3, 0.3], 3.0)
    belief, X, worked, values, U = make(failure=FailureModel(kernel, 0.5))
    rng = np.random.default_rng(11)
    draws = np.array([belief.sample_pool(rng, 1024) for _ in range(2000)])
    limits_only = FeasibleBelief(belief.limits, None, pool=U, capacity=20, chance=0.95)
    for x, v in zip(X[worked], values[worked]):
        limits_only.add(x, worked=True, values=v)
    mean, var = belief.classifier.latent(U)
    expected = np.exp(limits_only.pool_log_chance()) * norm.cdf(mean / np.sqrt(var))
    tol = Z_MAX * np.sqrt(np.maximum(expected * (1 - expected), 1e-3) / 2000) + 0.03
    share = draws.mean(axis=0)
    assert np.all(np.abs(share - expected) <= tol), np.abs(share - expected).max()
    averaged = np.exp(belief.pool_log_chance())
    assert not np.all(np.abs(share - averaged) <= tol)


@pytest.mark.parametrize("rule", ["ei", "pi", "thompson", "mes", "pbest", "kg", "lcb", "mean", "gp-ucb", "hedge"])
def test_weighted_rules_stay_where_the_limit_holds(rule):
    """Constructed: the objective falls toward x1 = 1, but a pressure measured at 150 trials clearly breaks its
    limit wherever x1 > 0.55 (by up to 9 prior sd). Each rule weighted by feasibility chooses its next trial where the limit holds
    (x1 < 0.6); the same rule ignoring the limit goes for the low objective (x1 > 0.6), the negative control."""
    from simlab.policies import POLICIES, Context
    rng = np.random.default_rng(3)
    pool = rng.random((512, 2))
    X = rng.random((150, 2))
    kernel = make_kernel("matern52", [0.3, 0.3], 1.0)
    post = Posterior(kernel, 0.0, 0.05, pool=pool, capacity=160)
    for x in X:
        post.add(x, float(-2.0 * x[0] + 0.2 * np.sin(5 * x[1])))
    limit = LimitModel(make_kernel("matern52", [0.3, 0.3], 3.0), 0.0, 0.1, 0.0, 1.0)
    chosen = {}
    for feasible in ("weight", "ignore"):
        post.feasible = FeasibleBelief([limit], None, pool=pool, capacity=160, chance=0.95)
        for x in X:
            post.feasible.add(x, worked=True, values=[60.0 * (x[0] - 0.55)])
        policy = POLICIES[rule](feasible=feasible)
        policy.start(Context(pool=pool, rng=np.random.default_rng(5), sequence=pool[:160], horizon=160, posterior=post))
        chosen[feasible] = policy.choose(post, 151)
    assert chosen["weight"][0] < 0.6, chosen
    assert chosen["ignore"][0] > 0.6, chosen
