"""The study in words for the report: the question, the assumptions (worlds, belief, space,
policies, campaigns), what the simulation does not cover, and the cautions. Descriptions come
from the registries (a kernel's ``title``, a rule's ``description``) and settings from the
resolved study; nothing here knows a default."""

from __future__ import annotations

from ..model.kernels import KERNELS
from ..policies import POLICIES, Policy
from ..worlds.kinds import WORLD_KINDS
from ..worlds.noise import NOISE_SHAPES
from .cells import escape, fmt_pct, in_units, number, unit_words


def _question(study, success):
    goal = "maximise" if study.goal == "maximize" else "minimise"
    inputs = ", ".join(f"<b>{escape(n)}</b> from {number(lo)} to {number(hi)}"
                       for n, lo, hi in zip(study.space.names, study.space.low, study.space.high))
    budgets = ", ".join(str(b) for b in study.campaign.budgets)
    return (
        '<section id="question"><h2>1. Appendix: the question as asked</h2>'
        f'<div class="box"><p>A campaign will {goal} an objective by choosing settings of '
        f"{len(study.space.names)} input{'s' if study.space.dim > 1 else ''}: {inputs} "
        "(in the units of the study file). "
        f"Which acquisition policy should it use, and how many trials should it ask for: {budgets}?</p>"
        f"<p>Success means the recommended setting ends within <b>{number(study.target)}</b> {unit_words(study, study.target)} "
        "of the best value the process can reach (simple regret ≤ target). "
        f"The requested chance of success for the budget plan is {fmt_pct(success)} %.</p></div>"
        "<p>To answer it, simlab drew many possible objectives (“worlds”) from the prior below, replayed "
        "a complete campaign with every policy on each world — with the same initial design, candidate "
        "pool and noise for every policy — and counted how often and how quickly each policy's "
        "recommendation met the target.</p></section>"
    )


def _prior_rows(prior, study):
    ls = ", ".join(f"{escape(n)} {number(v)}" for n, v in zip(study.space.names, prior.lengthscale))
    return (
        f"<tr><th>kernel</th><td>{escape(KERNELS[prior.kernel].title)}</td></tr>"
        f"<tr><th>lengthscale (input units)</th><td>{ls}</td></tr>"
        f"<tr><th>amplitude (prior sd)</th><td>{number(prior.amplitude)}</td></tr>"
        f"<tr><th>mean</th><td>{number(prior.mean)}</td></tr>"
        f"<tr><th>observation noise sd</th><td>{number(prior.noise)}</td></tr>"
    )


def _noise_words(w):
    """How the simulated observations depart from the truth, in words."""
    words = escape(NOISE_SHAPES[w.noise_kind](**dict(w.noise_settings)).describe(f"{w.noise:g}"))
    growth = w.noise_growth
    if growth:
        words += f", growing with the response (growth {number(growth)} per prior amplitude)"
    lost = w.lost
    if lost:
        words += f"; each trial is lost (budget spent, nothing observed) with probability {number(lost)}"
    return words


def _world_section(study):
    w = study.world
    if w.function is not None:
        from ..worlds.functions import FUNCTIONS

        fn = FUNCTIONS[w.function]
        return (f"<p>Every replicate uses the published test function <b>{escape(fn.name)}</b> "
                f"({escape(fn.source)}) on its published domain, observed with {_noise_words(w)}. The replicates "
                "differ only in the initial design, candidate pool and noise, so the spread of results "
                "reflects the campaigns, not a range of possible objectives.</p>")
    how = WORLD_KINDS[w.method].describe(dict(w.method_settings))
    rows = _prior_rows(w.prior, study)
    within = [("lengthscale", w.lengthscale_within), ("amplitude", w.amplitude_within)]
    for name, factor in within:
        if factor != 1.0:
            rows += (f"<tr><th>{name} uncertainty</th><td>each world draws its own {name}: 95 % within a "
                     f"factor {number(factor)} of the value above</td></tr>")
    rows += f"<tr><th>observations</th><td>{_noise_words(w)}</td></tr>"
    history = study.history
    past = ""
    if history is not None:
        past = (f"<p>Every world is conditioned on the <b>{history.size} trials already run</b> (response "
                f"column “{escape(history.response)}”), and every campaign starts from them; they do not count "
                "toward the budgets.</p>")
    return (f"<p>Each replicate's objective is a draw from this Gaussian-process prior, made with "
            f"{escape(how)}:</p><table class='kv'>{rows}</table>{past}")


def _assumptions(study, version):
    w = study.world
    refit = study.refit_every
    if w.prior is not None and study.belief == w.prior:
        belief = ("<p>The campaigns' model (belief) starts as <b>the same prior</b>: every policy knows exactly "
                  "how the worlds were made. That is the favourable case; a belief that is wrong about "
                  "smoothness, amplitude or noise is not tested here.</p>")
    else:
        belief = ("<p>The campaigns' model (belief) starts from:</p>"
                  f"<table class='kv'>{_prior_rows(study.belief, study)}</table>")
    belief += (f"<p>Its hyperparameters are refitted by maximum likelihood every {refit} trials.</p>" if refit
               else "<p>Its hyperparameters stay fixed for the whole campaign (no refitting).</p>")
    space = "".join(f"<tr><td>{escape(n)}</td><td class='n'>{number(lo)}</td><td class='n'>{number(hi)}</td></tr>"
                    for n, lo, hi in zip(study.space.names, study.space.low, study.space.high))
    policies = "".join(
        f"<tr><td>{escape(p.label)}</td><td>{escape(p.rule)}</td><td>{escape(POLICIES[p.rule].description)}</td>"
        f"<td>{_settings(p, study)}</td></tr>"
        for p in study.policies
    )
    c = study.campaign
    batch = c.batch
    rounds = (f"<tr><th>trials per round</th><td>{batch}, all chosen before any result of the round is "
              "back</td></tr>" if batch > 1 else "")
    return (
        '<section id="assumptions"><h2>2. Appendix: assumptions and method</h2>'
        "<h3>Worlds</h3>" + _world_section(study) + "<h3>Belief</h3>" + belief + _limits_assumed(study) +
        "<h3>Search space</h3><table><thead><tr><th>input</th><th class='n'>low</th><th class='n'>high</th>"
        f"</tr></thead><tbody>{space}</tbody></table>"
        "<h3>Policies</h3><table><thead><tr><th>label</th><th>rule</th><th>what it does</th>"
        "<th>settings it ran with (defaults included)</th>"
        f"</tr></thead><tbody>{policies}</tbody></table>"
        + ("" if batch > 1 else "<p>Settings for rounds of several trials (<code>fill</code>, <code>lie</code>) are "
           "left out: this study runs one trial at a time, so they play no part.</p>")
        + _policy_cautions(study) +
        "<h3>Campaigns</h3><table class='kv'>"
        f"<tr><th>goal</th><td>{escape(study.goal)}</td></tr>"
        f"<tr><th>initial design</th><td>{c.initial} trials ({escape(c.design)}), shared by every policy and "
        "counted in the budget</td></tr>"
        f"<tr><th>budgets</th><td>{', '.join(str(b) for b in c.budgets)} trials</td></tr>"
        f"{rounds}"
        f"<tr><th>target</th><td>simple regret ≤ {number(study.target)} {unit_words(study, study.target)}</td></tr>"
        f"<tr><th>candidate pool</th><td>{c.pool} quasi-random inputs, best few polished</td></tr>"
        f"<tr><th>replicates</th><td>{study.replicates} worlds</td></tr>"
        f"<tr><th>root seed</th><td>{study.seed}</td></tr>"
        f"<tr><th>simlab version</th><td>{escape(version)}</td></tr>"
        "</table></section>"
    )


def _limits_assumed(study) -> str:
    """The appendix's account of [[limit]]s and fails_where: each limit's prior, the failing region, and how
    the campaigns model both (empty for other studies)."""
    if not study.constrained:
        return ""
    out = ["<h3>Limits and failures</h3>"]
    for lim in study.limits:
        related = ("independent of the objective" if not lim.correlation else
                   f"correlated with the objective (ρ = {number(lim.correlation)} across worlds; the campaigns' belief "
                   "models it independently)")
        out.append(f"<p><b>{escape(lim.words())}</b>: drawn for each world from its own prior, {related}, and measured "
                   "with every trial that runs:</p>"
                   f"<table class='kv'>{_prior_rows(lim.prior, study)}</table>")
    fw = study.world.fails_where
    if fw is not None:
        ls = ", ".join(f"{escape(n)} {number(v)}" for n, v in zip(study.space.names, fw.lengthscale))
        out.append(f"<p><b>Trials fail</b> where a latent world ({escape(KERNELS[fw.kernel].title)}, unit amplitude, "
                   f"lengthscales {ls}) is in its top {number(100 * fw.share)} % of the space; a failed trial spends "
                   "its place in the budget and returns nothing.</p>")
    model = ["each limit with a Gaussian process of its own prior, fed the measured value of every trial that "
             "runs"] if study.limits else []
    if fw is not None:
        model.append("the failing region with a Gaussian-process classifier (logistic likelihood, Laplace's "
                     "approximation; latent amplitude 3 on the logistic scale, the region's lengthscales, prior chance "
                     f"of success {number(100 * (1 - fw.share))} %)")
    out.append("<p>The campaigns model " + " and ".join(model) + ". Every campaign ships the evaluated input with "
               "the lowest posterior mean among those believed to respect every limit at least "
               f"{number(100 * study.feasible_chance)} % surely (<code>[target] feasible_chance</code>).</p>")
    return "".join(out)


_ROUND_SETTINGS = ("fill", "lie")   # Acquisition's settings for rounds of trials (policies/base.py)


def _settings(spec, study):
    """Every setting a policy ran with, resolved (``margin = 0``), each with its help text (HTML)."""
    options = POLICIES[spec.rule].options
    # How a round of several trials is filled (fill, lie) matters only when the study has rounds.
    rounds_only = () if study.campaign.batch > 1 else _ROUND_SETTINGS
    # How a rule treats limits (feasible) matters only when the study has limits or failures.
    hidden = rounds_only + (() if study.constrained else ("feasible",))
    settings = [(key, value) for key, value in spec.settings if key not in hidden]
    if not settings:
        return "none (the rule has no settings)"
    # the rule's own settings first, then those every acquisition has (fill, lie, exploit_last: policies/base.py)
    shared = {key for base in POLICIES[spec.rule].__mro__[1:] if base.__module__ == Policy.__module__
              for key in getattr(base, "options", {})}
    ordered = sorted(settings, key=lambda item: item[0] in shared)
    shown = []
    for key, value in ordered:
        text = (f"{key} = {value:g}" if isinstance(value, (int, float)) and not isinstance(value, bool)
                else f"{key} = {value}")
        default = " (default)" if key in options and value == options[key].default else ""
        words = options[key].help if key in options else ""
        words = in_units(words, study)   # a setting in the objective's own unit
        what = f"<span class='ci'>{escape(words)}{default}</span>" if key in options else ""
        shown.append(f"<div><code>{escape(text)}</code>{what}</div>")
    return "".join(shown)


def _policy_cautions(study):
    """The rules' own warnings (``Policy.caution``) for policies run with settings that make them weak."""
    items = []
    for p in study.policies:
        words = in_units(POLICIES[p.rule].caution(p.options, study), study)   # the rule's words, in the study's unit
        if words:
            items.append(f"<li><b>{escape(p.label)}</b>: {escape(words)}</li>")
    if not items:
        return ""
    return ('<div class="caution" id="policy-cautions"><p><b>Weak baselines.</b> These policies ran with settings '
            "that hold them back; read their results as those of the settings, not of the rule:</p>"
            f"<ul>{''.join(items)}</ul></div>")


def _limits(study):
    belief_note = ""
    if study.world.prior is not None and study.belief == study.world.prior:
        belief_note = ("<li><b>The model starts exactly right here.</b> The campaigns' model starts as the prior "
                       "the worlds came from; a real campaign's model is always somewhat wrong, so real regret "
                       "is usually worse. Run the study again with a different <code>[belief]</code> to see "
                       "how much.</li>")
    return (
        '<section id="limits"><h2>6. What the simulation does not cover</h2><ul>'
        "<li><b>The prior may be wrong.</b> Every number above is about objectives drawn from the stated "
        "prior (or the stated test function). If the real objective is rougher, smoother, noisier or shaped "
        "differently, the ranking of policies and the budgets can change.</li>"
        + belief_note
        + _noise_limit(study.world)
        + _safety_limit(study)
        + ("<li><b>Refits follow one recipe.</b> The model is refitted by maximum likelihood on a fixed "
           "schedule; a team that refits differently, or by judgement, may see different campaigns.</li>"
           if study.refit_every else
           "<li><b>The model is not refitted.</b> Its hyperparameters stay fixed during a campaign; a real "
           "campaign that re-estimates them may behave differently, especially early.</li>")
        + "<li><b>Intervals are Monte Carlo uncertainty only.</b> They shrink with more replicates; they say "
        "nothing about whether the assumptions hold.</li>"
        "</ul></section>"
    )


def _safety_limit(study):
    """What the simulation assumes about safety and failed trials."""
    if not study.constrained:
        return ("<li><b>Safety constraints are not modelled.</b> Every input in the box is assumed safe to run; "
                "limits on temperature, pressure, dose or any other hazard are not part of the simulation, and "
                + ("trials fail only at random, never because of the setting chosen."
                   if study.world.lost else "every trial is assumed to return a measurement.")
                + "</li>")
    stated = []
    if study.limits:
        stated.append("the limits stated (" + escape("; ".join(limit.words() for limit in study.limits)) + ")")
    if study.world.fails_where is not None:
        stated.append("a region where trials fail")
    return ("<li><b>Only " + " and ".join(stated) + " are modelled, and only as well as their priors.</b> Each is "
            "drawn for every world from the prior the study gives it, independently of the objective; the real "
            "quantity may be rougher, larger or tied to the objective, and any other limit on temperature, "
            "pressure, dose or another hazard is not part of the simulation: an input that breaks none of the "
            "stated limits is not thereby safe to run.</li>")


def _noise_limit(w):
    if w.noise_kind == "gaussian" and not w.noise_growth:
        return ("<li><b>Noise is Gaussian with a fixed standard deviation.</b> Outliers, drift of equipment or "
                "materials over the campaign, and noise that depends on the setting are not modelled.</li>")
    return (f"<li><b>The noise model is the one stated</b> ({_noise_words(w)}). Drift of equipment or "
            "materials over the campaign, and other noise shapes, are not modelled.</li>")


def _cautions():
    return (
        '<section id="cautions"><h2>7. Cautions</h2><div class="caution">'
        "<p>This report comes from simulation. It can help choose a policy and argue for a budget; it does "
        "not show that any trial is safe. Where trials can hurt people, animals or the environment — for "
        "example clinical dosing, chemical processes at temperature or pressure, or field releases — a "
        "simulated recommendation is no substitute for the safety case: follow local codes and "
        "regulations, obtain ethics review where it applies, and rely on licensed professional practice. "
        "Never let a policy propose a trial outside the limits those set, and keep a qualified person "
        "responsible for approving each trial.</p></div></section>"
    )
