"""Observation models: how a trial's result departs from the world's true value.

A noise shape (one small class each, in :data:`NOISE_SHAPES`) draws the unit-variance shocks;
`Observer` scales them by the noise sd (which may grow with the response) and loses trials.
A shape declares its study-file name (``[world] noise_kind``), its settings (``options``,
validated by the study reader), a one-line description for the report, and its one method,
:meth:`NoiseShape.shocks`. Adding a shape is one class here and one line in NOISE_SHAPES.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from ..options import Option

__all__ = ["NoiseShape", "GaussianNoise", "StudentNoise", "NOISE_SHAPES", "Observer"]


class NoiseShape:
    """The distribution of a trial's shock, rescaled to mean 0 and variance 1."""

    name: ClassVar[str] = ""
    options: ClassVar[dict[str, Option]] = {}

    def __init__(self, **settings):
        self.settings = {key: settings.get(key, opt.default) for key, opt in self.options.items()}

    def describe(self, sd: str) -> str:
        """The noise in words for the report, given its sd as text."""
        raise NotImplementedError

    def shocks(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """n independent unit-variance shocks from `rng`."""
        raise NotImplementedError


class GaussianNoise(NoiseShape):
    name = "gaussian"

    def describe(self, sd):
        return f"Gaussian noise of sd {sd}"

    def shocks(self, rng, n):
        return rng.standard_normal(n)


class StudentNoise(NoiseShape):
    """Student-t variates with df > 2 rescaled to unit variance (``t * sqrt((df - 2) / df)``), so the sd
    keeps its meaning and only the tails get heavier."""

    name = "student"
    options = {"noise_df": Option(5.0, float, 2.0, 1e6, "degrees of freedom (heavier tails when smaller)",
                                  low_open=True)}

    def describe(self, sd):
        df = self.settings["noise_df"]
        return f"Student-t noise ({df:g} degrees of freedom, heavier tails) scaled to sd {sd}"

    def shocks(self, rng, n):
        df = self.settings["noise_df"]
        return rng.standard_t(df, size=n) * np.sqrt((df - 2.0) / df)


NOISE_SHAPES: dict[str, type[NoiseShape]] = {c.name: c for c in (GaussianNoise, StudentNoise)}


@dataclass(frozen=True)
class Observer:
    """Turns a true value into an observation, or into nothing when the trial is lost.

    Parameters
    ----------
    sd : float
        Noise standard deviation at the reference level (objective units).
    kind : str
        A key of :data:`NOISE_SHAPES` (the study file's ``noise_kind``).
    settings : tuple of (name, value)
        The shape's settings (its ``options``), e.g. ``(("noise_df", 4.0),)``.
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
    settings: tuple[tuple[str, Any], ...] = ()
    growth: float = 0.0
    center: float = 0.0
    scale: float = 1.0
    lost: float = 0.0
    sign: float = 1.0

    @property
    def shape(self) -> NoiseShape:
        return NOISE_SHAPES[self.kind](**dict(self.settings))

    def draw(self, rng: np.random.Generator, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Unit-variance shocks and lost-trial flags for n trials (shared by all policies)."""
        shocks = self.shape.shocks(rng, n)
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
