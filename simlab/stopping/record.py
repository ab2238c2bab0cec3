"""What stopping rules read, recorded after each trial: the posterior's view of the recommendation.

Both campaign loops call the same three steps, on a :class:`~simlab.model.gp.Stack` (the
one-campaign loop's `Posterior` is a Stack of one): ``begin(st, h=, n=)`` before the first
trial (the runner binds :meth:`StopRecorder.begin` to the block's replicates and policy),
``log.after(st, i)`` after each update, ``log.columns(b)`` at the end. Every quantity is
computed replicate by replicate from per-slice operations (elementwise ufuncs, stacked
products, reductions over a last axis) and each replicate draws from its own keyed streams
(``rng.stream(seed, replicate, "stop"[, policy])``), so a campaign's record has the same bits
alone or in a lockstep block (tests/unit/test_stopping.py).

Nothing is recorded, and nothing costs, when no ``[[stop]]`` rule of the study needs it:
:func:`record_plan` is None then, and the traces keep exactly their columns. Columns hold NaN
where nothing was computed: before the first trial any rule reading them may stop, and, for
``stop_chance`` (the costly one: pathwise draws over the pool), after every confident rule has
stopped the campaign. ``stop_chance`` is a lower bound on the belief's chance: the larger of an
exact one from pairs (Boole's inequality, :func:`_pair_bounds`) and the 95 % confidence bound from
the Monte Carlo count (:meth:`StopLog._chance`). Where the exact pairwise bounds already decide
every confident rule (the chance provably below each threshold, or above each), no draws are made
and ``stop_chance`` holds that bound (the upper one when below).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass

import numpy as np

from ..lazy import special
from ..model.gp import matvec, rowdot, vecmat
from ..policies.info import PathwiseDraws
from .rules import STOP_RULES

__all__ = ["RecordPlan", "StopRecorder", "StopLog", "record_plan"]

# Pool points whose lower bound mu - 5 sd lies above the lowest upper bound mu + 5 sd are left out
# of the draws (as policies.info does for its draws): such a point is a draw's minimum only when one
# of two values lies 5 sd beyond its mean, at most (m + 1) Phi(-5) = 6e-4 of the draws for a pool
# of 2048, far below the Monte Carlo error of 64 draws (0.04 at a probability of 0.9).
_SCREEN = 5.0
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)
# The first batch of draws; later batches double the count (16, 16, 32, 64, ...) up to `draws`.
_FIRST_BATCH = 16


@dataclass(frozen=True)
class RecordPlan:
    """Which columns to record, from which trial on, and the settings that shape them.

    A ``*_from`` of None means the column is not recorded. Trials are 1-based new trials.
    """

    target: float                      # [target] regret, objective units (the same in both orientations)
    chance_from: int | None = None
    chances: tuple[float, ...] = ()    # the confident rules' `chance` settings
    settled_from: int = 1              # the largest `min_trials` of the confident rules
    draws: int = 128                   # most posterior draws per trial, in doubling batches (StopLog._chance)
    features: int = 64
    gain_from: int | None = None
    gap_from: int | None = None
    width: float = 2.0

    @property
    def lowest_chance(self) -> float:
        """Below it no confident rule stops."""
        return min(self.chances, default=0.0)

    @property
    def highest_chance(self) -> float:
        """At or above it (from `settled_from` on) every confident rule has stopped."""
        return max(self.chances, default=1.0)

    @property
    def columns(self) -> tuple[str, ...]:
        return tuple(name for name, start in (("stop_chance", self.chance_from), ("stop_gain", self.gain_from),
                                              ("stop_gap", self.gap_from)) if start is not None)


def record_plan(study) -> RecordPlan | None:
    """The record a study's ``[[stop]]`` rules need, or None when none reads the posterior.

    Each column starts at the smallest ``min_trials`` of the rules reading it: before that no rule
    may stop, so nothing is computed (NaN in the traces).
    """
    starts: dict[str, int] = {}
    settings: dict[str, object] = {}
    confident = [spec.options for spec in getattr(study, "stops", ()) if STOP_RULES[spec.rule].statistic == "stop_chance"]
    for spec in getattr(study, "stops", ()):
        cls = STOP_RULES[spec.rule]
        if cls.statistic is None:
            continue
        o = spec.options
        starts[cls.statistic] = min(starts.get(cls.statistic, o["min_trials"]), o["min_trials"])
        settings.update({k: o[k] for k in cls.shared})     # equal across rules: checked by the reader
    if not starts:
        return None
    return RecordPlan(target=float(study.target), chance_from=starts.get("stop_chance"),
                      gain_from=starts.get("stop_gain"), gap_from=starts.get("stop_gap"),
                      chances=tuple(sorted({o["chance"] for o in confident})),
                      settled_from=max((o["min_trials"] for o in confident), default=1),
                      **{k: settings[k] for k in ("draws", "features", "width") if k in settings})


class StopRecorder:
    """Starts the record of each block of campaigns of a chunk of replicates (one per chunk).

    The draws' spectral frequencies, and their basis over the pool (the costly part to build:
    m x F cosines), belong to the replicate, not to the policy: they come from the stream
    ``stream(seed, replicate, "stop")`` and are built once, when a campaign of the replicate first
    needs them, then shared by every policy's campaigns on it (the pool and the belief are the
    same for all). The weights and noise of each trial's draws come from the policy's own stream
    ``stream(seed, replicate, "stop", policy)``. Which campaign builds first does not change the
    bits, so the record is the same alone, in any block and in any policy order.
    """

    def __init__(self, plan: RecordPlan, seed: int):
        self.plan, self.seed = plan, int(seed)
        self._draws: dict[int, PathwiseDraws] = {}

    def begin(self, st, replicates, label: str, *, h: int, n: int) -> "StopLog":
        """The record of the campaigns of policy ``label`` on ``replicates`` (the rows of ``st``),
        before their first new trial; h past trials, n rows in all."""
        from ..rng import stream

        rngs = [stream(self.seed, r, "stop", label) for r in replicates]
        return StopLog(self, st, list(replicates), rngs, h=h, n=n)

    def draws(self, st, b: int, replicate: int) -> PathwiseDraws:
        """Replicate's shared frequencies and pool basis (a copy: a refit rebuilds its own)."""
        from ..rng import stream

        shared = self._draws.get(replicate)
        if shared is None:
            shared = PathwiseDraws(st, st.pools[b], stream(self.seed, replicate, "stop"), self.plan.features)
            self._draws[replicate] = shared
        return copy.copy(shared)


class StopLog:
    """The per-trial record of a block of campaigns: one (B, n) array per column, NaN where not computed."""

    def __init__(self, recorder: StopRecorder, st, replicates, rngs, *, h: int, n: int):
        self.recorder, self.plan, self.h = recorder, recorder.plan, h
        self.replicates, self.rngs = replicates, rngs
        B = st.size
        self.values = {name: np.full((B, n), np.nan) for name in self.plan.columns}
        self.draws: dict[int, PathwiseDraws] = {}   # built when a campaign first needs them
        self.settled = np.zeros(B, dtype=bool)      # every confident rule has stopped this campaign

    def after(self, st, i: int) -> None:
        """Record row i (0-based) of every campaign of the block, after the belief has seen it."""
        p, t = self.plan, i - self.h + 1
        if t < 1 or st.n == 0:
            return
        want = {name: start is not None and t >= start for name, start in
                (("stop_chance", p.chance_from), ("stop_gain", p.gain_from), ("stop_gap", p.gap_from))}
        if not any(want.values()):
            return
        B = st.size
        at = np.arange(B)
        md = st.means_at_data()                                          # (B, n), as the loops' recommendation
        r = np.argmin(md, axis=-1)
        mu, sd = st.stacked_pool_moments()                               # (B, m)
        if want["stop_gain"]:
            self.values["stop_gain"][:, i] = _largest_ei(mu, sd, md[at, r][:, None])
        if want["stop_gap"]:
            w = p.width
            mud, sdd = st.stacked_moments(st._X[:, : st.n])              # (B, n) at the evaluated inputs
            lowest = np.minimum(np.min(mu - w * sd, axis=-1), np.min(mud - w * sdd, axis=-1))
            self.values["stop_gap"][:, i] = mud[at, r] + w * sdd[at, r] - lowest
        if want["stop_chance"] and not self.settled.all():
            chance = self.values["stop_chance"][:, i]
            lower, upper = _pair_bounds(st, r, md, mu, sd, p.target)
            for b in np.flatnonzero(~self.settled):
                if upper[b] < p.lowest_chance:       # below every rule's chance: none stops, no draws needed
                    chance[b] = upper[b]
                elif lower[b] >= p.highest_chance:   # above every rule's chance: all stop, no draws needed
                    chance[b] = lower[b]
                else:                                # undecided: the draws' lower bound, or the exact one
                    chance[b] = max(lower[b], self._chance(st, b, int(r[b]), mu[b], sd[b]))
            # once every confident rule has stopped a campaign nothing later can change a stopping
            # time: the rest of its column stays NaN and costs nothing
            if t >= p.settled_from:
                self.settled |= chance >= p.highest_chance

    def _chance(self, st, b: int, r: int, mu: np.ndarray, sd: np.ndarray) -> float:
        """A one-sided 95 % lower confidence bound on the belief's chance that the recommendation (row r)
        is within the target of the minimum over the pool and the evaluated inputs.

        Notes
        -----
        Pathwise posterior draws are counted in batches that double the count (16, 16, 32, 64, ...
        up to ``draws``): the draws in which the recommendation lies within the target of the draw's
        minimum (:meth:`_within`). Drawing stops as soon as no confident rule's ``chance`` lies
        inside the two-sided 90 % Clopper-Pearson interval of the share, i.e. once the draws can
        tell every rule whether to stop; far from every threshold (most trials) 16 or 32 draws do.
        The bound returned is the interval's lower end, ``Beta(0.05; k, S - k + 1)``. Comparing the
        point estimate with ``chance`` instead would stop at the first trial where Monte Carlo noise
        lifts it across, and the stopped campaigns would then be within target less often than
        ``chance`` (Wilson 2024 controls the same error with a test on the Monte Carlo estimate).

        The prior parts of the draws are made once per campaign (``draws`` of them) and each trial
        conditions them on its own data with fresh noise (``PathwiseDraws.draw_kept``): within a
        trial the draws are independent samples of that trial's belief, as the bound needs, while
        successive trials share their prior functions (common random numbers). A trial's Monte
        Carlo error is then not independent of the last one's, so chance crossings from noise alone
        are rarer than with fresh draws; the costly product ``Phi W`` is paid once per campaign
        instead of at every trial (the record about a third cheaper on the demo).
        """
        k = S = 0
        batch = min(_FIRST_BATCH, self.plan.draws)
        while True:
            k += self._within(st, b, r, mu, sd, slice(S, S + batch))
            S += batch
            low, high = _clopper_pearson(k, S)
            if S >= self.plan.draws or not any(low < c <= high for c in self.plan.chances):
                return low
            batch = min(S, self.plan.draws - S)

    def _within(self, st, b: int, r: int, mu: np.ndarray, sd: np.ndarray, draws: slice) -> int:
        """Of the posterior draws ``draws`` (columns of the campaign's kept prior draws, conditioned on the
        data now: ``PathwiseDraws.draw_kept``), how many put the recommendation (row r) within the target
        of the draw's minimum over the pool and the evaluated inputs (Wilson 2024, by Monte Carlo)."""
        rows = np.flatnonzero(mu - _SCREEN * sd <= np.min(mu + _SCREEN * sd))
        if 2 * len(rows) >= len(mu):      # most of the pool: every row costs less than copying the kept ones
            rows = np.arange(len(mu))
        if b not in self.draws:
            self.draws[b] = self.recorder.draws(st, b, self.replicates[b])
        G, GX = self.draws[b].draw_kept(st, b, self.rngs[b], draws, rows, total=self.plan.draws)   # (S, rows), (n, S)
        lowest = np.minimum(G.min(axis=1), GX.min(axis=0))
        return int(np.sum(GX[r] - lowest <= self.plan.target))

    def columns(self, b: int) -> dict[str, np.ndarray]:
        """Campaign b's record: column name -> (n,) array."""
        return {name: v[b] for name, v in self.values.items()}


def _clopper_pearson(k: int, n: int) -> tuple[float, float]:
    """One-sided 95 % bounds (the two-sided 90 % interval) of k successes in n: Clopper & Pearson (1934),
    ``Beta(0.05; k, n - k + 1)`` and ``Beta(0.95; k + 1, n - k)``, 0 and 1 at the ends (as
    simlab.evidence.intervals.share_interval, for one pair, without importing scipy.stats)."""
    low = float(special.betaincinv(k, n - k + 1, 0.05)) if k > 0 else 0.0
    high = float(special.betaincinv(k + 1, n - k, 0.95)) if k < n else 1.0
    return low, high


def _pair_bounds(st, r, md, mu, sd, target) -> tuple[np.ndarray, np.ndarray]:
    """Exact bounds on the chance from pairs, per replicate: ``(lower, upper)``, each (B,).

    With ``q_x = P(f(x) < f(rec) - target)`` for every pool point and evaluated input x (a normal
    probability of the posterior difference ``f(rec) - f(x)``: mean ``mu_rec - mu_x``, variance
    ``var_rec + var_x - 2 cov``), the chance lies between ``1 - sum_x q_x`` (Boole's inequality:
    the recommendation misses only if some x beats it by the target) and ``1 - max_x q_x`` (it
    misses whenever that x does). The covariances come from the kept factors: ``cov = k(rec, x) -
    v_rec . v_x`` with ``v_x`` a column of ``V = L^-1 K(X, pool)`` for the pool, and of ``L^-1 K(X, X)
    = L^T - s2 L^-1`` for the evaluated inputs. O(n m) per replicate, against O(m F S) for draws.
    """
    n, B = st.n, st.size
    at = np.arange(B)
    X, L, Li = st._X[:, :n], st._L[:, :n, :n], st._Li[:, :n, :n]
    kvar = st.kernel.variance
    xr = X[at, r][:, None, :]                                               # (B, 1, d)
    v = matvec(Li, st.kernel.stacked(X, xr)[:, :, 0])                       # L^-1 k(X, rec), (B, n)
    var_rec = np.maximum(kvar - rowdot(v, v), 0.0)[:, None]                 # (B, 1)
    mu_rec = md[at, r][:, None]
    # the pool
    cov = _pool_cov(st, r)                                                  # (B, m)
    q_pool = _beaten(mu_rec - target - mu, var_rec + sd * sd - 2.0 * cov, kvar)
    # the evaluated inputs: columns of L^-1 K(X, X), as rows of a contiguous array (last-axis sums)
    Vd = np.ascontiguousarray((L - st._s2()[:, None, None] * Li.transpose(0, 2, 1)))  # rows: (L^-1 K)^T
    cov_d = st.kernel.stacked(xr, X)[:, 0, :] - matvec(Vd, v)                        # (B, n)
    var_d = np.maximum(kvar - (Vd * Vd).sum(-1), 0.0)
    q_data = _beaten(mu_rec - target - md, var_rec + var_d - 2.0 * cov_d, kvar)
    lower = 1.0 - (q_pool.sum(-1) + q_data.sum(-1))
    upper = 1.0 - np.maximum(q_pool.max(-1), q_data.max(-1))
    return np.maximum(lower, 0.0), upper


def _pool_cov(st, r) -> np.ndarray:
    """Posterior covariance of each replicate's evaluated input ``r[b]`` with its pool, (B, m), from the kept
    factors alone.

    The recommendation is an evaluated input, so ``k(X, x_r) = (L L^T - s2 I) e_r`` and
    ``v = L^-1 k(X, x_r) = L^T e_r - s2 L^-1 e_r``, while ``k(x_r, pool) = e_r^T L V``; hence
    ``k(x_r, pool) - v^T V = s2 (L^-1 e_r)^T V``: one row of ``L^-1`` times the cached cross term, with no
    kernel evaluation over the pool and none of the cancellation of the difference (both terms near the
    prior variance where the belief knows the recommendation well). ``s2`` is the factor's own diagonal
    (noise, nugget and any raised jitter: ``Stack._s2``)."""
    n, at = st.n, np.arange(st.size)
    Li_r = st._Li[at, :n, r]                                                # column r of L^-1, (B, n)
    return st._s2()[:, None] * vecmat(Li_r, st._V[:, :n])


def _beaten(margin, var, kvar) -> np.ndarray:
    """``P(D > 0)`` for ``D ~ N(margin, var)``, elementwise; a difference the belief knows (almost)
    exactly (var below 1e-12 of the prior variance, where rounding decides its sign) counts as beaten
    only when its margin is positive."""
    with np.errstate(divide="ignore", invalid="ignore"):
        q = special.ndtr(margin / np.sqrt(np.maximum(var, 0.0)))
    return np.where(var > 1e-12 * kvar, q, (margin > 0).astype(float))


def _largest_ei(mu: np.ndarray, sd: np.ndarray, incumbent: np.ndarray) -> np.ndarray:
    """``max_x EI(x)`` per row, (B,), for minimisation below ``incumbent`` (B, 1).

    ``EI = (m - mu) Phi(z) + sd phi(z)``, ``z = (m - mu) / sd`` (Jones, Schonlau & Welch 1998);
    where sd = 0 it is ``max(m - mu, 0)``. Elementwise, then a maximum along the last axis, so a
    replicate's value does not depend on the block.
    """
    gain = incumbent - mu
    with np.errstate(divide="ignore", invalid="ignore"):
        z = gain / sd
        ei = gain * special.ndtr(z) + sd * _INV_SQRT_2PI * np.exp(-0.5 * z * z)
    ei = np.where(sd > 0, ei, np.maximum(gain, 0.0))
    return np.max(ei, axis=-1)
