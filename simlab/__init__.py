"""simlab: choose a Bayesian-optimisation policy and trial budget by simulated campaigns."""

from __future__ import annotations

__version__ = "0.4.0"

# The Python face (api.py, study/spec.py) is imported on first use (PEP 562), not here: the
# command line's ``--help`` and ``simlab check`` would otherwise pay for SciPy's statistics and
# pandas (about 2.5 s on a 2-core machine) before printing a line.
_EXPORTS = {"StudyResult": "api", "SweepResult": "api", "WorldView": "api", "load_results": "api",
            "run_study": "api", "run_sweep_study": "api", "world": "api",
            "Study": "study.spec", "StudyError": "study.spec", "load_study": "study.spec"}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str):
    if name not in _EXPORTS:
        raise AttributeError(f"module 'simlab' has no attribute {name!r}")
    from importlib import import_module
    value = getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
