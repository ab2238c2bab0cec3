"""Published test functions with their domains and known minima (all minimised)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

__all__ = ["TestFunction", "FUNCTIONS"]


@dataclass(frozen=True)
class TestFunction:
    """A published benchmark objective on its published domain.

    ``fmin`` and ``minimizers`` are the published values (see the References of each
    function below); ``fn`` takes inputs of shape (n, d) in the function's own units.
    """

    name: str
    dim: int
    bounds: tuple[tuple[float, float], ...]
    fmin: float
    minimizers: tuple[tuple[float, ...], ...]
    fn: Callable[[np.ndarray], np.ndarray]
    source: str

    def __call__(self, X) -> np.ndarray:
        return self.fn(np.atleast_2d(np.asarray(X, dtype=float)))


def _forrester(X):
    x = X[:, 0]
    return (6.0 * x - 2.0) ** 2 * np.sin(12.0 * x - 4.0)


def _branin(X):
    x1, x2 = X[:, 0], X[:, 1]
    a, b, c = 1.0, 5.1 / (4.0 * np.pi**2), 5.0 / np.pi
    r, s, t = 6.0, 10.0, 1.0 / (8.0 * np.pi)
    return a * (x2 - b * x1**2 + c * x1 - r) ** 2 + s * (1.0 - t) * np.cos(x1) + s


def _six_hump_camel(X):
    x1, x2 = X[:, 0], X[:, 1]
    return (4.0 - 2.1 * x1**2 + x1**4 / 3.0) * x1**2 + x1 * x2 + (-4.0 + 4.0 * x2**2) * x2**2


_ALPHA = np.array([1.0, 1.2, 3.0, 3.2])
_A3 = np.array([[3, 10, 30], [0.1, 10, 35], [3, 10, 30], [0.1, 10, 35]], dtype=float)
_P3 = 1e-4 * np.array([[3689, 1170, 2673], [4699, 4387, 7470], [1091, 8732, 5547], [381, 5743, 8828]], dtype=float)
_A6 = np.array([[10, 3, 17, 3.5, 1.7, 8], [0.05, 10, 17, 0.1, 8, 14],
                [3, 3.5, 1.7, 10, 17, 8], [17, 8, 0.05, 10, 0.1, 14]], dtype=float)
_P6 = 1e-4 * np.array([[1312, 1696, 5569, 124, 8283, 5886], [2329, 4135, 8307, 3736, 1004, 9991],
                       [2348, 1451, 3522, 2883, 3047, 6650], [4047, 8828, 8732, 5743, 1091, 381]], dtype=float)


def _hartmann(A, P):
    def fn(X):
        inner = (A[None, :, :] * (X[:, None, :] - P[None, :, :]) ** 2).sum(-1)  # (n, 4)
        return -(np.exp(-inner) * _ALPHA).sum(-1)
    return fn


_VLSE = "Surjanovic & Bingham, Virtual Library of Simulation Experiments (Simon Fraser University)"

FUNCTIONS: dict[str, TestFunction] = {f.name: f for f in (
    TestFunction("forrester", 1, ((0.0, 1.0),), -6.0207400558, ((0.7572487562,),), _forrester,
                 "Forrester, Sobester & Keane (2008), Engineering Design via Surrogate Modelling"),
    TestFunction("branin", 2, ((-5.0, 10.0), (0.0, 15.0)), 5.0 / (4.0 * np.pi),
                 ((-np.pi, 12.275), (np.pi, 2.275), (3 * np.pi, 2.475)), _branin,
                 "Dixon & Szego (1978); " + _VLSE),
    TestFunction("six-hump-camel", 2, ((-3.0, 3.0), (-2.0, 2.0)), -1.0316284535,
                 ((0.08984201, -0.71265641), (-0.08984201, 0.71265641)), _six_hump_camel, _VLSE),
    TestFunction("hartmann3", 3, ((0.0, 1.0),) * 3, -3.8627797873, ((0.114614, 0.555649, 0.852547),),
                 _hartmann(_A3, _P3), _VLSE),
    TestFunction("hartmann6", 6, ((0.0, 1.0),) * 6, -3.322368011415514,
                 ((0.20168951, 0.15001069, 0.47687397, 0.27533243, 0.31165161, 0.65730053),),
                 _hartmann(_A6, _P6), _VLSE),
)}
