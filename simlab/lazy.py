"""SciPy modules bound now, imported on first use.

Reading a study needs the rule and kernel classes but none of SciPy: importing
``scipy.special``, ``scipy.linalg`` and ``scipy.optimize`` costs about 0.5 s (``scipy.stats`` another 0.9 s) on a 2-core
machine, which ``simlab --help``, ``simlab check`` and the first line of ``simlab run`` would
otherwise pay before printing anything. The standard library's ``importlib.util.LazyLoader``
(the recipe in the ``importlib`` documentation) gives a module object whose first attribute
access runs the real import; from then on it is the ordinary module.
"""

from __future__ import annotations

import importlib.util
import sys


def lazy_module(name: str):
    """``import name``, deferred until an attribute of the module is first read."""
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.find_spec(name)
    loader = importlib.util.LazyLoader(spec.loader)
    spec.loader = loader
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    loader.exec_module(module)
    return module


special = lazy_module("scipy.special")
linalg = lazy_module("scipy.linalg")
optimize = lazy_module("scipy.optimize")
stats = lazy_module("scipy.stats")      # for stats.qmc: scipy.stats alone costs ~0.9 s
