"""Rules whose behaviour changes with the campaign: the GP-UCB width schedule and the GP-Hedge portfolio."""

from __future__ import annotations

import numpy as np

from ..model.gp import Stack
from .base import Acquisition, Option, Policy
from .classic import ConfidenceBound, ExpectedImprovement, ProbabilityOfImprovement

__all__ = ["GPUCB", "GPHedge", "gp_ucb_beta"]


def gp_ucb_beta(t, size: int, delta: float):
    """Srinivas et al.'s finite-domain schedule ``beta_t = 2 log(|D| t^2 pi^2 / (6 delta))``.

    Parameters
    ----------
    t : int or ndarray
        1-based round: the observation about to be made.
    size : int
        Number of inputs |D| in the finite domain.
    delta : float
        The bound holds for every round with probability at least 1 - delta (0 < delta < 1).

    References
    ----------
    Srinivas, Krause, Kakade & Seeger (2010), Gaussian Process Optimization in the Bandit
    Setting: No Regret and Experimental Design, ICML, Theorem 1.
    """
    t = np.asarray(t, dtype=float)
    return 2.0 * np.log(size * t * t * np.pi**2 / (6.0 * delta))


class GPUCB(Acquisition):
    """Confidence bound ``mu - sqrt(beta_t) sd`` with the GP-UCB schedule (minimisation form).

    Notes
    -----
    ``beta_t = 2 log(|D| t^2 pi^2 / (6 delta))`` (:func:`gp_ucb_beta`) with |D| the candidate
    pool size and ``t = n + 1``, n the observations the posterior holds (past trials, the
    initial design and earlier trials alike). That is the paper's convention: round t chooses
    ``x_t`` from the posterior after t - 1 observations, so the first choice from the prior has
    t = 1 (inside a round of several trials, held pending trials count as observations). The
    schedule is the one for a finite domain, Theorem 1; the pool stands in for it
    although polishing may leave the pool (the compact-domain schedule of Theorem 2 needs
    Lipschitz constants a study does not state). Widths from the theory are conservative in
    practice (common practice); here they are used as written, so the rule explores more
    than a fixed width of 2 (``lcb``) would: for a pool of
    2048 and delta = 0.1, ``sqrt(beta)`` grows from 5.2 at t = 5 to 5.9 at t = 30.

    References
    ----------
    Srinivas, Krause, Kakade & Seeger (2010), Gaussian Process Optimization in the Bandit
    Setting: No Regret and Experimental Design, ICML.
    """

    rule = "gp-ucb"
    description = "confidence bound with the GP-UCB width schedule"
    options = {"delta": Option(0.1, float, 1e-12, 0.999, "failure probability of the confidence bound")}
    lockstep = True
    weights_feasibility = bound_score = True

    def prepare(self, post):
        self.beta = float(gp_ucb_beta(post.n + 1, len(self.ctx.pool), self.delta))
        self.width = np.sqrt(self.beta)

    def prepare_block(self, st):
        # every replicate of a block holds the same number of observations
        self.beta = float(gp_ucb_beta(st.n + 1, st.pools.shape[1], self.delta))
        self.width = np.sqrt(self.beta)

    def _from_moments(self, mu, sd):
        return -(mu - self.width * sd), -np.ones_like(mu), np.full_like(sd, self.width)


class GPHedge(Policy):
    """A portfolio of EI, PI and the confidence bound that follows the member with the best past nominees.

    Every trial each member nominates the input it would choose; the portfolio picks member j
    with probability ``p_j = exp(eta g_j) / sum_l exp(eta g_l)``. Once the trial's outcome is
    in the posterior, every member's gain grows by the (negated) posterior mean at its own
    nominee: ``g_j <- g_j - mu_{t}(x_j)``, so members whose nominees now look good gain most.

    Notes
    -----
    Hoffman, Brochu & de Freitas (2011), the GP-Hedge algorithm, written for maximisation with
    reward ``mu_t(x_j)``; simlab minimises, so the reward is ``-mu_t(x_j)`` (in a study that
    maximises, exactly the user's posterior mean). The reward is collected at the start of the
    next round's first :meth:`choose`, when the posterior includes the trial; if no
    observation was added (a lost trial), it waits for the next one. In a round of several
    trials each choice is rewarded once the round's results are in, and pending trials are
    filled in by the member that chose them (:meth:`hold`). Gains are in objective units, so ``eta`` is per unit of the
    objective: a difference of ``1 / eta`` between two members' summed rewards multiplies
    the odds between them by e. Members use their default settings (EI and
    PI without margin, confidence bound of width 2), as the paper's portfolio uses its
    members' standard forms.

    References
    ----------
    Hoffman, Brochu & de Freitas (2011), Portfolio Allocation for Bayesian Optimization, UAI.
    """

    rule = "hedge"
    description = "portfolio of EI, PI and the confidence bound, weighted by past gains"
    options = {"eta": Option(1.0, float, 0.0, 1e6, "learning rate of the softmax over gains, per objective unit"),
               "feasible": Acquisition.options["feasible"]}   # passed to every member

    lockstep = True   # the members are lockstep rules; the one-campaign path is a block of one
    weights_feasibility = True

    def start(self, ctx):
        super().start(ctx)
        self._begin(1)
        for m in self.members:
            m.start(ctx)

    def _begin(self, size: int) -> None:
        """Fresh members and zero gains for a block of ``size`` campaigns."""
        self.members = tuple(m(feasible=self.feasible) for m in (ExpectedImprovement, ProbabilityOfImprovement,
                                                                 ConfidenceBound))
        self.gains = np.zeros((size, len(self.members)))
        self.nominees: list[np.ndarray] = []   # (B, members, d) per choice whose reward is pending
        self.picked: np.ndarray | None = None  # (B,) member chosen for each campaign
        self._n_seen = -1                      # observations when those choices were made
        self._holding = False                  # inside a round, with pending trials held
        self._chose_last = False               # the latest trial was chosen here (not the design)

    def probabilities(self) -> np.ndarray:
        """``exp(eta g) / sum exp(eta g)`` over the members (computed shift-invariantly), per campaign (B, members)."""
        e = self.eta * self.gains
        w = np.exp(e - e.max(-1, keepdims=True))
        return w / w.sum(-1, keepdims=True)

    def pick(self, rngs) -> np.ndarray:
        """Index of the member whose nominee is run, per campaign, each drawn from its own stream."""
        p = self.probabilities()
        return np.array([int(rng.choice(len(self.members), p=pb)) for rng, pb in zip(rngs, p)])

    def collect(self, st) -> None:
        """Add each member's rewards ``-mu(nominee)`` once the beliefs hold new observations."""
        if self.nominees and st.n > self._n_seen:
            k, M = len(self.nominees), len(self.members)
            mu, _ = st.stacked_moments(np.concatenate(self.nominees, axis=1))     # (B, k M)
            self.gains -= mu.reshape(st.size, k, M).sum(1)
            self.nominees = []

    def choose(self, post, t):
        return self.choose_block(post, t, self.ctx.block())[0]

    def _ready(self, size: int) -> None:
        """Members and gains for a block of ``size`` campaigns (a block starts them at its first choice or hold)."""
        if getattr(self, "gains", None) is None or len(self.gains) != size:
            self._begin(size)

    def choose_block(self, st, t, block):
        self._ready(st.size)
        if not self._holding:            # first choice of a round: the last round's results are in
            self.collect(st)
            self._n_seen = st.n
        if self.weighted(st):            # one campaign, its members weighted
            nominees = np.stack([m.choose(st, t) for m in self.members])[None]
        else:
            nominees = np.stack([m.choose_block(st, t, block) for m in self.members], axis=1)   # (B, M, d)
        self.picked = self.pick(block.rngs)
        self._chose_last = True
        self.nominees.append(nominees)
        return nominees[np.arange(st.size), self.picked].copy()

    def hold(self, post, u):
        """A round of several trials: the member that chose the pending trial fills it in its
        own way (by default the kriging believer), so every member sees it before nominating
        again; a trial the portfolio did not choose (initial design) is held by EI's. The block
        code on a block of one (:meth:`hold_block`)."""
        self.hold_block(post, np.asarray(u, dtype=float)[None])

    def hold_block(self, st, U):
        """:meth:`hold` for a block: each replicate's pending trial is filled by the member that chose it
        for that replicate (members may differ between replicates), all rows added in one update.

        Each member computes its held values over the whole block and the replicates it chose for
        take theirs. That is exact because the members fill as kriging believers (their default:
        the portfolio passes them no ``fill``), whose value at a replicate is its posterior mean
        there, per slice, whatever the other replicates hold; a fill with per-round state (liar's
        constant, fixed at the member's first hold) would need that state per replicate.
        """
        self._ready(st.size)             # a round's first holds may be initial-design rows
        self._holding = True
        picked = self.picked if self._chose_last else np.zeros(st.size, dtype=int)
        self._chose_last = False
        values = np.empty(st.size)
        for j in np.unique(picked):
            held = self.members[j]._held_values(st, U)
            values[picked == j] = held[picked == j]
        Stack.add(st, U, values)    # Stack's own add (B rows): a Posterior's takes one (d,) input

    def release(self):
        self._holding = False
        for m in self.members:
            m.release()
