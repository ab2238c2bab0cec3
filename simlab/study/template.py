"""A complete study file written for the team: campaign, target and policies suggested, every guess commented."""

from __future__ import annotations

import math
import re
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from .dump import toml_key, toml_value
from .spec import _NAME, RESERVED, parse_study
from .types import GOALS, NAME_LENGTH, StudyError

__all__ = ["CampaignSuggestion", "suggest_campaign", "suggest_target", "study_name", "study_text",
           "skeleton_text", "check_inputs", "write_study", "check_new_file", "relative_path", "RUNS_PER_INPUT"]

# Loeppky, Sacks & Welch (2009), Choosing the sample size of a computer experiment: a practical
# guide, Technometrics 51:366-376: "about 10 times the input dimension" runs for an initial
# computer experiment that fits a Gaussian process across the box.
RUNS_PER_INPUT = 10
_TARGET_FRACTION = 0.1    # of the amplitude (the prior sd of the objective): see suggest_target
_MARGIN_FRACTION = 0.01   # of the amplitude, for PI's margin: common practice (0 makes PI greedy)


@dataclass(frozen=True)
class CampaignSuggestion:
    """Initial design and budgets suggested for ``dim`` inputs (see :func:`suggest_campaign`)."""

    dim: int
    initial: int
    budgets: tuple[int, ...]


def suggest_campaign(dim: int) -> CampaignSuggestion:
    """Initial design and budgets for a campaign over ``dim`` inputs.

    Notes
    -----
    Loeppky, Sacks & Welch (2009) give about ``10 d`` runs as the size of an experiment that
    fits a Gaussian process across a d-input box. A campaign is such an experiment whose runs
    are chosen one at a time, so its total is put at ``10 d`` (the middle budget), with half
    and one and a half times that beside it, to ask whether less is enough and whether more
    helps: ``budgets = [5 d, 10 d, 15 d]``. The initial design takes ``2 d`` of them (a fifth
    of the rule's total, and simlab's own default for ``[campaign] initial``), never fewer than
    ``d + 1``, the fewest points that fix a linear trend in d inputs. The smallest budget then
    leaves ``3 d`` trials to the policy.

    References
    ----------
    Loeppky, J. L., Sacks, J. & Welch, W. J. (2009), Choosing the sample size of a computer
    experiment: a practical guide, Technometrics 51(4):366-376.
    """
    if isinstance(dim, bool) or not isinstance(dim, int) or dim < 1:
        raise ValueError(f"dim must be a whole number >= 1; got {dim!r}")
    total = RUNS_PER_INPUT * dim
    initial = max(dim + 1, total // 5)
    return CampaignSuggestion(dim=dim, initial=initial, budgets=(total // 2, total, total + total // 2))


def suggest_target(amplitude: float, noise: float) -> float:
    """A regret tolerance from the prior: ``max(0.1 amplitude, noise)``, to 4 significant digits.

    A tenth of the prior sd is small beside how much the objective varies across the box
    (worlds span several amplitudes); a tolerance below the noise sd could not be told apart
    from noise by one trial, so it is never smaller than that. A guess for the team to replace
    with the shortfall that matters to them.
    """
    if not (amplitude > 0 and math.isfinite(amplitude)) or not (noise >= 0 and math.isfinite(noise)):
        raise ValueError(f"amplitude must be > 0 and noise >= 0, both finite; got {amplitude!r}, {noise!r}")
    return _significant(max(_TARGET_FRACTION * amplitude, noise))


def _significant(v: float, digits: int = 4) -> float:
    return float(f"{v:.{digits}g}")


def study_name(path: str | Path) -> str:
    """A folder-safe ``[study] name`` from a file name: other characters become "-"."""
    name = re.sub(r"[^A-Za-z0-9_.-]", "-", Path(path).stem)
    if not _NAME.match(name):
        name = "study-" + name
    return name[:NAME_LENGTH]


def check_inputs(names: Sequence[str], *, source: str = "--inputs") -> tuple[str, ...]:
    """Input names for ``[space]``: the study reader's rules, refused with a one-line `StudyError`."""
    names = tuple(names)
    if not names:
        raise StudyError(source, "", "give at least one input name, e.g. temp,pressure")
    for n in names:
        if not _NAME.match(n):
            raise StudyError(source, "", f"\"{n}\" cannot name an input: use letters, digits, _ . - and start "
                             "with a letter or _")
        if n in RESERVED:
            raise StudyError(source, "", f"\"{n}\" is a reserved column name of the traces "
                             f"({', '.join(RESERVED)}); choose another")
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise StudyError(source, "", f"\"{dupes[0]}\" is listed twice")
    return names


def _policies(amplitude: float, discrete: bool = False) -> list[list[str]]:
    """The standard set, roughly from cautious (stays near the best so far) to bold (explores); over
    stepped or categorical inputs only the rules that run there (``spec.MIXED_RULES``)."""
    from .spec import MIXED_RULES
    every = _standard_policies(amplitude)
    return [p for p in every if not discrete or p[0].split('"')[1] in MIXED_RULES]


def _standard_policies(amplitude: float) -> list[list[str]]:
    margin = _significant(_MARGIN_FRACTION * amplitude, 2)
    g = "   # guessed: "
    return [
        [f'rule = "random"{g}baseline: a policy that cannot beat it is not earning its keep',
         f'label = "Random"{g}any name; it labels tables and figures'],
        [f'rule = "pi"{g}cautious: probability of improvement, stays near the best so far',
         f'label = "PI (margin {margin:g})"{g}any name',
         f"margin = {toml_value(margin)}{g}0.01 x amplitude (0 makes PI greedy); in the response's units"],
        [f'rule = "ei"{g}balanced: expected improvement, the usual default',
         f'label = "EI"{g}any name'],
        [f'rule = "lcb"{g}bolder: optimistic confidence bound (UCB when maximising)',
         f'label = "UCB (width 2)"{g}any name',
         f"width = 2.0{g}posterior sds of optimism; larger explores more (1 to 3 is usual)"],
        [f'rule = "thompson"{g}bold: one posterior sample per trial, explores in proportion to doubt',
         f'label = "Thompson"{g}any name'],
        [f'rule = "mes"{g}information: max-value entropy search, aims at learning the best value',
         f'label = "MES"{g}any name'],
    ]


def study_text(*, name: str, goal: str, space: Sequence[str], world: Sequence[str], dim: int, amplitude: float,
               noise: float, header: Sequence[str] = (), history: tuple[str, str, int] | None = None,
               amounts_from: str = "the fitted amplitude and noise", response: str | None = None,
               discrete: bool = False) -> str:
    """A complete study file: ``[study]``, the given ``[space]`` and ``[world]`` lines, and a
    suggested ``[campaign]``, ``[target]`` and policy set, each guessed value commented.

    Parameters
    ----------
    space, world : sequence of str
        The lines of those tables (keys with their comments), without the table headers.
    dim, amplitude, noise : the number of inputs and the prior's amplitude and noise, from which
        the campaign (:func:`suggest_campaign`), target (:func:`suggest_target`) and PI's margin
        are suggested.
    history : (file, response, rows), optional
        A ``[history]`` table: campaigns start from these ``rows`` past runs (``file`` relative
        to the study file's folder), so the initial design is 0 and budgets count new trials only.
    response : str, optional
        The data's response column, named in the comment of the (empty) ``units`` line: a column
        name is not a unit, so the unit is left for the team to fill in.
    discrete : bool
        The space has stepped or categorical inputs: the policies are those that run there, and a
        comment names the standard ones left out.
    """
    if goal not in GOALS:
        raise ValueError(f"goal must be one of {', '.join(GOALS)}; got {goal!r}")
    c = suggest_campaign(dim)
    target = suggest_target(amplitude, noise)
    g = "   # guessed: "
    budgets = ", ".join(f"{b // dim} d" for b in c.budgets)
    lines = [*header,
             "# Values marked \"guessed\" are suggestions to review before the results go into a proposal.",
             "", "[study]",
             f"name = {toml_value(name)}   # from the file name; names the results folder (results/NAME)",
             f"goal = {toml_value(goal)}   # as asked; \"minimize\" or \"maximize\" the response",
             f"replicates = 100{g}worlds drawn; 200 or more narrows the intervals for a proposal "
             "(`simlab check` prints the time)",
             f"seed = 1{g}any whole number; another draws other worlds",
             "units = \"\"   # TO FILL: the unit "
             + (f"column {toml_value(response)} is measured in" if response else "the response is measured in")
             + " (e.g. \"MPa\", \"g/L\"); it labels every regret, target and axis (empty: \"objective units\")",
             "", "[space]", *space,
             "", "[world]", *world]
    if history is not None:
        lines += ["", "[history]",
                  "# every campaign starts from these past runs, and worlds are drawn from the prior *given*",
                  "# them; the prior above was fitted to the same runs, so the worlds lean on them twice",
                  f"file = {toml_value(history[0])}   # the data file (a relative path starts from this file's folder)",
                  f"response = {toml_value(history[1])}   # its response column"]
    lines += ["", "[campaign]",
              f"# d = {dim} input{'s' * (dim > 1)}: budgets around the {RUNS_PER_INPUT} runs per input that fit a "
              "Gaussian process across the box",
              "# (Loeppky, Sacks & Welch 2009, Technometrics 51:366); put the budgets you could actually book"]
    if history is None:
        lines.append(f"initial = {c.initial}{g}2 d space-filling trials before the policy chooses (at least "
                     "d + 1); they count toward every budget")
    else:
        lines += [f"# the {history[2]} past runs already count toward the rule's {RUNS_PER_INPUT * dim} "
                  "runs: smaller budgets may be enough",
                  "initial = 0   # guessed: the past runs are the initial design; give a few more to "
                  "spread trials first"]
    lines += [f'design = "sobol"{g}scrambled Sobol\' points for the initial design; "lhs" or "random" also work',
              f"budgets = {toml_value(list(c.budgets))}{g}{budgets} trials"
              + (" after the past runs" if history is not None else ", the initial design included"),
              "", "[target]",
              f"# regret = max({_TARGET_FRACTION:g} x amplitude, noise sd), from {amounts_from}.",
              "# A tenth of the prior sd is small beside how much the objective varies across the box, and a",
              "# shortfall below the noise sd cannot be told from noise by one trial. Replace it with the",
              "# shortfall from the best that would matter to you, in the response's units.",
              f"regret = {toml_value(target)}{g}success is ending within this of the best reachable response",
              f"difference = {toml_value(_significant(target / 10))}{g}a tenth of the target (the default): the "
              "smallest lead between two policies worth calling clear",
              "", "# Policies, roughly from cautious to bold; drop those you would never use, and add settings "
              "you are weighing."]
    chosen = _policies(amplitude, discrete)
    left = [p[0].split('"')[1] for p in _standard_policies(amplitude) if p not in chosen]
    if left:
        lines.append(f"# Left out: {', '.join(left)} (they do not run over stepped or categorical inputs yet).")
    for rule in chosen:
        lines += ["", "[[policy]]", *rule]
    return "\n".join(lines) + "\n"


def skeleton_text(*, name: str, goal: str = "minimize", inputs: Sequence[str] = ("x1", "x2")) -> str:
    """A study file without data: placeholder space and world prior (each line says what to
    fill in), and the campaign, target and policies :func:`study_text` suggests for them."""
    inputs = check_inputs(inputs, source="inputs")
    p = "   # PLACEHOLDER: "
    space = [f"{toml_key(n)} = [0.0, 1.0]{p}this input's [low, high] in its own units" for n in inputs]
    world = [
        f'kernel = "matern52"{p}Matern 5/2 (smooth but not too smooth); sqexp, matern32 or matern12 for '
        "smoother or rougher responses",
        f"lengthscale = {toml_value([0.25] * len(inputs))}{p}per input ({', '.join(inputs)}), in its units: how far "
        "the input moves before the response changes markedly (here a quarter of the range)",
        f"amplitude = 1.0{p}the prior sd of the response: about a quarter of the spread of responses you expect "
        "across the box",
        f"mean = 0.0{p}a typical response, in its units",
        f"noise = 0.1{p}the sd of repeated trials at one setting (0 for a deterministic response)",
    ]
    header = [
        f"# Study skeleton written by simlab new: {len(inputs)} input{'s' * (len(inputs) > 1)}, no data.",
        "# Lines marked PLACEHOLDER must be replaced before the results mean anything: the file runs as written,",
        "# but on a made-up prior. With past runs in a CSV, `simlab calibrate DATA.csv --response COL --study "
        "NEW.toml`",
        "# fits [space] and [world] instead. After filling them in, revisit [campaign] (it depends on the number "
        "of inputs),",
        "# [target] and PI's margin (both depend on amplitude and noise).",
    ]
    return study_text(name=name, goal=goal, space=space, world=world, dim=len(inputs), amplitude=1.0, noise=0.1,
                      header=header, amounts_from="the placeholder amplitude and noise (recompute after filling "
                      "them in)")


def write_study(path: str | Path, text: str, *, force: bool = False) -> Path:
    """Write a new study file atomically, after checking that it reads back as a study.

    Raises
    ------
    StudyError
        One line naming the file: it exists (without ``force``), is a folder, or its folder
        does not exist or cannot be written. Nothing is written then.
    """
    from ..replay.store import atomic_write   # the results folder's writer (study/ sits upstream of replay/)
    path = check_new_file(path, force=force)
    name, folder = str(path), path.parent
    # Read back what is about to be written, as `simlab check` would: a file simlab wrote must load.
    parse_study(tomllib.loads(text), source=name, default_name=path.stem, base_dir=folder)
    try:
        atomic_write(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))
    except OSError as exc:
        raise StudyError(name, "", f"cannot be written in {folder} ({exc.strerror or exc}); nothing "
                         "written") from None
    return path


def check_new_file(path: str | Path, *, force: bool = False) -> Path:
    """Refuse a path :func:`write_study` would refuse (a `StudyError`), before any work is done."""
    path = Path(path)
    name = str(path)
    if path.suffix != ".toml":
        raise StudyError(name, "", "a study file name must end in .toml")
    if path.is_dir():
        raise StudyError(name, "", "is a folder; give a file name ending in .toml")
    if path.exists() and not force:
        raise StudyError(name, "", "already exists; give another name, or --force to replace it")
    folder = path.parent
    if not folder.is_dir():
        why = f"{folder} is a file, not a folder" if folder.exists() else f"folder {folder} does not exist (create it first)"
        raise StudyError(name, "", f"{why}; nothing written")
    return path


def relative_path(target: str | Path, start: str | Path) -> str:
    """``target`` relative to folder ``start`` when it lies below it (the two then move together),
    else absolute; with forward slashes, as a study file records it."""
    target, start = Path(target).resolve(), Path(start).resolve()
    return (target.relative_to(start) if target.is_relative_to(start) else target).as_posix()
