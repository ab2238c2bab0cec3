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


# The kinds of input a [space] may hold (DESIGN.md: step, level, library).
CONTINUOUS, LOG, STEPPED, CATEGORICAL = "continuous", "log", "stepped", "categorical"
INPUT_KINDS = (CONTINUOUS, LOG, STEPPED, CATEGORICAL)


@dataclass(frozen=True)
class Library:
    """A finite list of allowed trials (``[candidates] file``), one row per trial, in user values.

    ``rows`` hold a float for a numeric input and the level name (str) for a categorical one.
    ``dropped`` counts rows of the file that repeated an earlier row (warned about, not kept).
    """

    file: str = field(compare=False)            # path as resolved when the study was read
    rows: tuple[tuple[Any, ...], ...]
    dropped: tuple[int, ...] = field(default=(), compare=False)  # spreadsheet rows dropped as duplicates

    @property
    def size(self) -> int:
        return len(self.rows)


@dataclass(frozen=True)
class Space:
    """The inputs in the user's units, and their encoding on the unit cube.

    A box of reals gives only ``names``, ``low`` and ``high``; ``kinds``, ``steps`` and ``levels``
    stay empty (so such a study equals, dumps and hashes as before). Otherwise each input is one of
    `INPUT_KINDS`, and the unit-cube coordinate of input j is

    - continuous: ``(x - low) / (high - low)``;
    - log: ``(log x - log low) / (log high - log low)`` (the prior is stationary in ``log x``, and
      lengthscales are in natural-log units);
    - stepped: as continuous; values are rounded to ``low + k step`` (:meth:`round_unit`) inside
      the world and the belief (Garrido-Merchán & Hernández-Lobato 2020);
    - categorical: level ``i`` of ``L`` sits at ``(i + 0.5) / L``, and any coordinate in the
      cube reads as level ``floor(u L)`` (clipped), so uniform points give uniform levels. ``low``
      and ``high`` are 0 and L - 1 (level indices); the kernel handles these inputs by level
      (:mod:`simlab.model.levels`), with no lengthscale.

    ``library``: a finite list of allowed trials; its rows are points of this space.
    """

    names: tuple[str, ...]
    low: tuple[float, ...]
    high: tuple[float, ...]
    kinds: tuple[str, ...] = ()                    # per input, one of INPUT_KINDS; () = all continuous
    steps: tuple[float, ...] = ()                  # per input: a stepped input's step, 0.0 otherwise
    levels: tuple[tuple[str, ...], ...] = ()       # per input: a categorical input's levels, () otherwise
    library: Library | None = None

    def kind(self, j: int) -> str:
        return self.kinds[j] if self.kinds else CONTINUOUS

    @property
    def is_box(self) -> bool:
        """A box of reals: every input continuous and no library (the only space before issue 15)."""
        return not self.kinds and self.library is None

    @property
    def dim(self) -> int:
        return len(self.names)

    @property
    def numeric(self) -> tuple[int, ...]:
        """Indices of the inputs the continuous kernel sees (all but the categorical ones)."""
        return tuple(j for j in range(self.dim) if self.kind(j) != CATEGORICAL)

    @property
    def categorical(self) -> tuple[int, ...]:
        return tuple(j for j in range(self.dim) if self.kind(j) == CATEGORICAL)

    @property
    def discrete(self) -> tuple[int, ...]:
        """Indices of the inputs with a finite set of allowed values (stepped and categorical)."""
        return tuple(j for j in range(self.dim) if self.kind(j) in (STEPPED, CATEGORICAL))

    @property
    def width(self) -> np.ndarray:
        """Span of each numeric input in the units its lengthscale is given in, shape (len(numeric),):
        ``high - low``, or ``log(high / low)`` for a log input. Lengthscale / width is the
        lengthscale on the unit cube."""
        return np.array([np.log(self.high[j] / self.low[j]) if self.kind(j) == LOG else self.high[j] - self.low[j]
                         for j in self.numeric]) if self.kinds else np.asarray(self.high) - np.asarray(self.low)

    def to_unit(self, x: np.ndarray) -> np.ndarray:
        """User values (..., d) -> unit cube (..., d); a categorical input's column holds level indices."""
        x = np.asarray(x, dtype=float)
        if not self.kinds:
            return (x - np.asarray(self.low)) / (np.asarray(self.high) - np.asarray(self.low))
        u = np.empty_like(x)
        for j in range(self.dim):
            lo, hi, kind = self.low[j], self.high[j], self.kind(j)
            if kind == LOG:
                u[..., j] = (np.log(x[..., j]) - np.log(lo)) / np.log(hi / lo)
            elif kind == CATEGORICAL:
                u[..., j] = (x[..., j] + 0.5) / len(self.levels[j])
            else:
                u[..., j] = (x[..., j] - lo) / (hi - lo)
        return u

    def from_unit(self, u: np.ndarray) -> np.ndarray:
        """Unit cube (..., d) -> user values (..., d): stepped inputs on their grid, log inputs in
        natural units, categorical inputs as level indices (:meth:`level_names` gives the names)."""
        u = np.asarray(u, dtype=float)
        if not self.kinds:
            return np.asarray(self.low) + u * (np.asarray(self.high) - np.asarray(self.low))
        x = np.empty_like(u)
        r = self.round_unit(u)
        for j in range(self.dim):
            lo, hi, kind = self.low[j], self.high[j], self.kind(j)
            if kind == LOG:
                # clipped: exp(log) may land one ulp outside the bounds at the ends
                x[..., j] = np.clip(np.exp(np.log(lo) + r[..., j] * np.log(hi / lo)), lo, hi)
            elif kind == CATEGORICAL:
                x[..., j] = self.level_index(r[..., j], j)
            elif kind == STEPPED:
                # low + k * step from the integer k, so the value is exact (no drift from u * width)
                x[..., j] = lo + np.rint(r[..., j] * (hi - lo) / self.steps[j]) * self.steps[j]
            else:
                x[..., j] = lo + r[..., j] * (hi - lo)
        return x

    def level_index(self, u, j: int) -> np.ndarray:
        """The level (0 .. L-1) a unit coordinate of categorical input j reads as."""
        L = len(self.levels[j])
        return np.clip(np.floor(np.asarray(u, dtype=float) * L), 0, L - 1)

    def level_names(self, index, j: int) -> np.ndarray:
        """Level names (object array) of categorical input j from level indices."""
        return np.asarray(self.levels[j], dtype=object)[np.asarray(index, dtype=int)]

    def round_unit(self, u: np.ndarray) -> np.ndarray:
        """Unit coordinates moved to the nearest allowed value: stepped inputs to their grid,
        categorical inputs to their level's centre; continuous and log inputs unchanged.

        The world and the belief see only rounded inputs, so over a stepped input each is a
        step function of the continuous coordinate (Garrido-Merchán & Hernández-Lobato 2020).
        """
        u = np.array(u, dtype=float, copy=True)
        for j in range(self.dim):
            kind = self.kind(j)
            if kind == STEPPED:
                n = round((self.high[j] - self.low[j]) / self.steps[j])
                u[..., j] = np.rint(np.clip(u[..., j], 0.0, 1.0) * n) / n
            elif kind == CATEGORICAL:
                L = len(self.levels[j])
                u[..., j] = (self.level_index(u[..., j], j) + 0.5) / L
        return u

    def snap(self, u: np.ndarray) -> np.ndarray:
        """Uniform unit coordinates to allowed values, every allowed value equally likely.

        A stepped input with n + 1 values takes value ``floor(u (n + 1))`` (clipped to n), so a
        uniform draw gives each value probability 1 / (n + 1) (rounding to the nearest value would
        give the two ends half that); a categorical input takes its level's centre. Allowed values
        are left as they are, and continuous and log inputs are unchanged. Every trial a policy
        chooses passes through here before the world sees it.
        """
        if not self.discrete:
            return np.asarray(u, dtype=float)
        u = np.array(u, dtype=float, copy=True)
        for j in self.discrete:
            g = self.grid(j)
            k = np.clip(np.floor(np.clip(u[..., j], 0.0, 1.0) * len(g)), 0, len(g) - 1).astype(int)
            u[..., j] = g[k]
        return u

    def columns(self, u: np.ndarray) -> dict[str, np.ndarray]:
        """Unit-cube rows (n, d) as the user's columns: numbers, and level names (text) for categorical inputs."""
        X = self.from_unit(u)
        return {name: (self.level_names(X[:, j], j) if self.kind(j) == CATEGORICAL else X[:, j])
                for j, name in enumerate(self.names)}

    def user_matrix(self, frame) -> np.ndarray:
        """The inverse of :meth:`columns`: a table's input columns as a float matrix (n, d) of user
        values, a categorical column's level names read as level indices (unknown names raise)."""
        cols = []
        for j, name in enumerate(self.names):
            v = np.asarray(frame[name])
            if self.kind(j) == CATEGORICAL:
                index = {level: i for i, level in enumerate(self.levels[j])}
                try:
                    v = np.array([index[str(x)] for x in v], dtype=float)
                except KeyError as e:
                    raise ValueError(f"column {name!r} holds {e.args[0]!r}, which is not one of its levels "
                                     f"({', '.join(self.levels[j])})") from None
            cols.append(np.asarray(v, dtype=float))
        return np.stack(cols, axis=-1) if cols else np.empty((0, 0))

    def grid(self, j: int) -> np.ndarray:
        """The allowed unit coordinates of a stepped or categorical input j."""
        if self.kind(j) == STEPPED:
            n = round((self.high[j] - self.low[j]) / self.steps[j])
            return np.arange(n + 1) / n
        if self.kind(j) == CATEGORICAL:
            L = len(self.levels[j])
            return (np.arange(L) + 0.5) / L
        raise ValueError(f"input {self.names[j]!r} is {self.kind(j)}: it has no grid")

    def library_user(self) -> np.ndarray:
        """The library's rows as user values (n, d), a categorical input's level names as level indices."""
        if self.library is None:
            raise ValueError("this space has no library")
        return np.array([[self.levels[j].index(v) if self.kind(j) == CATEGORICAL else v
                          for j, v in enumerate(row)] for row in self.library.rows], dtype=float)

    def library_unit(self) -> np.ndarray:
        """The library's rows on the unit cube, shape (n, d)."""
        return self.to_unit(self.library_user())


@dataclass(frozen=True)
class Prior:
    """A Gaussian-process prior in the user's units and orientation."""

    kernel: str
    lengthscale: tuple[float, ...]     # one per numeric input (Space.numeric), in its units (log units if log)
    amplitude: float
    mean: float
    noise: float
    # One correlation between distinct levels per categorical input, in [space] order (exchangeable
    # correlation, Qian, Wu & Wu 2008); () when the space has no categorical input.
    level_correlation: tuple[float, ...] = ()


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
    fails_where: "FailSpec | None" = None   # hidden failures: where a latent world is in its top share


@dataclass(frozen=True)
class FailSpec:
    """``[world] fails_where``: a trial fails (spends the budget, returns nothing) where a latent world,
    drawn from a Matérn 5/2 prior of unit amplitude with these lengthscales, is in its top ``share``
    of the space's volume."""

    share: float                       # 0 < share < 1: the failing share of the space
    lengthscale: tuple[float, ...]     # one per numeric input, in its units (like [world] lengthscale)
    kernel: str = "matern52"


@dataclass(frozen=True)
class LimitSpec:
    """One ``[[limit]]``: a quantity measured with each trial that must stay below or above a bound.

    Worlds draw it from its own prior, independent of the objective unless ``correlation`` is set (then
    each world's limit is ``mean + amplitude (rho z_f + sqrt(1 - rho^2) z)`` with z_f the objective's
    standardised deviation and z a draw of the limit's own kernel); the belief models it with its own
    Gaussian process of the same prior, independent of the objective. Exactly one of ``below`` and
    ``above`` is set."""

    name: str
    prior: Prior                       # kernel, lengthscale, amplitude, mean (user units), noise
    below: float | None = None
    above: float | None = None
    correlation: float = 0.0           # with the objective (user orientation), at every input; 0: independent

    @property
    def bound(self) -> float:
        return self.below if self.below is not None else self.above

    @property
    def sign(self) -> float:
        """+1 for ``below``, -1 for ``above``: the limit holds where sign * (value - bound) <= 0."""
        return 1.0 if self.below is not None else -1.0

    def words(self, units: str = "") -> str:
        """The limit in words, e.g. "viscosity below 40"."""
        side = "below" if self.below is not None else "above"
        return f"{self.name} {side} {self.bound:g}" + (f" {units}" if units else "")


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
    """A ``[[policy]]`` table: a rule (a key of simlab.policies.POLICIES), its label and settings."""

    rule: str
    label: str
    settings: tuple[tuple[str, Any], ...] = ()

    @property
    def options(self) -> dict[str, Any]:
        return dict(self.settings)


@dataclass(frozen=True)
class StopSpec(PolicySpec):
    """A ``[[stop]]`` table: a stopping rule (a key of simlab.stopping.STOP_RULES), its label and settings
    (every option resolved, ``min_trials`` included); the same fields as a policy's table."""


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
    floor: float | None = None   # [target] floor, objective units: a trial worse than it is harmful (None: not counted)
    stops: tuple[StopSpec, ...] = ()  # [[stop]] rules, evaluated on the same campaigns (none: nothing recorded)
    limits: tuple[LimitSpec, ...] = ()  # [[limit]] tables: measured quantities with a bound
    feasible_chance: float = 0.95  # [target] feasible_chance: the recommendation must be believed feasible this surely
    source: str = field(default="<study>", compare=False)

    @property
    def lead_difference(self) -> float:
        """Smallest median paired regret difference that matters (``[target] difference``)."""
        return self.target / 10.0 if self.difference is None else self.difference

    @property
    def constrained(self) -> bool:
        """The study has [[limit]]s or hidden failures: trials can break limits or fail."""
        return bool(self.limits) or self.world.fails_where is not None

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
