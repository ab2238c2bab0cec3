"""One replicate's material, shared by every policy (the paired design): its world, the world's
optimum (two independent searches), the initial design, the Sobol' sequence, the noise shocks
and lost-trial flags, and the candidate pool. Each comes from its own keyed stream
(`simlab.rng.stream`), so adding a policy changes nothing here. The replay stage takes it on."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lazy import stats
from ..model.kernels import make_kernel
from ..rng import stream
from ..study.types import Prior, Study
from . import functions
from .draws import ConditionedWorld, FunctionWorld, World
from .kinds import WORLD_KINDS
from .mixed import make_mixed_world, needs_mixed
from .limits import WorldLimits, make_limits
from .noise import Observer

__all__ = ["Replicate", "make_replicate", "make_world", "world_optimum", "make_observer", "history_arrays",
           "unit_kernel"]


def unit_kernel(prior: Prior, study: Study):
    # Lengthscales are given in input units; campaigns work on the unit cube.
    return make_kernel(prior.kernel, np.asarray(prior.lengthscale) / study.space.width, prior.amplitude)


def make_world(study: Study, replicate: int) -> World:
    """The replicate's true objective (internal orientation, unit cube)."""
    w = study.world
    if w.function is not None:
        return FunctionWorld(functions.FUNCTIONS[w.function])
    if needs_mixed(study.space):   # stepped or categorical inputs, or a library (simlab.worlds.mixed)
        return make_mixed_world(study, w.prior, study.sign * w.prior.mean, stream(study.seed, replicate, "world"),
                                dict(w.method_settings)["features"], history=history_arrays(study), noise=w.noise)
    kernel = unit_kernel(w.prior, study)
    if w.lengthscale_within != 1.0 or w.amplitude_within != 1.0:
        kernel = _uncertain(kernel, w, stream(study.seed, replicate, "hyper"))
    rng = stream(study.seed, replicate, "world")
    mean = study.sign * w.prior.mean
    world = WORLD_KINDS[w.method].draw(kernel, mean, rng, dict(w.method_settings))
    if study.history is not None:
        H, yH = history_arrays(study)
        world = ConditionedWorld(world, kernel, H, yH, w.noise, rng)
    return world


def history_arrays(study: Study) -> tuple[np.ndarray, np.ndarray] | None:
    """Past trials on the unit cube and in the internal orientation, or None."""
    if study.history is None:
        return None
    space, X = study.space, np.array(study.history.X)
    if space.library is not None:
        # every past trial is one of the library's rows (spec.py checked and copied its values): take
        # that row's own unit-cube point, so the policies and the world see it as that row, bit for bit
        rows = {tuple(r): i for i, r in enumerate(space.library_user())}
        return space.library_unit()[[rows[tuple(x)] for x in X]], study.sign * np.array(study.history.y)
    return space.to_unit(X), study.sign * np.array(study.history.y)


def _uncertain(kernel, w, rng):
    """The replicate's own lengthscales (each input independently) and amplitude.

    ``within = f`` means log-normal around the stated value with 95 % of draws inside
    ``[value / f, value * f]``: log sd = log(f) / 1.959964 (the normal 97.5 % quantile).
    """
    z = rng.standard_normal(kernel.dim + 1)
    ls = kernel.lengthscale * np.exp(np.log(w.lengthscale_within) / 1.959964 * z[:-1])
    amp = kernel.amplitude * np.exp(np.log(w.amplitude_within) / 1.959964 * z[-1])
    return type(kernel)(ls, amp)


def _sobol(d: int, n: int, rng) -> np.ndarray:
    # Draw a power of two and keep the first n points: prefixes of a scrambled Sobol'
    # sequence keep their low discrepancy and this avoids SciPy's balance warning.
    return stats.qmc.Sobol(d, seed=rng).random_base2(max(int(np.ceil(np.log2(max(n, 2)))), 1))[:n]


@dataclass
class Replicate:
    """Everything shared by all policies on one replicate (the paired design)."""

    index: int
    world: World
    optimum: tuple[np.ndarray, float]   # the better of two independent searches (internal orientation)
    design: np.ndarray      # (n0, d)
    sequence: np.ndarray    # (B, d)
    shocks: np.ndarray      # (B,) unit-variance noise draws, one per trial
    lost: np.ndarray        # (B,) bool: the trial is lost
    pool: np.ndarray        # (m, d)
    optimum_gap: float = 0.0   # |first search - second search| >= 0, objective units
    optimum_searches: int = 1  # independent optimum searches run (more while the best two disagreed)
    optimum_spread: float = 0.0   # worst - best value among them, >= optimum_gap
    limits: WorldLimits | None = None   # [[limit]]s and the failing region (then `optimum` is the feasible one)
    worst: float = float("nan")         # with limits: the worst feasible value found (the regret of an infeasible pick)


# When the searches disagree by more than this share of the prior amplitude, search again, up to
# EXTRA_SEARCHES more times, until the best two agree (a missed optimum makes regret too small: when
# in doubt, search harder). Measured (benchmarks/world_optima.py, 2026-12-03, 30 worlds per cell): one
# search alone missed 4-D Matern 1/2 worlds by up to 0.24 x amplitude, the better of two by 0.0035 on
# one of 30.
AGREE = 1e-3
EXTRA_SEARCHES = 4


def world_optimum(world: World, study: Study, r: int) -> tuple[np.ndarray, float, float]:
    """The world's optimum from independent searches: location, the best value, and the gap
    (the best of :func:`optimum_searches`).

    The searches use their own keyed streams ("optimum", "optimum_check", then "optimum_extra" k), so
    their Sobol' points and zoom points differ. Two always run; while the best two values found
    differ by more than ``AGREE`` x the prior amplitude, another runs, up to ``EXTRA_SEARCHES``
    more. Regret uses the best (a missed optimum makes regret too small, so never a worse one);
    ``gap`` = second best - best, >= 0, in objective units: a lower bound on how far the best may
    still be from the true optimum (0 when two searches found the same value).
    """
    u, v, gap, _, _ = searched(optimum_searches(world, study, r))
    return u, v, gap


def searched(found) -> tuple[np.ndarray, float, float, int, float]:
    """What :func:`optimum_searches` found, summed up: (location, best value, gap to the second best,
    number of searches, spread = worst - best)."""
    (v, u), v_next = found[0], found[min(1, len(found) - 1)][0]
    return u, v, v_next - v, len(found), found[-1][0] - v


def optimum_searches(world: World, study: Study, r: int) -> list[tuple[float, np.ndarray]]:
    """Every independent search's ``(value, location)``, best first (see :func:`world_optimum`): one for
    a published function, else two and up to ``EXTRA_SEARCHES`` more while the best two disagree.

    Where every extra search ran and the values still spread (rough priors in several inputs:
    benchmarks/world_optima.py, 6-D Matern 1/2, lengthscale 0.2, found six searches spread by 0.05-0.3 x
    amplitude on 26 of 30 worlds), the gap between the best two understates how far the best may be from
    the true optimum; worlds.csv's ``optimum_spread`` (worst - best) and ``optimum_searches`` say so."""
    u1, v1 = world.optimum(stream(study.seed, r, "optimum"))
    if isinstance(world, FunctionWorld):
        return [(v1, u1)]         # the published optimum: nothing to search
    found = [(v1, u1), world.optimum(stream(study.seed, r, "optimum_check"))[::-1]]
    prior = study.world.prior
    tol = AGREE * (prior.amplitude if prior is not None else 1.0)
    for k in range(EXTRA_SEARCHES):
        found.sort(key=lambda t: t[0])
        if found[1][0] - found[0][0] <= tol:
            break
        found.append(world.optimum(stream(study.seed, r, "optimum_extra", str(k)))[::-1])
    found.sort(key=lambda t: t[0])
    return found


def feasible_optimum(world: World, limits: WorldLimits, unconstrained, study: Study, r: int):
    """The best input that respects every limit and works: (location, value, worst feasible value, gap).

    The unconstrained optimum is the answer when it is feasible (it is the global minimum); otherwise
    two independent searches with the limits applied (streams "feasible_optimum", "feasible_check"),
    the better kept, the gap between them reported like ``world_optimum``'s."""
    from .feasible import feasible_minimum

    u, v, gap = unconstrained
    found = [feasible_minimum(world, limits.slacks, world.dim, stream(study.seed, r, name), unconstrained=(u, v))
             for name in ("feasible_optimum", "feasible_check")]
    found.sort(key=lambda o: (not o.found, o.value))
    best, other = found
    worst = max(o.worst for o in found)
    if np.all(limits.slacks_at(u) <= 0):
        return u, v, max(worst, v), gap
    return best.u, best.value, max(worst, best.value), max(other.value - best.value, 0.0)


def make_observer(study: Study) -> Observer:
    """The study's observation model (noise shape, growth, lost trials)."""
    w = study.world
    ref = w.prior if w.prior is not None else study.belief
    return Observer(sd=w.noise, kind=w.noise_kind, settings=w.noise_settings, growth=w.noise_growth,
                    center=ref.mean, scale=ref.amplitude, lost=w.lost, sign=study.sign)


def _library_material(study: Study, r: int):
    """A library's design, sequence and pool: the rows in a random order of the replicate's own
    (permutations joined end to end, so rows come without replacement until the library is
    exhausted), the design its first rows whatever ``[campaign] design`` says, and the pool every row."""
    rows = study.space.library_unit()
    rng = stream(study.seed, r, "library")
    n = study.campaign.horizon
    order = np.concatenate([rng.permutation(len(rows)) for _ in range(-(-n // len(rows)))])[:n]
    sequence = rows[order]
    return sequence[: study.campaign.initial], sequence, rows


def _discrete_pool(study: Study, rng) -> np.ndarray:
    """The candidate pool over a space with stepped or categorical inputs: the scrambled Sobol'
    points moved to allowed values (:meth:`Space.snap`), so each level combination is scored on
    about pool / K points and polishing moves the continuous inputs within it.

    With no continuous input the space is a finite grid: every point when it has at most ``pool``
    of them (scored exactly, the same for every replicate), otherwise ``pool`` distinct points
    taken from ever longer Sobol' prefixes (snapped points repeat, and a repeat is scored twice
    for nothing). A continuous coordinate of a scrambled Sobol' set never repeats, so there the
    snapped points are distinct already.
    """
    space, m = study.space, study.campaign.pool
    if len(space.discrete) < space.dim:
        return space.snap(_sobol(space.dim, m, rng))
    grids = [space.grid(j) for j in range(space.dim)]
    if np.prod([len(g) for g in grids], dtype=float) <= m:
        return np.stack(np.meshgrid(*grids, indexing="ij"), axis=-1).reshape(-1, space.dim)
    seed = rng.integers(2**63)
    n = m
    while True:
        P = space.snap(_sobol(space.dim, n, np.random.default_rng(seed)))
        _, first = np.unique(P, axis=0, return_index=True)
        if len(first) >= m:
            return P[np.sort(first)[:m]]
        n *= 2


def make_replicate(study: Study, r: int) -> Replicate:
    d, c = study.space.dim, study.campaign
    B = c.horizon
    world = make_world(study, r)
    u_best, v_best, gap, searches, spread = searched(optimum_searches(world, study, r))
    limits, worst = make_limits(study, r, world), float("nan")
    if limits is not None:
        u_free = u_best
        u_best, v_best, worst, gap = feasible_optimum(world, limits, (u_best, v_best, gap), study, r)
        if u_best is not u_free:     # the feasible optimum's own two searches: their gap is the spread
            searches, spread = 2, gap
    rng = stream(study.seed, r, "design")
    sequence = _sobol(d, B, rng)
    if c.design == "sobol":
        design = sequence[: c.initial]
    elif c.design == "lhs":
        design = stats.qmc.LatinHypercube(d, seed=rng).random(c.initial)
    else:
        design = rng.random((c.initial, d))
    shocks, lost = make_observer(study).draw(stream(study.seed, r, "noise"), B)
    if study.space.library is not None:
        design, sequence, pool = _library_material(study, r)
    elif study.space.discrete:
        # stepped and categorical inputs take allowed values only (each equally likely from a uniform draw)
        design, sequence = study.space.snap(design), study.space.snap(sequence)
        pool = _discrete_pool(study, stream(study.seed, r, "pool"))
    else:
        pool = _sobol(d, c.pool, stream(study.seed, r, "pool"))
    return Replicate(index=r, world=world, optimum=(u_best, v_best), design=design, sequence=sequence,
                     shocks=shocks, lost=lost, pool=pool, optimum_gap=gap, optimum_searches=searches,
                     optimum_spread=spread, limits=limits, worst=worst)
