"""log h(z) = log(phi(z) + z Phi(z)): expected improvement without underflow."""

from __future__ import annotations

import numpy as np
from scipy.special import erfcx, log_ndtr, ndtr

__all__ = ["log_h", "dlog_h"]

_C1 = 0.5 * np.log(2.0 * np.pi)
_C2 = 0.5 * np.log(np.pi / 2.0)
_Z_ASYMPTOTIC = -1.0 / np.sqrt(np.finfo(float).eps)


def log_h(z) -> np.ndarray:
    """``log(phi(z) + z Phi(z))`` accurate for every finite z.

    Notes
    -----
    Three branches, following Ament et al. (2023), eq. (9):

    - z > -1: direct evaluation;
    - -1/sqrt(eps) < z <= -1: ``-z^2/2 - log(2 pi)/2 + log1mexp(log(erfcx(-z/sqrt2) |z|) + log(pi/2)/2)``,
      using ``Phi(z) = erfcx(-z/sqrt2) exp(-z^2/2) / 2``;
    - z <= -1/sqrt(eps): the asymptote ``-z^2/2 - log(2 pi)/2 - 2 log|z|``.
    """
    z = np.asarray(z, dtype=float)
    out = np.empty_like(z)
    hi = z > -1.0
    mid = (z <= -1.0) & (z > _Z_ASYMPTOTIC)
    lo = z <= _Z_ASYMPTOTIC
    zh = z[hi]
    out[hi] = np.log(np.exp(-0.5 * zh * zh) / np.sqrt(2 * np.pi) + zh * ndtr(zh))
    zm = z[mid]
    t = np.log(erfcx(-zm / np.sqrt(2.0)) * np.abs(zm)) + _C2
    # for z <= -1, t lies in (-0.43, 0), where log1mexp(t) = log(-expm1(t)) is the accurate
    # branch (Maechler 2012, "Accurately computing log(1 - exp(-|a|))")
    out[mid] = -0.5 * zm * zm - _C1 + np.log(-np.expm1(t))
    zl = z[lo]
    out[lo] = -0.5 * zl * zl - _C1 - 2.0 * np.log(np.abs(zl))
    return out


def dlog_h(z, lh=None) -> np.ndarray:
    """Derivative of :func:`log_h`: ``Phi(z) / h(z)``, evaluated as ``exp(log Phi - log h)``.

    ``lh`` may pass ``log_h(z)`` when the caller already has it.
    """
    z = np.asarray(z, dtype=float)
    return np.exp(log_ndtr(z) - (log_h(z) if lh is None else lh))
