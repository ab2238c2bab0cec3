"""How a replicate's world is drawn from the prior: one small class per kind, in WORLD_KINDS.

A kind declares its study-file name (``[world] method``), its settings (``options``, Options
the study reader validates; :meth:`WorldKind.options_for` when a default depends on the number
of inputs), what it cannot do (:meth:`WorldKind.refuse`), its words for the report
(:meth:`WorldKind.describe`), and its one method, :meth:`WorldKind.draw`. Adding a kind is one
class here and one line in WORLD_KINDS; the world class it draws lives in draws.py (see
DEVELOPERS.md, "How to add a world kind").
"""

from __future__ import annotations

from typing import ClassVar

import numpy as np

from ..model.kernels import Kernel
from ..options import Option
from .draws import FeatureWorld, GridWorld, World

__all__ = ["WorldKind", "FeatureKind", "GridKind", "WORLD_KINDS", "world_options"]


class WorldKind:
    """A way of drawing a continuous objective from a Gaussian-process prior on the unit cube."""

    name: ClassVar[str] = ""
    options: ClassVar[dict[str, Option]] = {}
    words: ClassVar[str] = ""     # how the worlds are made, for the report; {setting} fields are filled in

    @classmethod
    def options_for(cls, dim: int) -> dict[str, Option]:
        """The kind's settings for a space of `dim` inputs (default: ``options``)."""
        return cls.options

    @classmethod
    def refuse(cls, dim: int, *, uncertain_lengthscale: bool) -> tuple[str, str] | None:
        """(field, message) when the kind cannot serve this study, else None."""
        return None

    @classmethod
    def describe(cls, settings: dict) -> str:
        """How the worlds are made, in words for the report (``words`` with the settings filled in)."""
        return cls.words.format(**settings)

    @classmethod
    def draw(cls, kernel: Kernel, mean: float, rng: np.random.Generator, settings: dict) -> World:
        """One world (internal orientation) from the kernel, the prior mean and the replicate's stream."""
        raise NotImplementedError


class FeatureKind(WorldKind):
    name = "features"
    options = {"features": Option(1024, int, 16, 65536, "spectral frequencies per draw (2x as many basis functions)")}
    words = "random Fourier features ({features} frequencies: continuous functions)"

    @classmethod
    def draw(cls, kernel, mean, rng, settings):
        return FeatureWorld(kernel, mean, rng, settings["features"])


class GridKind(WorldKind):
    name = "grid"
    words = "exact joint draws on a grid of {grid} points per input"

    @classmethod
    def options_for(cls, dim):
        return {"grid": Option(256 if dim == 1 else 40, int, 8, 4096 if dim == 1 else 64, "grid points per input")}

    @classmethod
    def refuse(cls, dim, *, uncertain_lengthscale):
        if dim > 2:
            return "world.method", (f"\"grid\" draws are exact but only for 1 or 2 inputs; this space has {dim}; "
                                    "use \"features\"")
        if uncertain_lengthscale:
            return "world.lengthscale_within", ("uncertain lengthscales need method = \"features\" (a grid draw "
                                                "factors one covariance matrix for all replicates)")
        return None

    @classmethod
    def draw(cls, kernel, mean, rng, settings):
        return GridWorld(kernel, mean, rng, settings["grid"])


WORLD_KINDS: dict[str, type[WorldKind]] = {k.name: k for k in (FeatureKind, GridKind)}


def world_options(dim: int) -> dict[str, Option]:
    """Every kind's settings for `dim` inputs, in registry order: all are [world] keys (the
    resolved study records each of them, whichever kind is chosen)."""
    out: dict[str, Option] = {}
    for kind in WORLD_KINDS.values():
        out.update(kind.options_for(dim))
    return out
