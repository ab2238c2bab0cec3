"""A resolved study back to TOML: every setting written out, defaults included, so the results
folder's study.toml reproduces the run and its hash identifies it."""

from __future__ import annotations

import re
from typing import Any

import numpy as np

from .types import Prior, Study, WorldSpec


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


def dump_study(study: Study, *, header: dict[str, Any] | None = None, history_file: str | None = None) -> str:
    """The resolved study as TOML text that :func:`load_study` reads back to an equal study.

    Every default is written out, so the file records exactly what ran. ``history_file``
    replaces the history path (the results folder keeps its own copy of the history).
    """
    lines = []
    for k, v in (header or {}).items():
        lines.append(f"# {k}: {v}")
    lines += ["[study]", f"name = {toml_value(study.name)}", f"goal = {toml_value(study.goal)}",
              f"replicates = {study.replicates}", f"seed = {study.seed}"]
    if study.units:   # written only when set: without it the text (and the results folder's hash) is unchanged
        lines.append(f"units = {toml_value(study.units)}")
    lines += ["", "[space]"]
    for n, lo, hi in zip(study.space.names, study.space.low, study.space.high):
        lines.append(f"{toml_key(n)} = [{lo!r}, {hi!r}]")
    lines += ["", "[world]"]
    w = study.world
    if w.function is not None:
        lines += [f"function = {toml_value(w.function)}", f"noise = {w.noise!r}"]
        lines += _noise_lines(w)
    else:
        lines += _prior_lines(w.prior)
        lines += [f"method = {toml_value(w.method)}", *(f"{k} = {toml_value(v)}" for k, v in w.method_settings),
                  f"lengthscale_within = {w.lengthscale_within!r}", f"amplitude_within = {w.amplitude_within!r}"]
        lines += _noise_lines(w)
    lines += ["", "[belief]", *_prior_lines(study.belief), f"refit_every = {study.refit_every}", "", "[campaign]"]
    c = study.campaign
    lines += [f"initial = {c.initial}", f"design = {toml_value(c.design)}",
              f"budgets = {toml_value(list(c.budgets))}", f"pool = {c.pool}", f"batch = {c.batch}", "",
              "[target]", f"regret = {study.target!r}", f"difference = {study.lead_difference!r}"]
    if study.history is not None:
        lines += ["", "[history]", f"file = {toml_value(history_file or study.history.file)}",
                  f"response = {toml_value(study.history.response)}"]
    sw = study.sweep
    lines += ["", "[sweep]", f"lengthscale = {toml_value(list(sw.lengthscale))}",
              f"amplitude = {toml_value(list(sw.amplitude))}", f"replicates = {sw.replicates}"]
    for p in study.policies:
        lines += ["", "[[policy]]", f"rule = {toml_value(p.rule)}", f"label = {toml_value(p.label)}"]
        lines += [f"{k} = {toml_value(v)}" for k, v in p.settings]
    return "\n".join(lines) + "\n"


def _noise_lines(w: WorldSpec) -> list[str]:
    out = [f"noise_kind = {toml_value(w.noise_kind)}"]
    out += [f"{key} = {toml_value(value)}" for key, value in w.noise_settings]
    return out + [f"noise_growth = {w.noise_growth!r}", f"lost = {w.lost!r}"]


def _prior_lines(p: Prior) -> list[str]:
    return [f"kernel = {toml_value(p.kernel)}", f"lengthscale = {toml_value(list(p.lengthscale))}",
            f"amplitude = {p.amplitude!r}", f"mean = {p.mean!r}", f"noise = {p.noise!r}"]
