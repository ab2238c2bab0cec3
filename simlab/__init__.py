"""simlab: choose a Bayesian-optimisation policy and trial budget by simulated campaigns."""

from __future__ import annotations

__version__ = "0.4.0"

from .api import StudyResult, SweepResult, WorldView, load_results, run_study, run_sweep_study, world  # noqa: E402
from .study.spec import Study, StudyError, load_study  # noqa: E402

__all__ = ["__version__", "load_study", "run_study", "run_sweep_study", "load_results", "StudyResult",
           "SweepResult", "Study", "StudyError", "world", "WorldView"]
