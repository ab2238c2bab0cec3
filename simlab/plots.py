"""Figures of a study's results: regret, failure risk, trials-to-target, comparisons and a campaign snapshot."""

from __future__ import annotations

__all__ = [
    "policy_colors",
    "regret_figure",
    "failure_figure",
    "reach_figure",
    "final_regret_figure",
    "win_rate_figure",
    "snapshot_figure",
    "save_figure",
]

import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from numbers import Integral
from pathlib import Path

import numpy as np
import pandas as pd

# Okabe & Ito (2008), "Color Universal Design": eight colours distinguishable under the
# common colour-vision deficiencies. Yellow comes last because it is faint on white.
_OKABE_ITO = (
    "#0072B2",  # blue
    "#E69F00",  # orange
    "#009E73",  # bluish green
    "#D55E00",  # vermillion
    "#CC79A7",  # reddish purple
    "#56B4E9",  # sky blue
    "#000000",  # black
    "#F0E442",  # yellow
)
# Beyond eight policies colours repeat; the repeat gets another line style.
_LINESTYLES = ("-", "--", "-.", ":")

_GREY = "#6b6b6b"
_DPI = 150
_Z95 = 1.959963984540054  # standard normal 97.5% quantile (common practice)

# Regret is clipped at a floor on log axes (exact zeros are common: a policy that
# evaluated the best point any policy found has regret 0). The floor sits three decades
# below the target: differences that far below the target do not change a decision.
_FLOOR_BELOW_TARGET = 1e-3

# The snapshot's Monte Carlo minimiser distribution has its own fixed generator so that
# redrawing the figure never changes it and never touches the study's keyed streams.
_SNAPSHOT_SEED = 20240611
_SNAPSHOT_FREQUENCIES = 1024

_JITTER_SEED = 7
_KIND_WIDTH = 7.6  # inches; fits an A4 page with margins at 100 %


# ---------------------------------------------------------------------------
# shared helpers
# ---------------------------------------------------------------------------
def policy_colors(labels):
    """One colour per policy, fixed by the study's policy order.

    Parameters
    ----------
    labels : sequence of str
        Policy labels in study order (``study.labels``).

    Returns
    -------
    dict
        ``{label: "#rrggbb"}`` from the Okabe-Ito palette (colour-blind safe). Pass the
        same mapping to every figure so that a policy keeps its colour everywhere; with
        more than eight policies colours repeat and the figures change the line style.
    """
    labels = [str(label) for label in labels]
    if len(set(labels)) != len(labels):
        raise ValueError(f"`labels` must be distinct; got {labels}")
    return {label: _OKABE_ITO[i % len(_OKABE_ITO)] for i, label in enumerate(labels)}


def _linestyles(labels):
    return {str(label): _LINESTYLES[(i // len(_OKABE_ITO)) % len(_LINESTYLES)] for i, label in enumerate(labels)}


def _shown(label):
    """A label as matplotlib should draw it: a literal "$" must not start mathematics."""
    return str(label).replace("$", r"\$")


def _policy_ticks(axis, labels, colors, *, offset=0.0, fontsize=None):
    """Put the policy labels on a categorical axis (positions offset + 0, 1, ...) in their colours."""
    axis.set_ticks(np.arange(len(labels)) + offset, [_shown(label) for label in labels])
    for tick, label in zip(axis.get_ticklabels(), labels):
        tick.set_color(colors[label])
        if fontsize:
            tick.set_fontsize(fontsize)


@contextmanager
def _quiet_seaborn():
    """Silence deprecation notices raised by seaborn's own calls into matplotlib (not ours to fix)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=DeprecationWarning, module="seaborn")
        warnings.filterwarnings("ignore", category=PendingDeprecationWarning, module="seaborn")
        yield


def _band_alpha(labels):
    """Fainter bands when many overlap, so that the lines stay readable."""
    return 0.14 if len(labels) <= 4 else 0.08


def _policies_in(frame, column="policy"):
    """Policy labels in order of first appearance (metrics tables keep study order)."""
    return [str(p) for p in pd.unique(frame[column].astype(str))]


def _colors_for(labels, colors):
    if colors is None:
        return policy_colors(labels)
    missing = [label for label in labels if label not in colors]
    if missing:
        raise ValueError(f"`colors` has no colour for policies {missing}")
    return colors


def _new_axes(ax, size):
    """The axes to draw on and its figure; a new figure (no pyplot state) when ax is None."""
    if ax is not None:
        get = getattr(ax, "get_figure", None)
        try:
            fig = get(root=True)
        except TypeError:  # matplotlib < 3.10 has no `root`
            fig = ax.figure
        return fig, ax
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    return fig, fig.add_subplot()


def _regret_floor(values, target):
    """Positive floor for log-scale regret axes."""
    if target > 0:
        return target * _FLOOR_BELOW_TARGET
    values = np.asarray(values, dtype=float)
    positive = values[values > 0]
    if positive.size == 0:
        return 1e-12
    return 10.0 ** np.floor(np.log10(positive.min()))


def _floor_note(floor, values):
    """Second line of a regret axis label; says so when values below the floor are drawn at it."""
    values = np.asarray(values, dtype=float)
    if np.any(values[np.isfinite(values)] < floor):
        return f"log scale; below {floor:.2g} (including 0) drawn at {floor:.2g}"
    return "log scale"


def _legend_outside(ax, **kw):
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False,
                  fontsize=9, **kw)


def _check_columns(frame, name, columns):
    if not isinstance(frame, pd.DataFrame):
        raise ValueError(f"`{name}` must be a pandas DataFrame; got {type(frame).__name__}")
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(f"`{name}` lacks column(s) {missing}; it has {list(frame.columns)}")


def _percent_axis(axis):
    from matplotlib.ticker import PercentFormatter

    axis.set_major_formatter(PercentFormatter(1.0, decimals=0))


# ---------------------------------------------------------------------------
# results figures
# ---------------------------------------------------------------------------
def regret_figure(curves, *, target, budgets=(), initial=None, colors=None, ax=None):
    """Simple regret of the recommendation against trial: median and interquartile band.

    Parameters
    ----------
    curves : DataFrame
        `simlab.metrics.regret_curves` output (``policy, trial, regret_median,
        regret_q25, regret_q75``).
    target : float
        Regret tolerance, drawn as a horizontal line.
    budgets : sequence of int
        Budgets, drawn as vertical lines.
    initial : int, optional
        Trials of the initial design (shared by every policy), shaded.
    colors : dict, optional
        `policy_colors` mapping; default from the order in `curves`.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    The y axis is logarithmic; regret below ``target / 1000`` (including exact zeros)
    is drawn at that floor, which the axes state.
    """
    _check_columns(curves, "curves", ("policy", "trial", "regret_median", "regret_q25", "regret_q75"))
    labels = _policies_in(curves)
    colors = _colors_for(labels, colors)
    styles = _linestyles(labels)
    fig, ax = _new_axes(ax, (_KIND_WIDTH, 4.2))
    values = curves[["regret_median", "regret_q25", "regret_q75"]].to_numpy(dtype=float)
    floor = _regret_floor(values, target)
    if initial:
        ax.axvspan(0.5, initial + 0.5, color="#000000", alpha=0.06, lw=0)
        ax.text(0.5 + initial / 2, 0.01, "initial\ndesign", transform=ax.get_xaxis_transform(), ha="center",
                va="bottom", fontsize=8, color=_GREY)
    for label in labels:
        rows = curves[curves["policy"].astype(str) == label].sort_values("trial")
        t = rows["trial"].to_numpy()
        low = np.maximum(rows["regret_q25"].to_numpy(dtype=float), floor)
        high = np.maximum(rows["regret_q75"].to_numpy(dtype=float), floor)
        mid = np.maximum(rows["regret_median"].to_numpy(dtype=float), floor)
        ax.fill_between(t, low, high, color=colors[label], alpha=_band_alpha(labels), lw=0)
        ax.plot(t, mid, color=colors[label], ls=styles[label], lw=1.8, label=_shown(label))
    for b in budgets:
        ax.axvline(b, color=_GREY, lw=0.8, ls=":", zorder=0)
        ax.text(b, 0.99, f"budget {b} ", transform=ax.get_xaxis_transform(), fontsize=8, color=_GREY,
                va="top", ha="right")
    if target > 0:
        ax.axhline(target, color="#000000", lw=1.0, ls="--", label=f"target ({target:g})")
    ax.set_yscale("log")
    shown = np.maximum(values[np.isfinite(values)], floor)
    top = max(float(shown.max()) if shown.size else 1.0, target, floor * 10)
    bottom = min(float(shown.min()) if shown.size else floor, target if target > 0 else np.inf)
    ax.set_ylim(bottom / 2.5, top * 3)
    trials = curves["trial"].to_numpy()
    ax.set_xlim(min(trials.min(), 1) - 0.5, trials.max() + 0.5)
    ax.set_xlabel("trial")
    ax.set_ylabel(f"simple regret (objective units)\n{_floor_note(floor, values)}", fontsize=9.5)
    ax.set_title("Regret of the recommendation: median (line) and middle 50 % of campaigns (band)",
                 fontsize=10, loc="left")
    _legend_outside(ax)
    return fig


def failure_figure(summary, *, colors=None, ax=None):
    """Failure risk against budget with its Wilson 95 % interval (error bars).

    Parameters
    ----------
    summary : DataFrame
        `simlab.metrics.budget_summary` output (``policy, budget, failure_risk,
        failure_low, failure_high``).
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    _check_columns(summary, "summary", ("policy", "budget", "failure_risk", "failure_low", "failure_high"))
    labels = _policies_in(summary)
    colors = _colors_for(labels, colors)
    styles = _linestyles(labels)
    fig, ax = _new_axes(ax, (_KIND_WIDTH, 4.0))
    budgets = np.sort(summary["budget"].unique())
    gap = float(np.min(np.diff(budgets))) if budgets.size > 1 else 1.0
    # Dodge the policies sideways so that error bars do not hide each other.
    offsets = (np.arange(len(labels)) - (len(labels) - 1) / 2) * (0.5 * gap / max(len(labels), 1))
    for label, dx in zip(labels, offsets):
        rows = summary[summary["policy"].astype(str) == label].sort_values("budget")
        b = rows["budget"].to_numpy(dtype=float) + dx
        risk = rows["failure_risk"].to_numpy(dtype=float)
        err = np.vstack([risk - rows["failure_low"].to_numpy(dtype=float),
                         rows["failure_high"].to_numpy(dtype=float) - risk])
        ax.errorbar(b, risk, yerr=np.maximum(err, 0.0), color=colors[label], ls=styles[label], lw=1.2,
                    marker="o", ms=5, capsize=3, label=_shown(label))
    ax.set_xticks(budgets)
    ax.set_xlim(budgets.min() - 0.6 * gap, budgets.max() + 0.6 * gap)
    ax.set_ylim(-0.02, 1.02)
    _percent_axis(ax.yaxis)
    ax.grid(axis="y", color="#dddddd", lw=0.6)
    ax.set_xlabel("budget (trials)")
    ax.set_ylabel("failure risk\n(share of campaigns above the target)")
    ax.set_title("Failure risk at each budget, with 95 % Wilson intervals", fontsize=10, loc="left")
    _legend_outside(ax)
    return fig


def reach_figure(reach, *, success=0.9, colors=None, ax=None):
    """Kaplan-Meier share of campaigns that have met the target by each trial, with its band.

    Parameters
    ----------
    reach : DataFrame
        `simlab.metrics.reach_curves` output (``policy, trial, reached, reached_low,
        reached_high``).
    success : float, default 0.9
        Requested success level, drawn as a horizontal line.
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    _check_columns(reach, "reach", ("policy", "trial", "reached", "reached_low", "reached_high"))
    labels = _policies_in(reach)
    colors = _colors_for(labels, colors)
    styles = _linestyles(labels)
    fig, ax = _new_axes(ax, (_KIND_WIDTH, 4.2))
    for label in labels:
        rows = reach[reach["policy"].astype(str) == label].sort_values("trial")
        t = rows["trial"].to_numpy(dtype=float)
        # A share holds from its trial until the next one: draw the last step half a trial wide.
        t_ext = np.append(t, t[-1] + 0.5)

        def ext(column, rows=rows):
            v = rows[column].to_numpy(dtype=float)
            return np.append(v, v[-1])

        ax.fill_between(t_ext, ext("reached_low"), ext("reached_high"), step="post", color=colors[label],
                        alpha=_band_alpha(labels), lw=0)
        ax.step(t_ext, ext("reached"), where="post", color=colors[label], ls=styles[label], lw=1.8, label=_shown(label))
    ax.axhline(success, color="#000000", lw=1.0, ls="--", label=f"requested success ({success:.0%})")
    trials = reach["trial"].to_numpy(dtype=float)
    ax.set_xlim(trials.min() - 0.5, trials.max() + 0.5)
    ax.set_ylim(-0.02, 1.02)
    _percent_axis(ax.yaxis)
    ax.grid(axis="y", color="#dddddd", lw=0.6)
    ax.set_xlabel("trial")
    ax.set_ylabel("share of campaigns that met the target")
    ax.set_title("Trials to target (Kaplan-Meier, 95 % band; campaigns that never meet it are censored)",
                 fontsize=10, loc="left")
    _legend_outside(ax)
    return fig


def final_regret_figure(final, *, target, budget=None, colors=None, ax=None):
    """Distribution of regret at one budget per policy: box plot with every campaign shown.

    Parameters
    ----------
    final : DataFrame
        `simlab.metrics.regret_at_budget` output (``policy, replicate, regret``).
    target : float
        Regret tolerance, drawn as a vertical line.
    budget : int, optional
        The budget, for the title.
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    import seaborn as sns

    _check_columns(final, "final", ("policy", "regret"))
    labels = _policies_in(final)
    colors = _colors_for(labels, colors)
    fig, ax = _new_axes(ax, (_KIND_WIDTH, 0.9 + 0.45 * len(labels)))
    floor = _regret_floor(final["regret"].to_numpy(dtype=float), target)
    data = pd.DataFrame({
        "policy": pd.Categorical(final["policy"].astype(str), categories=labels, ordered=True),
        "regret": np.maximum(final["regret"].to_numpy(dtype=float), floor),
    })
    palette = {label: colors[label] for label in labels}
    with _quiet_seaborn():
        sns.boxplot(data=data, x="regret", y="policy", hue="policy", order=labels, hue_order=labels,
                    palette=palette, legend=False, ax=ax, width=0.55, fliersize=0, linewidth=1.0,
                    boxprops={"alpha": 0.35}, log_scale=True)
    # Every campaign as a dot, jittered sideways by a fixed local generator so that
    # redrawing gives the same picture.
    jitter = np.random.default_rng(_JITTER_SEED)
    for i, label in enumerate(labels):
        x = data.loc[data["policy"] == label, "regret"].to_numpy()
        ax.scatter(x, i + jitter.uniform(-0.22, 0.22, x.size), s=7, color=colors[label], alpha=0.7, lw=0,
                   zorder=3, gid=f"campaigns:{label}")
    if target > 0:
        ax.axvline(target, color="#000000", lw=1.0, ls="--")
        ax.text(target, 1.0, f" target {target:g}", transform=ax.get_xaxis_transform(), fontsize=8,
                va="bottom", ha="left")
    _policy_ticks(ax.yaxis, labels, colors)
    ax.set_xlabel(f"simple regret (objective units)\n{_floor_note(floor, final['regret'])}")
    ax.set_ylabel("policy")
    when = f" after {budget} trials" if budget is not None else ""
    ax.set_title(f"Regret of every campaign{when} (box: quartiles; dots: campaigns)", fontsize=10, loc="left",
                 pad=14)
    return fig


def win_rate_figure(pairs, *, alpha=0.05, ax=None, colors=None):
    """Pairwise win-rate matrix: share of worlds where the row policy ends with lower regret.

    Parameters
    ----------
    pairs : DataFrame
        `simlab.compare.pairwise` output (``policy_a, policy_b, budget, win_rate,
        regret_p_holm``).
    alpha : float, default 0.05
        Cells whose Holm-adjusted Wilcoxon p-value is below it get a star.
    colors : dict, optional
        `policy_colors` mapping, used for the tick labels.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Ties count half to each policy, so cell (a, b) and cell (b, a) add up to 100 %.
    """
    import seaborn as sns

    _check_columns(pairs, "pairs", ("policy_a", "policy_b", "win_rate", "regret_p_holm"))
    labels = []
    for a, b in zip(pairs["policy_a"].astype(str), pairs["policy_b"].astype(str)):
        for p in (a, b):
            if p not in labels:
                labels.append(p)
    colors = _colors_for(labels, colors)
    k = len(labels)
    fig, ax = _new_axes(ax, (min(_KIND_WIDTH, 2.2 + 0.85 * k), 1.6 + 0.6 * k))
    matrix = pd.DataFrame(np.nan, index=labels, columns=labels)
    text = pd.DataFrame("", index=labels, columns=labels)
    for row in pairs.itertuples(index=False):
        a, b, w = str(row.policy_a), str(row.policy_b), float(row.win_rate)
        star = "*" if float(row.regret_p_holm) < alpha else ""
        matrix.loc[a, b], matrix.loc[b, a] = w, 1.0 - w
        text.loc[a, b], text.loc[b, a] = f"{w:.0%}{star}", f"{1.0 - w:.0%}{star}"
    with _quiet_seaborn():
        sns.heatmap(matrix, annot=text.to_numpy(), fmt="", cmap="vlag_r", center=0.5, vmin=0.0, vmax=1.0,
                    square=True, linewidths=0.5, linecolor="white", ax=ax, annot_kws={"fontsize": 9},
                    cbar_kws={"label": "row policy wins", "format": "{x:.0%}", "shrink": 0.8})
    _policy_ticks(ax.yaxis, labels, colors, offset=0.5)
    _policy_ticks(ax.xaxis, labels, colors, offset=0.5)
    ax.tick_params(axis="x", labelrotation=35)
    ax.tick_params(axis="y", labelrotation=0)
    for tick in ax.get_xticklabels():
        tick.set_ha("right")
    ax.set_xlabel("against (column)")
    ax.set_ylabel("policy (row)")
    budget = pairs["budget"].iloc[0] if "budget" in pairs.columns and len(pairs) else None
    when = f" after {budget} trials" if budget is not None else ""
    ax.set_title(f"Share of worlds where the row policy\nends with lower regret{when}\n"
                 f"(ties count half; * Holm-adjusted\nWilcoxon p < {alpha:g})", fontsize=10, loc="left")
    return fig


# ---------------------------------------------------------------------------
# campaign snapshot
# ---------------------------------------------------------------------------
@dataclass
class _Snapshot:
    """Everything the snapshot figure draws, in the user's units and orientation."""

    name: str              # input along the horizontal axis
    x: np.ndarray          # (g,) input values along the line
    mean: np.ndarray       # (g,) posterior mean
    low: np.ndarray        # (g,) lower edge of the 95 % band
    high: np.ndarray       # (g,) upper edge
    world: np.ndarray      # (g,) true world
    trials_x: np.ndarray   # (n,) observed trials so far, input along the axis
    trials_y: np.ndarray   # (n,) observed values
    past: np.ndarray       # (n,) bool: the trial was run before the campaign (history)
    lost: int              # trials so far that returned nothing
    scores: dict           # label -> (g,) acquisition scaled to [0, 1], or None
    next_x: dict           # label -> chosen next input along the axis
    next_score: dict       # label -> scaled acquisition at the next input (one-input studies), or None
    minimisers: np.ndarray  # (S,) best input along the axis in each posterior sample
    best_x: float          # the world's true best input along the axis
    best_y: float
    fixed: dict            # other inputs held fixed (d > 1), name -> value
    trials: int            # campaign trials so far (history not counted)


def _acquisition_for_display(policy, values):
    """Scores in a form worth plotting: log-space scores (PI, EI) back on their natural scale."""
    values = np.asarray(values, dtype=float)
    if getattr(policy, "log_score", False):
        values = np.exp(values - np.max(values))
    span = np.max(values) - np.min(values)
    if not np.isfinite(span) or span <= 0:
        return np.full(values.shape, 0.5)
    return (values - np.min(values)) / span


def _check_snapshot_args(study, replicate, policy, trial, along, samples, points):
    n0, horizon = study.campaign.initial, study.campaign.horizon
    if not isinstance(replicate, Integral) or isinstance(replicate, bool) or replicate < 0:
        raise ValueError(f"`replicate` must be a whole number >= 0; got {replicate!r}")
    if policy is not None and policy not in study.labels:
        raise ValueError(f"`policy` must be one of {list(study.labels)}; got {policy!r}")
    if trial is None:
        trial = n0
    if not isinstance(trial, Integral) or isinstance(trial, bool) or not n0 <= trial < horizon:
        raise ValueError(f"`trial` must be a whole number from campaign.initial = {n0} to {horizon - 1} "
                         f"(a next trial must remain); got {trial!r}")
    if trial > n0 and policy is None:
        raise ValueError(f"`trial` {trial} lies beyond the initial design; name the `policy` whose trials to show")
    names = study.space.names
    if along is None:
        j = 0
    elif isinstance(along, str):
        if along not in names:
            raise ValueError(f"`along` must be one of the inputs {list(names)}; got {along!r}")
        j = names.index(along)
    elif isinstance(along, Integral) and not isinstance(along, bool) and 0 <= along < len(names):
        j = int(along)
    else:
        raise ValueError(f"`along` must be an input name or an index below {len(names)}; got {along!r}")
    for name, value, low in (("samples", samples, 1), ("points", points, 16)):
        if not isinstance(value, Integral) or isinstance(value, bool) or value < low:
            raise ValueError(f"`{name}` must be a whole number >= {low}; got {value!r}")
    return int(trial), j


def _trials_so_far(study, traces, replicate, policy, trial):
    """Trace rows of one campaign up to `trial` (past trials included), from the runner's record."""
    if traces is None:
        from .runner import replay_replicate

        traces = replay_replicate(study, replicate)
    else:
        _check_columns(traces, "traces", ("policy", "replicate", "trial", "y", *study.space.names))
    label = policy if policy is not None else study.labels[0]  # the initial design is shared
    rows = traces[(traces["policy"].astype(str) == label) & (traces["replicate"] == replicate)
                  & (traces["trial"] <= trial)].sort_values("trial")
    if rows.empty or rows["trial"].max() < trial:
        raise ValueError(f"`traces` has no trials 1..{trial} of policy {label!r} on replicate {replicate}")
    return rows


def _snapshot_data(study, traces, replicate, policy, trial, along, samples, points):
    from .gp import Posterior
    from .policies import Acquisition, Context
    from .rng import stream
    from .runner import make_belief, make_policy, make_replicate
    from .worlds import FeatureSample

    trial, j = _check_snapshot_args(study, replicate, policy, trial, along, samples, points)
    space, sign, horizon = study.space, study.sign, study.campaign.horizon
    rows = _trials_so_far(study, traces, replicate, policy, trial)
    rep = make_replicate(study, int(replicate))
    belief = make_belief(study)

    # The belief after the trials so far (lost trials returned nothing and teach nothing).
    observed = np.isfinite(rows["y"].to_numpy(dtype=float))
    X_user = rows[list(space.names)].to_numpy(dtype=float)[observed]
    U = space.to_unit(X_user)
    y = sign * rows["y"].to_numpy(dtype=float)[observed]
    post = Posterior(belief.kernel, belief.mean, belief.noise, pool=rep.pool, capacity=max(len(y), 1) + 1)
    for u, v in zip(U, y):
        post.add(u, v)

    # The line the figure is drawn along: the whole input range (d = 1) or a slice through
    # the current recommendation (d > 1). For d = 1 the trial inputs are on the line.
    grid = np.linspace(0.0, 1.0, points)
    if space.dim == 1:
        grid = np.unique(np.concatenate([grid, U[:, 0]]))
    base = U[post.recommend()].copy() if post.n else np.full(space.dim, 0.5)
    line = np.repeat(base[None, :], grid.size, axis=0)
    line[:, j] = grid
    mu, sd = post.moments(line)
    band = (sign * (mu - _Z95 * sd), sign * (mu + _Z95 * sd))

    # What each policy would choose next from this belief. Each starts afresh on its own
    # keyed stream, exactly as a campaign starts it, so after the initial design the
    # choices are those the campaigns made at trial initial + 1.
    specs = {p.label: p for p in study.policies}
    scores, next_x, next_score = {}, {}, {}
    for label in study.labels:
        pol = make_policy(specs[label])
        pol.start(Context(pool=rep.pool, rng=stream(study.seed, int(replicate), "policy", label),
                          sequence=rep.sequence, horizon=horizon, posterior=post))
        u_next = np.asarray(pol.choose(post, trial), dtype=float)
        next_x[label] = float(space.from_unit(u_next)[j])
        scores[label] = next_score[label] = None
        if isinstance(pol, Acquisition):
            # `choose` prepared the rule for this posterior (incumbent, or the Thompson
            # sample it minimised): score the line with exactly that state. With one input
            # the next input lies on the line, so it is scaled together with it.
            scored = np.vstack([line, u_next[None, :]]) if space.dim == 1 else line
            scaled = _acquisition_for_display(pol, pol.score(post, scored))
            scores[label] = scaled[: line.shape[0]]
            if space.dim == 1:
                next_score[label] = float(scaled[-1])

    # Monte Carlo distribution of the minimiser: posterior function samples drawn pathwise,
    # g = f + K(., X) (K + s2 I)^-1 (y - f(X) - eps), each minimised over a candidate set.
    rng = np.random.default_rng(_SNAPSHOT_SEED)
    sampler = FeatureSample(belief.kernel, belief.mean, rng, _SNAPSHOT_FREQUENCIES)
    candidates = line if space.dim == 1 else np.vstack([rep.pool, line])
    weights = np.empty((sampler.w.size, samples))
    for s in range(samples):
        if s:
            sampler.redraw(rng)
        weights[:, s] = sampler.w
    values = sampler.mean + sampler.basis(candidates) @ weights
    if post.n:
        eps = np.sqrt(post.s2) * rng.standard_normal((post.n, samples))
        residual = y[:, None] - (sampler.mean + sampler.basis(U) @ weights) - eps
        values += belief.kernel(candidates, U) @ post.solve(residual)
    minimisers = space.from_unit(candidates[np.argmin(values, axis=0)])[:, j]

    u_best, f_best = rep.optimum
    fixed = {}
    if space.dim > 1:
        base_user = space.from_unit(base)
        fixed = {space.names[i]: float(base_user[i]) for i in range(space.dim) if i != j}
    return _Snapshot(
        name=space.names[j], x=space.from_unit(line)[:, j], mean=sign * mu, low=np.minimum(*band),
        high=np.maximum(*band), world=sign * rep.world(line), trials_x=X_user[:, j], trials_y=sign * y,
        past=(rows["trial"].to_numpy() <= 0)[observed], lost=int((~observed).sum()),
        scores=scores, next_x=next_x, next_score=next_score, minimisers=minimisers,
        best_x=float(space.from_unit(u_best)[j]), best_y=float(sign * f_best), fixed=fixed, trials=trial,
    )


def snapshot_figure(study, traces=None, *, replicate=0, policy=None, trial=None, along=None, samples=400,
                    points=301, colors=None):
    """One replicate at one moment of a campaign: belief, truth, and what each policy would do next.

    Parameters
    ----------
    study : Study
        The study; the replicate's world and candidate pool are rebuilt from its keyed
        streams (`simlab.runner.make_replicate`).
    traces : DataFrame, optional
        The study's traces; the trials so far are read from them. Default: the replicate
        is replayed (`simlab.runner.replay_replicate`).
    replicate : int, default 0
    policy : str, optional
        Label of the policy whose trials are shown; default: only the initial design
        (and any past trials), which every policy shares.
    trial : int, optional
        Number of campaign trials so far (default ``campaign.initial``); beyond the
        initial design `policy` must be given.
    along : str or int, optional
        Input on the horizontal axis (default the first). For more than one input the
        figure is a slice through the current recommendation; the other inputs are held
        at its values and trials are drawn at their coordinate on this input.
    samples : int, default 400
        Posterior function samples for the distribution of the minimiser's location.
    points : int, default 301
        Points along the input (the trial inputs are added for one-input studies).
    colors : dict, optional
        `policy_colors` mapping.

    Returns
    -------
    matplotlib.figure.Figure
        Four panels sharing the input axis: posterior mean with its 95 % band for the
        noise-free objective, the trials so far and the true world (dashed); each
        scoring policy's acquisition scaled to [0, 1]; the next input each policy would
        choose (one row per policy); and a histogram of where the posterior samples put
        the best input.

    Notes
    -----
    The belief is the study's stated one (``simlab.runner.make_belief``), not refitted.
    The next inputs come from each policy started afresh on its keyed stream and given
    this belief; after the initial design (with one trial per round and no refit at that
    point) they are the choices the campaigns made. Acquisitions scored in log space (PI, EI) are
    exponentiated before scaling. Rules that do not score inputs (random, sobol) have no
    curve. Posterior samples are drawn pathwise from random Fourier features (Wilson et
    al. 2020, Efficiently Sampling Functions from Gaussian Process Posteriors, ICML) with
    a fixed local generator, and each is minimised over the plotted line (one input) or
    the candidate pool plus the line (several inputs).
    """
    snap = _snapshot_data(study, traces, replicate, policy, trial, along, samples, points)
    labels = list(study.labels)
    colors = _colors_for(labels, colors)
    styles = _linestyles(labels)
    from matplotlib.figure import Figure

    rows = 0.45 + 0.17 * len(labels)
    fig = Figure(figsize=(_KIND_WIDTH, 7.6 + rows), layout="constrained")
    top, mid, nxt, low = fig.subplots(4, 1, sharex=True,
                                      gridspec_kw={"height_ratios": [3.0, 1.8, rows, 1.3]})
    goal = "maximised" if study.sign < 0 else "minimised"

    top.fill_between(snap.x, snap.low, snap.high, color="#0072B2", alpha=0.18, lw=0,
                     label="95 % band (posterior)", gid="posterior-band")
    top.plot(snap.x, snap.mean, color="#0072B2", lw=1.8, label="posterior mean", gid="posterior-mean")
    top.plot(snap.x, snap.world, color="#000000", lw=1.3, ls="--", label="true world (hidden from policies)",
             gid="world")
    new = ~snap.past
    if new.any():
        top.plot(snap.trials_x[new], snap.trials_y[new], ls="none", marker="o", ms=6, mfc="white",
                 mec="#000000", mew=1.4, label="trials so far (observed)", gid="trials")
    if snap.past.any():
        top.plot(snap.trials_x[snap.past], snap.trials_y[snap.past], ls="none", marker="s", ms=5, color=_GREY,
                 label="past trials (history)", gid="past-trials")
    if not snap.fixed:
        top.plot([snap.best_x], [snap.best_y], ls="none", marker="*", ms=13, color="#E69F00", mec="#000000",
                 mew=0.6, label="true best input", gid="true-best")
    top.set_ylabel(f"objective ({goal})")
    top.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)

    for label in labels:
        curve = snap.scores[label]
        if curve is None:
            continue
        mid.plot(snap.x, curve, color=colors[label], ls=styles[label], lw=1.5, label=_shown(label))
        if snap.next_score[label] is not None:
            mid.plot([snap.next_x[label]], [snap.next_score[label]], ls="none", marker="v", ms=7,
                     color=colors[label], mec="#000000", mew=0.5)
    mid.set_ylim(-0.04, 1.1)
    mid.set_yticks([0.0, 0.5, 1.0])
    mid.set_ylabel("acquisition\n(scaled to 0-1)")
    if mid.get_legend_handles_labels()[0]:
        mid.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)
    else:
        mid.text(0.5, 0.5, "no policy in this study scores inputs", transform=mid.transAxes, ha="center",
                 color=_GREY)

    # One row per policy: where each would run the next trial.
    for i, label in enumerate(labels):
        nxt.plot([snap.next_x[label]], [i], ls="none", marker="v", ms=8, color=colors[label], mec="#000000",
                 mew=0.5, gid=f"next:{label}", label=_shown(label), clip_on=False)
    _policy_ticks(nxt.yaxis, labels, colors, fontsize=8.5)
    nxt.set_ylim(len(labels) - 0.5, -0.5)
    nxt.grid(axis="y", color="#e5e5e5", lw=0.6)
    nxt.set_ylabel("policy")
    nxt.set_title(f"next input each policy would choose (trial {snap.trials + 1})", fontsize=9, loc="left")

    names = study.space.names
    lo_x, hi_x = study.space.low[names.index(snap.name)], study.space.high[names.index(snap.name)]
    low.hist(snap.minimisers, bins=np.linspace(lo_x, hi_x, 41), color=_GREY, alpha=0.75, gid="minimiser-hist")
    low.axvline(snap.best_x, color="#000000", lw=1.0, ls="--", label="true best input")
    low.set_ylabel("posterior\nsamples")
    low.set_xlabel(snap.name)
    low.set_xlim(lo_x, hi_x)
    low.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)
    low.set_title(f"where {snap.minimisers.size} posterior samples put the best {snap.name}", fontsize=9,
                  loc="left")

    if policy is None:
        when = "before the first trial" if snap.trials == 0 else f"after the {snap.trials}-trial initial design"
    else:
        when = f"after {snap.trials} trials of {_shown(policy)}"
    title = f"Campaign snapshot: replicate {replicate}, {when}"
    if snap.past.any():
        title += f" (plus {int(snap.past.sum())} past trials)"
    if snap.lost:
        title += f"; {snap.lost} lost"
    if snap.fixed:
        held = ", ".join(f"{_shown(k)} = {v:.4g}" for k, v in snap.fixed.items())
        title += (f"\nslice through the current recommendation ({held});\n"
                  "trials and next inputs of other coordinates projected onto this input")
    top.set_title(title, fontsize=10, loc="left")
    return fig


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------
def save_figure(fig, folder, stem):
    """Write ``<stem>.png`` (150 dpi) and ``<stem>.svg`` into `folder`, each atomically.

    Parameters
    ----------
    fig : matplotlib Figure
    folder : path
        Created if missing.
    stem : str
        File name without extension.

    Returns
    -------
    png, svg : pathlib.Path
    """
    from .store import atomic_write

    if not isinstance(stem, str) or not stem or "/" in stem or "\\" in stem or stem.startswith("."):
        raise ValueError(f"`stem` must be a plain file name without folders; got {stem!r}")
    folder = Path(folder)
    png, svg = folder / f"{stem}.png", folder / f"{stem}.svg"
    import matplotlib

    # The temporary file has no telling extension, so the format is named explicitly;
    # metadata without dates and a fixed hash salt make repeated reports byte-identical.
    with matplotlib.rc_context({"svg.hashsalt": "simlab", "svg.fonttype": "path"}):
        atomic_write(png, _shareable(lambda p: fig.savefig(p, format="png", dpi=_DPI, facecolor="white",
                                                           metadata={"Software": None})))
        atomic_write(svg, _shareable(lambda p: fig.savefig(p, format="svg", facecolor="white",
                                                           metadata={"Date": None, "Creator": None})))
    return png, svg


def _shareable(write):
    """Wrap a writer so the file is readable by others (temporary files start as owner-only)."""
    import os

    def _write(path):
        write(path)
        os.chmod(path, 0o644)

    return _write
