"""Study files (TOML) to a `Study` (types.py): the only place that validates user input."""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from pathlib import Path
from typing import Any

import numpy as np

from ..columns import LIMIT_COLUMNS, STOP_COLUMNS, TRACE_COLUMNS, WORLD_COLUMNS
from ..model.kernels import KERNELS
from ..policies import POLICIES
from ..stopping.rules import STOP_RULES
from ..worlds.kinds import WORLD_KINDS, world_options
from ..worlds.mixed import MAX_ENUMERATED, MAX_SEARCHED, discrete_combinations, needs_mixed
from ..worlds.noise import NOISE_SHAPES
from ..worlds import functions
from .types import (CATEGORICAL, CONTINUOUS, DESIGNS, GOALS, LOG, MAX_REPLICATES, NAME_LENGTH, STEPPED, UNITS_LENGTH,
                    CampaignSpec, FailSpec, HistorySpec, Library, LimitSpec, PolicySpec, Prior, Space, StopSpec, Study,
                    StudyError, SweepSpec, WorldSpec)

__all__ = ["load_study", "parse_study", "advice", "RESERVED",
           # the types a study is made of (types.py), imported here because reading makes them
           "StudyError", "Space", "Prior", "WorldSpec", "CampaignSpec", "PolicySpec", "SweepSpec", "HistorySpec", "StopSpec",
           "Study", "Library", "MAX_REPLICATES", "NAME_LENGTH", "GOALS", "DESIGNS", "unsupported", "MAX_LEVELS"]

# Columns of traces.parquet and worlds.csv that an input name must not shadow (defined once, in columns.py).
RESERVED = TRACE_COLUMNS + STOP_COLUMNS + LIMIT_COLUMNS + WORLD_COLUMNS[1:]
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_.-]*$")
# Most levels a categorical input may have, and most rows a library may hold: beyond these an
# exchangeable correlation (one number for all pairs) or a scored-in-full library is not what was meant.
MAX_LEVELS = 1000
MAX_LIBRARY = 1_000_000
# Most [[limit]] tables: each is a world of its own in every replicate and a belief in every campaign.
MAX_LIMITS = 8
# Keys of a [space] entry written as a table.
_INPUT_KEYS = ("low", "high", "step", "scale", "levels")
_SCALES = ("linear", "log")


def _shape_keys() -> tuple[str, ...]:
    """Every noise shape's own settings (e.g. noise_df for "student"): [world] keys too."""
    return tuple(dict.fromkeys(k for c in NOISE_SHAPES.values() for k in c.options))


def _noise_keys() -> tuple[str, ...]:
    return ("noise_kind", *_shape_keys(), "noise_growth", "lost")


def _section_keys() -> dict[str, tuple[str, ...]]:
    """The keys each section allows; read from the registries when asked, so a registered world
    kind or noise shape brings its settings with it."""
    return {
        "study": ("name", "goal", "replicates", "seed", "units"),
        "world": ("kernel", "lengthscale", "amplitude", "mean", "noise", "level_correlation", "method",
                  *world_options(1), "function", "lengthscale_within", "amplitude_within", *_noise_keys(),
                  "fails_where"),
        "campaign": ("initial", "design", "budgets", "pool", "batch"),
        "target": ("regret", "difference", "floor", "feasible_chance"),
        "sweep": ("lengthscale", "amplitude", "replicates"),
        "history": ("file", "response"),
        "candidates": ("file",),
    }


def load_study(path: str | Path, *, runnable: bool = True) -> Study:
    """Read and validate a study file.

    ``runnable=False`` also accepts a study that uses an input kind some part of simlab does not
    support yet (:func:`unsupported`); such a study reads and dumps but cannot be run.

    Raises
    ------
    StudyError
        With a one-line message naming the file, the field and what is allowed.
    """
    path = Path(path)
    name = str(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise StudyError(name, "", "no such file") from None
    except IsADirectoryError:
        raise StudyError(name, "", "is a folder, not a study file") from None
    except OSError as exc:
        raise StudyError(name, "", f"cannot be read ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise StudyError(name, "", f"is not UTF-8 text (bad byte at position {exc.start})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StudyError(name, "", f"is not valid TOML: {exc}") from None
    return parse_study(data, source=name, default_name=path.stem, base_dir=path.parent, runnable=runnable)


def parse_study(data: dict, *, source: str = "<study>", default_name: str = "study",
                base_dir: str | Path | None = None, runnable: bool = True) -> Study:
    """Validate an already-parsed TOML mapping; see :func:`load_study`.

    ``base_dir`` is where relative file paths in the study (``[history] file``, ``[candidates]
    file``) are resolved; :func:`load_study` passes the study file's folder.
    """
    base_dir = Path(base_dir) if base_dir is not None else None
    r = _Reader(source)
    r.keys(data, "", ("study", "space", "world", "belief", "campaign", "target", "policy", "sweep",
                          "history", "candidates", "stop", "limit"))

    st = r.table(data, "study", required=False)
    r.keys(st, "study", _section_keys()["study"])
    name = r.string(st, "study.name", default=default_name)
    if not _NAME.match(name):
        r.fail("study.name", f"must be a folder-safe name (letters, digits, _ . -); got {name!r}")
    if len(name) > NAME_LENGTH:
        r.fail("study.name", f"must be at most {NAME_LENGTH} characters (it names the results folder); "
               f"got {len(name)}")
    goal = r.choice(st, "study.goal", GOALS, default="minimize")
    replicates = r.integer(st, "study.replicates", low=1, high=MAX_REPLICATES, default=100)
    seed = r.integer(st, "study.seed", low=0, high=2**63 - 1, default=0)
    units = r.string(st, "study.units", default="")
    if len(units) > UNITS_LENGTH or not units.isprintable() or units != units.strip():
        r.fail("study.units", f"must be a short printable label of at most {UNITS_LENGTH} characters, without "
               f"leading or trailing spaces (e.g. \"MPa\"); got {units!r}")

    wt = r.table(data, "world")
    function = r.string(wt, "world.function", default=None)
    if function is not None:
        function = r.choice(wt, "world.function", tuple(functions.FUNCTIONS), default=None)
        fn = functions.FUNCTIONS[function]
        r.keys(wt, "world", ("function", "noise", *_noise_keys()),
               hint="a published function is the world itself and takes only noise settings: drop the "
                    "prior keys here (the campaigns' model goes in [belief])", here=_section_keys()["world"])
        if goal != "minimize":
            r.fail("study.goal", f"published test functions are minimised; use goal = \"minimize\" with function = \"{function}\"")
        if "candidates" in data:
            r.fail("[candidates]", f"a library of candidates needs a prior world, not function = \"{function}\" "
                   "(a published function is defined on its whole domain)")
        space = _read_space(r, data, fn=fn)
        noise = r.number(wt, "world.noise", low=0.0, default=0.0)
        world = WorldSpec(prior=None, function=function, noise=noise, **_read_noise(r, wt))
        world_prior = None
    else:
        space = _read_space(r, data, fn=None, base_dir=base_dir)
        r.keys(wt, "world", _section_keys()["world"])
        world_prior = _read_prior(r, wt, "world", space, base=None)
        method = r.choice(wt, "world.method", tuple(WORLD_KINDS), default="features")
        within = {key: r.number(wt, f"world.{key}", low=1.0, high=100.0, default=1.0)
                  for key in ("lengthscale_within", "amplitude_within")}
        refusal = WORLD_KINDS[method].refuse(space.dim, uncertain_lengthscale=within["lengthscale_within"] != 1.0)
        if refusal is not None:
            r.fail(*refusal)
        if needs_mixed(space):
            _refuse_mixed(r, space, method, within)
        settings = r.options(wt, "world", world_options(space.dim))
        world = WorldSpec(prior=world_prior, function=None, noise=world_prior.noise, method=method,
                          method_settings=settings, **within, **_read_noise(r, wt),
                          fails_where=_read_fails_where(r, wt, space))

    bt = r.table(data, "belief", required=False)
    r.keys(bt, "belief", ("kernel", "lengthscale", "amplitude", "mean", "noise", "level_correlation", "refit_every"))
    refit_every = r.integer(bt, "belief.refit_every", low=0, high=100_000, default=0)
    belief = _read_prior(r, bt, "belief", space, base=world_prior, noise_default=world.noise)

    history = _read_history(r, data, space, base_dir)

    ct = r.table(data, "campaign")
    r.keys(ct, "campaign", _section_keys()["campaign"])
    initial = r.integer(ct, "campaign.initial", low=0 if history else 1, high=100_000,
                        default=0 if history else 2 * space.dim,
                        why="" if history else " (0 only with a [history] of past trials)")
    design = r.choice(ct, "campaign.design", DESIGNS, default="sobol")
    budgets = r.int_list(ct, "campaign.budgets", low=1, high=100_000)
    if len(set(budgets)) != len(budgets):
        r.fail("campaign.budgets", f"must not repeat a budget; got {list(budgets)}")
    if min(budgets) < initial:
        r.fail("campaign.budgets", f"every budget must be at least campaign.initial = {initial} "
               f"(the initial design counts toward the budget); got {min(budgets)}")
    pool = r.integer(ct, "campaign.pool", low=16, high=1_000_000, default=2048)
    batch = r.integer(ct, "campaign.batch", low=1, high=10_000, default=1)
    campaign = CampaignSpec(initial=initial, design=design, budgets=budgets, pool=pool,
                            batch=batch)

    tt = r.table(data, "target")
    r.keys(tt, "target", _section_keys()["target"])
    target = r.number(tt, "target.regret", low=0.0)
    # smallest median paired regret difference that matters for a "clear" lead (choice.choice_table)
    difference = r.number(tt, "target.difference", low=0.0, default=target / 10.0)
    # a trial whose true value is worse than this (objective units, the study's goal) counts as harmful
    floor = r.number(tt, "target.floor", default=None)
    # the recommendation must be believed to respect every limit (and to work) at least this surely
    feasible_chance = r.number(tt, "target.feasible_chance", low=0.5, high=1.0, high_open=True, default=0.95)
    limits = _read_limits(r, data, space)

    policies = _read_policies(r, data)
    stops = _read_stops(r, data, campaign)

    sw = r.table(data, "sweep", required=False)
    r.keys(sw, "sweep", _section_keys()["sweep"])
    sweep = SweepSpec(
        lengthscale=r.factor_list(sw, "sweep.lengthscale", SweepSpec.lengthscale),
        amplitude=r.factor_list(sw, "sweep.amplitude", SweepSpec.amplitude),
        replicates=r.integer(sw, "sweep.replicates", low=1, high=MAX_REPLICATES, default=min(replicates, 50)),
    )
    study = Study(name=name, goal=goal, replicates=replicates, seed=seed, space=space, world=world,
                  belief=belief, campaign=campaign, target=target, policies=policies, sweep=sweep,
                  history=history, refit_every=refit_every, difference=difference, units=units, floor=floor,
                  stops=stops, limits=limits, feasible_chance=feasible_chance, source=source)
    _check_feasible_settings(r, study)
    if runnable:
        refusal = unsupported(study)
        if refusal is not None:
            r.fail(*refusal)
    return study


def _read_noise(r: "_Reader", wt: dict) -> dict:
    kind = r.choice(wt, "world.noise_kind", tuple(NOISE_SHAPES), default="gaussian")
    shape = NOISE_SHAPES[kind]
    for key in _shape_keys():
        if key in wt and key not in shape.options:
            owners = [n for n, c in NOISE_SHAPES.items() if key in c.options]
            r.fail(f"world.{key}", "only applies with " + " or ".join(f'noise_kind = "{n}"' for n in owners))
    settings = r.options(wt, "world", shape.options)
    growth = r.number(wt, "world.noise_growth", low=-10.0, high=10.0, default=0.0)
    lost = r.number(wt, "world.lost", low=0.0, high=0.95, default=0.0)
    return {"noise_kind": kind, "noise_settings": settings, "noise_growth": growth, "lost": lost}


def _read_fails_where(r: "_Reader", wt: dict, space: Space) -> FailSpec | None:
    """``[world] fails_where = { share = 0.2, lengthscale = 0.3 }``: hidden failures, or None."""
    if "fails_where" not in wt:
        return None
    t = wt["fails_where"]
    if not isinstance(t, dict):
        r.fail("world.fails_where", "must be a table such as { share = 0.2, lengthscale = 0.3 }: the failing share "
               "of the space and the lengthscale of the failing region, in input units")
    r.keys(t, "world.fails_where", ("share", "lengthscale", "kernel"))
    share = r.number(t, "world.fails_where.share", low=0.0, high=1.0, low_open=True, high_open=True)
    if share > 0.9:
        r.fail("world.fails_where.share", f"must be at most 0.9 (at least a tenth of the space must work); got {share:g}")
    if "lengthscale" not in t:
        r.fail("world.fails_where.lengthscale", "is required: one number for all inputs or one per input, in input "
               "units (how wide the failing region's features are)")
    kernel = r.choice(t, "world.fails_where.kernel", tuple(KERNELS), default="matern52")
    return FailSpec(share=share, lengthscale=r.lengthscale(t, "world.fails_where.lengthscale", space), kernel=kernel)


def _read_limits(r: "_Reader", data: dict, space: Space) -> tuple[LimitSpec, ...]:
    """``[[limit]]`` tables (none is fine): a name, ``below`` or ``above``, and the quantity's own prior."""
    tables = r.tables(data, "limit", 'name = "viscosity" below = 40.0')
    if len(tables) > MAX_LIMITS:
        r.fail("limit", f"at most {MAX_LIMITS} [[limit]] tables; got {len(tables)}")
    reserved = set(space.names) | set(TRACE_COLUMNS) | set(STOP_COLUMNS) | set(LIMIT_COLUMNS)
    out, seen = [], set()
    for i, t in enumerate(tables):
        where = f"limit[{i}]"
        r.keys(t, where, ("name", "below", "above", "kernel", "lengthscale", "amplitude", "mean", "noise", "correlation"))
        name = r.string(t, f"{where}.name")
        if not _NAME.match(name) or len(name) > NAME_LENGTH:
            r.fail(f"{where}.name", f"must be a short name of letters, digits, _ . - (it names the limit in the report); got {name!r}")
        if name in seen or name in reserved:
            r.fail(f"{where}.name", f"{name!r} is already taken (" + ("by another [[limit]]" if name in seen
                   else "by an input or a traces column") + "): give each limit a name of its own")
        seen.add(name)
        sides = [k for k in ("below", "above") if k in t]
        if len(sides) != 1:
            r.fail(f"{where}.below", "give exactly one of below = ... (the value must stay below it) or above = ...; got "
                   + (" and ".join(sides) if sides else "neither"))
        bound = r.number(t, f"{where}.{sides[0]}")
        prior = _read_prior(r, t, where, space, base=None, noise_default=0.0)
        rho = r.number(t, f"{where}.correlation", low=-1.0, high=1.0, low_open=True, high_open=True, default=0.0)
        out.append(LimitSpec(name=name, prior=prior, correlation=rho, **{sides[0]: bound}))
    return tuple(out)


def _check_feasible_settings(r: "_Reader", study: Study) -> None:
    """``feasible = "weight"`` needs something to weight by."""
    if study.constrained:
        return
    for i, p in enumerate(study.policies):
        if p.options.get("feasible", "ignore") != "ignore":
            r.fail(f"policy[{i}].feasible", "weights the rule by the chance of respecting the limits, but the study has no "
                   "[[limit]] tables and no [world] fails_where: leave it out")


def _read_history(r: "_Reader", data: dict, space: Space, base_dir: Path | None) -> HistorySpec | None:
    """``[history]``: past trials in a CSV, one column per input (level names for a categorical input,
    allowed values for a stepped one; with a library, each row one of its rows) and the response."""
    if "history" not in data:
        return None
    ht = r.table(data, "history")
    r.keys(ht, "history", _section_keys()["history"])
    file = r.string(ht, "history.file")
    response = r.string(ht, "history.response", default="y")
    if response in space.names:
        r.fail("history.response", f"\"{response}\" is also an input in [space]; name the response column")
    path = Path(file)
    if not path.is_absolute():
        path = (base_dir or Path.cwd()) / path
    from .data import DataError, read_table
    text = [space.names[j] for j in space.categorical]
    try:
        table = read_table(path, columns=[*space.names, response], role="history", text=text)
    except DataError as exc:
        raise StudyError(r.source, "history.file", str(exc)) from None
    X = np.empty((len(table), space.dim))
    for j, name in enumerate(space.names):
        X[:, j] = _history_column(r, path, table, space, j)
    if space.library is not None:
        X = _history_rows(r, path, table, space, X)
    return HistorySpec(file=str(path.resolve()), response=response,
                       X=tuple(tuple(float(v) for v in row) for row in X),
                       y=tuple(float(v) for v in table[response].to_numpy(dtype=float)))


def _history_column(r: "_Reader", path: Path, table, space: Space, j: int) -> np.ndarray:
    """One input column of the history as floats (level indices for a categorical input, stepped
    values moved exactly onto ``low + k step``), refusing a value the input does not allow."""
    name, kind = space.names[j], space.kind(j)
    col = table[name].to_numpy()

    def fail(i: int, why: str):
        r.fail("history.file", f"{path}: column \"{name}\", row {table.index[i]} (the header is row 1): {why}")

    if kind == CATEGORICAL:
        index = {level: k for k, level in enumerate(space.levels[j])}
        bad = [i for i, v in enumerate(col) if v not in index]
        if bad:
            fail(bad[0], f"\"{col[bad[0]]}\" is not a level of [space] {name}; allowed: {', '.join(space.levels[j])}")
        return np.array([index[v] for v in col], dtype=float)
    col = col.astype(float)
    lo, hi = space.low[j], space.high[j]
    # 1e-9 x step: a stepped value written to about nine digits of the step is on the grid (and may
    # sit that far beyond an end); anything farther is another setting, never rounded silently
    tol = 1e-9 * space.steps[j] if kind == STEPPED else 0.0
    bad = np.flatnonzero((col < lo - tol) | (col > hi + tol))
    if bad.size:
        i = int(bad[0])
        fail(i, f"{col[i]:.12g} lies outside [space] [{lo:g}, {hi:g}]; widen the space or drop the row")
    if kind == STEPPED:
        step = space.steps[j]
        k = np.rint((col - lo) / step)
        off = np.flatnonzero(np.abs(col - (lo + k * step)) > tol)
        if off.size:
            i = int(off[0])
            fail(i, f"{col[i]:.10g} is not one of the allowed values {lo:g}, {lo + step:g}, ... {hi:g} (step {step:g})")
        col = lo + k * step
    return col


def _history_rows(r: "_Reader", path: Path, table, space: Space, X: np.ndarray) -> np.ndarray:
    """With a library, every past trial must be one of its rows: each row is replaced by the library's
    own values (so its unit-cube point is bit for bit the library's), else refused naming the row."""
    rows = space.library.rows
    cats = set(space.categorical)
    exact = {row: i for i, row in enumerate(rows)}
    numeric = np.array([[v for j, v in enumerate(row) if j not in cats] for row in rows], dtype=float)
    labels = [tuple(v for j, v in enumerate(row) if j in cats) for row in rows]
    out = np.empty_like(X)
    for n, x in enumerate(X):
        user = tuple(space.levels[j][int(v)] if j in cats else float(v) for j, v in enumerate(x))
        i = exact.get(user)
        if i is None:
            # a number written with other digits (0.10 for 0.1, 1e-1): the same value within 1e-9 relative
            lab = tuple(user[j] for j in sorted(cats))
            xn = np.array([user[j] for j in range(space.dim) if j not in cats], dtype=float)
            close = np.flatnonzero(np.all(np.abs(numeric - xn) <= 1e-9 * np.maximum(np.abs(xn), 1e-300), axis=1))
            close = [c for c in close if labels[c] == lab]
            if not close:
                shown = ", ".join(f"{nm} = {v:g}" if isinstance(v, float) else f"{nm} = {v}"
                                  for nm, v in zip(space.names, user))
                r.fail("history.file", f"{path}: row {table.index[n]} (the header is row 1): ({shown}) is not a row of "
                       f"the [candidates] library {Path(space.library.file).name}; every trial is one of its rows "
                       "(add the row to the library or drop it here)")
            i = int(close[0])
        out[n] = [space.levels[j].index(v) if j in cats else v for j, v in enumerate(rows[i])]
    return out


def _read_space(r: "_Reader", data: dict, *, fn, base_dir: Path | None = None) -> Space:
    if fn is not None and "space" not in data:
        return Space(names=tuple(f"x{i + 1}" for i in range(fn.dim)),
                     low=tuple(float(b[0]) for b in fn.bounds),
                     high=tuple(float(b[1]) for b in fn.bounds))
    if fn is None and "candidates" in data and "space" not in data:
        return _library_space(r, data, base_dir)
    sp = r.table(data, "space")
    if not sp:
        r.fail("space", "is empty; give one entry per input, e.g. barrel_temp = [180.0, 240.0]")
    names, low, high, kinds, steps, levels = [], [], [], [], [], []
    for key, value in sp.items():
        fld = f"space.{key}"
        if not _NAME.match(key):
            r.fail(fld, "an input name must start with a letter or _ and hold only letters, digits, _ . -")
        if key in RESERVED:
            r.fail(fld, f"is a reserved column name of the traces ({', '.join(RESERVED)}); rename the input")
        if isinstance(value, dict):
            if fn is not None:
                r.fail(fld, f"\"{fn.name}\" is defined on its published domain: write this input as [low, high]")
            kind, lo, hi, step, lev = _read_input(r, fld, value)
        elif isinstance(value, list) and len(value) == 2:
            kind, lo, hi, step, lev = CONTINUOUS, r.as_number(value[0], fld + "[0]"), r.as_number(value[1], fld + "[1]"), 0.0, ()
            if not lo < hi:
                r.fail(fld, f"low must be below high; got [{lo}, {hi}]")
        else:
            r.fail(fld, f"must be [low, high] (two numbers), or a table: {{low, high, step}}, {{low, high, "
                   f"scale = \"log\"}} or {{levels = [...]}}; got {value!r}")
        names.append(key), low.append(lo), high.append(hi), kinds.append(kind), steps.append(step), levels.append(lev)
    if fn is not None:
        if len(names) != fn.dim:
            r.fail("space", f"function \"{fn.name}\" has {fn.dim} inputs; [space] lists {len(names)}")
        for k, (lo, hi), (blo, bhi) in zip(names, zip(low, high), fn.bounds):
            if not (math.isclose(lo, blo, abs_tol=1e-12) and math.isclose(hi, bhi, abs_tol=1e-12)):
                r.fail(f"space.{k}", f"\"{fn.name}\" is defined on its published domain [{blo:g}, {bhi:g}] "
                       "for this input; rename inputs freely but keep the bounds")
    space = _make_space(names, low, high, kinds, steps, levels)
    if "candidates" in data:
        space = _make_space(names, low, high, kinds, steps, levels, _read_library(r, data, space, base_dir))
    return space


def _refuse_mixed(r: "_Reader", space: Space, method: str, within: dict) -> None:
    """What the worlds over stepped or categorical inputs and libraries (worlds/mixed.py) cannot do yet."""
    if method != "features":
        r.fail("world.method", f"\"{method}\" worlds are for boxes of reals; stepped or categorical inputs and "
               "libraries are drawn with method = \"features\"")
    for key, value in within.items():
        if value != 1.0:
            r.fail(f"world.{key}", "uncertain hyperparameters are not supported yet with stepped or categorical "
                   "inputs or a library (issue 15 lands them later)")
    if space.library is not None:
        return      # a library's world is evaluated at its rows: no search, no limit
    total = discrete_combinations(space)
    continuous = [j for j in range(space.dim) if space.kind(j) not in (STEPPED, CATEGORICAL)]
    if continuous and total > MAX_SEARCHED:
        r.fail("space", f"{total:,} combinations of levels and stepped values; the world's optimum search covers at "
               f"most {MAX_SEARCHED} beside continuous inputs yet (each gets a full search): use fewer levels or "
               "coarser steps, or a [candidates] library")
    if not continuous and total > MAX_ENUMERATED:
        r.fail("space", f"{total:,} allowed points; at most {MAX_ENUMERATED:,} are enumerated for the world's "
               "optimum yet: use fewer levels or coarser steps, or a [candidates] library")


def _make_space(names, low, high, kinds, steps, levels, library=None) -> Space:
    """A Space whose kind fields stay empty when every input is continuous (a box of reals reads,
    compares and dumps exactly as before issue 15)."""
    if all(k == CONTINUOUS for k in kinds):
        return Space(names=tuple(names), low=tuple(low), high=tuple(high), library=library)
    return Space(names=tuple(names), low=tuple(low), high=tuple(high), kinds=tuple(kinds), steps=tuple(steps),
                 levels=tuple(tuple(v) for v in levels), library=library)


def _read_input(r: "_Reader", fld: str, value: dict) -> tuple[str, float, float, float, tuple[str, ...]]:
    """One [space] entry written as a table: (kind, low, high, step, levels)."""
    r.keys(value, fld, _INPUT_KEYS if "levels" not in value else ("levels",),
           hint="a categorical input takes only levels" if "levels" in value else "")
    if "levels" in value:
        lev = value["levels"]
        if not isinstance(lev, list) or not all(isinstance(v, str) for v in lev):
            r.fail(fld + ".levels", f"must be a list of level names in quotes, e.g. [\"acetone\", \"ethanol\"] "
                   f"(numbered settings are a stepped input: {{low, high, step}}); got {lev!r}")
        lev = [v.strip() for v in lev]
        if len(lev) < 2:
            r.fail(fld + ".levels", f"needs at least two levels (one level is a constant, not an input); got {len(lev)}")
        if len(lev) > MAX_LEVELS:
            r.fail(fld + ".levels", f"at most {MAX_LEVELS} levels; got {len(lev)}")
        if any(not v for v in lev):
            r.fail(fld + ".levels", "a level name must not be blank")
        seen = set()
        for v in lev:
            if v in seen:
                r.fail(fld + ".levels", f"\"{v}\" is listed twice; every level must be named once")
            seen.add(v)
        return CATEGORICAL, 0.0, float(len(lev) - 1), 0.0, tuple(lev)
    for key in ("low", "high"):
        if key not in value:
            r.fail(f"{fld}.{key}", "is required (a number), e.g. { low = 1, high = 6, step = 1 }")
    lo, hi = r.as_number(value["low"], fld + ".low"), r.as_number(value["high"], fld + ".high")
    if not lo < hi:
        r.fail(fld, f"low must be below high; got low = {lo:g}, high = {hi:g}")
    scale = r.choice(value, fld + ".scale", _SCALES, default="linear")
    if "step" in value:
        if scale == "log":
            r.fail(fld + ".step", "a stepped input cannot also be log-scaled; give either step or scale = \"log\"")
        step = r.number(value, fld + ".step", low=0.0, low_open=True)
        n = (hi - lo) / step
        if abs(n - round(n)) > 1e-9 * max(n, 1.0) or round(n) < 1:
            r.fail(fld + ".step", f"must divide the range {lo:g} to {hi:g} into whole steps; {hi - lo:g} / {step:g} = "
                   f"{n:g} steps")
        if round(n) > 1_000_000:
            r.fail(fld + ".step", f"gives {round(n) + 1:,} allowed values (at most 1,000,001); use a continuous input")
        return STEPPED, lo, hi, step, ()
    if scale == "log":
        if lo <= 0:
            r.fail(fld + ".low", f"a log-scaled range must be positive (low > 0); got low = {lo:g}")
        return LOG, lo, hi, 0.0, ()
    return CONTINUOUS, lo, hi, 0.0, ()


def _library_file(r: "_Reader", data: dict, base_dir: Path | None) -> Path:
    ct = r.table(data, "candidates")
    r.keys(ct, "candidates", _section_keys()["candidates"])
    path = Path(r.string(ct, "candidates.file"))
    return path if path.is_absolute() else (base_dir or Path.cwd()) / path


def _library_table(r: "_Reader", path: Path, *, columns=None, text=()):
    from .data import DataError, read_table
    try:
        return read_table(path, columns=columns, text=text, role="the library")
    except DataError as exc:
        raise StudyError(r.source, "candidates.file", str(exc)) from None


def _library_space(r: "_Reader", data: dict, base_dir: Path | None) -> Space:
    """A [candidates] library without [space]: numeric columns are continuous over the rows' range,
    text columns categorical with their levels in order of first appearance."""
    path = _library_file(r, data, base_dir)
    table = _library_table(r, path, text=True)
    names, low, high, kinds, levels = [], [], [], [], []
    for name in table.attrs["header"]:
        where = f"{path}: column \"{name}\""
        if not _NAME.match(name) or name in RESERVED:
            r.fail("candidates.file", f"{where}: cannot name an input (letters, digits, _ . -; not one of "
                   f"{', '.join(RESERVED)}); rename the column")
        col = table[name].to_numpy()
        if col.dtype == object:
            lev = tuple(dict.fromkeys(col))
            if len(lev) < 2:
                r.fail("candidates.file", f"{where}: every row holds \"{lev[0]}\"; a column with one level is not "
                       "an input (drop it)")
            names.append(name), low.append(0.0), high.append(float(len(lev) - 1)), kinds.append(CATEGORICAL)
            levels.append(lev)
        else:
            lo, hi = float(col.min()), float(col.max())
            if not lo < hi:
                r.fail("candidates.file", f"{where}: every row holds {lo:g}; a constant column is not an input (drop it)")
            names.append(name), low.append(lo), high.append(hi), kinds.append(CONTINUOUS), levels.append(())
    steps = (0.0,) * len(names)
    space = _make_space(names, low, high, kinds, steps, levels)
    return _make_space(names, low, high, kinds, steps, levels, _library_rows(r, path, table, space))


def _read_library(r: "_Reader", data: dict, space: Space, base_dir: Path | None) -> Library:
    path = _library_file(r, data, base_dir)
    header = _library_table(r, path, text=True).attrs["header"]
    extra = [c for c in header if c not in space.names]
    if extra:
        r.fail("candidates.file", f"{path}: column \"{extra[0]}\" is not an input in [space] ("
               f"{', '.join(space.names)}); drop the column or add the input")
    text = [n for j, n in enumerate(space.names) if space.kind(j) == CATEGORICAL]
    table = _library_table(r, path, columns=space.names, text=text)
    return _library_rows(r, path, table, space)


def _library_rows(r: "_Reader", path: Path, table, space: Space) -> Library:
    """The library's rows checked against the space (levels, bounds, steps), duplicates dropped."""
    cols = []
    for j, name in enumerate(space.names):
        col = table[name].to_numpy()
        where = f"{path}: column \"{name}\""
        if space.kind(j) == CATEGORICAL:
            known = set(space.levels[j])
            bad = [i for i, v in enumerate(col) if v not in known]
            if bad:
                r.fail("candidates.file", f"{where}, row {table.index[bad[0]]} (the header is row 1): \"{col[bad[0]]}\" "
                       f"is not a level of [space] {name}; allowed: {', '.join(space.levels[j])}")
            cols.append([str(v) for v in col])
            continue
        col = col.astype(float)
        lo, hi = space.low[j], space.high[j]
        bad = np.flatnonzero((col < lo) | (col > hi))
        if bad.size:
            i = int(bad[0])
            r.fail("candidates.file", f"{where}, row {table.index[i]} (the header is row 1): {col[i]:g} lies outside "
                   f"[space] [{lo:g}, {hi:g}]; widen the space or drop the row")
        if space.kind(j) == STEPPED:
            k = (col - lo) / space.steps[j]
            off = np.flatnonzero(np.abs(k - np.rint(k)) > 1e-9 * np.maximum(np.abs(k), 1.0))
            if off.size:
                i = int(off[0])
                r.fail("candidates.file", f"{where}, row {table.index[i]} (the header is row 1): {col[i]:g} is not "
                       f"one of the allowed values {lo:g}, {lo + space.steps[j]:g}, ... {hi:g} (step {space.steps[j]:g})")
            col = lo + np.rint(k) * space.steps[j]
        cols.append([float(v) for v in col])
    rows, dropped, seen = [], [], set()
    for i, row in zip(table.index, zip(*cols)):
        if row in seen:
            dropped.append(int(i))
            continue
        seen.add(row)
        rows.append(row)
    if len(rows) < 2:
        r.fail("candidates.file", f"{path}: holds {len(rows)} distinct row{'s' * (len(rows) != 1)}; a library needs at "
               "least two candidates")
    if len(rows) > MAX_LIBRARY:
        r.fail("candidates.file", f"{path}: holds {len(rows):,} distinct rows; at most {MAX_LIBRARY:,}")
    return Library(file=str(path.resolve()), rows=tuple(rows), dropped=tuple(dropped))


def _read_prior(r: "_Reader", t: dict, section: str, space: Space, *, base: Prior | None,
                noise_default: float | None = None) -> Prior:
    kernel = r.choice(t, f"{section}.kernel", tuple(KERNELS), default=base.kernel if base else "matern52")
    need = "is required: the world is a published function, so there is no world prior to copy"
    if not space.numeric and "lengthscale" not in t:
        ls = ()     # every input categorical: the level correlations are the whole kernel
    elif "lengthscale" in t or base is None:
        if "lengthscale" not in t:
            r.fail(f"{section}.lengthscale", need if section == "belief" else
                   "is required: one number for all inputs or one per input, in input units (natural-log "
                   "units for a log-scaled input)")
        ls = r.lengthscale(t, f"{section}.lengthscale", space)
    else:
        ls = base.lengthscale
    if "amplitude" in t or base is None:
        if "amplitude" not in t:
            r.fail(f"{section}.amplitude", need if section == "belief" else
                   "is required: the prior standard deviation of the objective, a number > 0")
        amp = r.number(t, f"{section}.amplitude", low=0.0, low_open=True)
    else:
        amp = base.amplitude
    if "mean" in t or base is None:
        if "mean" not in t and section == "belief":
            r.fail(f"{section}.mean", need)
        mean = r.number(t, f"{section}.mean", default=0.0)
    else:
        mean = base.mean
    if "noise" in t:
        noise = r.number(t, f"{section}.noise", low=0.0)
    elif base is not None:
        noise = base.noise
    elif noise_default is not None:
        noise = noise_default
    else:
        r.fail(f"{section}.noise", "is required: the observation noise standard deviation, a number >= 0")
    if "level_correlation" in t:
        rho = _level_correlation(r, t, f"{section}.level_correlation", space)
    elif base is not None:
        rho = base.level_correlation
    elif space.categorical:
        r.fail(f"{section}.level_correlation", "is required with categorical inputs: the prior correlation between "
               "two distinct levels, one number for all (e.g. 0.5) or a table by input name")
    else:
        rho = ()
    return Prior(kernel=kernel, lengthscale=ls, amplitude=amp, mean=mean, noise=noise, level_correlation=rho)


def _level_correlation(r: "_Reader", t: dict, field: str, space: Space) -> tuple[float, ...]:
    """One exchangeable correlation per categorical input, each in (-1/(L-1), 1) (Qian, Wu & Wu 2008:
    the L x L matrix with 1 on the diagonal and rho elsewhere is positive definite exactly there)."""
    cats = [space.names[j] for j in space.categorical]
    if not cats:
        r.fail(field, "applies only to categorical inputs ({levels = [...]} in [space]); this space has none")
    v = t["level_correlation"]
    if isinstance(v, dict):
        for key in v:
            if key not in cats:
                r.fail(f"{field}.{key}", f"is not a categorical input; categorical inputs: {', '.join(cats)}")
        for name in cats:
            if name not in v:
                r.fail(field, f"gives no correlation for the categorical input \"{name}\"; give one for each of "
                       f"{', '.join(cats)} (or one number for all)")
        values = {name: r.as_number(v[name], f"{field}.{name}") for name in cats}
    else:
        one = r.as_number(v, field) if not isinstance(v, list) else r.fail(
            field, f"must be one number or a table by input name, e.g. {{ {cats[0]} = 0.5 }}; got {v!r}")
        values = {name: one for name in cats}
    out = []
    for j in space.categorical:
        name, L = space.names[j], len(space.levels[j])
        rho, low = values[name], -1.0 / (L - 1)
        fld = field if not isinstance(v, dict) else f"{field}.{name}"
        if not low < rho < 1.0:
            r.fail(fld, f"for \"{name}\" ({L} levels) must lie strictly between -1/(L-1) = {low:.4g} and 1 (else the "
                   f"level correlation is not positive definite); got {rho:g}")
        out.append(rho)
    return tuple(out)


def _read_policies(r: "_Reader", data: dict) -> tuple[PolicySpec, ...]:
    if "policy" not in data:
        r.fail("policy", "at least one [[policy]] table is required, e.g. [[policy]] rule = \"ei\"")
    tables = r.tables(data, "policy")
    if not tables:
        r.fail("policy", "at least one [[policy]] table is required")
    out, seen = [], {}
    for i, t in enumerate(tables):
        rule, _, label, settings = _read_rule_table(r, t, "policy", i, POLICIES, seen, "policy")
        out.append(PolicySpec(rule=rule, label=label, settings=settings))
    return tuple(out)


def _read_rule_table(r: "_Reader", t: dict, section: str, i: int, registry: dict, seen: dict, noun: str):
    """One ``[[policy]]`` or ``[[stop]]`` table: (rule, its class, label, settings). ``seen`` maps the
    labels read so far to their table index (updated here); labels are unique within the section."""
    where = f"{section}[{i}]"
    if "rule" not in t:
        r.fail(f"{where}.rule", f"is required; one of {', '.join(registry)}")
    rule = r.choice(t, f"{where}.rule", tuple(registry))
    cls = registry[rule]
    r.keys(t, where, ("rule", "label", *cls.options))
    label = r.string(t, f"{where}.label", default=rule)
    if not label.strip() or len(label) > 60:
        r.fail(f"{where}.label", "must be 1 to 60 characters")
    if label in seen:
        r.fail(f"{where}.label", f"\"{label}\" is already used by {section}[{seen[label]}]; give each {noun} its "
               "own label")
    seen[label] = i
    return rule, cls, label, r.options(t, where, cls.options)


def _read_stops(r: "_Reader", data: dict, campaign: CampaignSpec) -> tuple[StopSpec, ...]:
    """``[[stop]]`` tables (none is fine): a rule of STOP_RULES, a label of its own, its settings.

    ``min_trials`` left out becomes the initial design + 2 and may not pass the largest budget (the
    rule could never stop a campaign). Rules that read the same recorded column must agree on the
    settings that shape it (``StopRule.shared``): the column is recorded once per trial.
    """
    tables = r.tables(data, "stop", 'rule = "confident"')
    out, seen, shaped = [], {}, {}
    for i, t in enumerate(tables):
        where = f"stop[{i}]"
        rule, cls, label, settings = _read_rule_table(r, t, "stop", i, STOP_RULES, seen, "stop rule")
        settings = dict(settings)
        if settings["min_trials"] is None:
            settings["min_trials"] = campaign.initial + 2
        if settings["min_trials"] > campaign.horizon:
            r.fail(f"{where}.min_trials", f"must be at most the largest budget, {campaign.horizon} (the rule could "
                   f"never stop a campaign); got {settings['min_trials']}"
                   + (" (the default: the initial design + 2)" if "min_trials" not in t else ""))
        for key in cls.shared:
            first = shaped.setdefault((cls.statistic, key), (i, settings[key]))
            if first[1] != settings[key]:
                r.fail(f"{where}.{key}", f"must equal stop[{first[0]}].{key} = {first[1]!r}: every {rule} rule of a "
                       f"study reads one record, made once per trial; got {settings[key]!r}")
        out.append(StopSpec(rule=rule, label=label, settings=tuple(settings.items())))
    return tuple(out)


class _Reader:
    """Typed getters that raise :class:`StudyError` naming the file and field."""

    def __init__(self, source: str):
        self.source = source

    def fail(self, field: str, message: str):
        raise StudyError(self.source, field, message)

    def keys(self, t: dict, section: str, allowed: tuple[str, ...], hint: str = "", here: tuple[str, ...] = ()):
        """Refuse keys outside ``allowed``; ``here`` lists keys valid in this section in another
        setting (they get ``hint``, never a pointer to another section)."""
        for key in t:
            if key not in allowed:
                where = f"{section}.{key}" if section else key
                close = difflib.get_close_matches(key, allowed, n=1)
                msg = "unknown key"
                home = [sec for sec, keys in _section_keys().items() if key in keys and sec != section
                        and key not in here]
                if home and not close:
                    msg += f"; it belongs in [{home[0]}] (is that section header missing?)"
                else:
                    msg += f"; did you mean \"{close[0]}\"?" if close else f"; allowed: {', '.join(allowed)}"
                if hint:
                    msg += f" ({hint})"
                self.fail(where if section else f"[{key}]", msg)

    def table(self, data: dict, key: str, *, required: bool = True) -> dict:
        if key not in data:
            if required:
                self.fail(f"[{key}]", "section is missing")
            return {}
        value = data[key]
        if not isinstance(value, dict):
            self.fail(f"[{key}]", f"must be a table ([{key}] with keys below it); got {type(value).__name__}")
        return value

    def tables(self, data: dict, key: str, example: str = "") -> list:
        """The ``[[key]]`` tables (an empty list when there are none), refused unless written as such."""
        if key not in data:
            return []
        tables = data[key]
        if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
            self.fail(key, f"must be written as [[{key}]] tables" + (f", e.g. [[{key}]] {example}" if example else ""))
        return tables

    def as_number(self, value, field: str) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(field, f"must be a number; got {value!r}")
        value = float(value)
        if not math.isfinite(value):
            self.fail(field, f"must be a finite number; got {value}")
        return value

    def number(self, t: dict, field: str, *, low=None, high=None, low_open=False, high_open=False,
               default=...) -> float:
        key = field.rsplit(".", 1)[-1]
        if key not in t:
            if default is ...:
                self.fail(field, "is required (a number)")
            return default
        v = self.as_number(t[key], field)
        if high_open and low_open and not low < v < high:     # an open interval, e.g. a probability
            self.fail(field, f"must lie strictly between {low:g} and {high:g}; got {v:g}")
        if low is not None and (v < low or (low_open and v == low)):
            self.fail(field, f"must be {'>' if low_open else '>='} {low:g}; got {v:g}")
        if high is not None and (v > high or (high_open and v == high)):
            self.fail(field, f"must be {'<' if high_open else '<='} {high:g}; got {v:g}")
        return v

    def integer(self, t: dict, field: str, *, low=None, high=None, default=..., why: str = "") -> int:
        key = field.rsplit(".", 1)[-1]
        if key not in t:
            if default is ...:
                self.fail(field, "is required (a whole number)")
            return default
        v = t[key]
        if isinstance(v, bool) or not isinstance(v, int):
            self.fail(field, f"must be a whole number; got {v!r}")
        if (low is not None and v < low) or (high is not None and v > high):
            rng = f"between {low} and {high}" if high is not None else f">= {low}"
            self.fail(field, f"must be {rng}{why}; got {v}")
        return v

    def int_list(self, t: dict, field: str, *, low, high) -> tuple[int, ...]:
        key = field.rsplit(".", 1)[-1]
        if key not in t:
            self.fail(field, "is required: a list of whole numbers, e.g. [10, 20, 30]")
        v = t[key]
        if isinstance(v, int) and not isinstance(v, bool):
            self.fail(field, f"must be a list of whole numbers, even for one budget: write a list like [{v}]")
        if not isinstance(v, list) or not v:
            self.fail(field, f"must be a non-empty list of whole numbers; got {v!r}")
        for item in v:
            if isinstance(item, bool) or not isinstance(item, int) or not low <= item <= high:
                self.fail(field, f"every entry must be a whole number between {low} and {high}; got {item!r}")
        if len(set(v)) == len(v) and v != sorted(v):
            self.fail(field, f"must list budgets in increasing order, e.g. {sorted(v)}; got {v}")
        return tuple(v)

    def factor_list(self, t: dict, field: str, default: tuple[float, ...]) -> tuple[float, ...]:
        key = field.rsplit(".", 1)[-1]
        if key not in t:
            return default
        v = t[key]
        if not isinstance(v, list) or not v:
            self.fail(field, f"must be a non-empty list of factors > 0, e.g. [0.5, 1.0, 2.0]; got {v!r}")
        out = tuple(self.as_number(x, field) for x in v)
        if min(out) <= 0:
            self.fail(field, f"every factor must be > 0; got {min(out):g}")
        if len(set(out)) != len(out):
            self.fail(field, f"must not repeat a factor; got {list(out)}")
        return tuple(sorted(out))

    def string(self, t: dict, field: str, *, default=...) -> str | None:
        key = field.rsplit(".", 1)[-1]
        if key not in t:
            if default is ...:
                self.fail(field, "is required (a string)")
            return default
        v = t[key]
        if not isinstance(v, str):
            self.fail(field, f"must be a string in quotes; got {v!r}")
        return v

    def options(self, t: dict, where: str, options: dict) -> tuple[tuple[str, Any], ...]:
        """An extension's settings (its ``options``, each an `Option`) from table `t`, defaults filled in."""
        settings = []
        for key, opt in options.items():
            fld = f"{where}.{key}"
            if key not in t:
                settings.append((key, opt.default))
            elif opt.kind is int:
                settings.append((key, self.integer(t, fld, low=opt.low, high=opt.high)))
            elif opt.kind is str:
                settings.append((key, self.choice(t, fld, opt.choices)))
            else:
                settings.append((key, self.number(t, fld, low=opt.low, high=opt.high, low_open=opt.low_open,
                                                  high_open=opt.high_open)))
        return tuple(settings)

    def choice(self, t: dict, field: str, allowed: tuple[str, ...], *, default=...) -> str:
        if field.rsplit(".", 1)[-1] not in t and default is not ...:
            return default
        v = self.string(t, field)
        if v not in allowed:
            close = difflib.get_close_matches(v, allowed, n=1)
            hint = f"did you mean \"{close[0]}\"? " if close else ""
            self.fail(field, f"unknown value \"{v}\"; {hint}allowed: {', '.join(allowed)}")
        return v

    def lengthscale(self, t: dict, field: str, space: Space) -> tuple[float, ...]:
        key = field.rsplit(".", 1)[-1]
        v = t[key]
        values = v if isinstance(v, list) else [v]
        d = len(space.numeric)
        if not d:
            self.fail(field, "every input is categorical, so there is no lengthscale: leave it out")
        if len(values) not in (1, d):
            per = f"one per input ({d})" if d == space.dim else (
                f"one per non-categorical input ({d}: {', '.join(space.names[j] for j in space.numeric)})")
            self.fail(field, f"give one number for all inputs or {per}; got {len(values)}")
        out = []
        for i, item in enumerate(values):
            x = self.as_number(item, field)
            if x <= 0:
                self.fail(field, f"every lengthscale must be > 0 (input units); got {x:g}")
            out.append(x)
        if len(out) == 1:
            out = out * d
        return tuple(out)


# Rules that run over stepped and categorical inputs: every rule (the pool moved to allowed values,
# the continuous part polished within each point's level combination; posterior samples drawn with
# the mixed random features, simlab.worlds.mixed.MixedFeatureSample).
MIXED_RULES = ("random", "sobol", "mean", "lcb", "pi", "ei", "gp-ucb", "hedge", "thompson", "pbest", "mes", "kg")
# Rules that choose a library's rows (every row scored exactly, or drawn without replacement).
LIBRARY_RULES = ("random", "sobol", "ei", "pi", "lcb", "mean", "gp-ucb", "hedge", "thompson", "pbest", "mes", "kg")


def unsupported(study: Study) -> tuple[str, str] | None:
    """(field, message) when the study combines a space with a part of simlab that does not run on it yet."""
    space = study.space
    if space.library is not None:
        for i, p in enumerate(study.policies):
            if p.rule not in LIBRARY_RULES:
                return f"policy[{i}].rule", (f"\"{p.rule}\" does not choose from a [candidates] library yet (issue 15 "
                                             f"is landing in slices); with a library use {', '.join(LIBRARY_RULES)}")
            if p.options.get("exploit_last", 0):
                return f"policy[{i}].exploit_last", "is not supported yet with a [candidates] library"
        if study.campaign.batch != 1:
            return "campaign.batch", "rounds of several trials are not supported yet with a [candidates] library"
    elif space.discrete:
        kinds = " and ".join(sorted({space.kind(j) for j in space.discrete}))
        for i, p in enumerate(study.policies):
            if p.rule not in MIXED_RULES:
                return f"policy[{i}].rule", (f"\"{p.rule}\" does not run over {kinds} inputs yet (issue 15 is landing "
                                             f"in slices); there use {', '.join(MIXED_RULES)}")
    if study.constrained:
        what = "[[limit]] tables" if study.limits else "world.fails_where"
        field = "limit" if study.limits else "world.fails_where"
        if study.world.function is not None:
            return field, f"{what} need a prior world (the limits' worlds are drawn beside it), not a published function"
        if space.discrete or space.library is not None:
            return field, f"{what} are not supported yet with stepped or categorical inputs or a [candidates] library"
        if study.history is not None:
            return field, f"{what} are not supported yet with a [history] (past trials would need their measured limits)"
        for i, p in enumerate(study.policies):
            if p.options.get("feasible", "ignore") == "weight" and not POLICIES[p.rule].weights_feasibility:
                return f"policy[{i}].feasible", (f"\"weight\" does not apply to rule \"{p.rule}\": it weights a score "
                                                 "that is a positive utility, as in " + ", ".join(
                                                     k for k, c in POLICIES.items() if c.weights_feasibility))
    if space.discrete and study.refit_every:
        return "belief.refit_every", ("belief refits are not supported yet with stepped or categorical inputs "
                                      "(the refit searches the lengthscales of a stationary kernel only)")
    return None


def advice(study: Study) -> list[str]:
    """Settings that are allowed but probably not what was meant, one line each (file: field: why).

    The command line prints them as warnings on standard error; nothing is changed.
    """
    out, c = [], study.campaign
    first = min(c.budgets)
    if c.batch > first:
        out.append(f"campaign.batch: {c.batch} trials per round is more than the budget {first}: that budget "
                   "ends inside the first round, before any result of the round is back")
    for i, p in enumerate(study.policies):
        k = p.options.get("exploit_last", 0)
        if k and k > first - c.initial:
            out.append(f"policy[{i}].exploit_last: {k} is more than the {first - c.initial} trials budget {first} "
                       "leaves after the initial design: at that budget the policy only exploits")
    lib = study.space.library
    if lib is not None and lib.dropped:
        n = len(lib.dropped)
        rows = ", ".join(str(i) for i in lib.dropped[:5]) + (", ..." if n > 5 else "")
        out.append(f"candidates.file: {lib.file}: {n} duplicated row{'s' * (n > 1)} dropped (row{'s' * (n > 1)} "
                   f"{rows} repeat{'s' * (n == 1)} an earlier row); {lib.size} distinct candidates kept")
    if study.target == 0:
        out.append("target.regret: 0 asks for the exact optimum; with noise and continuous inputs almost no "
                   "campaign gets there, so failure risk will be near 100 % (give the tolerance that matters)")
    out += _floor_advice(study)
    return [f"{study.source}: {line}" for line in out]


def _floor_advice(study: Study) -> list[str]:
    """A floor more than 5 prior amplitudes beyond the prior mean: almost every trial of almost every
    world is harmful, or none is (a judgement of "clearly meaningless"; 5 sd leaves 3e-7 of the prior)."""
    prior = study.world.prior
    if study.floor is None or prior is None:      # a published function has no prior to judge by
        return []
    side = (study.floor - prior.mean) / prior.amplitude * (-study.sign)   # > 0: the floor lies on the good side
    if side > 5:
        return [f"target.floor: {study.floor:g} lies more than 5 prior amplitudes on the good side of the prior mean "
                f"{prior.mean:g}: nearly every trial of every world will count as harmful"]
    if side < -5:
        return [f"target.floor: {study.floor:g} lies more than 5 prior amplitudes on the bad side of the prior mean "
                f"{prior.mean:g}: almost no trial will count as harmful"]
    return []


