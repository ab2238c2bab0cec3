"""Gaussian-process hyperparameters by maximum marginal likelihood, and leave-one-out checks."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import cho_solve, solve_triangular
from scipy.optimize import minimize
from threadpoolctl import threadpool_limits

from .gp import NUGGET
from .kernels import KERNELS, Kernel, make_kernel

__all__ = ["FitResult", "LeaveOneOut", "log_marginal_likelihood", "fit_hyperparameters",
           "loo_log_predictive", "default_bounds"]

_LOG2PI = np.log(2.0 * np.pi)
# Default search box, relative to the data (see `default_bounds` for the reasons).
_LENGTHSCALE_SPAN = (0.01, 10.0)   # x each input's span on the unit cube
_AMPLITUDE_SD = (0.01, 10.0)       # x sd(y)
_NOISE_SD = (1e-4, 1.0)            # x sd(y)
# Starting points are drawn from a narrower, central part of the box (log-uniform):
# the corners (huge amplitude, tiny lengthscale, ...) are where the optimiser stalls.
_START_LENGTHSCALE = (0.05, 2.0)
_START_AMPLITUDE = (0.3, 3.0)
_START_NOISE = (1e-3, 0.5)
_AT_BOUND = 0.01                   # within 1% (in log space, |log(v / bound)| < 0.01) counts as at the bound


# --------------------------------------------------------------------------- results
@dataclass(frozen=True)
class FitResult:
    """Maximum-likelihood hyperparameters of one kernel family.

    Attributes
    ----------
    kernel : str
        Kernel name (a key of :data:`simlab.model.kernels.KERNELS`).
    lengthscale : tuple of float, length d
        Per-input lengthscales on the unit cube the inputs were given on.
    amplitude, mean, noise : float
        Prior standard deviation, constant prior mean and noise standard deviation, in the
        units of ``y``.
    log_likelihood : float
        Log marginal likelihood at the optimum.
    at_bound : tuple of str
        Hyperparameters that ended at an edge of the search box, e.g.
        ``("lengthscale[1]", "noise")``: the data cannot tell their value.
    n_starts : int
        Starting points tried.
    converged : bool
        Whether L-BFGS-B reported success from the best start.
    bounds : dict
        The search box used: ``{"lengthscale": (low (d,), high (d,)), "amplitude": (low, high),
        "noise": (low, high)}``.
    """

    kernel: str
    lengthscale: tuple[float, ...]
    amplitude: float
    mean: float
    noise: float
    log_likelihood: float
    at_bound: tuple[str, ...]
    n_starts: int
    converged: bool
    bounds: dict

    @property
    def hyper(self) -> dict:
        """Keyword arguments for :func:`log_marginal_likelihood` and :func:`loo_log_predictive`."""
        return {"lengthscale": np.asarray(self.lengthscale), "amplitude": self.amplitude,
                "mean": self.mean, "noise": self.noise}

    def make_kernel(self) -> Kernel:
        """The fitted covariance as a :class:`simlab.model.kernels.Kernel` (unit-cube inputs)."""
        return make_kernel(self.kernel, np.asarray(self.lengthscale), self.amplitude)


@dataclass(frozen=True)
class LeaveOneOut:
    """Leave-one-out predictions of each observation from all the others.

    Attributes
    ----------
    mean, sd : ndarray of shape (n,)
        Predictive mean and standard deviation of ``y_i`` (noise included) given the rest.
    log_density : ndarray of shape (n,)
        ``log p(y_i | y_-i)``.
    """

    mean: np.ndarray
    sd: np.ndarray
    log_density: np.ndarray

    @property
    def total(self) -> float:
        """Sum of the leave-one-out log predictive densities (higher is better)."""
        return float(self.log_density.sum())


# --------------------------------------------------------------------------- the objective
class _Objective:
    """Log marginal likelihood and its gradient for one data set, with the pairwise squared
    differences computed once so each evaluation costs two matrix-vector products, one
    Cholesky factorisation and one inverse."""

    def __init__(self, kernel_name: str, X, y):
        if kernel_name not in KERNELS:
            raise ValueError(f"kernel must be one of {', '.join(KERNELS)}; got {kernel_name!r}")
        self.X, self.y = _check_xy(X, y)
        n, d = self.X.shape
        self.n, self.d = n, d
        # Only the profile functions rho(r) and rho'(r)/r are used; they do not depend on the
        # instance's lengthscale or amplitude, so one instance serves every evaluation.
        # `_drho_over_r` is the kernel's documented extension hook (see DEVELOPERS.md).
        self.profile = KERNELS[kernel_name](np.ones(d), 1.0)
        diff = self.X[:, None, :] - self.X[None, :, :]
        self.D2 = (diff * diff).reshape(n * n, d)   # squared differences per input, (n*n, d)
        self.eye = np.eye(n)

    def gram(self, lengthscale, amplitude, noise):
        """(1 / lengthscale^2, r, rho(r), K) with K the noisy Gram matrix, from exact differences."""
        n = self.n
        ls = np.asarray(lengthscale, dtype=float)
        var = float(amplitude) ** 2
        inv_ls2 = 1.0 / (ls * ls)
        r = np.sqrt(self.D2 @ inv_ls2).reshape(n, n)
        rho = self.profile._rho(r)
        K = var * rho
        # Same diagonal convention as simlab.model.gp.Posterior.s2: noise variance plus a relative nugget.
        K[np.diag_indices(n)] += float(noise) ** 2 + NUGGET * var
        return inv_ls2, r, rho, K

    def __call__(self, lengthscale, amplitude, mean, noise, *, grad: bool, profile_mean: bool = False):
        """Return (lml, gradient or None, mean used).

        The gradient is with respect to (log lengthscale_1..d, log amplitude, log noise, mean).
        With ``profile_mean`` the mean is replaced by its generalised-least-squares value
        ``1' K^-1 y / 1' K^-1 1``, which maximises the likelihood over the mean for the other
        hyperparameters; by the envelope theorem the gradient in the others is then the partial
        gradient at that mean, and the mean's own component is zero.
        """
        n, d = self.n, self.d
        var = float(amplitude) ** 2
        noise2 = float(noise) ** 2
        inv_ls2, r, rho, K = self.gram(lengthscale, amplitude, noise)
        L = np.linalg.cholesky(K)               # raises LinAlgError if not positive definite
        if profile_mean:
            one = np.ones(n)
            sol = cho_solve((L, True), np.column_stack([self.y, one]), check_finite=False)
            mean = float(sol[:, 0].sum() / sol[:, 1].sum())          # GLS mean
            alpha = sol[:, 0] - mean * sol[:, 1]
        else:
            mean = float(mean)
            alpha = cho_solve((L, True), self.y - mean, check_finite=False)
        resid = self.y - mean
        # Rasmussen & Williams (2006), Algorithm 2.1 / eq. 5.8:
        # log p(y) = -1/2 (y-m)' K^-1 (y-m) - sum log L_ii - n/2 log 2 pi
        lml = -0.5 * resid @ alpha - np.log(np.diag(L)).sum() - 0.5 * n * _LOG2PI
        if not grad:
            return float(lml), None, mean
        # Rasmussen & Williams (2006), eq. 5.9: d lml / d theta = 1/2 tr((alpha alpha' - K^-1) dK/dtheta)
        Linv = solve_triangular(L, self.eye, lower=True, check_finite=False)
        W = np.outer(alpha, alpha) - Linv.T @ Linv                    # alpha alpha' - K^-1
        g = np.empty(d + 3)
        # dk/d log l_i = -variance * (rho'(r)/r) * (delta_i / l_i)^2   (differentiate r = |delta / l|)
        M = W * (-var * self.profile._drho_over_r(r))
        g[:d] = 0.5 * (M.reshape(-1) @ self.D2) * inv_ls2
        trW = np.trace(W)
        # dK/d log amplitude = 2 variance (rho + NUGGET I);  dK/d log noise = 2 noise^2 I
        g[d] = var * (np.einsum("ij,ij->", W, rho) + NUGGET * trW)
        g[d + 1] = noise2 * trW
        # d lml / d mean = 1' K^-1 (y - m)  (zero at the profiled mean)
        g[d + 2] = alpha.sum()
        return float(lml), g, mean


def _check_xy(X, y):
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    if X.ndim == 1:
        X = X[:, None]
    if X.ndim != 2:
        raise ValueError(f"X must have shape (n, d); got {X.shape}")
    if y.ndim != 1 or y.shape[0] != X.shape[0]:
        raise ValueError(f"y must have shape ({X.shape[0]},) to match X; got {y.shape}")
    if not (np.isfinite(X).all() and np.isfinite(y).all()):
        raise ValueError("X and y must be finite (no NaN or inf)")
    return X, y


def _hyper_arrays(d, lengthscale, amplitude, noise):
    ls = np.broadcast_to(np.asarray(lengthscale, dtype=float), (d,)).copy()
    if not (ls > 0).all():
        raise ValueError(f"lengthscale must be > 0; got {ls}")
    if not amplitude > 0:
        raise ValueError(f"amplitude must be > 0; got {amplitude}")
    if not noise >= 0:
        raise ValueError(f"noise must be >= 0; got {noise}")
    return ls


def log_marginal_likelihood(kernel_name: str, X, y, *, lengthscale, amplitude: float, mean: float,
                            noise: float, grad: bool = False):
    """Log marginal likelihood of a constant-mean Gaussian process with observation noise.

    Parameters
    ----------
    kernel_name : str
        One of :data:`simlab.model.kernels.KERNELS`.
    X : ndarray of shape (n, d)
        Inputs (simlab passes the unit cube).
    y : ndarray of shape (n,)
        Observations.
    lengthscale : float or array_like of shape (d,)
    amplitude : float
        Prior standard deviation (> 0).
    mean : float
        Constant prior mean.
    noise : float
        Noise standard deviation (>= 0).
    grad : bool
        Also return the gradient.

    Returns
    -------
    lml : float
    gradient : ndarray of shape (d + 3,), only if ``grad``
        With respect to ``(log lengthscale_1, ..., log lengthscale_d, log amplitude, log noise,
        mean)``.

    Notes
    -----
    ``K = amplitude^2 rho(r) + (noise^2 + NUGGET amplitude^2) I`` as in
    :class:`simlab.model.gp.Posterior`, and

    ``log p(y) = -1/2 (y - m)' K^-1 (y - m) - 1/2 log|K| - n/2 log 2 pi``,

    ``d log p / d theta = 1/2 tr((alpha alpha' - K^-1) dK/dtheta)``, ``alpha = K^-1 (y - m)``.

    References
    ----------
    Rasmussen & Williams (2006), *Gaussian Processes for Machine Learning*, Algorithm 2.1
    and eqs. 5.8-5.9.
    """
    obj = _Objective(kernel_name, X, y)
    ls = _hyper_arrays(obj.d, lengthscale, amplitude, noise)
    lml, g, _ = obj(ls, amplitude, mean, noise, grad=grad)
    return (lml, g) if grad else lml


# --------------------------------------------------------------------------- fitting
def default_bounds(X, y) -> dict:
    """The default search box for :func:`fit_hyperparameters`, tied to the data.

    Returns
    -------
    dict
        ``lengthscale``: (low (d,), high (d,)) = (0.01, 10) x each input's span (1 where an input
        never varies); ``amplitude``: (0.01, 10) x sd(y); ``noise``: (1e-4, 1) x sd(y).

    Notes
    -----
    Reasons (common practice, argued rather than sourced):

    - A lengthscale below 1% of the span would mean about a hundred independent wiggles
      across the data: no data set of the size simlab sees (n <= a few hundred) can support
      that, and below the spacing of the points it trades off against noise. At 10 x the
      span, the correlation between the two ends of the data range is 0.995 (squared
      exponential), 0.992 (Matérn 5/2), 0.987 (Matérn 3/2) and 0.90 (Matérn 1/2): the function
      is flat or straight over the data, and lengthscale and amplitude slide along a ridge
      together; stopping there and reporting the bound is more honest than an arbitrarily
      large number.
    - Amplitude: the spread of the function explains the spread of ``y``; from 1% (the data
      are nearly pure noise) to 10 x sd(y) (a long-lengthscale trend that only partly shows
      inside the data).
    - Noise: at most the whole spread of ``y`` (for pure noise its maximum-likelihood value is
      sd(y) sqrt((n-1)/n), inside the box); at least 1e-4 sd(y), a floor that keeps the Gram
      matrix well conditioned and that, when reached, says "the data look noise-free".
    """
    X, y = _check_xy(X, y)
    span = np.ptp(X, axis=0)
    span = np.where(span > 0, span, 1.0)
    sd = float(np.std(y, ddof=1)) if y.size > 1 else 0.0
    if not sd > 0:
        raise ValueError("y is constant: there is no spread to fit a Gaussian process to")
    return {"lengthscale": (_LENGTHSCALE_SPAN[0] * span, _LENGTHSCALE_SPAN[1] * span),
            "amplitude": (_AMPLITUDE_SD[0] * sd, _AMPLITUDE_SD[1] * sd),
            "noise": (_NOISE_SD[0] * sd, _NOISE_SD[1] * sd)}


def _merge_bounds(X, y, bounds) -> dict:
    out = default_bounds(X, y)
    d = X.shape[1]
    for key, value in (bounds or {}).items():
        if key not in out:
            raise ValueError(f"bounds keys must be among {', '.join(out)}; got {key!r}")
        lo, hi = value
        if key == "lengthscale":
            lo = np.broadcast_to(np.asarray(lo, dtype=float), (d,)).copy()
            hi = np.broadcast_to(np.asarray(hi, dtype=float), (d,)).copy()
            ok = (lo > 0).all() and (hi >= lo).all()
        else:
            lo, hi = float(lo), float(hi)
            ok = 0 < lo <= hi
        if not ok:
            raise ValueError(f"bounds[{key!r}] must be (low, high) with 0 < low <= high; got {value!r}")
        out[key] = (lo, hi)
    return out


def fit_hyperparameters(kernel_name: str, X, y, *, restarts: int = 8, rng: np.random.Generator,
                        bounds: dict | None = None, fixed_noise: float | None = None,
                        fixed_mean: float | None = None, start: FitResult | None = None,
                        maxiter: int = 200) -> FitResult:
    """Maximise the log marginal likelihood over lengthscales, amplitude, noise and mean.

    Parameters
    ----------
    kernel_name : str
        One of :data:`simlab.model.kernels.KERNELS`.
    X : ndarray of shape (n, d)
        Inputs on the unit cube.
    y : ndarray of shape (n,)
        Observations (n >= 2, not all equal).
    restarts : int
        Starting points in all (>= 1). The first is ``start`` if given, else a data-based
        guess (lengthscale half the span, amplitude sd(y), noise 0.1 sd(y)); the others are
        drawn log-uniformly from the central part of the box.
    rng : numpy.random.Generator
        Source of the random starting points.
    bounds : dict, optional
        Override parts of :func:`default_bounds`, e.g. ``{"noise": (0.01, 1.0)}``; lengthscale
        bounds are on the unit cube and may be per input.
    fixed_noise : float, optional
        Hold the noise standard deviation at this value (0 allowed) instead of fitting it.
    fixed_mean : float, optional
        Hold the mean at this value instead of profiling it out.
    start : FitResult, optional
        Previous hyperparameters to start from (a refit during a campaign).
    maxiter : int
        L-BFGS-B iteration limit per start.

    Returns
    -------
    FitResult

    Notes
    -----
    L-BFGS-B in the logarithms of lengthscales, amplitude and noise, with the analytic gradient
    of :func:`log_marginal_likelihood`. The constant mean is not searched: for given covariance
    hyperparameters the likelihood is maximised in closed form by the generalised-least-squares
    mean ``1' K^-1 y / 1' K^-1 1`` (a weighted average of y). Profiling it out is exact, costs
    one extra triangular solve, and leaves the optimiser one dimension fewer, with no scale to
    guess for a parameter that is not positive.

    References
    ----------
    Rasmussen & Williams (2006), *Gaussian Processes for Machine Learning*, section 5.4.1 and
    section 2.7 (explicit basis functions).
    """
    obj = _Objective(kernel_name, X, y)
    n, d = obj.n, obj.d
    if n < 2:
        raise ValueError(f"need at least 2 observations to fit hyperparameters; got {n}")
    if isinstance(restarts, bool) or not isinstance(restarts, (int, np.integer)) or restarts < 1:
        raise ValueError(f"restarts must be a whole number >= 1; got {restarts!r}")
    if fixed_noise is not None and not fixed_noise >= 0:
        raise ValueError(f"fixed_noise must be >= 0; got {fixed_noise}")
    box = _merge_bounds(obj.X, obj.y, bounds)
    sd = float(np.std(obj.y, ddof=1))
    span = np.ptp(obj.X, axis=0)
    span = np.where(span > 0, span, 1.0)
    fit_noise = fixed_noise is None
    profile = fixed_mean is None
    mean0 = 0.0 if profile else float(fixed_mean)

    lo = np.concatenate([np.log(box["lengthscale"][0]), [np.log(box["amplitude"][0])]])
    hi = np.concatenate([np.log(box["lengthscale"][1]), [np.log(box["amplitude"][1])]])
    if fit_noise:
        lo = np.append(lo, np.log(box["noise"][0]))
        hi = np.append(hi, np.log(box["noise"][1]))
    sl = slice(0, d + 1 + fit_noise)

    def unpack(t):
        noise = float(np.exp(t[d + 1])) if fit_noise else float(fixed_noise)
        return np.exp(t[:d]), float(np.exp(t[d])), noise

    def negative(t):
        ls, amp, noise = unpack(t)
        try:
            lml, g, _ = obj(ls, amp, mean0, noise, grad=True, profile_mean=profile)
        except np.linalg.LinAlgError:
            # Not positive definite at this point (tiny noise, huge lengthscale): tell the line
            # search to step back. Finite, because L-BFGS-B cannot handle inf.
            return 1e25, np.zeros(len(t))
        return -lml, -g[sl]

    # starting points
    starts = []
    if start is not None:
        guess = [*np.log(start.lengthscale), np.log(start.amplitude)]
        if fit_noise:
            guess.append(np.log(max(start.noise, box["noise"][0])))
    else:
        guess = [*np.log(0.5 * span), np.log(sd)]
        if fit_noise:
            guess.append(np.log(0.1 * sd))
    starts.append(np.clip(guess, lo, hi))
    slo = np.concatenate([np.log(_START_LENGTHSCALE[0] * span), [np.log(_START_AMPLITUDE[0] * sd)]])
    shi = np.concatenate([np.log(_START_LENGTHSCALE[1] * span), [np.log(_START_AMPLITUDE[1] * sd)]])
    if fit_noise:
        slo = np.append(slo, np.log(_START_NOISE[0] * sd))
        shi = np.append(shi, np.log(_START_NOISE[1] * sd))
    for _ in range(restarts - 1):
        starts.append(np.clip(rng.uniform(slo, shi), lo, hi))

    best, evaluations = None, 0
    # The matrices are small (n <= a few hundred): BLAS threads only fight each other (and
    # joblib workers) for cores here; one thread was 5-50x faster on a loaded 2-core machine.
    with threadpool_limits(1):
        for t0 in starts:
            res = minimize(negative, t0, jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                           options={"maxiter": maxiter})
            evaluations += res.nfev
            if best is None or res.fun < best.fun:
                best = res
    if best.fun >= 1e24:
        raise np.linalg.LinAlgError("the Gram matrix was not positive definite at any starting point")

    t = np.clip(best.x, lo, hi)
    ls, amp, noise = unpack(t)
    lml, _, mean = obj(ls, amp, mean0, noise, grad=False, profile_mean=profile)
    names = [f"lengthscale[{i}]" for i in range(d)] + ["amplitude"] + (["noise"] if fit_noise else [])
    at_bound = tuple(nm for nm, v, a, b in zip(names, t, lo, hi)
                     if v - a < _AT_BOUND or b - v < _AT_BOUND)
    return FitResult(kernel=kernel_name, lengthscale=tuple(float(v) for v in ls), amplitude=amp,
                     mean=mean, noise=noise, log_likelihood=lml, at_bound=at_bound,
                     n_starts=len(starts), converged=bool(best.success), bounds=box)


# --------------------------------------------------------------------------- leave-one-out
def loo_log_predictive(kernel_name: str, X, y, *, lengthscale, amplitude: float, mean: float,
                       noise: float) -> LeaveOneOut:
    """Leave-one-out predictive distributions in closed form, hyperparameters held fixed.

    Parameters
    ----------
    kernel_name : str
    X : ndarray of shape (n, d)
    y : ndarray of shape (n,)
    lengthscale, amplitude, mean, noise
        As in :func:`log_marginal_likelihood` (``FitResult.hyper`` fits).

    Returns
    -------
    LeaveOneOut
        Predictive mean, sd (of the noisy observation) and log density of each ``y_i`` given
        the other n - 1 observations.

    Notes
    -----
    With ``K`` the noisy Gram matrix and ``alpha = K^-1 (y - m)``:
    ``mu_i = y_i - alpha_i / [K^-1]_ii`` (eq. 5.12), ``sigma_i^2 = 1 / [K^-1]_ii`` (eq. 5.12),
    ``log p(y_i | y_-i) = -1/2 log sigma_i^2 - (y_i - mu_i)^2 / (2 sigma_i^2) - 1/2 log 2 pi``
    (eq. 5.10). One factorisation instead of n refits.

    References
    ----------
    Rasmussen & Williams (2006), *Gaussian Processes for Machine Learning*, section 5.4.2,
    eqs. 5.10-5.12.
    """
    obj = _Objective(kernel_name, X, y)
    n, y = obj.n, obj.y
    if n < 2:
        raise ValueError(f"leave-one-out needs at least 2 observations; got {n}")
    ls = _hyper_arrays(obj.d, lengthscale, amplitude, noise)
    K = obj.gram(ls, amplitude, noise)[3]
    L = np.linalg.cholesky(K)
    Kinv = cho_solve((L, True), np.eye(n), check_finite=False)
    alpha = Kinv @ (y - mean)
    dinv = np.diag(Kinv)
    var = 1.0 / dinv                                   # eq. 5.12
    mu = y - alpha * var                               # eq. 5.12
    logp = -0.5 * np.log(var) - 0.5 * (y - mu) ** 2 / var - 0.5 * _LOG2PI   # eq. 5.10
    return LeaveOneOut(mean=mu, sd=np.sqrt(var), log_density=logp)
