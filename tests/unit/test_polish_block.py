"""polish_block: as good as SciPy's L-BFGS-B, bit-identical across block sizes, safe at edges."""

import numpy as np
import pytest
from scipy.optimize import check_grad, minimize
from threadpoolctl import threadpool_limits

from simlab.worlds.functions import FUNCTIONS
from simlab.model.optimize import polish_block

# ---------------------------------------------------------------------------------------------
# Test functions on the unit cube, with analytic gradients. Every one works on U of any shape
# (..., d) with elementwise operations and sums over the last axis only, so problem (b, j)
# depends on U[b, j] alone (what polish_block's contract asks of fg).


def _box(lo, hi):
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    return lo, hi - lo


def _branin(U):
    # Branin on [-5, 10] x [0, 15] (Dixon & Szego 1978); values checked against simlab.worlds.functions.
    lo, w = _box([-5.0, 0.0], [10.0, 15.0])
    X = lo + w * U
    x1, x2 = X[..., 0], X[..., 1]
    b, c, t = 5.1 / (4 * np.pi**2), 5 / np.pi, 1 / (8 * np.pi)
    r = x2 - b * x1**2 + c * x1 - 6
    f = r**2 + 10 * (1 - t) * np.cos(x1) + 10
    g = np.stack([2 * r * (c - 2 * b * x1) - 10 * (1 - t) * np.sin(x1), 2 * r], -1)
    return f, g * w


def _camel(U):
    # Six-hump camel on [-3, 3] x [-2, 2] (Surjanovic & Bingham, VLSE).
    lo, w = _box([-3.0, -2.0], [3.0, 2.0])
    X = lo + w * U
    x1, x2 = X[..., 0], X[..., 1]
    f = (4 - 2.1 * x1**2 + x1**4 / 3) * x1**2 + x1 * x2 + (-4 + 4 * x2**2) * x2**2
    g = np.stack([8 * x1 - 8.4 * x1**3 + 2 * x1**5 + x2, x1 - 8 * x2 + 16 * x2**3], -1)
    return f, g * w


def _forrester(U):
    # Forrester, Sobester & Keane (2008) on [0, 1].
    x = U[..., 0]
    f = (6 * x - 2) ** 2 * np.sin(12 * x - 4)
    g = 12 * (6 * x - 2) * np.sin(12 * x - 4) + 12 * (6 * x - 2) ** 2 * np.cos(12 * x - 4)
    return f, g[..., None]


# Rosenbrock's usual restricted box (Surjanovic & Bingham, VLSE; value from memory).
ROSEN_LO, ROSEN_HI = -2.048, 2.048


def _rosenbrock(U, shift=0.0):
    # Rosenbrock (1960): minimum 0 at x = (1, ..., 1) (from memory; f = 0 there by inspection of
    # the formula, and f >= 0 as a sum of squares), i.e. at u = (1 + 2.048) / 4.096 - shift.
    w = ROSEN_HI - ROSEN_LO
    X = ROSEN_LO + w * (U + shift)
    a, b = X[..., :-1], X[..., 1:]
    f = (100 * (b - a**2) ** 2 + (1 - a) ** 2).sum(-1)
    inner = -400 * a * (b - a**2) - 2 * (1 - a)
    outer = 200 * (b - a**2)
    zero = np.zeros_like(X[..., :1])
    g = np.concatenate([inner, zero], -1) + np.concatenate([zero, outer], -1)
    return f, g * w


def _bound_quadratic(d, seed):
    """A strictly convex quadratic whose box-constrained minimiser x* is known by construction.

    f(u) = (u - x*)' A (u - x*) / 2 + lam' (u - x*), with lam >= 0 where x* sits at 0,
    lam <= 0 where it sits at 1 and 0 elsewhere. Directly: lam' (u - x*) >= 0 for every u in
    the box, so f(u) >= (u - x*)' A (u - x*) / 2 >= |u - x*|^2 / 2 (A's smallest eigenvalue
    is 1) and x* is the unique minimiser over [0, 1]^d with f(x*) = 0 (these are the KKT
    conditions for the box, Nocedal & Wright 2006, chapter 12). The unconstrained minimiser,
    x* - A^-1 lam, lies outside the box.
    """
    rng = np.random.default_rng(seed)
    Q, _ = np.linalg.qr(rng.normal(size=(d, d)))
    A = Q @ np.diag(np.logspace(0, 2, d)) @ Q.T          # condition number 100
    A = (A + A.T) / 2
    xs = rng.uniform(0.2, 0.8, d)
    lam = np.zeros(d)
    k = max(1, d // 3)
    xs[:k], lam[:k] = 0.0, rng.uniform(0.5, 2.0, k)
    xs[k:2 * k], lam[k:2 * k] = 1.0, -rng.uniform(0.5, 2.0, k)

    def fg(U):
        D = U - xs
        AD = (A * D[..., None, :]).sum(-1)
        return 0.5 * (D * AD).sum(-1) + (lam * D).sum(-1), AD + lam
    return fg, xs


def _one(fg, d):
    """fg for a single point, as SciPy wants it: (float, ndarray (d,))."""
    def fun(u):
        v, g = fg(np.asarray(u, float).reshape(1, 1, d))
        return float(v[0, 0]), g[0, 0].copy()
    return fun


def _lbfgsb(fg, starts, **options):
    """SciPy's L-BFGS-B from each start; returns its results (one per start, flattened)."""
    d = starts.shape[-1]
    fun = _one(fg, d)
    # L-BFGS-B calls BLAS on tiny matrices; OpenBLAS threads waiting for a busy second core
    # made it ~50x slower here (measured), so the references run on one thread.
    with threadpool_limits(1):
        return [minimize(fun, s, jac=True, method="L-BFGS-B", bounds=[(0.0, 1.0)] * d, options=options)
                for s in starts.reshape(-1, d)]


def _lbfgsb_values(fg, starts, **options):
    return np.array([r.fun for r in _lbfgsb(fg, starts, **options)]).reshape(starts.shape[:-1])


QUAD5, QUAD5_X = _bound_quadratic(5, seed=11)
QUAD20, QUAD20_X = _bound_quadratic(20, seed=12)

# ---------------------------------------------------------------------------------------------
# 1. Against SciPy's L-BFGS-B (run to its default convergence) from the same starts.


def test_the_test_functions_are_right():
    # Values against simlab.worlds.functions (published definitions; test_functions.py checks those
    # against the literature) and gradients against finite differences (scipy.optimize.check_grad).
    rng = np.random.default_rng(2024)
    for name, fg, d in [("branin", _branin, 2), ("six-hump-camel", _camel, 2), ("forrester", _forrester, 1)]:
        tf = FUNCTIONS[name]
        U = rng.uniform(size=(5, d))
        lo = np.array([b[0] for b in tf.bounds])
        hi = np.array([b[1] for b in tf.bounds])
        np.testing.assert_allclose(fg(U)[0], tf(lo + (hi - lo) * U), rtol=1e-13, atol=1e-13)
    for fg, d in [(_branin, 2), (_camel, 2), (_forrester, 1), (_rosenbrock, 5), (QUAD5, 5), (QUAD20, 20)]:
        fun = _one(fg, d)
        for u in rng.uniform(0.05, 0.95, size=(3, d)):
            scale = 1.0 + np.abs(fun(u)[1]).max()
            # check_grad's forward differences (step h = 1.5e-8) err by ~h f'' / 2 + 2 eps |f| / h,
            # below 1e-5 of the gradient scale for these functions (float64 rounding).
            err = check_grad(lambda v, fun=fun: fun(v)[0], lambda v, fun=fun: fun(v)[1], u)
            assert err < 1e-5 * scale * np.sqrt(d)


# (name, fg, d, iterations, published or constructed minimum, one minimum value).
# Iterations: 30 where L-BFGS-B itself converges within ~20 evaluations (measured for these
# starts: Branin, six-hump camel, the quadratics). Rosenbrock's curved valley takes L-BFGS-B a
# median of ~40 (2-D) and ~45 (5-D) evaluations, up to ~70, so both get more: 100 and 150.
#
# "One minimum value": every local minimum in the box has the same value, so from any start
# both methods must end at that value and polish_block must be no worse than L-BFGS-B on every
# start. The quadratics by construction (_bound_quadratic); Branin's three minimisers all have
# the value 5/(4 pi) and it has no other local minimum in its box (Dixon & Szego 1978; the
# latter from memory); 2-D Rosenbrock's gradient vanishes only at (1, 1) (b = a^2 from the
# second component, then a = 1 from the first). Six-hump camel has six local minima and 5-D
# Rosenbrock a second one near (-1, 1, 1, 1, 1) (both from memory, and both seen in these
# runs): there the two methods take different first steps and can settle in different basins
# from the same start (polish_block's first step moves a quarter of the cube, L-BFGS-B's a unit
# length), so the comparison with L-BFGS-B is made where both reach the same minimiser, and
# elsewhere L-BFGS-B restarted from polish_block's result must find nothing better: it ended
# at a local minimum, not half-way. Which basin is reached is not compared: on six-hump camel
# polish_block lands in a worse one than L-BFGS-B from 18 of these 64 starts and a better one
# from 5 (measured; seeds 8 and 9 similar), a known difference of the two first steps.
CASES = [
    ("branin", _branin, 2, 30, 5 / (4 * np.pi), True),         # 0.397887, Dixon & Szego (1978)
    ("six-hump-camel", _camel, 2, 30, -1.0316284535, False),   # Surjanovic & Bingham, VLSE
    ("quadratic-5", QUAD5, 5, 30, 0.0, True),                  # by construction
    ("quadratic-20", QUAD20, 20, 30, 0.0, True),               # by construction
    ("rosenbrock-2", _rosenbrock, 2, 100, 0.0, True),          # Rosenbrock (1960)
    ("rosenbrock-5", _rosenbrock, 5, 150, 0.0, False),         # Rosenbrock (1960)
]
# "No worse" allows 1e-6 (1 + |f|): L-BFGS-B stops on a relative decrease of 2.2e-9 or a
# projected gradient of 1e-5 (SciPy defaults), so its own result is off the minimum by up to
# ~1e-6 here; a tighter tolerance would compare stopping rules, not methods.
REL_TOL = 1e-6


@pytest.mark.parametrize("name, fg, d, iterations, fmin, one_value", CASES, ids=[c[0] for c in CASES])
def test_as_good_as_lbfgsb_from_the_same_starts(name, fg, d, iterations, fmin, one_value):
    starts = np.random.default_rng(7).uniform(size=(16, 4, d))
    U, v = polish_block(fg, starts, iterations=iterations)
    res = _lbfgsb(fg, starts)
    ref = np.array([r.fun for r in res]).reshape(v.shape)
    no_worse = v <= ref + REL_TOL * (1.0 + np.abs(ref))
    # Same minimiser as L-BFGS-B from that start (within 1e-3 in every coordinate): no worse.
    same = np.abs(U - np.array([r.x for r in res]).reshape(U.shape)).max(-1) < 1e-3
    assert same.any() and np.all(no_worse[same]), name
    if one_value:
        assert np.all(no_worse), (name, np.flatnonzero(~no_worse))
    # Every result is a local minimum to L-BFGS-B's precision: restarted there, it gains at most
    # the same tolerance.
    again = np.array([r.fun for r in _lbfgsb(fg, U)]).reshape(v.shape)
    assert np.all(v <= again + REL_TOL * (1.0 + np.abs(again))), name
    # The published (or constructed) minimum is reached from the best start: 1e-9 absolute
    # covers float64 rounding of functions of size ~1-300 near their minimum.
    assert v.min() == pytest.approx(fmin, abs=1e-9)
    assert v.min() >= fmin - 1e-9   # nothing goes below the global minimum


def test_the_comparison_with_lbfgsb_can_fail():
    # Negative control: stopped after 3 iterations, polish_block is worse than L-BFGS-B from the
    # same starts on 2-D Rosenbrock, and L-BFGS-B restarted from its results still gains.
    starts = np.random.default_rng(7).uniform(size=(16, 4, 2))
    U, v = polish_block(_rosenbrock, starts, iterations=3)
    ref = _lbfgsb_values(_rosenbrock, starts)
    assert not np.all(v <= ref + REL_TOL * (1.0 + np.abs(ref)))
    again = _lbfgsb_values(_rosenbrock, U)
    assert not np.all(v <= again + REL_TOL * (1.0 + np.abs(again)))


@pytest.mark.parametrize("fg, xstar, d", [(QUAD5, QUAD5_X, 5), (QUAD20, QUAD20_X, 20)], ids=["5", "20"])
def test_the_quadratic_minimiser_on_the_bounds_is_found(fg, xstar, d):
    # The answer is known by construction (_bound_quadratic): x* with some coordinates exactly
    # at 0 and 1. f(u) >= |u - x*|^2 / 2 in the box, so f < 5e-9 puts u within 1e-4 of x*;
    # coordinates at a bound are reached exactly by the projection. 5e-9 is what the
    # stopping rule promises: it stops once a step gains less than ~2.2e-9 (L-BFGS-B's
    # default factr), and a quasi-Newton step near the minimum gains at least about half
    # the remaining gap (common practice: superlinear convergence).
    starts = np.random.default_rng(8).uniform(size=(4, 4, d))
    U, v = polish_block(fg, starts, iterations=30)
    assert np.all(v < 5e-9)
    np.testing.assert_allclose(U, np.broadcast_to(xstar, U.shape), atol=1e-4)
    on_bound = (xstar == 0.0) | (xstar == 1.0)
    assert np.array_equal(U[..., on_bound], np.broadcast_to(xstar[on_bound], U[..., on_bound].shape))


def test_at_an_equal_budget_it_is_not_behind_lbfgsb():
    # Both get 31 evaluations of a 20-D quadratic (L-BFGS-B: maxfun=31, SciPy's limit on
    # function evaluations, which it can overrun by one line search, in its favour).
    starts = np.random.default_rng(9).uniform(size=(8, 4, 20))
    _, v = polish_block(QUAD20, starts, iterations=30)
    ref = _lbfgsb_values(QUAD20, starts, maxfun=31)
    assert np.median(v) <= np.median(ref)
    # Negative control: with 5 evaluations it is far from L-BFGS-B's 31 (the comparison can fail).
    _, v5 = polish_block(QUAD20, starts, iterations=5)
    assert np.median(v5) > 100 * np.median(ref) + 1e-6


# ---------------------------------------------------------------------------------------------
# 2. Bit identity: problem (b, j) gets the same bits whatever else is in the block.

PROBLEMS = 40   # a pool of distinct problems; 0-7 are the targets followed across blocks


def _family(d, seed):
    """Shifts, poisons and starts of the pool; targets 0-7 cover every poison."""
    rng = np.random.default_rng(seed)
    shift = rng.uniform(-0.3, 0.3, size=(PROBLEMS, d))
    poison = rng.integers(0, 4, size=PROBLEMS)
    poison[:8] = [0, 1, 2, 3, 0, 1, 0, 2]
    starts = rng.uniform(size=(PROBLEMS, d))
    return shift, poison, starts


def _family_fg(shift, poison, leak=0.0, seen=None):
    """fg for a block of pool members with the given (B, q, d) shifts and (B, q) poisons.

    Each problem is Rosenbrock (1960) plus a double well, sum (x^2 - 1)^2 / 2 (so that d = 1
    is not trivial), shifted; both vanish at x = 1, the minimiser. Polynomials only, so that
    fg itself is exact per problem. Poison 1: value NaN where u_0 > 0.8; poison 2: gradient
    inf where u_last < 0.1; poison 3: value inf everywhere (a non-finite start). ``leak``
    adds a block-dependent term (negative control only); ``seen`` (B, q), if given, records
    which problems were ever evaluated to something non-finite.
    """
    w = ROSEN_HI - ROSEN_LO

    def fg(U):
        f, g = _rosenbrock(U, shift)
        X = ROSEN_LO + w * (U + shift)
        f = f + 0.5 * ((X * X - 1) ** 2).sum(-1)
        g = g + 2 * X * (X * X - 1) * w
        f = np.where((poison == 1) & (U[..., 0] > 0.8), np.nan, f)
        f = np.where(poison == 3, np.inf, f)
        g = np.where((poison == 2)[..., None] & (U[..., -1:] < 0.1), np.inf, g)
        if seen is not None:
            seen[...] |= ~(np.isfinite(f) & np.isfinite(g).all(-1))
        return f + leak * U.mean(), g
    return fg


def _run(family, ids, *, iterations=30, leak=0.0, nudge=None, seen=None):
    """polish_block on the block of pool members ids (B, q); returns U (B, q, d), values (B, q)."""
    shift, poison, starts = family
    S = starts[ids].copy()
    if nudge is not None:
        S[nudge] += 1e-12
    return polish_block(_family_fg(shift[ids], poison[ids], leak, seen), S, iterations=iterations)


def _layouts(seed):
    """Blocks holding the targets: replicates of q = 4 starts (targets 0-3 and 4-7 as two
    rows) in blocks of B = 1, 3 and 16, and targets scattered through a (5, 7) block. Other
    places hold other pool members. Returns (ids (B, q), target number at each flat place)."""
    rng = np.random.default_rng(seed)
    layouts = [(np.array([[0, 1, 2, 3]]), {0: 0, 1: 1, 2: 2, 3: 3}),
               (np.array([[4, 5, 6, 7]]), {0: 4, 1: 5, 2: 6, 3: 7})]
    for B in (3, 16):
        ids = rng.integers(8, PROBLEMS, size=(B, 4))
        r1, r2 = rng.choice(B, size=2, replace=False)
        ids[r1], ids[r2] = [0, 1, 2, 3], [4, 5, 6, 7]
        layouts.append((ids, {4 * r1 + j: j for j in range(4)} | {4 * r2 + j: 4 + j for j in range(4)}))
    ids = rng.integers(8, PROBLEMS, size=35)
    places = rng.choice(35, size=8, replace=False)
    ids[places] = np.arange(8)
    layouts.append((ids.reshape(5, 7), {int(p): k for k, p in enumerate(places)}))
    return layouts


def _same_bits_as_alone(family, layouts, **kwargs):
    """Whether every target gets the same bits in every layout as alone in a (1, 1) block."""
    alone = [_run(family, np.array([[k]]), **kwargs) for k in range(8)]
    for ids, targets in layouts:
        U, v = _run(family, ids, **kwargs)
        U, v = U.reshape(-1, U.shape[-1]), v.reshape(-1)
        for place, k in targets.items():
            if not (np.array_equal(U[place], alone[k][0][0, 0])
                    and np.array_equal(v[place], alone[k][1][0, 0], equal_nan=True)):
                return False
    return True


@pytest.mark.parametrize("d", [1, 2, 9, 20])
def test_bit_identical_whatever_the_block(d):
    # d = 9 and 20 exercise NumPy's pairwise summation (8 partial sums from 8 terms up).
    family = _family(d, seed=100 + d)
    # np.errstate: the poisoned test functions make inf - inf on purpose.
    with np.errstate(invalid="ignore"):
        assert _same_bits_as_alone(family, _layouts(seed=200 + d))
        # The targets did meet non-finite values: at the start (poison 3) and along the way
        # (at least one of the poison 1 and 2 targets), so failed steps are part of the check.
        seen = np.zeros((1, 8), bool)
        _run(family, np.arange(8)[None], seen=seen)
    poison = family[1][:8]
    assert np.all(seen[0, poison == 3]) and np.any(seen[0, (poison == 1) | (poison == 2)])


def test_bit_identity_check_can_fail():
    # Negative controls for the comparison above: it notices changes in the last bits.
    family = _family(2, seed=102)
    layouts = _layouts(seed=202)
    with np.errstate(invalid="ignore"):
        # (a) an fg coupling the problems through 1e-13 x the block mean (applied alone too,
        # so only its dependence on the rest of the block can make a difference).
        assert not _same_bits_as_alone(family, layouts, leak=1e-13)
        # (b) one start moved by 1e-12 gives other bits for that problem (target 0, healthy),
        # (c) and so does stopping after 10 iterations instead of 30.
        ids = np.array([[0, 1, 2, 3]])
        U, _ = _run(family, ids)
        Un, _ = _run(family, ids, nudge=(0, 0))
        U10, _ = _run(family, ids, iterations=10)
    assert not np.array_equal(Un[0, 0], U[0, 0])
    assert not np.array_equal(U10[0, 0], U[0, 0])
    # ... while the other problems of the block keep their bits under (b).
    assert np.array_equal(Un[0, 1:], U[0, 1:])


# ---------------------------------------------------------------------------------------------
# 3. Contract: never worse, in the box, non-finite values, d = 1 and 20, corners, call count.


def test_never_worse_and_inside_the_box():
    # Starts include points outside the cube (clipped first) and the Branin minimisers mapped
    # into the cube (Dixon & Szego 1978), where there is nothing to gain.
    rng = np.random.default_rng(31)
    starts = rng.uniform(-0.5, 1.5, size=(8, 4, 2))
    xmin = (np.array(FUNCTIONS["branin"].minimizers) - [-5.0, 0.0]) / 15.0
    starts[0, :3] = xmin
    U, v = polish_block(_branin, starts, iterations=30)
    v0, _ = _branin(np.clip(starts, 0.0, 1.0))
    assert np.all(v <= v0)
    assert np.all((U >= 0.0) & (U <= 1.0))
    assert np.array_equal(v, _branin(U)[0])   # the values returned are fg at the points returned


def test_non_finite_values_and_gradients():
    # Family members: 0 healthy, 1 NaN where u_0 > 0.8, 2 inf gradient where u_1 < 0.1,
    # 3 inf everywhere. Problem 1 starts below the valley, so its early steps overshoot into
    # the NaN region; problem 2's minimiser is shifted into its inf region.
    ustar = (1 - ROSEN_LO) / (ROSEN_HI - ROSEN_LO)
    shift = np.array([[ustar - 0.9, 0.0], [0.0, 0.0], [0.0, ustar - 0.05], [0.0, 0.0]])
    poison = np.array([0, 1, 2, 3])
    starts = np.array([[0.3, 0.3], [0.75, 0.2], [0.6, 0.6], [0.5, 0.5]])
    seen = np.zeros((1, 4), bool)
    fg = _family_fg(shift[None], poison[None], seen=seen)
    with np.errstate(invalid="ignore"):   # the poisoned functions make inf - inf on purpose
        U, v = polish_block(fg, starts[None], iterations=60)
    assert np.array_equal(seen[0], [False, True, True, True])   # the poisons were met
    with np.errstate(invalid="ignore"):
        v0, _ = fg(starts[None])
        _, gU = fg(U)
    U, v, v0 = U[0], v[0], v0[0]
    # 0: the minimiser u = (0.9, ustar) of the shifted function (x = 1, Rosenbrock 1960): reached.
    assert v[0] < 1e-10
    # 1: the minimiser (ustar, ustar) = (0.74, 0.74) is outside the NaN region: reached.
    assert v[1] < 1e-10 and U[1, 0] <= 0.8
    # 2: its minimiser (ustar, 0.05) lies in the region where the gradient is inf: the result
    # improves on the start, stays outside that region and has finite value and gradient.
    assert np.isfinite(v[2]) and v[2] < v0[2] and U[2, 1] >= 0.1 and np.all(np.isfinite(gU[0, 2]))
    # 3: a non-finite start is returned unchanged.
    assert np.array_equal(U[3], starts[3]) and v[3] == np.inf
    # Healthy problem 0 is not poisoned by its neighbours: same bits as alone.
    Ua, va = polish_block(_family_fg(shift[None, :1], poison[None, :1]), starts[None, :1], iterations=60)
    assert np.array_equal(Ua[0, 0], U[0]) and va[0, 0] == v[0]


def test_one_dimension():
    # Forrester, Sobester & Keane (2008), as recorded in simlab.worlds.functions (REFERENCES.md):
    # minimum -6.0207400558 at x = 0.7572487562 (10 printed digits).
    # Starts in [0.6, 0.95] lie in that minimiser's basin (the function rises monotonically
    # away from it over that interval: sign of the derivative checked below).
    starts = np.linspace(0.6, 0.95, 16).reshape(4, 4, 1)
    grid = np.linspace(0.6, 0.95, 2001)
    _, dg = _forrester(grid[:, None])
    assert np.all(dg[grid < 0.757, 0] < 0) and np.all(dg[grid > 0.758, 0] > 0)
    U, v = polish_block(_forrester, starts, iterations=30)
    np.testing.assert_allclose(v, -6.0207400558, atol=5e-11)   # half a unit in the last digit
    # Near the minimum f - fmin ~ f'' (x - x*)^2 / 2 with f'' ~ 800, so 5e-11 in f is ~3.5e-7 in x.
    np.testing.assert_allclose(U[..., 0], 0.7572487562, atol=5e-7)
    ref = _lbfgsb_values(_forrester, starts)
    assert np.all(v <= ref + REL_TOL * (1 + np.abs(ref)))


def test_corners():
    # Quadratic with minimiser at the corner 0: its gradient lam > 0 there points out of the
    # box, so the KKT conditions hold at the corner (answer known by construction).
    d = 3
    lam = np.array([1.0, 0.5, 2.0])

    def fg(U):
        return 0.5 * (U * U).sum(-1) + (lam * U).sum(-1), U + lam
    starts = np.stack([np.zeros(d), np.ones(d), np.array([0.0, 1.0, 0.0])])[None]
    U, v = polish_block(fg, starts, iterations=30)
    assert np.array_equal(U, np.zeros_like(U)) and np.array_equal(v, np.zeros_like(v))
    # Starts on corners with the gradient pointing into the box: they move to the interior
    # minimiser c of |u - c|^2 / 2 (by construction). f < 1e-20 puts u within 1.5e-10 of c.
    c = np.array([0.3, 0.6, 0.9])
    U, v = polish_block(lambda X: (0.5 * ((X - c) ** 2).sum(-1), X - c),
                        np.stack([np.zeros(d), np.ones(d)])[None], iterations=30)
    assert np.all(v < 1e-20)
    np.testing.assert_allclose(U[0], [c, c], atol=1.5e-10)


def test_call_count_and_shapes():
    calls = []

    def fg(U):
        calls.append(U.shape)
        return _rosenbrock(U)
    starts = np.random.default_rng(5).uniform(size=(3, 2, 4))
    polish_block(fg, starts, iterations=12)
    assert calls == [(3, 2, 4)] * 13                 # iterations + 1, whole block each time
    # Fewer only when every problem has stopped: starts at a constrained minimum (the corner 0
    # of the cube for f = sum(u), gradient pointing out) need the first evaluation only.
    calls.clear()
    polish_block(lambda U: (calls.append(U.shape), (U.sum(-1), np.ones_like(U)))[1],
                 np.zeros((2, 3, 4)), iterations=12)
    assert calls == [(2, 3, 4)]
    with pytest.raises(ValueError, match="starts"):
        polish_block(fg, starts[0])
    with pytest.raises(ValueError, match="fg must return"):
        polish_block(lambda U: (np.zeros(U.shape[0]), np.zeros(U.shape)), starts)
