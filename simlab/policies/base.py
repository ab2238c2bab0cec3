"""The policy interface: options, per-campaign context, and the pool-then-polish acquisition base."""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from ..lazy import special

from ..model.gp import Posterior, Stack
from ..model.optimize import distinct_best, polish, polish_block
from ..options import Option, WithOptions

__all__ = ["Option", "Context", "Block", "Policy", "Acquisition", "best_row"]


@dataclass
class Context:
    """What a policy may use during one campaign besides the posterior."""

    pool: np.ndarray            # (m, d) quasi-random candidate inputs on the unit cube
    rng: np.random.Generator    # the policy's own stream for this replicate
    sequence: np.ndarray        # (horizon, d) the replicate's Sobol' sequence (initial design prefix)
    horizon: int                # trials in the campaign
    posterior: Posterior
    library: bool = False       # the pool is a [candidates] library: every trial is one of its rows

    def block(self) -> "Block":
        """This campaign as a block of one (rules whose one-campaign path is their block code)."""
        return Block(rngs=[self.rng], sequences=self.sequence[None], horizon=self.horizon,
                     library=self.pool if self.library else None)


@dataclass
class Block:
    """What a policy may use when it chooses for a block of replicates in lockstep."""

    rngs: list[np.random.Generator]   # each replicate's own stream for this policy
    sequences: np.ndarray             # (B, horizon, d) each replicate's Sobol' sequence
    horizon: int                      # trials in each campaign
    library: np.ndarray | None = None  # (m, d) a [candidates] library's rows (every replicate's pool), or None

    def evaluated(self, st: Stack) -> np.ndarray:
        """Library mode: which rows each replicate's belief has observed, (B, m) bool (a trial is an
        exact copy of its row, so rows are matched by their bytes)."""
        index = getattr(self, "_index", None)
        if index is None:
            index = self._index = {np.ascontiguousarray(row).tobytes(): i for i, row in enumerate(self.library)}
        seen = np.zeros((st.size, len(self.library)), dtype=bool)
        for b in range(st.size):
            for x in st._X[b, : st.n]:
                i = index.get(np.ascontiguousarray(x).tobytes())
                if i is not None:
                    seen[b, i] = True
        return seen


class Policy(WithOptions):
    """Chooses the next trial. Subclasses set ``rule`` and implement :meth:`choose`.

    ``options`` declared on a class are merged with those of its bases, so a rule lists
    only its own settings. A rule that sets ``lockstep = True`` also implements
    :meth:`choose_block`, and its campaigns on a block of replicates then advance together
    (``simlab.replay.lockstep``) with results identical to replaying them one at a time.
    """

    rule: ClassVar[str] = ""
    description: ClassVar[str] = ""      # one line for the report: what the rule does
    options: ClassVar[dict[str, Option]] = {}
    lockstep: ClassVar[bool] = False
    # The rule honours ``feasible = "weight"`` ([[limit]]s and hidden failures): its score is weighted by the
    # belief's chance that an input respects every limit and works (simlab.model.feasible)
    weights_feasibility: ClassVar[bool] = False

    def __init__(self, label: str | None = None, **settings):
        self.label = label or self.rule
        self._set_options(settings)
        self.ctx: Context | None = None

    def weighted(self, post) -> bool:
        """The rule weighs the chance of feasibility (``feasible = "weight"`` in a study with limits)."""
        return getattr(self, "feasible", "ignore") == "weight" and post.feasible is not None

    def start(self, ctx: Context) -> None:
        """Called once before the first trial the policy chooses."""
        self.ctx = ctx

    def choose(self, post: Posterior, t: int) -> np.ndarray:  # pragma: no cover - abstract
        """The next input (d,) on the unit cube; t is the 0-based trial index."""
        raise NotImplementedError

    def choose_block(self, st: Stack, t: int, block: Block) -> np.ndarray:  # pragma: no cover - abstract
        """The next inputs (B, d) of a block of replicates advancing in lockstep."""
        raise NotImplementedError

    @property
    def horizon_aware(self) -> bool:
        """True when early choices depend on the budget (the runner then runs one campaign per budget)."""
        return False

    @classmethod
    def caution(cls, settings, study) -> str | None:
        """A sentence for the report when these settings make the rule a weak baseline, else None.

        Parameters
        ----------
        settings : dict
            The rule's resolved settings (``PolicySpec.options``: every option, defaults filled in).
        study : Study
            The whole study (the belief's amplitude, the other policies), for rules whose
            caution depends on them.

        The report prints the sentence under the policies table; the rule itself, not the
        report, knows which settings make it weak. Default: no caution.
        """
        return None

    def hold(self, post: Posterior, u) -> None:
        """Account for a trial chosen in this round whose result is not back yet.

        Non-adaptive rules ignore pending trials. Any change to ``post`` is undone by the
        campaign at the end of the round (inside ``post.fantasies()``).
        """

    def hold_block(self, st: Stack, U) -> None:
        """:meth:`hold` for a block of replicates in lockstep: each replicate's pending trial, U (B, d).

        The default holds what :meth:`_held_values` says each pending trial returned (nothing for
        non-adaptive rules). Undone at the end of the round, inside ``st.fantasies()``.
        """
        values = self._held_values(st, U)
        if values is not None:
            Stack.add(st, U, values)    # Stack's own add (B rows): a Posterior's takes one (d,) input

    def _held_values(self, st: Stack, U) -> np.ndarray | None:
        """What each replicate's pending trial at U (B, d) is taken to have returned, (B,); None: nothing held."""
        return None

    def release(self) -> None:
        """The round's results are in: forget pending trials."""


class Acquisition(Policy):
    """A rule that scores inputs: scored over the pool, the best few polished by L-BFGS-B.

    Subclasses implement :meth:`score` (larger is better), or :meth:`_from_moments` when
    the score is a function of the posterior mean and sd alone.

    Settings every acquisition has:

    - ``fill``: how a round of several trials (``[campaign] batch``) is filled before any
      result is back. ``believer``: pretend each pending trial returned the posterior mean
      (kriging believer); ``liar``: pretend it returned a constant ``lie`` (constant liar),
      both Ginsbourger, Le Riche & Carraro (2010), Kriging is well-suited to parallelize
      optimization; ``penalize``: keep the posterior and multiply the acquisition by
      local penalizers around pending trials, Gonzalez, Dai, Hennig & Lawrence (2016),
      Batch Bayesian optimization via local penalization, AISTATS; ``samples``: nothing
      to hold, because every choice is a fresh posterior sample (Thompson-type rules).
    - ``lie``: the constant for ``liar``: ``min``, ``mean`` or ``max`` of the observations
      so far (internal, minimising orientation: ``min`` is the optimistic lie).
    - ``exploit_last``: the final k trials of the campaign go to the lowest posterior mean
      (a switch to pure exploitation); k > 0 makes the policy horizon-aware.
    """

    options = {
        "fill": Option("believer", str, help="how a round of several trials is filled",
                       choices=("believer", "liar", "penalize", "samples")),
        "lie": Option("min", str, help="constant for fill = \"liar\"", choices=("min", "mean", "max")),
        "exploit_last": Option(0, int, 0, 100_000, "final trials spent on the lowest posterior mean"),
        "feasible": Option("ignore", str, help="with [[limit]]s or [world] fails_where: ignore them (the baseline), or "
                           "weight the score by the chance that an input respects every limit and works",
                           choices=("ignore", "weight"), always_written=False),
    }
    n_starts: ClassVar[int] = 4       # pool points polished by L-BFGS-B (0: take the best pool point)
    polish_iterations: ClassVar[int] = 30
    sd_floor: ClassVar[float] = 1e-9  # relative to the prior sd; keeps z finite at evaluated inputs
    log_score: ClassVar[bool] = False  # the score is the log of a positive quantity (log EI, log PI)
    positive_score: ClassVar[bool] = False  # the score is a positive quantity (an information gain): logged as is
    # The score is minus a bound on the objective (mu - width sd, or mu): weighted by feasibility, its utility is
    # the bound's improvement over the incumbent, max(best - bound, 0), a positive quantity whose largest value
    # is the bound's best input whenever one beats the incumbent (so unweighted, nothing changes)
    bound_score: ClassVar[bool] = False
    scores_anywhere: ClassVar[bool] = True  # False for rules that only score their own candidate sets
    # lockstep = True: the score is a function of the posterior mean and sd alone (set through
    # _from_moments, with per-trial state from prepare_block); choose() then runs the block
    # code on a block of one, so both paths share every operation.

    def __init__(self, label: str | None = None, **settings):
        super().__init__(label, **settings)
        self._pending: list[tuple[np.ndarray, float, float]] = []   # (x_j, mu_j, sd_j) for penalize
        self._held = 0                                               # trials held this round

    @property
    def horizon_aware(self) -> bool:
        return self.exploit_last > 0

    def prepare(self, post: Posterior) -> None:
        """Per-trial state (incumbent, function sample) computed before scoring."""

    def prepare_block(self, st: Stack) -> None:
        """Per-trial state for a block, shaped to broadcast against (B, m) scores."""

    def _keep_state(self, post: Posterior) -> None:
        """After a choice made as a block of one: leave the one-campaign state that
        :meth:`score` reads (the incumbent; the snapshot scores with it). Rules whose
        per-trial state is random override this to keep the block's state instead, since
        preparing again would draw from the stream a second time."""
        self.prepare(post)

    def _from_moments(self, mu, sd):  # pragma: no cover - abstract
        """Score and its partial derivatives with respect to mu and sd, each (q,)."""
        raise NotImplementedError

    def _value(self, mu, sd):
        """Score alone (no derivatives); override where that is cheaper."""
        return self._from_moments(mu, sd)[0]

    def _pool_values(self, mu, sd, k: int):
        """Scores over the pools (B, m) for choosing the k best per row.

        Only the k best of each row need to be right: a rule may return -inf for entries it
        has proved cannot be among them (see :class:`ExpectedImprovement`).
        """
        return self._value(mu, sd)

    def _floor(self, post, sd):
        return np.maximum(sd, self.sd_floor * post.kernel.amplitude)

    def score_pool(self, post: Posterior) -> np.ndarray:
        mu, sd = post.pool_moments()
        return self._value(mu, self._floor(post, sd))

    def score(self, post: Posterior, U, *, grad: bool = False):
        """Score at inputs U (q, d); with ``grad`` also the gradient (q, d)."""
        if not grad:
            mu, sd = post.moments(U)
            return self._value(mu, self._floor(post, sd))
        mu, sd, dmu, dsd = post.moments(U, grad=True)
        floored = sd < self.sd_floor * post.kernel.amplitude
        a, da_dmu, da_dsd = self._from_moments(mu, self._floor(post, sd))
        da_dsd = np.where(floored, 0.0, da_dsd)
        return a, da_dmu[:, None] * dmu + da_dsd[:, None] * dsd

    # ------------------------------------------------------------------ choosing
    zero_at_evaluated: ClassVar[bool] = False   # with zero noise the score is exactly 0 at an evaluated input

    def choose(self, post, t):
        weighted = self.weighted(post)
        if self.lockstep and not self._pending and not weighted:
            u = self.choose_block(post, t, self.ctx.block())[0]
            self._keep_state(post)
            return u
        if t >= self.ctx.horizon - self.exploit_last:
            return _lowest_mean(post, self.ctx.pool, self.n_starts, self.polish_iterations)
        self.prepare(post)
        if weighted and self.bound_score:
            self._bound_best = self._feasible_incumbent(post)
        pool = self.ctx.pool
        values = self._penalized(post, pool, self.score_pool(post), on_pool=True)
        if self.n_starts == 0:
            return pool[int(np.argmax(values))].copy()
        starts = pool[distinct_best(pool, -values, self.n_starts)]

        def neg(U):
            a, g = self._penalized(post, U, *self.score(post, U, grad=True))
            return -a, -g

        U, v = polish(neg, starts, maxiter=self.polish_iterations)
        return U[int(np.argmin(v))]

    def choose_block(self, st, t, block):
        if t >= block.horizon - self.exploit_last:
            return _lowest_mean_block(st, self.n_starts, self.polish_iterations)
        self.prepare_block(st)
        floor = self.sd_floor * st.kernel.amplitude
        mu, sd = st.stacked_pool_moments()
        m = mu.shape[-1]
        library = block.library is not None        # every row scored exactly: no pruning, no polish
        values = self._pool_values(mu, np.maximum(sd, floor), m if library else _candidates(self.n_starts, m))
        if library:
            return best_row(st, block, values, skip_evaluated=self.zero_at_evaluated)

        def neg(U):
            mu, sd, dmu, dsd = st.stacked_moments(U, grad=True)
            a, da_dmu, da_dsd = self._from_moments(mu, np.maximum(sd, floor))
            da_dsd = np.where(sd < floor, 0.0, da_dsd)
            return -a, -(da_dmu[..., None] * dmu + da_dsd[..., None] * dsd)

        return _best_polished(st.pools, values, neg, self.n_starts, self.polish_iterations)

    # ------------------------------------------------------------------ rounds of trials
    def hold(self, post, u):
        if self.fill != "penalize":      # believer, liar, samples: the block code on a block of one
            self.hold_block(post, np.asarray(u, dtype=float)[None])
            return
        if self._held == 0:
            self._penalty_state(post)
        self._held += 1
        mu, sd = post.moments(np.atleast_2d(u))
        self._pending.append((np.asarray(u, dtype=float), float(mu[0]), float(self._floor(post, sd)[0])))

    def _held_values(self, st, U):
        """Believer: each replicate's posterior mean at its pending input (from the stacked moments, as
        the choice reads them). Liar: a constant per replicate, the ``lie`` of that replicate's real
        observations, fixed at the round's first hold (the prior mean before any observation).
        Samples: nothing (every choice draws a fresh sample). Penalize keeps a list per campaign
        instead (:meth:`hold`; such campaigns run one at a time)."""
        first = self._held == 0
        self._held += 1
        if self.fill == "believer":
            return st.stacked_moments(np.asarray(U, dtype=float)[:, None, :])[0][:, 0]
        if self.fill == "liar":
            if first:  # the lie comes from real observations (no fantasy is held yet), fixed for the round
                n = st.n
                reduce = {"min": np.min, "mean": np.mean, "max": np.max}[self.lie]
                self._lie = reduce(st._y[:, :n], axis=-1) if n else np.full(st.size, st.mean)
            return self._lie
        return None

    def release(self):
        self._pending, self._held = [], 0

    def _penalty_state(self, post):
        """Lipschitz constant and minimum estimate for local penalization (Gonzalez et al. 2016).

        L is the largest norm of the posterior-mean gradient over the pool (unit-cube
        units); M is the lowest posterior mean over the pool and the evaluated inputs.
        """
        pool = self.ctx.pool
        mu, _, dmu, _ = post.moments(pool, grad=True)
        self._lipschitz = max(float(np.sqrt((dmu**2).sum(1)).max()), 1e-7 * post.kernel.amplitude)
        low = [mu.min()] + ([post.mean_at_data().min()] if post.n else [])
        self._minimum = float(min(low))

    # Set by a rule's prepare() when, weighting by feasibility, no evaluated input is believed feasible:
    # the score is then the chance of feasibility alone (Gelbart, Snoek & Adams 2014, section 3: search
    # for a feasible region first), as log P(feasible).
    _feasible_first = False

    def _feasible_incumbent(self, post) -> float:
        """The lowest posterior mean over evaluated inputs believed feasible (the set the recommendation comes
        from); sets ``_feasible_first`` when there is none (the rule then seeks feasibility alone)."""
        trusted = post.feasible.trusted(post.X) if post.n else np.zeros(0, dtype=bool)
        self._feasible_first = not trusted.any()
        return float(np.min(post.mean_at_data()[trusted])) if trusted.any() else post.mean

    def _penalized(self, post, U, values, grads=None, *, on_pool: bool = False):
        """Add log local penalizers of the pending trials to the (log-transformed) score, and, weighting
        by feasibility, log P(feasible) (Gardner et al. 2014, ICML, eq. 4: EI times the chance that
        the limits hold; the same product for every scoring rule, in logarithms).

        Notes
        -----
        For minimisation the penalizer of pending x_j is
        ``phi_j(x) = Phi((L ||x - x_j|| - mu_j + M) / sd_j)``: the probability that x lies
        outside the ball around x_j that cannot hold the minimum (Gonzalez et al. 2016,
        eq. 4, in minimisation form). Scores that are not already logarithms are first
        mapped through ``log(softplus(a))`` as in that paper; a ``positive_score`` (MES's
        information) through its own logarithm, with penalizers as with weighting.
        """
        weighted = self.weighted(post)
        if not self._pending and not weighted:
            return values if grads is None else (values, grads)
        U = np.atleast_2d(U)
        if weighted and self._feasible_first:
            total, g = np.zeros(len(U)), None if grads is None else np.zeros(U.shape)
        elif self.log_score:
            total, g = values.copy(), None if grads is None else grads.copy()
        elif weighted and self.bound_score:
            total, g = _log_positive(values + self._bound_best, grads)   # the bound's gain, best - bound
        elif self.positive_score:
            # a positive utility: its own logarithm (softplus would flatten an information gain of a few
            # hundredths of a nat to log 2)
            total, g = _log_positive(values, grads)
        else:
            sp = np.logaddexp(0.0, values)                      # softplus
            total = np.log(sp)
            if grads is not None:
                g = (1.0 / (1.0 + np.exp(-values)) / sp)[:, None] * grads
        for xj, mu_j, sd_j in self._pending:
            diff = U - xj
            dist = np.sqrt((diff**2).sum(1))
            z = (self._lipschitz * dist - mu_j + self._minimum) / sd_j
            total = total + special.log_ndtr(z)
            if grads is not None:
                ratio = np.exp(-0.5 * z * z - 0.5 * np.log(2 * np.pi) - special.log_ndtr(z))   # phi / Phi
                with np.errstate(invalid="ignore", divide="ignore"):
                    unit = np.where(dist[:, None] > 0, diff / dist[:, None], 0.0)
                g = g + (ratio * self._lipschitz / sd_j)[:, None] * unit
        if weighted:
            if grads is None:
                total = total + (post.feasible.pool_log_chance() if on_pool else post.feasible.log_chance(U))
            else:
                chance, dchance = post.feasible.log_chance(U, grad=True)
                total, g = total + chance, g + dchance
        return total if grads is None else (total, g)


def _log_positive(values, grads=None):
    """``log(a)`` of a positive score and its gradient ``grad a / a``, floored at 1e-300 where it underflows
    (there the gradient is 0)."""
    safe = np.maximum(values, 1e-300)
    if grads is None:
        return np.log(safe), None
    return np.log(safe), np.where((values > 1e-300)[:, None], grads / safe[:, None], 0.0)


def best_row(st: Stack, block: Block, values, *, skip_evaluated: bool = False) -> np.ndarray:
    """Library mode: per replicate, the row with the highest score (B, d): every row scored exactly,
    no polish.

    ``skip_evaluated``: with a noise-free belief, a rule whose score is exactly 0 at evaluated inputs
    (expected improvement: Jones, Schonlau & Welch 1998) gives those rows -inf, so the nugget's
    ~1e-5 sd there never outranks an unevaluated row; once every row is evaluated they compete again.
    """
    values = np.array(values, dtype=float)
    if skip_evaluated and st.noise == 0.0:
        seen = block.evaluated(st)
        values[seen & ~seen.all(axis=-1, keepdims=True)] = -np.inf
    return st.pools[np.arange(st.size), np.argmax(values, axis=-1)].copy()


def _lowest_mean(post: Posterior, pool, n_starts: int, iterations: int) -> np.ndarray:
    """The input with the lowest posterior mean: pool search, then L-BFGS-B polish."""
    mu, _ = post.pool_moments()
    if n_starts == 0:
        return pool[int(np.argmin(mu))].copy()
    starts = pool[distinct_best(pool, mu, n_starts)]

    def fg(U):
        m, _, dm, _ = post.moments(U, grad=True)
        return m, dm

    U, v = polish(fg, starts, maxiter=iterations)
    return U[int(np.argmin(v))]


def _lowest_mean_block(st: Stack, n_starts: int, iterations: int) -> np.ndarray:
    """Per replicate, the input with the lowest posterior mean: pool search, then polish."""
    mu, _ = st.stacked_pool_moments()

    def fg(U):
        m, _, dm, _ = st.stacked_moments(U, grad=True)
        return m, dm

    return _best_polished(st.pools, -mu, fg, n_starts, iterations)


def _best_polished(pools, values, neg, n_starts: int, iterations: int) -> np.ndarray:
    """Per replicate, the best pool point by ``values`` (B, m), or the best of the
    ``n_starts`` best distinct pool points after polishing ``neg`` (lower is better)."""
    rows = np.arange(pools.shape[0])
    if n_starts == 0:
        return pools[rows, np.argmax(values, axis=-1)].copy()
    starts = pools[rows[:, None], top_distinct(pools, values, n_starts)]
    U, v = polish_block(neg, starts, iterations=iterations)
    return U[rows, np.argmin(v, axis=-1)]


def _candidates(n_starts: int, m: int) -> int:
    """How many of the best pool points per replicate the choice looks at (see top_distinct)."""
    return 1 if n_starts == 0 else min(m, 4 * n_starts)


def top_distinct(pools, values, k: int, *, min_dist: float = 1e-6) -> np.ndarray:
    """Indices (B, k) of each replicate's k best pool points by ``values`` whose inputs differ.

    The same choice as :func:`simlab.model.optimize.distinct_best` made row by row, without
    sorting whole rows: candidates are the 4k best (``np.argpartition``), ordered by value
    and then index. A row with fewer than k distinct candidates repeats its best one.
    """
    B, m, _ = pools.shape
    kk = _candidates(k, m)
    part = np.argpartition(-values, kk - 1, axis=-1)[:, :kk] if kk < m else np.tile(np.arange(m), (B, 1))
    order = np.lexsort((part, -np.take_along_axis(values, part, -1)), axis=-1)
    cand = np.take_along_axis(part, order, -1)                          # (B, kk), best first
    X = pools[np.arange(B)[:, None], cand]                              # (B, kk, d)
    chosen = np.repeat(cand[:, :1], k, axis=1)
    taken = np.full((B, k) + X.shape[2:], np.inf)
    taken[:, 0] = X[:, 0]
    count = np.ones(B, dtype=int)
    for j in range(1, kk):
        far = (np.abs(X[:, j, None, :] - taken).max(-1) > min_dist).all(-1)
        ok = far & (count < k)
        chosen[ok, count[ok]] = cand[ok, j]
        taken[ok, count[ok]] = X[ok, j]
        count[ok] += 1
    return chosen
