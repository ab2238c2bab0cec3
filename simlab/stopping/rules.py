"""The stopping rules a study's ``[[stop]]`` tables name: one small class each, and `STOP_RULES`.

A rule only decides *when* a campaign stops; it never changes which trials are run. So every
campaign is replayed to the largest budget, the quantities rules need are recorded after
each trial (:mod:`simlab.stopping.record`, columns ``stop_*`` of the traces), and each rule
is evaluated on the traces afterwards (:func:`simlab.evidence.stopping.stopping_times`): one
replay serves every rule, and every rule meets the same campaigns, as policies meet the same
worlds.

A rule declares its settings as `Option`s (the study reader validates them like a policy's),
the trace column it reads (``statistic``; None when the traces alone decide) and, in
``shared``, the settings that shape that column (every rule of the study reading the column
must give them equal values: the column is recorded once). :meth:`StopRule.holds` says after
which rows its condition holds; the evaluation stops a campaign at the first trial at or
after ``min_trials`` where it does.
"""

from __future__ import annotations

from typing import Any, ClassVar

import numpy as np

from ..options import Option, WithOptions

__all__ = ["StopRule", "Confident", "SmallGain", "NoProgress", "BoundGap", "STOP_RULES", "make_rule"]


class StopRule(WithOptions):
    """Decides after which trials a campaign may stop. Subclasses set the class attributes and :meth:`holds`."""

    rule: ClassVar[str] = ""
    description: ClassVar[str] = ""           # one line for the report: when the rule stops
    statistic: ClassVar[str | None] = None    # trace column read (simlab.columns.STOP_COLUMNS), None: traces alone
    shared: ClassVar[tuple[str, ...]] = ()    # settings that shape the recorded column
    threshold: ClassVar[str] = ""             # the setting the report names in words
    # Every rule's own minimum. None: the initial design + 2, resolved when the study is read
    # (a rule that may fire during the space-filling design would judge a model that has not
    # been steered yet; two trials after it is common practice, as in the issue).
    options: ClassVar[dict[str, Option]] = {
        "min_trials": Option(None, int, 1, 100_000, "earliest trial after which the rule may stop the campaign "
                             "(default: the initial design + 2)"),
    }

    option_owner = "stop rule"

    def __init__(self, label: str | None = None, **settings: Any):
        self.label = label or self.rule
        self._set_options(settings)

    def holds(self, frame, study) -> np.ndarray:
        """Whether the rule's condition holds after each row of ``frame`` (bool, one per row).

        ``frame``: traces rows with trial >= 1, sorted by campaign (``policy``, ``replicate``)
        then trial, with a ``campaign`` column numbering the campaigns. ``min_trials`` is
        applied by the caller.
        """
        raise NotImplementedError

    def words(self, study) -> str:
        """The rule and its threshold in words, e.g. "confident (chance 0.9)"."""
        return f"{self.rule} ({self.threshold} {getattr(self, self.threshold):g})"


class Confident(StopRule):
    """Stop when the belief gives the recommendation at least `chance` of being within the target.

    Notes
    -----
    After each trial the recorder bounds ``P(f(rec) - min f <= target | data)`` from below
    (``stop_chance``): it counts the pathwise posterior draws over the pool and the evaluated inputs
    in which the recommendation's value lies within the study's target (``[target] regret``) of the
    draw's minimum, in batches that double the count from 16 up to ``draws`` while the count cannot
    yet tell a rule's ``chance`` apart, and takes the one-sided 95 % Clopper-Pearson lower bound of
    the share.
    The rule stops once that bound reaches ``chance``. With a belief that matches the worlds, the
    campaigns it stops are then within target at least about ``chance`` of the time (Bayesian
    calibration: tests/unit/test_stopping.py); a wrong belief breaks this.

    References
    ----------
    Wilson (2024), Stopping Bayesian optimization with probabilistic regret bounds,
    arXiv:2402.16811. Draws: Wilson, Borovitskiy, Terenin, Mostowsky & Deisenroth (2020), ICML.
    """

    rule = "confident"
    description = "stops when the belief gives the recommendation a chance of at least `chance` of being within the target"
    statistic = "stop_chance"
    shared = ("draws", "features")
    threshold = "chance"
    options = {
        "chance": Option(0.9, float, 0.0, 1.0, "belief's probability that the recommendation is within the target",
                         low_open=True, high_open=True),
        "draws": Option(128, int, 16, 4096, "most posterior draws per trial for the probability (drawn in "
                        "doubling batches from 16 until every rule's decision is clear)"),
        "features": Option(64, int, 16, 4096, "spectral frequencies of the draws (drawn once per campaign)"),
    }

    def holds(self, frame, study):
        return frame["stop_chance"].to_numpy() >= self.chance


class SmallGain(StopRule):
    """Stop when the largest expected improvement over the pool falls below `fraction` x the prior amplitude.

    Notes
    -----
    ``stop_gain`` is ``max_x EI(x)`` over the pool, with ``EI(x) = (m - mu) Phi(z) + sd phi(z)``,
    ``z = (m - mu) / sd``, for the posterior of the noise-free objective and the incumbent ``m``,
    the recommendation's posterior mean. The pool is not polished: the polish costs about twice a
    trial of EI itself, and a pool of 2048 points misses the continuous maximum only where EI is
    already concentrated on a small basin. Jones, Schonlau & Welch (1998) stopped at a small fraction
    of the current best value (as the issue recalls it); a fraction of the prior amplitude (the belief's sd) keeps the
    threshold independent of where the objective's zero lies.

    References
    ----------
    Jones, Schonlau & Welch (1998), Efficient global optimization of expensive black-box
    functions, J. Global Optim. 13:455.
    """

    rule = "small-gain"
    description = "stops when the largest expected improvement falls below `fraction` x the prior amplitude"
    statistic = "stop_gain"
    threshold = "fraction"
    options = {"fraction": Option(0.01, float, 0.0, 1.0, "largest expected improvement, as a fraction of the "
                                  "belief's amplitude, below which the campaign stops", low_open=True)}

    def holds(self, frame, study):
        return frame["stop_gain"].to_numpy() < self.fraction * study.belief.amplitude


class NoProgress(StopRule):
    """Stop after `trials` trials in a row none of which became the recommendation.

    Notes
    -----
    A trial makes progress when the model, after it, recommends that very trial (``rec_trial ==
    trial`` in the traces): the belief now holds it better than everything run before. The rule
    stops at trial t when none of trials t - trials + 1 .. t did (common practice: "no improvement
    in k iterations"); it reads the traces alone.
    """

    rule = "no-progress"
    description = "stops after `trials` trials in a row without a new recommendation"
    threshold = "trials"
    options = {"trials": Option(5, int, 1, 100_000, "trials in a row without a new recommendation")}

    def holds(self, frame, study):
        trial = frame["trial"].to_numpy()
        progress = frame["rec_trial"].to_numpy() == trial
        last = frame.assign(_last=np.where(progress, trial, 0)).groupby("campaign", sort=False)["_last"].cummax()
        return trial - last.to_numpy() >= self.trials


class BoundGap(StopRule):
    """Stop when the recommendation's upper bound is within `gap` of the lowest lower bound over the space.

    Notes
    -----
    ``stop_gap`` is ``mu(rec) + width sd(rec) - min_x (mu(x) - width sd(x))`` with the minimum over
    the pool and the evaluated inputs: an upper confidence bound on the recommendation's simple
    regret (>= 0, since the recommendation is one of the inputs). The rule stops once it is below
    ``gap`` (objective units).

    References
    ----------
    Makarova et al. (2022), Automatic termination for hyperparameter optimization, AutoML
    Conference (their regret bound: upper bound at the incumbent minus the lowest lower bound;
    here with a fixed width in place of their schedule, recalled from memory).
    """

    rule = "bound-gap"
    description = "stops when the recommendation's upper bound is within `gap` of the lowest lower bound"
    statistic = "stop_gap"
    shared = ("width",)
    threshold = "gap"
    options = {
        "gap": Option(0.5, float, 0.0, None, "largest bound on regret (objective units) at which the campaign stops",
                      low_open=True),
        "width": Option(2.0, float, 0.0, 10.0, "posterior sds on either side of the mean", low_open=True),
    }

    def holds(self, frame, study):
        return frame["stop_gap"].to_numpy() < self.gap


STOP_RULES: dict[str, type[StopRule]] = {c.rule: c for c in (Confident, SmallGain, NoProgress, BoundGap)}


def make_rule(spec) -> StopRule:
    """The rule object of a study's ``StopSpec``."""
    return STOP_RULES[spec.rule](spec.label, **spec.options)
