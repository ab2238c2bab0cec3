"""Observation models: how a trial's result departs from the world's true value."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Observer"]


@dataclass(frozen=True)
class Observer:
    """Turns a true value into an observation, or into nothing when the trial is lost.

    Parameters
    ----------
    sd : float
        Noise standard deviation at the reference level (objective units).
    kind : {"gaussian", "student"}
        Shape of the noise. ``student`` draws Student-t variates with ``df`` > 2 degrees of
        freedom rescaled to unit variance (``t * sqrt((df - 2) / df)``), so ``sd`` keeps its
        meaning and only the tails get heavier.
    df : float
        Degrees of freedom for ``student``.
    growth : float
        Heteroscedasticity: the sd at a true value f (user orientation) is
        ``sd * exp(growth * (f - center) / scale)``, so noise grows with the response for
        growth > 0 (a log-linear variance model; 0 gives constant noise).
    center, scale : float
        Reference level and unit for ``growth`` (the prior mean and amplitude).
    lost : float
        Probability that a trial is lost: the budget is spent, nothing is observed.
    sign : float
        +1 or -1: internal value = sign * user value.
    """

    sd: float
    kind: str = "gaussian"
    df: float = 5.0
    growth: float = 0.0
    center: float = 0.0
    scale: float = 1.0
    lost: float = 0.0
    sign: float = 1.0

    def draw(self, rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Unit-variance shocks and lost-trial flags for n trials (shared by all policies)."""
        if self.kind == "student":
            shocks = rng.standard_t(self.df, size=n) * np.sqrt((self.df - 2.0) / self.df)
        else:
            shocks = rng.standard_normal(n)
        lost = rng.random(n) < self.lost
        return shocks, lost

    def sd_at(self, f_internal):
        """Noise sd at true values given in the internal orientation."""
        if self.growth == 0.0:
            return np.full_like(np.asarray(f_internal, dtype=float), self.sd)
        f_user = self.sign * np.asarray(f_internal, dtype=float)
        return self.sd * np.exp(self.growth * (f_user - self.center) / self.scale)

    def __call__(self, f_internal: float, shock: float, lost: bool) -> float:
        """The observation (internal orientation), NaN when the trial is lost."""
        if lost:
            return float("nan")
        return float(self.many(np.array([f_internal]), np.array([shock]), np.array([lost]))[0])

    def many(self, f_internal, shocks, lost) -> np.ndarray:
        """Observations of several trials at once (arrays of equal shape); the elementwise
        arithmetic of one trial, so a block of replicates observes what each would alone."""
        f_internal = np.asarray(f_internal, dtype=float)
        return np.where(lost, np.nan, f_internal + self.sd_at(f_internal) * shocks)
