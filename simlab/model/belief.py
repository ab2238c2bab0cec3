"""`Belief`: the campaign's model of the objective before any trial (kernel, mean, noise, refits)."""

from __future__ import annotations

from dataclasses import dataclass

from .kernels import Kernel

__all__ = ["Belief"]


@dataclass(frozen=True)
class Belief:
    """The campaign's model, on the unit cube and in the internal (minimising) orientation.

    ``refit_every = k > 0`` refits the hyperparameters by maximum likelihood after every k
    new trials (at the end of the round that completes them), as a real team would.
    """

    kernel: Kernel
    mean: float
    noise: float
    refit_every: int = 0
