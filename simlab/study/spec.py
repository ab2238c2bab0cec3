"""Study files (TOML) to a `Study` (types.py): the only place that validates user input."""

from __future__ import annotations

import difflib
import math
import re
import tomllib
from pathlib import Path
from typing import Any

import numpy as np

from ..columns import TRACE_COLUMNS, WORLD_COLUMNS
from ..model.kernels import KERNELS
from ..policies import POLICIES
from ..worlds.kinds import WORLD_KINDS, world_options
from ..worlds.noise import NOISE_SHAPES
from ..worlds import functions
from .types import (DESIGNS, GOALS, MAX_REPLICATES, NAME_LENGTH, UNITS_LENGTH, CampaignSpec, HistorySpec, PolicySpec, Prior,
                    Space, Study, StudyError, SweepSpec, WorldSpec)

__all__ = ["load_study", "parse_study", "advice", "RESERVED",
           # the types a study is made of (types.py), imported here because reading makes them
           "StudyError", "Space", "Prior", "WorldSpec", "CampaignSpec", "PolicySpec", "SweepSpec", "HistorySpec",
           "Study", "MAX_REPLICATES", "NAME_LENGTH", "GOALS", "DESIGNS"]

# Columns of traces.parquet and worlds.csv that an input name must not shadow (defined once, in columns.py).
RESERVED = TRACE_COLUMNS + WORLD_COLUMNS[1:]
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_.-]*$")


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
        "world": ("kernel", "lengthscale", "amplitude", "mean", "noise", "method", *world_options(1), "function",
                  "lengthscale_within", "amplitude_within", *_noise_keys()),
        "campaign": ("initial", "design", "budgets", "pool", "batch"),
        "target": ("regret", "difference"),
        "sweep": ("lengthscale", "amplitude", "replicates"),
        "history": ("file", "response"),
    }


def load_study(path: str | Path) -> Study:
    """Read and validate a study file.

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
    return parse_study(data, source=name, default_name=path.stem, base_dir=path.parent)


def parse_study(data: dict, *, source: str = "<study>", default_name: str = "study",
                base_dir: str | Path | None = None) -> Study:
    """Validate an already-parsed TOML mapping; see :func:`load_study`.

    ``base_dir`` is where relative file paths in the study (``[history] file``) are
    resolved; :func:`load_study` passes the study file's folder.
    """
    base_dir = Path(base_dir) if base_dir is not None else None
    r = _Reader(source)
    r.keys(data, "", ("study", "space", "world", "belief", "campaign", "target", "policy", "sweep",
                          "history"))

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
        space = _read_space(r, data, fn=fn)
        noise = r.number(wt, "world.noise", low=0.0, default=0.0)
        world = WorldSpec(prior=None, function=function, noise=noise, **_read_noise(r, wt))
        world_prior = None
    else:
        space = _read_space(r, data, fn=None)
        r.keys(wt, "world", _section_keys()["world"])
        world_prior = _read_prior(r, wt, "world", space, base=None)
        method = r.choice(wt, "world.method", tuple(WORLD_KINDS), default="features")
        within = {key: r.number(wt, f"world.{key}", low=1.0, high=100.0, default=1.0)
                  for key in ("lengthscale_within", "amplitude_within")}
        refusal = WORLD_KINDS[method].refuse(space.dim, uncertain_lengthscale=within["lengthscale_within"] != 1.0)
        if refusal is not None:
            r.fail(*refusal)
        settings = r.options(wt, "world", world_options(space.dim))
        world = WorldSpec(prior=world_prior, function=None, noise=world_prior.noise, method=method,
                          method_settings=settings, **within, **_read_noise(r, wt))

    bt = r.table(data, "belief", required=False)
    r.keys(bt, "belief", ("kernel", "lengthscale", "amplitude", "mean", "noise", "refit_every"))
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

    policies = _read_policies(r, data)

    sw = r.table(data, "sweep", required=False)
    r.keys(sw, "sweep", _section_keys()["sweep"])
    sweep = SweepSpec(
        lengthscale=r.factor_list(sw, "sweep.lengthscale", SweepSpec.lengthscale),
        amplitude=r.factor_list(sw, "sweep.amplitude", SweepSpec.amplitude),
        replicates=r.integer(sw, "sweep.replicates", low=1, high=MAX_REPLICATES, default=min(replicates, 50)),
    )
    return Study(name=name, goal=goal, replicates=replicates, seed=seed, space=space, world=world,
                 belief=belief, campaign=campaign, target=target, policies=policies, sweep=sweep,
                 history=history, refit_every=refit_every, difference=difference, units=units, source=source)


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


def _read_history(r: "_Reader", data: dict, space: Space, base_dir: Path | None) -> HistorySpec | None:
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
    try:
        table = read_table(path, columns=[*space.names, response], role="history")
    except DataError as exc:
        raise StudyError(r.source, "history.file", str(exc)) from None
    X = table[list(space.names)].to_numpy(dtype=float)
    for j, name in enumerate(space.names):
        lo, hi = space.low[j], space.high[j]
        bad = np.flatnonzero((X[:, j] < lo) | (X[:, j] > hi))
        if bad.size:
            i = int(bad[0])
            r.fail("history.file", f"{path}: column \"{name}\", row {table.index[i]} (the header is row 1): "
                   f"{X[i, j]:g} lies outside [space] [{lo:g}, {hi:g}]; widen the space or drop the row")
    return HistorySpec(file=str(path.resolve()), response=response,
                       X=tuple(tuple(float(v) for v in row) for row in X),
                       y=tuple(float(v) for v in table[response].to_numpy(dtype=float)))


def _read_space(r: "_Reader", data: dict, *, fn) -> Space:
    if fn is not None and "space" not in data:
        return Space(names=tuple(f"x{i + 1}" for i in range(fn.dim)),
                     low=tuple(float(b[0]) for b in fn.bounds),
                     high=tuple(float(b[1]) for b in fn.bounds))
    sp = r.table(data, "space")
    if not sp:
        r.fail("space", "is empty; give one entry per input, e.g. barrel_temp = [180.0, 240.0]")
    names, low, high = [], [], []
    for key, value in sp.items():
        fld = f"space.{key}"
        if not _NAME.match(key):
            r.fail(fld, "an input name must start with a letter or _ and hold only letters, digits, _ . -")
        if key in RESERVED:
            r.fail(fld, f"is a reserved column name of the traces ({', '.join(RESERVED)}); rename the input")
        if not (isinstance(value, list) and len(value) == 2):
            r.fail(fld, f"must be [low, high], two numbers; got {value!r}")
        lo = r.as_number(value[0], fld + "[0]")
        hi = r.as_number(value[1], fld + "[1]")
        if not lo < hi:
            r.fail(fld, f"low must be below high; got [{lo}, {hi}]")
        names.append(key), low.append(lo), high.append(hi)
    if fn is not None:
        if len(names) != fn.dim:
            r.fail("space", f"function \"{fn.name}\" has {fn.dim} inputs; [space] lists {len(names)}")
        for k, (lo, hi), (blo, bhi) in zip(names, zip(low, high), fn.bounds):
            if not (math.isclose(lo, blo, abs_tol=1e-12) and math.isclose(hi, bhi, abs_tol=1e-12)):
                r.fail(f"space.{k}", f"\"{fn.name}\" is defined on its published domain [{blo:g}, {bhi:g}] "
                       "for this input; rename inputs freely but keep the bounds")
    return Space(names=tuple(names), low=tuple(low), high=tuple(high))


def _read_prior(r: "_Reader", t: dict, section: str, space: Space, *, base: Prior | None,
                noise_default: float | None = None) -> Prior:
    kernel = r.choice(t, f"{section}.kernel", tuple(KERNELS), default=base.kernel if base else "matern52")
    need = "is required: the world is a published function, so there is no world prior to copy"
    if "lengthscale" in t or base is None:
        if "lengthscale" not in t:
            r.fail(f"{section}.lengthscale", need if section == "belief" else
                   "is required: one number for all inputs or one per input, in input units")
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
    return Prior(kernel=kernel, lengthscale=ls, amplitude=amp, mean=mean, noise=noise)


def _read_policies(r: "_Reader", data: dict) -> tuple[PolicySpec, ...]:
    if "policy" not in data:
        r.fail("policy", "at least one [[policy]] table is required, e.g. [[policy]] rule = \"ei\"")
    tables = data["policy"]
    if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
        r.fail("policy", "must be written as [[policy]] tables")
    if not tables:
        r.fail("policy", "at least one [[policy]] table is required")
    out, seen = [], {}
    for i, t in enumerate(tables):
        where = f"policy[{i}]"
        if "rule" not in t:
            r.fail(f"{where}.rule", f"is required; one of {', '.join(POLICIES)}")
        rule = r.choice(t, f"{where}.rule", tuple(POLICIES))
        cls = POLICIES[rule]
        r.keys(t, where, ("rule", "label", *cls.options))
        label = r.string(t, f"{where}.label", default=rule)
        if not label.strip() or len(label) > 60:
            r.fail(f"{where}.label", "must be 1 to 60 characters")
        if label in seen:
            r.fail(f"{where}.label", f"\"{label}\" is already used by policy[{seen[label]}]; "
                   "give each policy its own label")
        seen[label] = i
        settings = r.options(t, where, cls.options)
        out.append(PolicySpec(rule=rule, label=label, settings=settings))
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

    def as_number(self, value, field: str) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(field, f"must be a number; got {value!r}")
        value = float(value)
        if not math.isfinite(value):
            self.fail(field, f"must be a finite number; got {value}")
        return value

    def number(self, t: dict, field: str, *, low=None, high=None, low_open=False, default=...) -> float:
        key = field.rsplit(".", 1)[-1]
        if key not in t:
            if default is ...:
                self.fail(field, "is required (a number)")
            return default
        v = self.as_number(t[key], field)
        if low is not None and (v < low or (low_open and v == low)):
            self.fail(field, f"must be {'>' if low_open else '>='} {low:g}; got {v:g}")
        if high is not None and v > high:
            self.fail(field, f"must be <= {high:g}; got {v:g}")
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
                settings.append((key, self.number(t, fld, low=opt.low, high=opt.high, low_open=opt.low_open)))
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
        if len(values) not in (1, space.dim):
            self.fail(field, f"give one number for all inputs or one per input ({space.dim}); got {len(values)}")
        out = []
        for i, item in enumerate(values):
            x = self.as_number(item, field)
            if x <= 0:
                self.fail(field, f"every lengthscale must be > 0 (input units); got {x:g}")
            out.append(x)
        if len(out) == 1:
            out = out * space.dim
        return tuple(out)


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
    if study.target == 0:
        out.append("target.regret: 0 asks for the exact optimum; with noise and continuous inputs almost no "
                   "campaign gets there, so failure risk will be near 100 % (give the tolerance that matters)")
    return [f"{study.source}: {line}" for line in out]


