"""Every module of simlab imports on its own in a fresh interpreter (no import cycles)."""

import multiprocessing
import pkgutil
import subprocess
import sys

import pytest

import simlab

# Discovered, not listed, so a module added later is covered without editing this file.
# `simlab.__main__` runs the command line when imported; it is checked by running it.
MODULES = sorted(m.name for m in pkgutil.walk_packages(simlab.__path__, prefix="simlab.")
                 if m.name != "simlab.__main__")


def test_modules_are_discovered():
    # negative control for the discovery itself: the module that once failed is among them
    assert "simlab.evidence.reach" in MODULES and "simlab.evidence.metrics" in MODULES and "simlab.policies.base" in MODULES


@pytest.mark.slow
def test_every_module_imports_alone_in_a_fresh_interpreter():
    """Each module is imported first thing in its own process, forked from a server that has
    loaded only third-party libraries (numpy, scipy, pandas, matplotlib...), never simlab: an
    import cycle among simlab's modules shows exactly as in a new interpreter, at a fraction
    of the start-up cost."""
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["numpy", "scipy.stats", "scipy.optimize", "scipy.linalg", "pandas", "joblib",
                                "matplotlib", "pyarrow.parquet", "tqdm"])
    failed = []
    for m in MODULES:
        code = ("import sys\n"
                "assert not [k for k in sys.modules if k.split('.')[0] == 'simlab'], 'simlab already loaded'\n"
                f"import {m}\n")
        p = ctx.Process(target=exec, args=(code,))     # builtins.exec: pickled by name, imports nothing
        p.start()
        p.join(120)
        if p.exitcode != 0:
            failed.append(m)
    assert not failed, f"cannot be imported alone (traceback on stderr): {failed}"


def test_main_module_runs():
    out = subprocess.run([sys.executable, "-m", "simlab", "--version"], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0 and out.stdout.startswith("simlab ")


_LOADED = """
import sys, importlib.util
{setup}
heavy = ["pandas", "matplotlib", "scipy.stats", "scipy.special", "scipy.linalg", "scipy.optimize", "joblib"]
loaded = [m for m in heavy if m in sys.modules and not isinstance(sys.modules[m], importlib.util._LazyModule)]
print(",".join(loaded))
"""


def _really_loaded(setup: str) -> list[str]:
    out = subprocess.run([sys.executable, "-c", _LOADED.format(setup=setup)], capture_output=True, text=True,
                         check=True)
    return [m for m in out.stdout.strip().split(",") if m]


def test_reading_a_study_imports_neither_pandas_nor_scipy():
    """What `simlab check` and `simlab run` need before their first line (issue: start-up within
    0.5 s): the study reader, its registries and the argument parser load NumPy and nothing
    heavier. SciPy's modules may be bound lazily (simlab/lazy.py) but not executed."""
    from pathlib import Path
    demo = Path(__file__).resolve().parents[2] / "configs" / "demo.toml"
    setup = ("from simlab.parser import build_parser; build_parser().parse_args(['check', 'x.toml'])\n"
             f"from simlab.study.spec import load_study, advice; advice(load_study({str(demo)!r}))")
    assert _really_loaded(setup) == []
    # negative control: the engine does load them, and the check sees it
    assert {"pandas", "scipy.special"} <= set(_really_loaded(setup + "\nimport simlab.api\nimport scipy.special; scipy.special.ndtr(0.0)"))
