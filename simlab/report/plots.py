"""Figures of a study's results: regret, failure risk, within-target share, first passage, comparisons, the sweep."""

from __future__ import annotations

__all__ = [
    "policy_colors",
    "regret_figure",
    "failure_figure",
    "reach_figure",
    "final_regret_figure",
    "win_rate_figure",
    "sweep_figure",
    "placement_figure",
    "harm_figure",
    "stopping_figure",
    "save_figure",
]

import numpy as np
import pandas as pd

from .style import (GREY, JITTER_SEED, KIND_WIDTH, band_alpha, check_columns, colors_for, display_label, floor_note,
                    legend_outside, linestyles, mark_every, markers, new_axes, percent_axis, policies_in,
                    policy_colors, policy_ticks, quiet_seaborn, regret_floor, save_figure)


# ---------------------------------------------------------------------------
# results figures
# ---------------------------------------------------------------------------
def regret_figure(curves, *, target, budgets=(), initial=None, colors=None, ax=None, unit="trial",
                  units="objective units"):
    """Simple regret of the recommendation against trial (or round): median and interquartile band.

    Parameters
    ----------
    curves : DataFrame
        `simlab.evidence.metrics.regret_curves` output (``policy, trial, regret_median,
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
    unit : {"trial", "round"}
        What the ``trial`` column counts; "round" when the curves are taken at the end of
        each round of trials evaluated together (the budgets and initial design are then
        given in rounds too).
    units : str
        The objective's unit for the regret axis (``[study] units``; "objective units" when none).

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    The y axis is logarithmic; regret below ``target / 1000`` (including exact zeros)
    is drawn at that floor, which the axes state.
    """
    if unit not in ("trial", "round"):
        raise ValueError(f"`unit` must be 'trial' or 'round'; got {unit!r}")
    check_columns(curves, "curves", ("policy", "trial", "regret_median", "regret_q25", "regret_q75"))
    labels = policies_in(curves)
    colors = colors_for(labels, colors)
    styles, marks = linestyles(labels), markers(labels)
    fig, ax = new_axes(ax, (KIND_WIDTH, 3.4))
    values = curves[["regret_median", "regret_q25", "regret_q75"]].to_numpy(dtype=float)
    floor = regret_floor(values, target)
    if initial:
        ax.axvspan(0.5, initial + 0.5, color="#000000", alpha=0.06, lw=0)
        ax.text(0.5 + initial / 2, 0.01, "initial\ndesign", transform=ax.get_xaxis_transform(), ha="center",
                va="bottom", fontsize=8, color=GREY)
    for i, label in enumerate(labels):
        rows = curves[curves["policy"].astype(str) == label].sort_values("trial")
        t = rows["trial"].to_numpy()
        low = np.maximum(rows["regret_q25"].to_numpy(dtype=float), floor)
        high = np.maximum(rows["regret_q75"].to_numpy(dtype=float), floor)
        mid = np.maximum(rows["regret_median"].to_numpy(dtype=float), floor)
        ax.fill_between(t, low, high, color=colors[label], alpha=band_alpha(labels), lw=0)
        ax.plot(t, mid, color=colors[label], ls=styles[label], lw=1.6, marker=marks[label], ms=5,
                markevery=mark_every(t, i, after=initial or 0), label=display_label(label))
    for b in budgets:
        ax.axvline(b, color=GREY, lw=0.8, ls=":", zorder=0)
        ax.text(b, 0.99, f"budget {b}{' rounds' if unit == 'round' else ''} ", transform=ax.get_xaxis_transform(),
                fontsize=8, color=GREY, va="top", ha="right")
    if target > 0:
        ax.axhline(target, color="#000000", lw=1.0, ls="--", label=f"target ({target:g} {units})")
    ax.set_yscale("log")
    shown = np.maximum(values[np.isfinite(values)], floor)
    top = max(float(shown.max()) if shown.size else 1.0, target, floor * 10)
    bottom = min(float(shown.min()) if shown.size else floor, target if target > 0 else np.inf)
    ax.set_ylim(bottom / 2.5, top * 3)
    trials = curves["trial"].to_numpy()
    ax.set_xlim(min(trials.min(), 1) - 0.5, trials.max() + 0.5)
    ax.set_xlabel("round (trials evaluated together)" if unit == "round" else "trial")
    ax.set_ylabel(f"simple regret ({units})\n{floor_note(floor, values)}", fontsize=9.5)
    ax.set_title("Regret after each round: median (line) and middle 50 % of campaigns (band)" if unit == "round"
                 else "Regret of the recommendation: median (line) and middle 50 % of campaigns (band)",
                 fontsize=10, loc="left")
    legend_outside(ax)
    return fig


def failure_figure(within, *, success=0.9, budgets=(), initial=None, target=None, units="objective units",
                   colors=None, ax=None):
    """Miss risk (failure risk) after every trial, with its exact 95 % band: one minus the within-target share.

    Parameters
    ----------
    within : DataFrame
        `simlab.evidence.reach.within_target_curves` output (``policy, trial, within_target,
        within_low, within_high``); the miss risk is ``1 - within_target`` and its band
        ``[1 - within_high, 1 - within_low]`` (the Clopper–Pearson interval of the complement).
    success : float, default 0.9
        Requested success level: the largest miss risk the budget plan accepts, ``1 - success``,
        is drawn as a dashed line.
    budgets : sequence of int, default ()
        The study's budgets, drawn as dotted vertical lines.
    initial : int, optional
        Trials of the initial design (shared by every policy), shaded.
    target : float, optional
        The regret target, named with `units` on the y axis.
    units : str
        The objective's unit (``[study] units``; "objective units" when none).
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Every policy is drawn at its own trials (no sideways shift): curves that lie together are
    told apart by line style and marker as well as colour.
    """
    check_columns(within, "within", ("policy", "trial", "within_target", "within_low", "within_high"))
    labels = policies_in(within)
    colors = colors_for(labels, colors)
    fig, ax = new_axes(ax, (KIND_WIDTH, 3.4))
    miss = within.assign(miss=1.0 - within["within_target"].astype(float),
                         miss_low=1.0 - within["within_high"].astype(float),
                         miss_high=1.0 - within["within_low"].astype(float))
    if initial:
        ax.axvspan(0.5, initial + 0.5, color="#000000", alpha=0.06, lw=0)
    for b in budgets:
        ax.axvline(b, color=GREY, lw=0.8, ls=":", zorder=0)
        ax.text(b, 0.99, f"budget {b} ", transform=ax.get_xaxis_transform(), fontsize=8, color=GREY, va="top",
                ha="right")
    _share_steps(ax, miss, ("miss", "miss_low", "miss_high"), labels, colors, after=initial or 0)
    ax.axhline(1.0 - success, color="#000000", lw=1.0, ls="--", label=f"plan's limit ({1 - success:.0%})")
    words = f"more than {target:g} {units} short" if target is not None else "outside the target"
    ax.set_ylabel(f"miss risk: share of campaigns\nending {words}", fontsize=9.5)
    ax.set_title("Miss risk after each trial, with its exact 95 % band (Clopper–Pearson)", fontsize=10, loc="left")
    legend_outside(ax)
    return fig


def _share_steps(ax, frame, columns, labels, colors, *, after=0):
    """Step curves of a share per policy with its band; a share holds from its trial to the next."""
    value, low, high = columns
    styles, marks = linestyles(labels), markers(labels)
    for i, label in enumerate(labels):
        rows = frame[frame["policy"].astype(str) == label].sort_values("trial")
        t = rows["trial"].to_numpy(dtype=float)
        # A share holds from its trial until the next one: draw the last step half a trial wide.
        t_ext = np.append(t, t[-1] + 0.5)

        def ext(column, rows=rows):
            v = rows[column].to_numpy(dtype=float)
            return np.append(v, v[-1])

        ax.fill_between(t_ext, ext(low), ext(high), step="post", color=colors[label],
                        alpha=band_alpha(labels), lw=0)
        ax.step(t_ext, ext(value), where="post", color=colors[label], ls=styles[label], lw=1.6)
        # the markers sit in the middle of each step, on the value that holds there
        at = mark_every(t, i, after=after)
        ax.plot(t[at] + 0.5, rows[value].to_numpy(dtype=float)[at], ls="none", marker=marks[label], ms=5,
                color=colors[label])
        # an empty line carries the legend entry: line style and marker together
        ax.plot([], [], color=colors[label], ls=styles[label], lw=1.6, marker=marks[label], ms=5,
                label=display_label(label))
    trials = frame["trial"].to_numpy(dtype=float)
    ax.set_xlim(trials.min() - 0.5, trials.max() + 0.5)
    ax.set_ylim(-0.02, 1.02)
    percent_axis(ax.yaxis)
    ax.grid(axis="y", color="#dddddd", lw=0.6)
    ax.set_xlabel("trial")


def reach_figure(reach, *, success=0.9, initial=None, target=None, units="objective units", colors=None, ax=None):
    """First passage: Kaplan-Meier share of campaigns whose recommendation was within target at some trial so far.

    Descriptive only (a real campaign cannot observe its first passage); budgets are
    planned on the within-target share (`failure_figure` draws its complement).

    Parameters
    ----------
    reach : DataFrame
        `simlab.evidence.reach.reach_curves` output (``policy, trial, reached, reached_low,
        reached_high``).
    success : float, default 0.9
        Requested success level, drawn as a horizontal line.
    initial : int, optional
        Trials of the initial design; markers start after it.
    target : float, optional
        The regret target, named with `units` on the y axis.
    units : str
        The objective's unit.
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    check_columns(reach, "reach", ("policy", "trial", "reached", "reached_low", "reached_high"))
    labels = policies_in(reach)
    colors = colors_for(labels, colors)
    fig, ax = new_axes(ax, (KIND_WIDTH, 3.0))
    _share_steps(ax, reach, ("reached", "reached_low", "reached_high"), labels, colors, after=initial or 0)
    ax.axhline(success, color="#000000", lw=1.0, ls="--", label=f"requested success ({success:.0%})")
    words = f"{target:g} {units} of the best" if target is not None else "target"
    ax.set_ylabel(f"share of campaigns within\n{words} at some trial so far", fontsize=9.5)
    ax.set_title("First passage (descriptive: a real campaign cannot observe it; Kaplan-Meier, 95 % band)",
                 fontsize=10, loc="left")
    legend_outside(ax)
    return fig


def final_regret_figure(final, *, target, budget=None, colors=None, ax=None, units="objective units"):
    """Distribution of regret at one budget per policy: box plot with every campaign shown.

    Parameters
    ----------
    final : DataFrame
        `simlab.evidence.metrics.regret_at_budget` output (``policy, replicate, regret``).
    target : float
        Regret tolerance, drawn as a vertical line.
    budget : int, optional
        The budget, for the title.
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional
    units : str
        The objective's unit for the regret axis.

    Returns
    -------
    matplotlib.figure.Figure
    """
    check_columns(final, "final", ("policy", "regret"))
    labels = policies_in(final)
    colors = colors_for(labels, colors)
    fig, ax = new_axes(ax, (KIND_WIDTH, 0.9 + 0.4 * len(labels)))
    raw = final["regret"].to_numpy(dtype=float)
    floor = regret_floor(raw, target)
    policy = final["policy"].astype(str).to_numpy()
    # Every campaign as a dot, jittered sideways by a fixed local generator so that
    # redrawing gives the same picture; the boxes are drawn over them.
    jitter = np.random.default_rng(JITTER_SEED)
    stats = []
    for i, label in enumerate(labels):
        mine = raw[policy == label]
        x = np.maximum(mine, floor)
        ax.scatter(x, i + jitter.uniform(-0.3, 0.3, x.size), s=6, color=colors[label], alpha=0.45, lw=0,
                   zorder=2, gid=f"campaigns:{label}")
        q10, q25, q50, q75, q90 = np.maximum(np.quantile(mine, BOX_QUANTILES), floor)
        stats.append({"label": display_label(label), "whislo": q10, "q1": q25, "med": q50, "q3": q75,
                      "whishi": q90, "fliers": []})
    # Box: the quartiles (numpy's linear rule, as regret_q25/regret_q75 of summary.csv), a thick
    # median, whiskers from the 10th to the 90th percentile; the dots beyond are the worst tenth
    # that CVaR-90 averages. Filled faintly beneath the dots, outlined in black above them.
    positions = np.arange(len(labels))
    ax.bxp(stats, positions=positions, orientation="horizontal", widths=0.62, patch_artist=True, showfliers=False,
           boxprops={"facecolor": "none", "edgecolor": "#000000", "linewidth": 1.4},
           medianprops={"color": "#000000", "linewidth": 2.6}, whiskerprops={"color": "#000000", "linewidth": 1.1},
           capprops={"color": "#000000", "linewidth": 1.1}, zorder=4, manage_ticks=False)
    for i, (label, box) in enumerate(zip(labels, stats)):
        ax.add_patch(_box_fill(box, i, 0.62, colors[label]))
    ax.set_xscale("log")
    ax.set_ylim(len(labels) - 0.5, -0.5)
    if target > 0:
        ax.axvline(target, color="#000000", lw=1.0, ls="--", zorder=3)
        ax.text(target, 1.0, f" target {target:g} {units}", transform=ax.get_xaxis_transform(), fontsize=8,
                va="bottom", ha="left")
    policy_ticks(ax.yaxis, labels, colors)
    ax.set_xlabel(f"simple regret ({units})\n{floor_note(floor, raw)}")
    ax.set_ylabel("policy")
    when = f" after {budget} trials" if budget is not None else ""
    ax.set_title(f"Regret of every campaign{when} (box: quartiles; whiskers: 10th–90th percentile)", fontsize=10,
                 loc="left", pad=14)
    return fig


# The final-regret box: whiskers at the 10th and 90th percentiles, the box at the quartiles.
BOX_QUANTILES = (0.1, 0.25, 0.5, 0.75, 0.9)


def _box_fill(box, y, width, color):
    from matplotlib.patches import Rectangle

    return Rectangle((box["q1"], y - width / 2), box["q3"] - box["q1"], width, facecolor=color, alpha=0.28, lw=0,
                     zorder=1)


def win_rate_figure(pairs, *, alpha=0.05, ax=None, colors=None):
    """Pairwise win-rate matrix: share of worlds where the row policy ends with lower regret.

    Parameters
    ----------
    pairs : DataFrame
        `simlab.evidence.compare.pairwise` output (``policy_a, policy_b, budget, win_rate,
        sign_p_holm``).
    alpha : float, default 0.05
        Cells whose Holm-adjusted sign-test p-value is below it get a star.
    colors : dict, optional
        `policy_colors` mapping, used for the tick labels.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Ties count half to each policy, so cell (a, b) and cell (b, a) add up to 100 %.
    A star tests the number shown: the two-sided exact sign test of wins against losses
    (ties excluded; scipy.stats.binomtest), Holm-adjusted over the pairs of the matrix.
    """
    import seaborn as sns

    check_columns(pairs, "pairs", ("policy_a", "policy_b", "win_rate", "sign_p_holm"))
    labels = []
    for a, b in zip(pairs["policy_a"].astype(str), pairs["policy_b"].astype(str)):
        for p in (a, b):
            if p not in labels:
                labels.append(p)
    colors = colors_for(labels, colors)
    k = len(labels)
    fig, ax = new_axes(ax, (KIND_WIDTH, 1.3 + 0.45 * k))
    matrix = pd.DataFrame(np.nan, index=labels, columns=labels)
    text = pd.DataFrame("", index=labels, columns=labels)
    for row in pairs.itertuples(index=False):
        a, b, w = str(row.policy_a), str(row.policy_b), float(row.win_rate)
        star = "*" if float(row.sign_p_holm) < alpha else ""
        matrix.loc[a, b], matrix.loc[b, a] = w, 1.0 - w
        text.loc[a, b], text.loc[b, a] = f"{w:.0%}{star}", f"{1.0 - w:.0%}{star}"
    with quiet_seaborn():
        sns.heatmap(matrix, annot=text.to_numpy(), fmt="", cmap="vlag_r", center=0.5, vmin=0.0, vmax=1.0,
                    square=True, linewidths=0.5, linecolor="white", ax=ax, annot_kws={"fontsize": 9},
                    cbar_kws={"label": "row policy wins", "format": "{x:.0%}", "shrink": 0.8})
    policy_ticks(ax.yaxis, labels, colors, offset=0.5)
    policy_ticks(ax.xaxis, labels, colors, offset=0.5)
    ax.tick_params(axis="x", labelrotation=35)
    ax.tick_params(axis="y", labelrotation=0)
    for tick in ax.get_xticklabels():
        tick.set_ha("right")
    ax.set_xlabel("against (column)")
    ax.set_ylabel("policy (row)")
    budget = pairs["budget"].iloc[0] if "budget" in pairs.columns and len(pairs) else None
    when = f" after {budget} trials" if budget is not None else ""
    # over the whole width (square cells leave the axes narrow), on one line
    fig.suptitle(f"Share of worlds where the row policy ends with lower regret{when}", fontsize=10, x=0.01,
                 ha="left")
    return fig


def sweep_figure(summary, *, budget, target=None, units="objective units", colors=None):
    """Failure risk over the misspecification grid: one heatmap per policy.

    Parameters
    ----------
    summary : DataFrame
        `simlab.replay.sweep.summarize_sweep` output (``policy, budget, lengthscale_factor,
        amplitude_factor, failure_risk``).
    budget : int
        The budget to show.
    target : float, optional
        The regret target, named with `units` in the title.
    units : str
        The objective's unit.
    colors : dict, optional
        `policy_colors` mapping, used for the panel titles.

    Returns
    -------
    matplotlib.figure.Figure
        Columns: factor on the belief's lengthscales; rows: factor on its amplitude; the
        cell (1, 1) is the study's own belief and is outlined.
    """
    import seaborn as sns
    from matplotlib.figure import Figure
    from matplotlib.patches import Rectangle

    check_columns(summary, "summary", ("policy", "budget", "lengthscale_factor", "amplitude_factor",
                                        "failure_risk"))
    at = summary[summary["budget"] == budget]
    if at.empty:
        raise ValueError(f"`budget` {budget} is not in the sweep summary; it has {sorted(set(summary['budget']))}")
    labels = policies_in(at)
    colors = colors_for(labels, colors)
    k = len(labels)
    ncol = min(k, 3)
    nrow = -(-k // ncol)
    fig = Figure(figsize=(min(KIND_WIDTH, 2.6 * ncol + 1.2), 2.5 * nrow + 0.9), layout="constrained")
    axes = np.atleast_1d(fig.subplots(nrow, ncol, squeeze=False)).ravel()
    ls = sorted(at["lengthscale_factor"].unique())
    amp = sorted(at["amplitude_factor"].unique(), reverse=True)
    for i, (ax, label) in enumerate(zip(axes, labels)):
        g = at[at["policy"].astype(str) == label]
        grid = g.pivot(index="amplitude_factor", columns="lengthscale_factor", values="failure_risk")
        grid = grid.reindex(index=amp, columns=ls)
        with quiet_seaborn():
            sns.heatmap(grid, annot=grid.map(lambda v: f"{v:.0%}").to_numpy(), fmt="", cmap="rocket_r",
                        vmin=0.0, vmax=1.0, cbar=i == len(labels) - 1, ax=ax, annot_kws={"fontsize": 8},
                        linewidths=0.5, linecolor="white", square=True,
                        cbar_kws={"label": "miss risk", "format": "{x:.0%}"})
        if 1.0 in ls and 1.0 in amp:
            ax.add_patch(Rectangle((ls.index(1.0), amp.index(1.0)), 1, 1, fill=False, lw=2.0, ec="#0072B2"))
        ax.set_title(display_label(label), color=colors[label], fontsize=10, loc="left")
        ax.set_xticklabels([f"{v:g}" for v in ls], rotation=0)
        ax.set_yticklabels([f"{v:g}" for v in amp], rotation=0)
        ax.set_xlabel("belief lengthscale x" if i // ncol == nrow - 1 else "")
        ax.set_ylabel("belief amplitude x" if i % ncol == 0 else "")
    for ax in axes[k:]:
        ax.set_visible(False)
    target_words = f" (target {target:g} {units})" if target is not None else ""
    fig.suptitle(f"Miss risk{target_words} after {budget} trials when the belief is scaled wrongly", fontsize=10,
                 x=0.02, ha="left")
    return fig




def placement_figure(trials, *, names, low, high, band=0.01, placement=None, colors=None, space=None):
    """Where each policy's own trials land: one histogram per policy (rows) and input (columns).

    Parameters
    ----------
    trials : DataFrame
        The policies' own trials (`simlab.evidence.placement.own_trials`), inputs in user units.
    names : sequence of str
        The input columns.
    low, high : sequence of float
        The box in user units.
    band : float, default 0.01
        The boundary band, a fraction of each input's range; drawn as a dark narrow bar at
        each end whose height is the share of trials within it.
    placement : DataFrame, optional
        `simlab.evidence.placement.placement_table` output; its boundary and corner shares
        are written in each row.
    colors : dict, optional
        `policy_colors` mapping.
    space : simlab.study.types.Space, optional
        Says which inputs are stepped or categorical (one bar per allowed value or level, the
        levels named on the axis, no boundary band) and log-scaled (log bins on a log axis).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    from ..study.types import CATEGORICAL, LOG

    from .cells import fmt_pct

    check_columns(trials, "trials", ["policy", *names])
    labels = policies_in(trials)
    colors = colors_for(labels, colors)
    names = list(names)
    fig = Figure(figsize=(KIND_WIDTH, 0.6 + 0.72 * len(labels)), layout="constrained")
    axes = fig.subplots(len(labels), len(names), sharex="col", sharey=True, squeeze=False)
    bins = 20
    top = 0.0
    for i, label in enumerate(labels):
        mine = trials[trials["policy"].astype(str) == label]
        n = max(len(mine), 1)
        for j, name in enumerate(names):
            ax = axes[i, j]
            kind = space.kind(j) if space is not None else "continuous"
            if space is not None and j in space.discrete:
                # one bar per allowed value (stepped) or level (categorical), in the order of the space
                if kind == CATEGORICAL:
                    values = list(space.levels[j])
                    shares = mine[name].astype(str).value_counts().reindex(values, fill_value=0).to_numpy() / n
                else:
                    values = list(space.from_unit(np.outer(space.grid(j), np.ones(space.dim)))[:, j])
                    x = np.round(mine[name].to_numpy(dtype=float), 12)
                    shares = np.array([np.count_nonzero(x == np.round(v, 12)) for v in values]) / n
                ax.bar(np.arange(len(values)), shares, width=0.7, color=colors[label], alpha=0.45,
                       edgecolor=colors[label], linewidth=0.8, gid=f"levels:{label}:{name}")
                ax.set_xticks(np.arange(len(values)),
                              [str(v) if kind == CATEGORICAL else f"{v:g}" for v in values], fontsize=7,
                              rotation=30 if kind == CATEGORICAL else 0, ha="right" if kind == CATEGORICAL else "center")
                ax.set_xlim(-0.6, len(values) - 0.4)
                top = max(top, float(shares.max(initial=0)))
            else:
                x = mine[name].to_numpy(dtype=float)
                lo, hi = float(low[j]), float(high[j])
                log = kind == LOG
                if log:     # binned in log x, where the prior is stationary
                    x, lo, hi = np.log(x), np.log(lo), np.log(hi)
                width = band * (hi - lo)
                heights, edges = np.histogram(x, bins=bins, range=(lo, hi))
                draw = np.exp if log else (lambda v: v)
                # one step patch per histogram, not one rectangle per bin: the figure has 2 x inputs x policies
                # of them, and matplotlib's layout and rendering cost grows with the artists
                ax.stairs(heights / n, draw(edges), fill=True, color=colors[label], alpha=0.45, linewidth=0)
                ax.stairs(heights / n, draw(edges), color=colors[label], linewidth=0.8)
                reach = width * (1 + 1e-9)   # the allowance of simlab.evidence.placement.edge_flags for rounding
                ends = [np.count_nonzero(x - lo <= reach) / n, np.count_nonzero(hi - x <= reach) / n]
                if space is not None and space.library is not None:
                    ends = []                # a library has no boundary (simlab.evidence.placement.box_view)
                else:
                    ax.bar(draw(np.array([lo, hi - width])), ends, width=draw(np.array([lo + width, hi])) -
                           draw(np.array([lo, hi - width])), align="edge", color="#000000", linewidth=0,
                           gid=f"band:{label}:{name}")
                top = max(top, float(heights.max(initial=0)) / n, *ends)
                if log:
                    ax.set_xscale("log")
                ax.set_xlim(draw(lo), draw(hi))
            ax.tick_params(labelsize=8)
            if i == len(labels) - 1:
                ax.set_xlabel(display_label(name), fontsize=9)
            if j == 0:
                ax.set_ylabel(display_label(label), fontsize=9, color=colors[label], rotation=0, ha="right",
                              va="center")
        if placement is not None and not (space is not None and space.library is not None):
            row = placement[placement["policy"].astype(str) == label]
            if len(row):
                r = row.iloc[0]
                axes[i, -1].text(0.5, 0.95, f"boundary {fmt_pct(r['boundary_share'])} %, "
                                 f"corners {fmt_pct(r['corner_share'])} %", transform=axes[i, -1].transAxes,
                                 ha="center", va="top", fontsize=8)
    axes[0, 0].set_ylim(0, 1.15 * top if top > 0 else 1.0)
    for ax in axes.flat:
        percent_axis(ax.yaxis)
        ax.yaxis.set_major_locator(MaxNLocator(2))
    fig.suptitle("Where each policy's own trials land" + ("" if space is not None and space.library is not None else
                 f" (dark bars: within {100 * band:g} % of a bound)"),
                 fontsize=10, x=0.01, ha="left")
    return fig


def harm_figure(harm, summary, *, budget, target, floor, colors=None, ax=None, units="objective units", what=None):
    """Final regret against harmful trials per campaign: one point per policy, 95 % intervals both ways.

    Parameters
    ----------
    harm : DataFrame
        `simlab.evidence.harm.harm_table` output (``policy, budget, harmful_mean, harmful_low,
        harmful_high``).
    summary : DataFrame
        `simlab.evidence.metrics.budget_summary` output (``policy, budget, regret_median,
        median_low, median_high``).
    budget : int
        The budget both are read at (the largest).
    target : float
        Regret tolerance, drawn as a dashed horizontal line.
    floor : float or None
        ``[target] floor``, for the axis label.
    colors : dict, optional
        `policy_colors` mapping.
    ax : matplotlib Axes, optional
    units : str
        The objective's unit.
    what : str, optional
        What made a trial harmful, for the axis label (a study with limits: "its true value is above
        the floor of 0.5 MPa, it breaks a limit (viscosity below 40) or it fails ..."); default: worse
        than `floor`.

    Returns
    -------
    matplotlib.figure.Figure
    """
    check_columns(harm, "harm", ("policy", "budget", "harmful_mean", "harmful_low", "harmful_high"))
    check_columns(summary, "summary", ("policy", "budget", "regret_median", "median_low", "median_high"))
    h = harm[harm["budget"] == budget].assign(policy=lambda f: f["policy"].astype(str)).set_index("policy")
    r = summary[summary["budget"] == budget].assign(policy=lambda f: f["policy"].astype(str)).set_index("policy")
    labels = [p for p in policies_in(harm) if p in r.index]
    colors = colors_for(labels, colors)
    marks = markers(labels)
    fig, ax = new_axes(ax, (KIND_WIDTH, 4.2))
    values = r.loc[labels, ["regret_median", "median_low", "median_high"]].to_numpy(dtype=float)
    lowest = regret_floor(values[np.isfinite(values)], target)
    for label in labels:
        x, x_lo, x_hi = (float(h.at[label, c]) for c in ("harmful_mean", "harmful_low", "harmful_high"))
        y, y_lo, y_hi = (max(float(r.at[label, c]), lowest) if np.isfinite(float(r.at[label, c])) else np.nan
                         for c in ("regret_median", "median_low", "median_high"))
        xerr = [[x - x_lo], [x_hi - x]] if np.isfinite(x_lo) else None
        yerr = [[y - y_lo], [y_hi - y]] if np.isfinite(y_lo) else None
        ax.errorbar([x], [y], xerr=xerr, yerr=yerr, fmt=marks[label], color=colors[label], ms=7, capsize=3,
                    elinewidth=1.2, label=display_label(label), zorder=3, gid=f"policy:{label}")
    ax.set_yscale("log")
    if target > 0:
        ax.axhline(target, color="#000000", lw=1.0, ls="--", zorder=1)
        ax.text(0.0, target, f" target {target:g} {units}", transform=ax.get_yaxis_transform(), fontsize=8,
                va="bottom", ha="left")
    ax.set_xlim(left=0.0)
    if what is None:
        ax.set_xlabel(f"harmful trials per campaign (true value worse than {floor:g} {units}), mean [95 % interval]")
    else:   # a study with limits: the longer definition on a line of its own
        ax.set_xlabel(f"harmful trials per campaign, mean [95 % interval]\nharmful: {what}", fontsize=8.5)
    ax.set_ylabel(f"median regret after {budget} trials\n({units}; {floor_note(lowest, values)})", fontsize=9.5)
    ax.set_title(f"Final regret against harmful trials after {budget} trials (lower left is better)", fontsize=10,
                 loc="left")
    legend_outside(ax)
    return fig


# ---------------------------------------------------------------------------
# when to stop
# ---------------------------------------------------------------------------
_RULE_MARKERS = ("D", "s", "^", "v", "P", "X", "*", "h")   # "o" is the full budget's (hollow)


def stopping_figure(table, *, success=0.9, target=None, units="objective units", colors=None, ax=None):
    """Trials saved against miss risk at the stop: one point per policy and stopping rule.

    Parameters
    ----------
    table : DataFrame
        `simlab.evidence.stopping.stopping_table` output (``policy, rule, saved_median, saved_low,
        saved_high, failure_risk, failure_low, failure_high, failure_full, full_low, full_high``).
    success : float, default 0.9
        The budget plan's success level; ``1 - success`` is drawn as a dashed line.
    colors : dict, optional
        `policy_colors` mapping; the marker tells the rules apart (the legend names them).

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Each point has its two 95 % intervals: across, the order-statistic interval of the median
    trials saved; up and down, the Clopper–Pearson interval of the miss risk. A hollow point
    at 0 trials saved is the same policy run to the full budget, so the drop from it to a rule's
    point is what stopping early costs on the same worlds.
    """
    check_columns(table, "table", ("policy", "rule", "saved_median", "saved_low", "saved_high", "failure_risk",
                                   "failure_low", "failure_high", "failure_full", "full_low", "full_high"))
    labels = policies_in(table)
    colors = colors_for(labels, colors)
    rules = list(dict.fromkeys(table["rule"].astype(str)))
    shape = {rule: _RULE_MARKERS[k % len(_RULE_MARKERS)] for k, rule in enumerate(rules)}
    fig, ax = new_axes(ax, (KIND_WIDTH, 3.8))
    from matplotlib.lines import Line2D

    for policy in labels:
        rows = table[table["policy"].astype(str) == policy]
        c = colors[policy]
        full = rows.iloc[0]
        ax.errorbar([0.0], [full["failure_full"]], yerr=[[full["failure_full"] - full["full_low"]],
                                                        [full["full_high"] - full["failure_full"]]],
                    fmt="o", mfc="white", mec=c, ecolor=c, ms=6, lw=0.9, capsize=2, zorder=3)
        for _, row in rows.iterrows():
            x, y = float(row["saved_median"]), float(row["failure_risk"])
            xerr = [[x - float(row["saved_low"])], [float(row["saved_high"]) - x]] if np.isfinite(row["saved_low"]) else None
            ax.errorbar([x], [y], xerr=xerr, yerr=[[y - float(row["failure_low"])], [float(row["failure_high"]) - y]],
                        fmt=shape[str(row["rule"])], color=c, ms=6, lw=0.9, capsize=2, zorder=4)
    ax.axhline(1.0 - success, color="#000000", lw=1.0, ls="--")
    handles = [Line2D([], [], color=colors[p], marker="o", ls="", label=display_label(p)) for p in labels]
    handles += [Line2D([], [], color=GREY, marker="o", mfc="white", ls="", label="full budget (no stop)")]
    handles += [Line2D([], [], color=GREY, marker=shape[r], ls="", label=f"stop: {r}") for r in rules]
    handles += [Line2D([], [], color="#000000", ls="--", label=f"plan's limit ({1 - success:.0%})")]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)
    percent_axis(ax.yaxis)
    ax.set_ylim(bottom=0.0)
    ax.set_xlim(left=-0.5)
    words = f"more than {target:g} {units} short" if target is not None else "outside the target"
    ax.set_xlabel("trials saved against the full budget (median, 95 % interval)", fontsize=9.5)
    ax.set_ylabel(f"miss risk at the stop: share\nof campaigns {words}", fontsize=9.5)
    ax.set_title("What stopping early saves and what it costs, with 95 % intervals both ways", fontsize=10, loc="left")
    return fig
