"""Lockstep replicates: one policy's campaigns on a block of replicates, advanced together.

The one-screen loop, for a block of B replicates sharing a policy and a budget::

    for each round (``[campaign] batch`` trials; the last may be shorter):
        choose   each trial's xs (B, d): initial design, or policy.choose_block(stack, t, block);
                 inside stack.fantasies() every pending trial but the round's last is held
                 (policy.hold_block), then policy.release()
      for each trial t of the round, in order:
        evaluate f  (B,)     every replicate's own world at its own input
        observe  y  (B,)     the replicate's shared noise draw for trial t
        update   stack.add(xs, y)      one row of every factor, one product per block
        record   argmin of the posterior mean at the data, per replicate
                 (and what the study's stopping rules read, when it has some: simlab.stopping.record)

Python's overhead (a few hundred function calls per trial) is paid once per block rather
than once per campaign. Every operation works slice by slice (``simlab.model.gp.matvec`` and
friends), so each campaign's trace has the same bits as :func:`simlab.replay.campaign.run_campaign`
gives it alone; ``tests/unit/test_lockstep.py`` compares them.

Campaigns run in lockstep when the rule declares ``lockstep = True`` and every campaign of
the block stays the same length at every step: no lost trials and no belief refits (rounds of
several trials hold the same number of pending trials in every replicate). Other campaigns are
replayed one at a time. Spaces with stepped or categorical inputs and [candidates] libraries
run in lockstep too (a library's rows are every replicate's
pool, scored exactly and never polished: ``Block.library``).

Which rules: random, sobol, mean, lcb, gp-ucb, pi, ei (rules of the posterior moments),
thompson, pbest and mes (posterior samples: each replicate draws its own weights, noise and
minima from its own stream, in the order the one-campaign path draws them), kg (each
replicate's discrete set; the exact envelope is still computed replicate by replicate) and
hedge (its members are lockstep rules; each replicate picks a member from its own stream).
Every one of them makes its one-campaign choice by running its block code on a block of
one, and polishes with :func:`~simlab.model.optimize.polish_block`, so the two paths share
every operation. The snapshot's ``score`` after a choice reads the state kept from it
(``Acquisition._keep_state``), never a second draw. In a round, pending trials are held the
same way: ``Policy.hold_block`` (believer: each replicate's posterior mean at its pending
input, from the stacked moments; liar: a constant per replicate from its real observations;
samples: nothing; hedge: each replicate's trial held by the member that chose it), and the
one-campaign ``hold`` is that code on a block of one.

Still one campaign at a time, and why:

- rounds filled by local penalization (``fill = "penalize"`` with ``[campaign] batch`` > 1): the
  rule keeps a list of pending inputs and a Lipschitz state per campaign and scores through
  the one-campaign ``_penalized`` (``fits_lockstep`` reads the policy's ``fill``).
- lost trials (``[world] lost`` > 0): the belief skips a row, so replicates of one block would
  hold different numbers of rows; :class:`~simlab.model.gp.Stack` keeps one ``n`` for the
  block (a row count per replicate would lift this).
- belief refits (``[belief] refit_every``): each replicate gets its own kernel mid-campaign,
  and a Stack shares one kernel.

Why two loops and not one: the one-campaign loop (campaign.py) serves those cases. Both
start from the same past trials and buffers (trace.py) and call the same arithmetic, so a
campaign has the same bits on either path.
"""

from __future__ import annotations

import numpy as np

from ..model.belief import Belief
from ..model.gp import Stack
from ..worlds.noise import Observer
from ..policies import Policy
from ..policies.base import Block
from ..worlds.draws import WorldBlock
from .trace import Trace, allocate, fill_round, past_trials

__all__ = ["run_block", "fits_lockstep"]


def fits_lockstep(policy: Policy, belief: Belief, *, batch: int, lost: float) -> bool:
    """Whether campaigns of this policy can advance in lockstep.

    Rounds (``batch`` > 1) do, except with ``fill = "penalize"``, whose pending trials and
    Lipschitz state are kept per campaign (``Acquisition.hold``).
    """
    rounds = batch == 1 or getattr(policy, "fill", None) != "penalize"
    return policy.lockstep and rounds and belief.refit_every == 0 and lost == 0.0


def run_block(policy: Policy, belief: Belief, reps, *, observer: Observer, budget: int, rngs,
              batch: int = 1, history: tuple[np.ndarray, np.ndarray] | None = None, snap=None,
              library: bool = False, stop=None) -> list[Trace]:
    """Replay one policy on a block of replicates in lockstep.

    Parameters
    ----------
    policy : Policy
        A fresh policy whose class sets ``lockstep = True``.
    reps : list of simlab.worlds.replicate.Replicate
        The block's replicates (world, design, Sobol' sequence, noise draws, pool).
    observer : Observer
        The study's observation model.
    budget : int
        New trials in each campaign.
    rngs : list of numpy.random.Generator
        Each replicate's own stream for this policy.
    batch : int
        Trials per round: every trial of a round is chosen (pending ones held as fantasies,
        ``Policy.hold_block``) before any result is back, as in ``run_campaign``.
    history : (ndarray (h, d), ndarray (h,)), optional
        Past trials shared by every replicate (first in every trace).
    snap : callable, optional
        Moves chosen inputs to allowed values (``Space.snap``), as in ``run_campaign``.
    library : bool
        The pools are a [candidates] library's rows (the same in every replicate): rules score every
        row and choose one (``Block.library``), and a trial off the library is refused.
    stop : callable, optional
        ``stop(st, h=, n=)`` starts the record of what stopping rules read after each trial
        (``simlab.stopping.StopRecorder.begin`` bound to the block's replicates), as in ``run_campaign``.

    Returns
    -------
    list of Trace
        One per replicate, identical to what ``run_campaign`` returns for it.
    """
    B, d = len(reps), reps[0].pool.shape[1]
    H, yH = past_trials(history, d)
    h, n = len(yH), len(yH) + budget
    st = Stack(belief.kernel, belief.mean, belief.noise, pools=np.stack([r.pool for r in reps]),
               capacity=n + batch)                          # room for a round's fantasies
    block = Block(rngs=list(rngs), sequences=np.stack([r.sequence for r in reps]), horizon=budget,
                  library=reps[0].pool if library else None)
    design = np.stack([r.design for r in reps])
    shocks, lost = np.stack([r.shocks for r in reps]), np.stack([r.lost for r in reps])
    worlds = WorldBlock([r.world for r in reps])
    U, y, f, rec = allocate(n, d, B)
    rows = {np.ascontiguousarray(r).tobytes() for r in reps[0].pool} if library else None
    log = stop(st, h=h, n=n) if stop is not None else None
    try:
        for i in range(h):                                        # past trials, already observed
            U[:, i], y[:, i] = H[i], yH[i]
            f[:, i] = worlds(U[:, i])
            st.add(U[:, i], y[:, i])
            rec[:, i] = np.argmin(st.means_at_data(), axis=-1)
        for start in range(0, budget, batch):                     # one round of up to `batch` trials
            ts = range(start, min(start + batch, budget))
            chosen = _fill_round(policy, st, ts, design, block, snap)                              # choose
            for t, Ut in zip(ts, chosen):
                i = h + t
                U[:, i] = Ut
                if library and not all(np.ascontiguousarray(u).tobytes() in rows for u in U[:, i]):
                    raise RuntimeError(f"policy {policy.label!r} chose an input that is not a row of the library")
                f[:, i] = worlds(U[:, i])                                                          # evaluate
                y[:, i] = observer.many(f[:, i], shocks[:, t], lost[:, t])                        # observe
                st.add(U[:, i], y[:, i])                                                           # update
                rec[:, i] = np.argmin(st.means_at_data(), axis=-1)                                 # record
                if log is not None:
                    log.after(st, i)
    finally:
        st.release()
    return [Trace(U=U[b], y=y[b], f=f[b], rec=rec[b], stats=log.columns(b) if log is not None else {})
            for b in range(B)]


def _fill_round(policy: Policy, st: Stack, ts: range, design: np.ndarray, block: Block, snap=None) -> list[np.ndarray]:
    """Choose every trial of a round for the whole block, (B, d) each, before any result is back
    (:func:`~.trace.fill_round`, as ``campaign._fill_round``: the same order of choices, holds and release)."""
    def pick(t):
        U = np.asarray(design[:, t] if t < design.shape[1] else policy.choose_block(st, t, block), dtype=float)
        return U if snap is None else snap(U)

    return fill_round(policy, st, ts, pick, policy.hold_block)
