"""Acquisition policies: one small class per rule, and the registry the study file names.

To add a rule, write its class in a module of this package and list it in ``POLICIES``.
"""

from __future__ import annotations

from .base import Acquisition, Context, Option, Policy
from .classic import (ConfidenceBound, ExpectedImprovement, PosteriorMean, ProbabilityOfImprovement,
                      RandomSearch, SobolSearch, ThompsonSampling)
from .gradient import KnowledgeGradient
from .info import MaxValueEntropySearch, ProbabilityOfMinimum
from .logei import dlog_h, log_h
from .schedule import GPUCB, GPHedge

__all__ = [
    "Option", "Context", "Policy", "Acquisition", "RandomSearch", "SobolSearch", "PosteriorMean",
    "ConfidenceBound", "ProbabilityOfImprovement", "ExpectedImprovement", "ThompsonSampling",
    "ProbabilityOfMinimum", "MaxValueEntropySearch", "KnowledgeGradient", "GPUCB", "GPHedge",
    "POLICIES", "log_h", "dlog_h",
]

POLICIES: dict[str, type[Policy]] = {c.rule: c for c in (
    RandomSearch, SobolSearch, PosteriorMean, ConfidenceBound,
    ProbabilityOfImprovement, ExpectedImprovement, ThompsonSampling,
    ProbabilityOfMinimum, MaxValueEntropySearch, KnowledgeGradient, GPUCB, GPHedge,
)}
