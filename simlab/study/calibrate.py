"""A world prior from the team's past runs: fit, compare kernels, write [space] and [world]."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .data import DataError, read_table
from ..model.fit import FitResult, fit_hyperparameters, loo_log_predictive
from ..model.kernels import KERNELS
from ..rng import label_key
from .dump import toml_key, toml_value
from .spec import _NAME, GOALS, MAX_LEVELS, RESERVED, Prior, Space, _make_space
from .types import CATEGORICAL, CONTINUOUS, STEPPED

__all__ = ["Calibration", "KernelFit", "calibrate"]

_ROLE = "calibration data"
_ROWS_PER_INPUT = 10   # Loeppky, Sacks & Welch (2009): about 10 runs per input for a useful GP fit
# A numeric column of whole numbers with at most this many distinct values (and fewer than half the
# rows) may be a stepped setting; it is kept continuous unless --stepped names it, and a warning says so.
_FEW_WHOLE = 20
# Tolerance for a value on a step's grid: 1e-9 x step (as the study reader's [history]).
_ON_GRID = 1e-9


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
        Lengthscales in input units, one per numeric (continuous or stepped) input.
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
        The space spanning the data, in input units: continuous inputs, stepped ones (``--stepped``)
        and categorical ones (text columns; levels in order of first appearance in the file).
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
    steps_given: Mapping[str, bool] = dataclasses.field(default_factory=dict)   # stepped input -> step given

    @property
    def best(self) -> KernelFit:
        """The chosen kernel's fit."""
        return next(f for f in self.fits if f.kernel == self.chosen)

    @property
    def prior(self) -> Prior:
        """The fitted world prior in input units and the response's orientation."""
        b = self.best
        return Prior(kernel=b.kernel, lengthscale=b.lengthscale, amplitude=b.fit.amplitude,
                     mean=b.fit.mean, noise=b.fit.noise, level_correlation=getattr(b.fit, "level_correlation", ()))

    @property
    def numeric_names(self) -> tuple[str, ...]:
        """The inputs that have a lengthscale (all but the categorical ones), in order."""
        return tuple(self.space.names[j] for j in self.space.numeric)

    def _space_lines(self, comments: bool) -> list[str]:
        sp, out = self.space, []
        for j, name in enumerate(sp.names):
            lo, hi, kind = float(sp.low[j]), float(sp.high[j]), sp.kind(j)
            if kind == CATEGORICAL:
                line = f"{toml_key(name)} = {{ levels = {toml_value(list(sp.levels[j]))} }}"
                why = "the data's levels, in order of first appearance in the file; add levels to search beyond"
            elif kind == STEPPED:
                line = (f"{toml_key(name)} = {{ low = {toml_value(lo)}, high = {toml_value(hi)}, "
                        f"step = {toml_value(float(sp.steps[j]))} }}")
                why = "stepped as asked (--stepped): the data's range" + (
                    "" if self.steps_given.get(name) else "; step = the smallest gap between its values, check it")
            else:
                line = f"{toml_key(name)} = [{toml_value(lo)}, {toml_value(hi)}]"
                why = "the data's range; widen it to search beyond (lengthscales are in input units)"
            out.append(f"{line}   # {why}" if comments else line)
        return out

    def _correlation_line(self, comments: bool) -> list[str]:
        rho = self.prior.level_correlation
        if not rho:
            return []
        table = ", ".join(f"{toml_key(self.space.names[j])} = {toml_value(_round(r))}"
                          for j, r in zip(self.space.categorical, rho))
        line = f"level_correlation = {{ {table} }}"
        return [line + "   # fitted: correlation between two distinct levels (Qian, Wu & Wu 2008)" if comments
                else line]

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
        if self.space.categorical:
            lines.append("# categorical inputs: the text columns, levels in order of first appearance in the file")
        lines += self._space_lines(comments=False)
        lines += ["", "[world]", f"kernel = {toml_value(p.kernel)}"]
        if p.lengthscale:
            lines.append(f"lengthscale = {toml_value([_round(v) for v in p.lengthscale])}   # "
                         + ", ".join(self.numeric_names))
        lines += [f"amplitude = {toml_value(_round(p.amplitude))}", f"mean = {toml_value(_round(p.mean, 6))}",
                  f"noise = {toml_value(_round(p.noise))}", *self._correlation_line(comments=False)]
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
        space = self._space_lines(comments=True)
        amplitude, noise = _round(p.amplitude), _round(p.noise)
        world = [f"kernel = {toml_value(p.kernel)}   # fitted: {how}"]
        if p.lengthscale:
            world.append(f"lengthscale = {toml_value([_round(v) for v in p.lengthscale])}   # fitted, per input: "
                         + ", ".join(self.numeric_names))
        world += [f"amplitude = {toml_value(amplitude)}   # fitted: prior sd of the response",
                  f"mean = {toml_value(_round(p.mean, 6))}   # fitted: prior mean of the response",
                  f"noise = {toml_value(noise)}   # fitted: sd of repeated runs at one setting",
                  *self._correlation_line(comments=True)]
        return study_text(name=name, goal=self.goal, space=space, world=world, dim=self.space.dim,
                          amplitude=amplitude, noise=noise, header=header, response=self.response,
                          discrete=bool(self.space.discrete),
                          history=None if history is None else (history, self.response, self.rows))

    def diagnostics(self) -> str:
        """A table of every kernel tried (log marginal likelihood, leave-one-out, hyperparameters)
        and the warnings, for standard error."""
        names = self.space.names
        head = [(f"calibrate: {self.source}, response \"{self.response}\" ({self.goal}), {self.rows} rows, "
                 f"{self.distinct} distinct input settings"),
                "inputs: " + ", ".join(_describe_input(self.space, j) for j in range(self.space.dim)),
                f"best observed {self.response}: {self.best_value:g} (row {self.best_row})", ""]
        numeric = self.numeric_names
        cats = [names[j] for j in self.space.categorical]
        rows = [("kernel", "log ML", "LOO", "amplitude", "mean", "noise", "lengthscale (input units)", "at bound")]
        if cats:
            rows[0] = rows[0][:7] + ("level correlation",) + rows[0][7:]
        for f in self.fits:
            mark = " *" if f.kernel == self.chosen else ""
            row = (f.kernel + mark, f"{f.fit.log_likelihood:.2f}", f"{f.loo:.2f}", f"{f.fit.amplitude:.4g}",
                   f"{f.fit.mean:.6g}", f"{f.fit.noise:.4g}",
                   ", ".join(f"{n} {v:.4g}" for n, v in zip(numeric, f.lengthscale)) or "-")
            if cats:
                row += (", ".join(f"{n} {v:.3f}" for n, v in zip(cats, f.fit.level_correlation)),)
            rows.append(row + (", ".join(_bound_name(a, numeric, cats) for a in f.fit.at_bound) or "-",))
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        left = (0, 6, 7, 8)
        table = ["  ".join(c.ljust(w) if i in left else c.rjust(w) for i, (c, w) in enumerate(zip(r, widths)))
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


def _bound_name(name: str, numeric: Sequence[str], cats: Sequence[str] = ()) -> str:
    if name.startswith("lengthscale["):
        return f"lengthscale {numeric[int(name[12:-1])]}"
    if name.startswith("level_correlation["):
        return f"level correlation {cats[int(name[18:-1])]}"
    return name


def _describe_input(space: Space, j: int) -> str:
    name, kind = space.names[j], space.kind(j)
    if kind == CATEGORICAL:
        return f"{name} (levels {', '.join(space.levels[j])})"
    if kind == STEPPED:
        return f"{name} [{space.low[j]:g}, {space.high[j]:g}] step {space.steps[j]:g}"
    return f"{name} [{space.low[j]:g}, {space.high[j]:g}]"


def calibrate(path, *, response: str, inputs: Sequence[str] | None = None, kernel: str = "matern52",
              goal: str = "minimize", restarts: int = 8, seed: int = 0,
              stepped: Mapping[str, float | None] | None = None) -> Calibration:
    """Fit a world prior (kernel, lengthscales, amplitude, mean, noise, level correlations) to past runs
    in a CSV file.

    Parameters
    ----------
    path : str or Path
        CSV with one row per past run: one column per input and one for the response.
    response : str
        The response column.
    inputs : sequence of str, optional
        Input columns. A column holding text (no number at all) is a categorical input, its levels
        the distinct names in order of first appearance in the file. Default: every other column
        holding numbers, and every text column in which some name repeats (a text column with a
        different name in every row, such as a batch label, or with one name only, is left out and
        named in the warnings).
    kernel : str
        One of ``sqexp``, ``matern12``, ``matern32``, ``matern52``, or ``auto``: fit all four and
        choose by leave-one-out log predictive density.
    goal : str
        "minimize" or "maximize": recorded (and noted in the TOML); the fit is the same.
    restarts : int
        Starting points for L-BFGS-B per kernel.
    seed : int
        Seed for the random starting points.
    stepped : mapping of str to float or None, optional
        Numeric input columns to write as stepped inputs, with their step (None: the smallest gap
        between the column's distinct values, said in the study's comment). Every value must lie on
        ``low + k step`` within 1e-9 x step. Without this, whole-number columns stay continuous (a
        warning names them).

    Returns
    -------
    Calibration

    Raises
    ------
    DataError
        One line naming the file, column and row: anything :func:`simlab.study.data.read_table`
        refuses, plus fewer rows than inputs + 2, too few distinct input settings, a constant
        response or input, column names a study cannot use, a stepped column that is not a numeric
        input or whose values are off the step. Repeated input settings with different responses
        are fine: they are what tells the noise.
    ValueError
        For an unknown ``kernel`` or ``goal`` (the valid names are listed).

    Notes
    -----
    Without categorical inputs the fit is :func:`simlab.model.fit.fit_hyperparameters` (stepped
    values are numbers at the data's points, where rounding changes nothing); with them it is
    :func:`simlab.model.fit_levels.fit_mixed`, the product kernel of :mod:`simlab.model.levels`.
    """
    if goal not in GOALS:
        raise ValueError(f"goal must be one of {', '.join(GOALS)}; got {goal!r}")
    if kernel != "auto" and kernel not in KERNELS:
        raise ValueError(f"kernel must be one of {', '.join(KERNELS)} or auto; got {kernel!r}")
    name = str(path)
    stepped = dict(stepped or {})

    # ---- validate the data
    skipped_why = []
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
        df = read_table(path, columns=[*inputs, response], role=_ROLE, required=[response], text=True)
    else:
        df = read_table(path, role=_ROLE, required=[response], text=True)
        inputs = []
        for c in df.columns:
            if c == response:
                continue
            if _is_text(df[c]):
                distinct = len(set(df[c]))
                if distinct == len(df) or distinct < 2:
                    skipped_why.append(c)
                    continue
            inputs.append(c)
        if not inputs:
            raise DataError(name, f"has no numeric column besides the response \"{response}\"; "
                            "calibration needs at least one input column")
    skipped = list(df.attrs.get("skipped", ())) + skipped_why
    for c in inputs:
        if not _NAME.match(c):
            raise DataError(name, "cannot name an input in a study: use letters, digits, _ . - and start "
                            "with a letter or _ (rename the column)", column=c)
        if c in RESERVED:
            raise DataError(name, f"is a reserved column name of the traces ({', '.join(RESERVED)}); "
                            "rename the column", column=c)
    for c in stepped:
        if c not in inputs:
            raise DataError(name, f"is not an input column (--stepped names input columns: {', '.join(inputs)})",
                            column=c)
        if _is_text(df[c]):
            raise DataError(name, "holds level names (text), not numbers: it is a categorical input and cannot "
                            "also be stepped", column=c)
    space, X = _space(name, df, inputs, stepped)
    y = df[response].to_numpy(dtype=float)
    n, d = X.shape
    if n < d + 2:
        raise DataError(name, f"has {n} data rows; calibrating {d} input{'s' * (d > 1)} needs at least "
                        f"{d + 2} (inputs + 2), and about {_ROWS_PER_INPUT * d} for a useful fit")
    if np.ptp(y) == 0:
        raise DataError(name, f"is constant (every row is {y[0]:g}); there is nothing to fit", column=response)
    distinct = len(np.unique(X, axis=0))
    if distinct < d + 2:
        raise DataError(name, f"has only {distinct} distinct input settings among {n} rows; calibrating {d} "
                        f"input{'s' * (d > 1)} needs at least {d + 2}")

    # ---- fit
    numeric, cats = list(space.numeric), list(space.categorical)
    width = np.array([space.high[j] - space.low[j] for j in numeric])
    U = (X[:, numeric] - np.array([space.low[j] for j in numeric])) / width if numeric else np.empty((n, 0))
    levels = X[:, cats].astype(int)
    counts = [len(space.levels[j]) for j in cats]
    fits = []
    for kname in (tuple(KERNELS) if kernel == "auto" else (kernel,)):
        # Keyed by kernel name (NEP 19 style, as simlab.rng does for policies), so each kernel's
        # starting points do not depend on which other kernels are fitted.
        rng = np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(label_key(kname),)))
        if cats:
            from ..model.fit_levels import fit_mixed, mixed_loo
            fit = fit_mixed(kname, U, levels, counts, y, restarts=restarts, rng=rng)
            loo = mixed_loo(kname, U, levels, counts, y, **fit.hyper).total
        else:
            fit = fit_hyperparameters(kname, U, y, restarts=restarts, rng=rng)
            loo = loo_log_predictive(kname, U, y, **fit.hyper).total
        fits.append(KernelFit(fit=fit, loo=loo, lengthscale=tuple(float(v) for v in np.asarray(fit.lengthscale) * width)))
    chosen = max(fits, key=lambda f: f.loo).kernel

    sign = 1.0 if goal == "minimize" else -1.0
    best_i = int(np.argmin(sign * y))
    cal = Calibration(source=name, response=response, goal=goal, space=space, fits=tuple(fits), chosen=chosen,
                      rows=n, distinct=distinct, best_row=int(df.index[best_i]), best_value=float(y[best_i]),
                      warnings=(), steps_given={c: v is not None for c, v in stepped.items()})
    warnings = _warnings(cal, y, skipped) + _whole_number_warnings(space, X, n)
    return dataclasses.replace(cal, warnings=tuple(warnings))


def _space(name: str, df, inputs: list[str], stepped: dict) -> tuple[Space, np.ndarray]:
    """The space spanning the data and the inputs as a float matrix (n, d), level indices for text columns."""
    kinds, low, high, steps, levels, cols = [], [], [], [], [], []
    for c in inputs:
        col = df[c].to_numpy()
        if _is_text(col):
            lev = tuple(dict.fromkeys(col))       # order of first appearance, as a [candidates] library reads
            if len(lev) < 2:
                raise DataError(name, f"never varies (every row is \"{lev[0]}\"); the study's space needs at least "
                                "two levels, so leave it out of the inputs", column=c)
            if len(lev) > MAX_LEVELS:
                raise DataError(name, f"holds {len(lev)} different names; a categorical input has at most "
                                f"{MAX_LEVELS} levels", column=c)
            index = {v: i for i, v in enumerate(lev)}
            kinds.append(CATEGORICAL), low.append(0.0), high.append(float(len(lev) - 1)), steps.append(0.0)
            levels.append(lev), cols.append(np.array([index[v] for v in col], dtype=float))
            continue
        col = col.astype(float)
        lo, hi = float(col.min()), float(col.max())
        if lo == hi:
            raise DataError(name, f"never varies (every row is {lo:g}); the study's space needs low < high, "
                            "so leave it out of the inputs", column=c)
        if c in stepped:
            step, col = _step(name, df, c, col, stepped[c])
            kinds.append(STEPPED), steps.append(step)
        else:
            kinds.append(CONTINUOUS), steps.append(0.0)
        low.append(lo), high.append(hi), levels.append(()), cols.append(col)
    return _make_space(inputs, low, high, kinds, steps, levels), np.column_stack(cols)


def _step(name: str, df, c: str, col: np.ndarray, step: float | None) -> tuple[float, np.ndarray]:
    """The step of a stepped column (given, or the smallest gap between its distinct values) and the
    column moved exactly onto ``low + k step``; values farther than 1e-9 x step from it are refused."""
    lo = float(col.min())
    if step is None:
        step = float(np.diff(np.unique(col)).min())
        how = "the smallest gap between its values"
    else:
        if not (step > 0 and np.isfinite(step)):
            raise DataError(name, f"--stepped gives step {step:g}; a step must be a number > 0", column=c)
        how = "the step given"
    k = np.rint((col - lo) / step)
    off = np.flatnonzero(np.abs(col - (lo + k * step)) > _ON_GRID * step)
    if off.size:
        i = int(off[0])
        raise DataError(name, f"{col[i]:.10g} is not on the step {step:g} from {lo:g} ({how}); give the step as "
                        f"--stepped {c}=STEP, or leave the column continuous", column=c, row=int(df.index[i]))
    if k.max() > 1_000_000:
        raise DataError(name, f"a step of {step:g} gives {int(k.max()) + 1:,} allowed values (at most 1,000,001); "
                        "leave the column continuous", column=c)
    return step, lo + k * step


def _whole_number_warnings(space: Space, X: np.ndarray, n: int) -> list[str]:
    out = []
    for j in range(space.dim):
        if space.kind(j) != CONTINUOUS:
            continue
        values = np.unique(X[:, j])
        if np.all(values == np.rint(values)) and len(values) <= _FEW_WHOLE and len(values) < n / 2:
            nm = space.names[j]
            out.append(f"{nm} holds only whole numbers ({len(values)} distinct values, {values[0]:g} to "
                       f"{values[-1]:g}): kept continuous; `--stepped {nm}` makes it a stepped input (worlds and "
                       "beliefs then take its allowed values only)")
    return out


def _warnings(cal: Calibration, y: np.ndarray, skipped: list[str]) -> list[str]:
    out = []
    b = cal.best
    f = b.fit
    names = cal.numeric_names
    cats = [cal.space.names[j] for j in cal.space.categorical]
    for item in f.at_bound:
        if item.startswith("level_correlation["):
            k = int(item[18:-1])
            L, rho = f.levels[k], f.level_correlation[k]
            if rho > 0:
                out.append(f"level correlation of {cats[k]} is at its upper end ({rho:.4f}): the data cannot tell "
                           f"its levels apart; worlds drawn with it treat them as nearly the same setting")
            else:
                out.append(f"level correlation of {cats[k]} is at its lower end ({rho:.4f}, the least -1/(L-1) = "
                           f"{-1 / (L - 1):.4g} allows for {L} levels): the levels look opposed; check the data")
            continue
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
        out.append("left out columns with no numbers: " + ", ".join(skipped) + " (text with a different name in "
                   "every row, such as a label, or with one name only; --inputs naming a text column makes it a "
                   "categorical input)")
    return out


def _is_text(col) -> bool:
    """A column read as text (level names) rather than numbers; read_table gives numbers as float64."""
    return not np.issubdtype(np.asarray(col).dtype, np.number)
