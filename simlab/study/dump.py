"""A resolved study back to TOML: every setting written out, defaults included, so the results
folder's study.toml reproduces the run and its hash identifies it."""

from __future__ import annotations

import re
from typing import Any

import numpy as np

from ..policies import POLICIES
from .types import CATEGORICAL, LOG, STEPPED, Prior, Space, Study, WorldSpec


def toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def toml_key(k: str) -> str:
    return k if re.match(r"^[A-Za-z0-9_-]+$", k) else toml_value(k)


def dump_study(study: Study, *, header: dict[str, Any] | None = None, history_file: str | None = None,
               library_file: str | None = None) -> str:
    """The resolved study as TOML text that :func:`load_study` reads back to an equal study.

    Every default is written out, so the file records exactly what ran. ``history_file``
    replaces the history path (the results folder keeps its own copy of the history), and
    ``library_file`` the ``[candidates]`` path likewise.
    """
    lines = []
    for k, v in (header or {}).items():
        lines.append(f"# {k}: {v}")
    lines += ["[study]", f"name = {toml_value(study.name)}", f"goal = {toml_value(study.goal)}",
              f"replicates = {study.replicates}", f"seed = {study.seed}"]
    if study.units:   # written only when set: without it the text (and the results folder's hash) is unchanged
        lines.append(f"units = {toml_value(study.units)}")
    lines += ["", "[space]", *_space_lines(study.space)]
    if study.space.library is not None:
        lines += ["", "[candidates]", f"file = {toml_value(library_file or study.space.library.file)}"]
    lines += ["", "[world]"]
    w = study.world
    if w.function is not None:
        lines += [f"function = {toml_value(w.function)}", f"noise = {w.noise!r}"]
        lines += _noise_lines(w)
    else:
        lines += _prior_lines(w.prior, study.space)
        lines += [f"method = {toml_value(w.method)}", *(f"{k} = {toml_value(v)}" for k, v in w.method_settings),
                  f"lengthscale_within = {w.lengthscale_within!r}", f"amplitude_within = {w.amplitude_within!r}"]
        lines += _noise_lines(w)
        if w.fails_where is not None:   # written only when set: other studies dump (and hash) as before
            fw = w.fails_where
            lines.append(f"fails_where = {{ share = {fw.share!r}, lengthscale = {toml_value(list(fw.lengthscale))}, "
                         f"kernel = {toml_value(fw.kernel)} }}")
    lines += ["", "[belief]", *_prior_lines(study.belief, study.space), f"refit_every = {study.refit_every}", "", "[campaign]"]
    c = study.campaign
    lines += [f"initial = {c.initial}", f"design = {toml_value(c.design)}",
              f"budgets = {toml_value(list(c.budgets))}", f"pool = {c.pool}", f"batch = {c.batch}", "",
              "[target]", f"regret = {study.target!r}", f"difference = {study.lead_difference!r}"]
    if study.floor is not None:   # written only when set: without it the text (and the results folder's hash) is unchanged
        lines.append(f"floor = {study.floor!r}")
    if study.constrained:   # likewise
        lines.append(f"feasible_chance = {study.feasible_chance!r}")
    if study.history is not None:
        lines += ["", "[history]", f"file = {toml_value(history_file or study.history.file)}",
                  f"response = {toml_value(study.history.response)}"]
    sw = study.sweep
    lines += ["", "[sweep]", f"lengthscale = {toml_value(list(sw.lengthscale))}",
              f"amplitude = {toml_value(list(sw.amplitude))}", f"replicates = {sw.replicates}"]
    for p in study.policies:
        lines += ["", "[[policy]]", f"rule = {toml_value(p.rule)}", f"label = {toml_value(p.label)}"]
        options = POLICIES[p.rule].options
        lines += [f"{k} = {toml_value(v)}" for k, v in p.settings if k not in options or options[k].written(v)]
    for limit in study.limits:   # written only when the study has some
        side = "below" if limit.below is not None else "above"
        lines += ["", "[[limit]]", f"name = {toml_value(limit.name)}", f"{side} = {limit.bound!r}",
                  *_prior_lines(limit.prior, study.space)]
        if limit.correlation:
            lines.append(f"correlation = {limit.correlation!r}")
    for stop in study.stops:   # written only when the study has some: other studies dump (and hash) as before
        lines += ["", "[[stop]]", f"rule = {toml_value(stop.rule)}", f"label = {toml_value(stop.label)}"]
        lines += [f"{k} = {toml_value(v)}" for k, v in stop.settings]
    return "\n".join(lines) + "\n"


def _noise_lines(w: WorldSpec) -> list[str]:
    out = [f"noise_kind = {toml_value(w.noise_kind)}"]
    out += [f"{key} = {toml_value(value)}" for key, value in w.noise_settings]
    return out + [f"noise_growth = {w.noise_growth!r}", f"lost = {w.lost!r}"]


def _space_lines(space: Space) -> list[str]:
    """One line per input in the form it was given: [low, high], or a table for the other kinds."""
    out = []
    for j, (n, lo, hi) in enumerate(zip(space.names, space.low, space.high)):
        kind = space.kind(j)
        if kind == CATEGORICAL:
            out.append(f"{toml_key(n)} = {{ levels = {toml_value(list(space.levels[j]))} }}")
        elif kind == STEPPED:
            out.append(f"{toml_key(n)} = {{ low = {lo!r}, high = {hi!r}, step = {space.steps[j]!r} }}")
        elif kind == LOG:
            out.append(f"{toml_key(n)} = {{ low = {lo!r}, high = {hi!r}, scale = \"log\" }}")
        else:
            out.append(f"{toml_key(n)} = [{lo!r}, {hi!r}]")
    return out


def _prior_lines(p: Prior, space: Space) -> list[str]:
    out = [f"kernel = {toml_value(p.kernel)}"]
    if p.lengthscale:     # absent only when every input is categorical
        out.append(f"lengthscale = {toml_value(list(p.lengthscale))}")
    out += [f"amplitude = {p.amplitude!r}", f"mean = {p.mean!r}", f"noise = {p.noise!r}"]
    if p.level_correlation:   # written only with categorical inputs: box studies dump as before
        table = ", ".join(f"{toml_key(space.names[j])} = {rho!r}" for j, rho in zip(space.categorical, p.level_correlation))
        out.append(f"level_correlation = {{ {table} }}")
    return out
