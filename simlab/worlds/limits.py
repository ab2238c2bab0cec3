"""The limits of one replicate's world: each [[limit]]'s true quantity (a world of its own, drawn from
that limit's prior, independent of the objective) and the failing region of [world] fails_where (a
latent world in its top share of the space), with the measurement shocks shared by every policy."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..lazy import stats
from ..model.kernels import make_kernel
from ..rng import stream
from ..study.types import Study
from .draws import FeatureWorld, World
from .feasible import Slack

__all__ = ["Slack", "WorldLimits", "make_limits", "FAIL_LEVEL_POINTS"]

# Sobol' points on which the failing share is set: the threshold is the latent world's (1 - share)
# quantile over them, so the failing share of the space is `share` within about 1 / sqrt(2^14) (less:
# the points are low-discrepancy). The threshold then defines the world exactly.
FAIL_LEVEL_POINTS = 2**14


@dataclass
class WorldLimits:
    """One replicate's limits: ``slacks`` (one per [[limit]], then the failing region's, if any), the
    limits' true quantities (user units) and their per-trial measurement shocks (J, horizon)."""

    names: tuple[str, ...]
    quantities: list[World]       # each [[limit]]'s true value (user units)
    noise: np.ndarray             # (J,) measurement sd
    shocks: np.ndarray            # (J, horizon) unit-normal measurement shocks
    slacks: list[Slack]           # the limits' slacks, then the failing region's (latent - threshold)
    fails_slack: Slack | None

    def fails(self, U) -> np.ndarray:
        """(n,) bool: a trial at U fails (returns nothing)."""
        U = np.atleast_2d(U)
        return self.fails_slack(U) > 0 if self.fails_slack is not None else np.zeros(len(U), dtype=bool)

    def breaks(self, U) -> np.ndarray:
        """(n,) bool: U's true values break at least one measured limit."""
        U = np.atleast_2d(U)
        out = np.zeros(len(U), dtype=bool)
        for s in self.slacks[: len(self.quantities)]:
            out |= s(U) > 0
        return out

    def slacks_at(self, u) -> np.ndarray:
        """Every slack at one input u (d,): (K,), feasible where all are <= 0."""
        u = np.atleast_2d(u)
        return np.array([s(u)[0] for s in self.slacks])

    def infeasible(self, U) -> np.ndarray:
        """(n,) bool: U breaks a limit or fails."""
        return self.breaks(U) | self.fails(U)

    def measure(self, u, t: int) -> np.ndarray:
        """The measured limit values (J,) of trial t at input u (d,), user units."""
        u = np.atleast_2d(u)
        true = np.array([q(u)[0] for q in self.quantities])
        return true + self.noise * self.shocks[:, t]


class Blend(World):
    """``offset + sum_i weight_i world_i``: a limit correlated with the objective (its own draw mixed with the
    objective's standardised deviation)."""

    def __init__(self, offset: float, parts):
        self.offset, self.parts = float(offset), [(float(w), world) for w, world in parts]
        self.dim = self.parts[0][1].dim

    def __call__(self, U):
        return self.offset + sum(w * world(U) for w, world in self.parts)

    def grad(self, U):
        return sum(w * world.grad(U) for w, world in self.parts)

    def rank_values(self, U):
        return self.offset + sum(w * world.rank_values(U) for w, world in self.parts)

    def roughness(self):
        """The roughest part's (shortest lengthscales, smallest smoothness), so a search scales with it."""
        rough = [world.roughness() for _, world in self.parts]
        rough = [x for x in rough if x is not None]
        if not rough:
            return None
        return np.min([ls for ls, _ in rough], axis=0), min(nu for _, nu in rough)


def _unit(kernel_name, lengthscale, amplitude, study: Study):
    return make_kernel(kernel_name, np.asarray(lengthscale) / study.space.width, amplitude)


def make_limits(study: Study, r: int, objective: World | None = None) -> WorldLimits | None:
    """Replicate r's limits (None when the study has neither [[limit]]s nor fails_where). Each comes from
    its own keyed stream ("limit" + name, "fails"), so adding a limit leaves the objective unchanged. A limit
    with a ``correlation`` rho mixes its own unit draw z with the objective's standardised deviation
    z_f = (f - mean) / amplitude (user orientation): ``mean + amplitude (rho z_f + sqrt(1 - rho^2) z)``, so
    at every input its correlation with the objective across worlds is rho (with equal kernels, at every
    pair of inputs too)."""
    if not study.constrained:
        return None
    n_freq = dict(study.world.method_settings).get("features", 1024)
    horizon = study.campaign.horizon
    quantities, slacks, noise, shocks = [], [], [], []
    for lim in study.limits:
        p = lim.prior
        if lim.correlation == 0.0:
            world = FeatureWorld(_unit(p.kernel, p.lengthscale, p.amplitude, study), p.mean,
                                 stream(study.seed, r, "limit", lim.name), n_freq)
        else:
            rho, obj = lim.correlation, study.world.prior
            own = FeatureWorld(_unit(p.kernel, p.lengthscale, 1.0, study), 0.0, stream(study.seed, r, "limit", lim.name),
                               n_freq)
            # internal objective f_int = sign * f_user, so amplitude * rho * (f_user - m) / a is linear in f_int
            scale = p.amplitude * rho / obj.amplitude
            world = Blend(p.mean - scale * obj.mean, [(scale * study.sign, objective),
                                                      (p.amplitude * np.sqrt(1.0 - rho**2), own)])
        quantities.append(world)
        slacks.append(Slack(world, lim.bound, int(lim.sign)))
        noise.append(p.noise)
        shocks.append(stream(study.seed, r, "limit_noise", lim.name).standard_normal(horizon))
    fails_slack = None
    fw = study.world.fails_where
    if fw is not None:
        latent = FeatureWorld(_unit(fw.kernel, fw.lengthscale, 1.0, study), 0.0, stream(study.seed, r, "fails"), n_freq)
        points = stats.qmc.Sobol(study.space.dim, seed=stream(study.seed, r, "fails_level")).random(FAIL_LEVEL_POINTS)
        threshold = float(np.quantile(latent.rank_values(points).astype(float), 1.0 - fw.share))   # float32 ranks: set once, then exact
        fails_slack = Slack(latent, threshold, 1)
        slacks.append(fails_slack)
    return WorldLimits(names=tuple(lim.name for lim in study.limits), quantities=quantities,
                       noise=np.array(noise, dtype=float), shocks=np.array(shocks).reshape(len(quantities), horizon),
                       slacks=slacks, fails_slack=fails_slack)
