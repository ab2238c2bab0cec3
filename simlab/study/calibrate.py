"""A world prior from the team's past runs: fit, compare kernels, write [space] and [world]."""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .data import DataError, read_table
from ..model.fit import FitResult, fit_hyperparameters, loo_log_predictive
from ..model.kernels import KERNELS
from ..rng import label_key
from .dump import toml_key, toml_value
from .spec import _NAME, GOALS, RESERVED, Prior, Space

__all__ = ["Calibration", "KernelFit", "calibrate"]

_ROLE = "calibration data"
_ROWS_PER_INPUT = 10   # Loeppky, Sacks & Welch (2009): about 10 runs per input for a useful GP fit


@dataclass(frozen=True)
class KernelFit:
    """One kernel family fitted to the data.

    Attributes
    ----------
    fit : FitResult
        Maximum-likelihood hyperparameters (lengthscales on the unit cube of the data's span).
    loo : float
        Sum of leave-one-out log predictive densities at those hyperparameters.
    lengthscale : tuple of float
        Lengthscales in input units.
    """

    fit: FitResult
    loo: float
    lengthscale: tuple[float, ...]

    @property
    def kernel(self) -> str:
        return self.fit.kernel


@dataclass(frozen=True)
class Calibration:
    """The result of :func:`calibrate`.

    Attributes
    ----------
    source : str
        The data file.
    response : str
        The response column.
    goal : str
        "minimize" or "maximize" (the fit itself does not depend on it: a Gaussian-process
        prior is symmetric, and ``mean`` is in the response's own orientation, as ``[world]``
        expects).
    space : Space
        The box spanning the data, in input units.
    fits : tuple of KernelFit
        Every kernel tried, in the order tried.
    chosen : str
        The kernel written to ``[world]``.
    rows, distinct : int
        Data rows, and distinct input settings among them.
    best_row : int
        Spreadsheet row (header = row 1) of the best observed response for ``goal``.
    best_value : float
    warnings : tuple of str
        Things the team should know before using the prior (nothing is printed).
    """

    source: str
    response: str
    goal: str
    space: Space
    fits: tuple[KernelFit, ...]
    chosen: str
    rows: int
    distinct: int
    best_row: int
    best_value: float
    warnings: tuple[str, ...]

    @property
    def best(self) -> KernelFit:
        """The chosen kernel's fit."""
        return next(f for f in self.fits if f.kernel == self.chosen)

    @property
    def prior(self) -> Prior:
        """The fitted world prior in input units and the response's orientation."""
        b = self.best
        return Prior(kernel=b.kernel, lengthscale=b.lengthscale, amplitude=b.fit.amplitude,
                     mean=b.fit.mean, noise=b.fit.noise)

    def toml(self) -> str:
        """``[space]`` and ``[world]`` tables, with comments, to paste into a study file."""
        b, p = self.best, self.prior
        how = ("chosen by leave-one-out log predictive density among " + ", ".join(f.kernel for f in self.fits)
               if len(self.fits) > 1 else "as asked")
        lines = [
            (f"# simlab calibrate: fitted to {Path(self.source).name}, response \"{self.response}\", "
             f"{self.rows} rows, by maximum marginal likelihood"),
            f"# kernel {b.kernel} {how}",
        ]
        if self.goal == "maximize":
            lines.append('# the response is maximised: put goal = "maximize" under [study]')
        lines.append("# add [study], [campaign], [target] and [[policy]] tables to make a study")
        lines += [f"# warning: {w}" for w in self.warnings]
        lines += ["", "[space]", "# spans the data; widening it keeps the lengthscales valid (they are in input units)"]
        for name, lo, hi in zip(self.space.names, self.space.low, self.space.high):
            lines.append(f"{toml_key(name)} = [{toml_value(float(lo))}, {toml_value(float(hi))}]")
        lines += [
            "",
            "[world]",
            f"kernel = {toml_value(p.kernel)}",
            f"lengthscale = {toml_value([_round(v) for v in p.lengthscale])}   # "
            + ", ".join(self.space.names),
            f"amplitude = {toml_value(_round(p.amplitude))}",
            f"mean = {toml_value(_round(p.mean, 6))}",
            f"noise = {toml_value(_round(p.noise))}",
        ]
        return "\n".join(lines) + "\n"

    def study(self, *, name: str, history: str | None = None) -> str:
        """A complete, runnable study file: ``[space]`` and ``[world]`` as :meth:`toml` writes them
        (each value commented), and the campaign, target and policies that
        :func:`simlab.study.template.study_text` suggests from the fit; every guess commented.

        ``history``: the data file's path relative to the study file, to start every campaign
        from these runs (a ``[history]`` table with this response).
        """
        from .template import study_text
        p = self.prior
        how = ("chosen by leave-one-out log predictive density among " + ", ".join(f.kernel for f in self.fits)
               if len(self.fits) > 1 else "as asked (--kernel auto compares all)")
        header = [(f"# Study written by simlab calibrate from {Path(self.source).name}, response \"{self.response}\" "
                   f"({self.rows} rows, {self.space.dim} input{'s' * (self.space.dim > 1)});"),
                  "# [space] spans the data and [world] is fitted to it by maximum marginal likelihood.",
                  *[f"# warning: {w}" for w in self.warnings]]
        space = [f"{toml_key(n)} = [{toml_value(float(lo))}, {toml_value(float(hi))}]   # the data's range; "
                 "widen it to search beyond (lengthscales are in input units)"
                 for n, lo, hi in zip(self.space.names, self.space.low, self.space.high)]
        amplitude, noise = _round(p.amplitude), _round(p.noise)
        world = [f"kernel = {toml_value(p.kernel)}   # fitted: {how}",
                 f"lengthscale = {toml_value([_round(v) for v in p.lengthscale])}   # fitted, per input: "
                 + ", ".join(self.space.names),
                 f"amplitude = {toml_value(amplitude)}   # fitted: prior sd of the response",
                 f"mean = {toml_value(_round(p.mean, 6))}   # fitted: prior mean of the response",
                 f"noise = {toml_value(noise)}   # fitted: sd of repeated runs at one setting"]
        return study_text(name=name, goal=self.goal, space=space, world=world, dim=self.space.dim,
                          amplitude=amplitude, noise=noise, header=header, response=self.response,
                          history=None if history is None else (history, self.response, self.rows))

    def diagnostics(self) -> str:
        """A table of every kernel tried (log marginal likelihood, leave-one-out, hyperparameters)
        and the warnings, for standard error."""
        names = self.space.names
        head = [(f"calibrate: {self.source}, response \"{self.response}\" ({self.goal}), {self.rows} rows, "
                 f"{self.distinct} distinct input settings"),
                "inputs: " + ", ".join(f"{n} [{lo:g}, {hi:g}]" for n, lo, hi in
                                       zip(names, self.space.low, self.space.high)),
                f"best observed {self.response}: {self.best_value:g} (row {self.best_row})", ""]
        rows = [("kernel", "log ML", "LOO", "amplitude", "mean", "noise", "lengthscale (input units)", "at bound")]
        for f in self.fits:
            mark = " *" if f.kernel == self.chosen else ""
            rows.append((f.kernel + mark, f"{f.fit.log_likelihood:.2f}", f"{f.loo:.2f}", f"{f.fit.amplitude:.4g}",
                         f"{f.fit.mean:.6g}", f"{f.fit.noise:.4g}",
                         ", ".join(f"{n} {v:.4g}" for n, v in zip(names, f.lengthscale)),
                         ", ".join(_bound_name(a, names) for a in f.fit.at_bound) or "-"))
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        table = ["  ".join(c.ljust(w) if i in (0, 6, 7) else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths)))
                 .rstrip() for r in rows]
        notes = ["", ("log ML: log marginal likelihood at the fit; LOO: sum of leave-one-out log predictive "
                      "densities (higher is better for both)")]
        if len(self.fits) > 1:
            notes.append("* chosen: highest LOO (it judges predictions of unseen runs, which is what a campaign needs)")
        else:
            notes.append("* the kernel asked for; --kernel auto compares all of " + ", ".join(KERNELS))
        warn = ["", "warnings:", *[f"  - {w}" for w in self.warnings]] if self.warnings else ["", "warnings: none"]
        return "\n".join(head + table + notes + warn) + "\n"


def _round(v: float, digits: int = 4) -> float:
    """Round for the study file: the fitted values are far less certain than 4 significant digits."""
    return float(f"{v:.{digits}g}")


def _bound_name(name: str, inputs: Sequence[str]) -> str:
    if name.startswith("lengthscale["):
        return f"lengthscale {inputs[int(name[12:-1])]}"
    return name


def calibrate(path, *, response: str, inputs: Sequence[str] | None = None, kernel: str = "matern52",
              goal: str = "minimize", restarts: int = 8, seed: int = 0) -> Calibration:
    """Fit a world prior (kernel, lengthscales, amplitude, mean, noise) to past runs in a CSV file.

    Parameters
    ----------
    path : str or Path
        CSV with one row per past run: one column per input and one for the response.
    response : str
        The response column.
    inputs : sequence of str, optional
        Input columns; default every other column that holds numbers (columns with no number at
        all, such as labels or dates, are left out and named in the warnings).
    kernel : str
        One of ``sqexp``, ``matern12``, ``matern32``, ``matern52``, or ``auto``: fit all four and
        choose by leave-one-out log predictive density.
    goal : str
        "minimize" or "maximize": recorded (and noted in the TOML); the fit is the same.
    restarts : int
        Starting points for L-BFGS-B per kernel.
    seed : int
        Seed for the random starting points.

    Returns
    -------
    Calibration

    Raises
    ------
    DataError
        One line naming the file, column and row: anything :func:`simlab.study.data.read_table`
        refuses, plus fewer rows than inputs + 2, too few distinct input settings, a constant
        response or input, and column names a study cannot use. Repeated input settings with
        different responses are fine: they are what tells the noise.
    ValueError
        For an unknown ``kernel`` or ``goal`` (the valid names are listed).
    """
    if goal not in GOALS:
        raise ValueError(f"goal must be one of {', '.join(GOALS)}; got {goal!r}")
    if kernel != "auto" and kernel not in KERNELS:
        raise ValueError(f"kernel must be one of {', '.join(KERNELS)} or auto; got {kernel!r}")
    name = str(path)

    # ---- validate the data
    if inputs is not None:
        inputs = list(inputs)
        if not inputs:
            raise DataError(name, "no inputs given; name at least one input column")
        for c in inputs:
            if c == response:
                raise DataError(name, "is the response; it cannot also be an input", column=c)
        dupes = sorted({c for c in inputs if inputs.count(c) > 1})
        if dupes:
            raise DataError(name, "is listed twice among the inputs", column=dupes[0])
        df = read_table(path, columns=[*inputs, response], role=_ROLE)
    else:
        df = read_table(path, role=_ROLE, required=[response])
        inputs = [c for c in df.columns if c != response]
        if not inputs:
            raise DataError(name, f"has no numeric column besides the response \"{response}\"; "
                            "calibration needs at least one input column")
    skipped = list(df.attrs.get("skipped", ()))
    for c in inputs:
        if not _NAME.match(c):
            raise DataError(name, "cannot name an input in a study: use letters, digits, _ . - and start "
                            "with a letter or _ (rename the column)", column=c)
        if c in RESERVED:
            raise DataError(name, f"is a reserved column name of the traces ({', '.join(RESERVED)}); "
                            "rename the column", column=c)
    X = df[inputs].to_numpy(dtype=float)
    y = df[response].to_numpy(dtype=float)
    n, d = X.shape
    if n < d + 2:
        raise DataError(name, f"has {n} data rows; calibrating {d} input{'s' * (d > 1)} needs at least "
                        f"{d + 2} (inputs + 2), and about {_ROWS_PER_INPUT * d} for a useful fit")
    if np.ptp(y) == 0:
        raise DataError(name, f"is constant (every row is {y[0]:g}); there is nothing to fit", column=response)
    low, high = X.min(axis=0), X.max(axis=0)
    for c, lo, hi in zip(inputs, low, high):
        if lo == hi:
            raise DataError(name, f"never varies (every row is {lo:g}); the study's space needs low < high, "
                            "so leave it out of the inputs", column=c)
    distinct = len(np.unique(X, axis=0))
    if distinct < d + 2:
        raise DataError(name, f"has only {distinct} distinct input settings among {n} rows; calibrating {d} "
                        f"input{'s' * (d > 1)} needs at least {d + 2}")

    # ---- fit
    space = Space(names=tuple(inputs), low=tuple(float(v) for v in low), high=tuple(float(v) for v in high))
    width = high - low
    U = (X - low) / width
    fits = []
    for kname in (tuple(KERNELS) if kernel == "auto" else (kernel,)):
        # Keyed by kernel name (NEP 19 style, as simlab.rng does for policies), so each kernel's
        # starting points do not depend on which other kernels are fitted.
        rng = np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(label_key(kname),)))
        fit = fit_hyperparameters(kname, U, y, restarts=restarts, rng=rng)
        loo = loo_log_predictive(kname, U, y, **fit.hyper).total
        fits.append(KernelFit(fit=fit, loo=loo, lengthscale=tuple(float(v) for v in np.asarray(fit.lengthscale) * width)))
    chosen = max(fits, key=lambda f: f.loo).kernel

    sign = 1.0 if goal == "minimize" else -1.0
    best_i = int(np.argmin(sign * y))
    cal = Calibration(source=name, response=response, goal=goal, space=space, fits=tuple(fits), chosen=chosen,
                      rows=n, distinct=distinct, best_row=int(df.index[best_i]), best_value=float(y[best_i]),
                      warnings=())
    warnings = _warnings(cal, y, skipped)
    return dataclasses.replace(cal, warnings=tuple(warnings))


def _warnings(cal: Calibration, y: np.ndarray, skipped: list[str]) -> list[str]:
    out = []
    b = cal.best
    f = b.fit
    names = cal.space.names
    for item in f.at_bound:
        if item.startswith("lengthscale["):
            i = int(item[12:-1])
            nm = names[i]
            lo, hi = f.bounds["lengthscale"][0][i], f.bounds["lengthscale"][1][i]
            v = f.lengthscale[i]
            if abs(np.log(v / hi)) < abs(np.log(v / lo)):
                out.append(f"lengthscale of {nm} is at its upper bound ({b.lengthscale[i]:.4g}, 10x the data's "
                           f"span): the data cannot tell it; the response looks flat or straight along {nm} "
                           "over this range, so worlds drawn with it will be too")
            else:
                out.append(f"lengthscale of {nm} is at its lower bound ({b.lengthscale[i]:.4g}, 1% of the data's "
                           f"span): the data cannot tell it; the response looks rough or noisy along {nm}, "
                           "or there are too few runs")
        elif item == "amplitude":
            if f.amplitude < f.bounds["amplitude"][0] * 1.05:
                out.append("amplitude is at its lower bound (1% of the response's sd): the data show almost no "
                           "signal beyond noise")
            else:
                out.append("amplitude is at its upper bound (10x the response's sd): the data look like part of "
                           "a trend much larger than their range; the fitted prior is unreliable")
        elif item == "noise":
            if f.noise < f.bounds["noise"][0] * 1.05:
                out.append("noise is at its floor (1e-4 x the response's sd): the data look noise-free; if "
                           "repeated runs differ, set noise from their spread instead")
            else:
                out.append("noise is at its upper bound (the response's sd): the data show no signal beyond noise")
    if not min(y) <= f.mean <= max(y):
        out.append(f"mean {f.mean:.4g} lies outside the observed responses [{min(y):.4g}, {max(y):.4g}]: the fit "
                   "reads the data as part of a larger trend; check that the worlds drawn look plausible")
    if not f.converged:
        out.append(f"the optimiser did not report convergence for {f.kernel}; try more restarts")
    d = cal.space.dim
    if cal.rows < _ROWS_PER_INPUT * d:
        out.append(f"only {cal.rows} rows for {d} input{'s' * (d > 1)}: about {_ROWS_PER_INPUT} per input is the "
                   "usual minimum for a useful fit (Loeppky, Sacks & Welch 2009), so treat the values as rough")
    if len(cal.fits) > 1:
        by_ml = max(cal.fits, key=lambda k: k.fit.log_likelihood).kernel
        if by_ml != cal.chosen:
            out.append(f"log marginal likelihood prefers {by_ml} and leave-one-out prefers {cal.chosen}; "
                       "the data do not settle the kernel's smoothness: consider a sweep over both")
    if skipped:
        out.append("left out columns with no numbers: " + ", ".join(skipped))
    return out
