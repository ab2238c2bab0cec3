"""What a study is, once read: frozen dataclasses in the user's units, and the error a mistake in a
study file raises. Everything downstream takes a `Study`; only spec.py makes one."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

GOALS = ("minimize", "maximize")
DESIGNS = ("sobol", "lhs", "random")
# A study name becomes a folder name: most file systems allow 255 bytes, and the folder's
# own files add their names below it; 100 leaves room and is plenty for a person to read.
NAME_LENGTH = 100
UNITS_LENGTH = 20    # [study] units: a short label such as "MPa" or "g/L"
# The most replicates a study may ask for, in the study file and with --replicates alike.
MAX_REPLICATES = 10_000_000


class StudyError(ValueError):
    """A mistake in a study file: carries the file, the field and what is allowed."""

    def __init__(self, file: str, field: str, message: str):
        self.file, self.field, self.message = file, field, message
        super().__init__(f"{file}: {field}: {message}" if field else f"{file}: {message}")


@dataclass(frozen=True)
class Space:
    """The box of inputs in the user's units; maps to and from the unit cube."""

    names: tuple[str, ...]
    low: tuple[float, ...]
    high: tuple[float, ...]

    @property
    def dim(self) -> int:
        return len(self.names)

    @property
    def width(self) -> np.ndarray:
        return np.asarray(self.high) - np.asarray(self.low)

    def to_unit(self, x: np.ndarray) -> np.ndarray:
        """User units (..., d) -> unit cube (..., d)."""
        return (np.asarray(x, dtype=float) - np.asarray(self.low)) / self.width

    def from_unit(self, u: np.ndarray) -> np.ndarray:
        """Unit cube (..., d) -> user units (..., d)."""
        return np.asarray(self.low) + np.asarray(u, dtype=float) * self.width


@dataclass(frozen=True)
class Prior:
    """A Gaussian-process prior in the user's units and orientation."""

    kernel: str
    lengthscale: tuple[float, ...]
    amplitude: float
    mean: float
    noise: float


@dataclass(frozen=True)
class WorldSpec:
    """How each replicate's true objective is made."""

    prior: Prior | None          # None when `function` names a published test function
    function: str | None
    noise: float
    method: str = "features"     # a key of simlab.worlds.kinds.WORLD_KINDS
    method_settings: tuple[tuple[str, Any], ...] = ()   # every kind's settings, resolved (e.g. features, grid)
    lengthscale_within: float = 1.0  # each replicate draws lengthscales log-normally: 95 % within this factor
    amplitude_within: float = 1.0    # likewise for the amplitude (1.0: known exactly)
    noise_kind: str = "gaussian"     # a key of simlab.worlds.noise.NOISE_SHAPES
    noise_settings: tuple[tuple[str, Any], ...] = ()   # that shape's settings, defaults filled in
    noise_growth: float = 0.0        # sd = noise * exp(growth * (f - mean) / amplitude)
    lost: float = 0.0                # probability that a trial is lost


@dataclass(frozen=True)
class HistorySpec:
    """Trials already run: campaigns start from them and worlds are conditioned on them."""

    file: str = field(compare=False)      # path as resolved when the study was read
    response: str                         # column holding the observed response
    X: tuple[tuple[float, ...], ...]      # inputs in user units, one tuple per row
    y: tuple[float, ...]                  # observed responses in the user's orientation

    @property
    def size(self) -> int:
        return len(self.y)


@dataclass(frozen=True)
class SweepSpec:
    """Belief misspecification grid: factors applied to the belief's lengthscales and amplitude."""

    lengthscale: tuple[float, ...] = (0.25, 0.5, 1.0, 2.0, 4.0)
    amplitude: tuple[float, ...] = (0.25, 0.5, 1.0, 2.0, 4.0)
    replicates: int = 50


@dataclass(frozen=True)
class CampaignSpec:
    initial: int
    design: str
    budgets: tuple[int, ...]
    pool: int = 2048
    batch: int = 1               # trials per round, chosen before any result of the round is back

    @property
    def horizon(self) -> int:
        """The largest budget: every campaign runs this many trials."""
        return max(self.budgets)


@dataclass(frozen=True)
class PolicySpec:
    rule: str
    label: str
    settings: tuple[tuple[str, Any], ...] = ()

    @property
    def options(self) -> dict[str, Any]:
        return dict(self.settings)


@dataclass(frozen=True)
class Study:
    name: str
    goal: str
    replicates: int
    seed: int
    space: Space
    world: WorldSpec
    belief: Prior
    campaign: CampaignSpec
    target: float                # regret tolerance, objective units
    policies: tuple[PolicySpec, ...]
    sweep: SweepSpec = SweepSpec()
    history: HistorySpec | None = None
    refit_every: int = 0         # [belief] refit_every: refit the belief by maximum likelihood every k trials
    difference: float | None = None  # [target] difference, objective units; None: target / 10
    units: str = ""              # [study] units: the objective's unit for the report ("" : "objective units")
    source: str = field(default="<study>", compare=False)

    @property
    def lead_difference(self) -> float:
        """Smallest median paired regret difference that matters (``[target] difference``)."""
        return self.target / 10.0 if self.difference is None else self.difference

    @property
    def sign(self) -> float:
        """+1 for minimise, -1 for maximise: internal value = sign * user value."""
        return 1.0 if self.goal == "minimize" else -1.0

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(p.label for p in self.policies)

    def with_replicates(self, replicates: int) -> "Study":
        """The study with another replicate count (``--replicates``), capped as in the study file."""
        if (isinstance(replicates, bool) or not isinstance(replicates, int)
                or not 1 <= replicates <= MAX_REPLICATES):
            raise StudyError(self.source, "--replicates", f"must be between 1 and {MAX_REPLICATES}; got {replicates!r}")
        return dataclasses.replace(self, replicates=replicates)
