"""log h(z) = log(phi(z) + z Phi(z)): expected improvement without underflow."""

from __future__ import annotations

import numpy as np
from ..lazy import special

__all__ = ["log_h", "dlog_h"]

_C1 = 0.5 * np.log(2.0 * np.pi)
_C2 = 0.5 * np.log(np.pi / 2.0)
_Z_TAIL = -1000.0


def log_h(z) -> np.ndarray:
    """``log(phi(z) + z Phi(z))`` accurate for every finite z.

    Notes
    -----
    Three branches:

    - z > -1: direct evaluation;
    - -1000 < z <= -1: ``-z^2/2 - log(2 pi)/2 + log1mexp(log(special.erfcx(-z/sqrt2) |z|) + log(pi/2)/2)``,
      using ``Phi(z) = special.erfcx(-z/sqrt2) exp(-z^2/2) / 2`` (Ament et al. 2023, eq. 9);
    - z <= -1000: the tail series ``h(z) = phi(z) / z^2 (1 - 3/z^2 + 15/z^4 - 105/z^6 + ...)``,
      from the asymptotic expansion of the Mills ratio (Abramowitz & Stegun 1964, 7.1.23),
      whose next term is below 1e-20 there. In the middle branch's formula ``1 - exp(t)``
      is about ``1/z^2``, so it would lose every digit long before z = -1/sqrt(eps).
    """
    z = np.asarray(z, dtype=float)
    out = np.empty_like(z)
    hi = z > -1.0
    mid = (z <= -1.0) & (z > _Z_TAIL)
    lo = z <= _Z_TAIL
    zh = z[hi]
    out[hi] = np.log(np.exp(-0.5 * zh * zh) / np.sqrt(2 * np.pi) + zh * special.ndtr(zh))
    zm = z[mid]
    t = np.log(special.erfcx(-zm / np.sqrt(2.0)) * np.abs(zm)) + _C2
    # for -1000 < z <= -1, t lies in (-0.43, -1e-6), where log1mexp(t) = log(-expm1(t)) is the
    # accurate branch (Maechler 2012, "Accurately computing log(1 - exp(-|a|))")
    out[mid] = -0.5 * zm * zm - _C1 + np.log(-np.expm1(t))
    zl = z[lo]
    w = 1.0 / (zl * zl)
    out[lo] = -0.5 * zl * zl - _C1 - 2.0 * np.log(np.abs(zl)) + np.log1p(w * (-3.0 + w * (15.0 - 105.0 * w)))
    return out


def dlog_h(z, lh=None) -> np.ndarray:
    """Derivative of :func:`log_h`: ``Phi(z) / h(z)``.

    Evaluated as ``exp(log Phi - log h)`` for z > -1000 (``lh`` may pass ``log_h(z)``), and
    in the tail as the ratio of the two series,
    ``|z| (1 - 1/z^2 + 3/z^4 - 15/z^6) / (1 - 3/z^2 + 15/z^4 - 105/z^6)``, because the
    difference of two numbers of size z^2/2 would lose the digits there.
    """
    z = np.asarray(z, dtype=float)
    out = np.exp(special.log_ndtr(z) - (log_h(z) if lh is None else lh))
    lo = z <= _Z_TAIL
    if np.any(lo):
        zl = z[lo]
        w = 1.0 / (zl * zl)
        out[lo] = np.abs(zl) * (1.0 + w * (-1.0 + w * (3.0 - 15.0 * w))) / (1.0 + w * (-3.0 + w * (15.0 - 105.0 * w)))
    return out
