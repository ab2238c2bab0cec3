"""The campaign snapshot figure: one replicate's belief, acquisitions, next inputs and minimiser spread."""

from __future__ import annotations

import textwrap

__all__ = ["snapshot_figure"]

from dataclasses import dataclass
from numbers import Integral

import numpy as np

from .cells import unit_label
from .style import (GREY, KIND_WIDTH, Z95, check_columns, colors_for, display_label, linestyles, mark_every, markers,
                    policy_ticks)

# The snapshot's Monte Carlo minimiser distribution has its own fixed generator so that
# redrawing the figure never changes it and never touches the study's keyed streams.
_SNAPSHOT_SEED = 20240611
_SNAPSHOT_FREQUENCIES = 1024


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
    on_line: np.ndarray    # (n,) bool: the trial lies on the drawn line (always, with one input)
    lost: int              # trials so far that returned nothing
    scores: dict           # label -> (g,) acquisition scaled to [0, 1], or None
    next_x: dict           # label -> chosen next input along the axis
    next_score: dict       # label -> scaled acquisition at the next input (one-input studies), or None
    minimisers: np.ndarray  # (S,) best input along the axis in each posterior sample
    best_x: float          # the world's true best input along the axis
    best_y: float
    fixed: dict            # other inputs held fixed (d > 1), name -> value (a level name for a categorical one)
    trials: int            # campaign trials so far (history not counted)
    kind: str = "continuous"   # of the input along the axis: a stepped or categorical one is drawn value by value
    ticks: tuple = ()      # categorical: the level names at x = 0, 1, ...
    infeasible: np.ndarray | None = None   # (g,) bool with limits: the true world breaks a limit or fails there
    chance: np.ndarray | None = None       # (g,) with limits: the belief's chance of feasibility
    failed: int = 0        # trials so far that failed (with fails_where; counted apart from lost ones)


def _shade_infeasible(ax, x, infeasible) -> None:
    """Hatch the stretches of the line where the true world breaks a limit or fails (one legend entry)."""
    edges = np.flatnonzero(np.diff(np.r_[0, infeasible.astype(int), 0]))
    half = 0.5 * (np.min(np.diff(x)) if len(x) > 1 else 1.0)
    for k, (a, b) in enumerate(zip(edges[::2], edges[1::2] - 1)):
        ax.axvspan(x[a] - half, x[b] + half, facecolor="none", edgecolor=GREY, hatch="///", lw=0, zorder=0,
                   label="breaks a limit or fails\n(true world, hidden)" if k == 0 else None, gid="infeasible")


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
    if along is None:   # the first input with a range (all inputs stepped or categorical: the first)
        j = next((i for i in range(len(names)) if i not in study.space.discrete), 0)
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
        from ..replay.runner import replay_replicate

        traces = replay_replicate(study, replicate)
    else:
        check_columns(traces, "traces", ("policy", "replicate", "trial", "y", *study.space.names))
    label = policy if policy is not None else study.labels[0]  # the initial design is shared
    rows = traces[(traces["policy"].astype(str) == label) & (traces["replicate"] == replicate)
                  & (traces["trial"] <= trial)].sort_values("trial")
    if rows.empty or rows["trial"].max() < trial:
        raise ValueError(f"`traces` has no trials 1..{trial} of policy {label!r} on replicate {replicate}")
    return rows


def _snapshot_data(study, traces, replicate, policy, trial, along, samples, points):
    from ..model.gp import Posterior
    from ..policies import Acquisition, Context
    from ..rng import stream
    from ..replay.runner import make_belief, make_feasible, make_policy
    from ..worlds.replicate import make_replicate
    from ..worlds.draws import FeatureSample

    trial, j = _check_snapshot_args(study, replicate, policy, trial, along, samples, points)
    space, sign, horizon = study.space, study.sign, study.campaign.horizon
    rows = _trials_so_far(study, traces, replicate, policy, trial)
    rep = make_replicate(study, int(replicate))
    belief = make_belief(study)

    # The belief after the trials so far (lost trials returned nothing and teach nothing).
    observed = np.isfinite(rows["y"].to_numpy(dtype=float))
    X_user = space.user_matrix(rows)[observed]       # level names read as level indices
    U = space.to_unit(X_user)
    y = sign * rows["y"].to_numpy(dtype=float)[observed]
    post = Posterior(belief.kernel, belief.mean, belief.noise, pool=rep.pool, capacity=max(len(y), 1) + 1)
    for u, v in zip(U, y):
        post.add(u, v)
    failed = rows["failed"].to_numpy(dtype=bool) if "failed" in rows else np.zeros(len(rows), dtype=bool)
    if rep.limits is not None:
        # the campaign's belief about its limits, rebuilt from the same trials: each failed trial, and the
        # measured limits of each that worked (the replicate's own shocks, as the campaign measured them)
        post.feasible = make_feasible(study)(pool=rep.pool, capacity=len(rows) + 1)
        X_all = space.to_unit(space.user_matrix(rows))
        for u, t, fail, seen in zip(X_all, rows["trial"].to_numpy(), failed, observed):
            if fail:
                post.feasible.add(u, worked=False)
            elif seen:
                post.feasible.add(u, worked=True, values=rep.limits.measure(u, int(t) - 1))

    # The line the figure is drawn along: the whole input range (d = 1) or a slice through
    # the current recommendation (d > 1). For d = 1 the trial inputs are on the line.
    grid = space.grid(j) if j in space.discrete else np.linspace(0.0, 1.0, points)
    if space.dim == 1 and j not in space.discrete:
        grid = np.unique(np.concatenate([grid, U[:, 0]]))
    if not post.n:
        base = np.full(space.dim, 0.5)
    else:               # the campaign's own recommendation (among inputs believed feasible, with limits)
        base = U[post.feasible.recommend(post) if post.feasible is not None else post.recommend()].copy()
    line = np.repeat(base[None, :], grid.size, axis=0)
    line[:, j] = grid
    mu, sd = post.moments(line)
    band = (sign * (mu - Z95 * sd), sign * (mu + Z95 * sd))

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
        if isinstance(pol, Acquisition) and pol.scores_anywhere:
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
    candidates = line if space.dim == 1 else np.vstack([rep.pool, line])
    if space.discrete:
        values = _joint_samples(post, candidates, samples, rng)
    else:
        sampler = FeatureSample(belief.kernel, belief.mean, rng, _SNAPSHOT_FREQUENCIES)
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
        held = space.columns(base[None, :])
        fixed = {name: (v[0] if i in space.categorical else float(v[0]))
                 for i, (name, v) in enumerate(held.items()) if i != j}
    return _Snapshot(
        name=space.names[j], x=space.from_unit(line)[:, j], mean=sign * mu, low=np.minimum(*band),
        high=np.maximum(*band), world=sign * rep.world(line), trials_x=X_user[:, j], trials_y=sign * y,
        past=(rows["trial"].to_numpy() <= 0)[observed], lost=int((~observed & ~failed).sum()),
        on_line=np.all(np.abs(np.delete(U - base, j, axis=1)) <= 1e-9, axis=1),
        scores=scores, next_x=next_x, next_score=next_score, minimisers=minimisers,
        best_x=float(space.from_unit(u_best)[j]), best_y=float(sign * f_best), fixed=fixed, trials=trial,
        kind=space.kind(j), ticks=tuple(space.levels[j]) if j in space.categorical else (),
        infeasible=rep.limits.infeasible(line) if rep.limits is not None else None,
        chance=np.exp(post.feasible.log_chance(line)) if post.feasible is not None else None,
        failed=int(failed.sum()),
    )


def _joint_samples(post, candidates, samples, rng):
    """Posterior samples of the noise-free objective at the candidates, (q, samples), drawn exactly
    from the joint Gaussian (the product kernel over levels has no random-feature form here).

    Candidates that repeat (or nearly) make the covariance singular; a jitter of 1e-9 of the prior
    variance and then eigenvalues clipped at 0 keep the draw exact up to that rounding.
    """
    from ..lazy import linalg

    kernel = post.kernel
    C = kernel(candidates)
    mu = np.full(len(candidates), post.mean)
    if post.n:
        Kc = kernel(candidates, post.X)
        mu = mu + Kc @ post.solve(post.y - post.mean)
        C = C - Kc @ post.solve(Kc.T)
    C = 0.5 * (C + C.T)
    try:
        L = np.linalg.cholesky(C + 1e-9 * kernel.variance * np.eye(len(C)))
    except np.linalg.LinAlgError:
        w, V = linalg.eigh(C)
        L = V * np.sqrt(np.clip(w, 0.0, None))
    return mu[:, None] + L @ rng.standard_normal((len(C), samples))


def snapshot_figure(study, traces=None, *, replicate=0, policy=None, trial=None, along=None, samples=400,
                    points=301, colors=None):
    """One replicate at one moment of a campaign: belief, truth, and what each policy would do next.

    Parameters
    ----------
    study : Study
        The study; the replicate's world and candidate pool are rebuilt from its keyed
        streams (`simlab.worlds.replicate.make_replicate`).
    traces : DataFrame, optional
        The study's traces; the trials so far are read from them. Default: the replicate
        is replayed (`simlab.replay.runner.replay_replicate`).
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
    The belief is the study's stated one (``simlab.replay.runner.make_belief``), not refitted.
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
    colors = colors_for(labels, colors)
    styles, marks = linestyles(labels), markers(labels)
    from matplotlib.figure import Figure

    rows = 0.35 + 0.15 * len(labels)
    fig = Figure(figsize=(KIND_WIDTH, 5.6 + rows), layout="constrained")
    top, mid, nxt, low = fig.subplots(4, 1, sharex=True,
                                      gridspec_kw={"height_ratios": [2.4, 1.4, rows, 1.0]})
    goal = "maximised" if study.sign < 0 else "minimised"

    discrete = snap.kind in ("stepped", "categorical")
    if discrete:    # value by value: a line between levels or steps would suggest values in between
        top.errorbar(snap.x, snap.mean, yerr=[snap.mean - snap.low, snap.high - snap.mean], ls="none", marker="_",
                     ms=14, color="#0072B2", elinewidth=6, alpha=0.5, label="posterior mean, 95 % band",
                     gid="posterior-band")
        top.plot(snap.x, snap.world, ls="none", marker="x", ms=8, color="#000000",
                 label="true world (hidden from policies)", gid="world")
    else:
        top.fill_between(snap.x, snap.low, snap.high, color="#0072B2", alpha=0.18, lw=0,
                         label="95 % band (posterior)", gid="posterior-band")
        top.plot(snap.x, snap.mean, color="#0072B2", lw=1.8, label="posterior mean", gid="posterior-mean")
        top.plot(snap.x, snap.world, color="#000000", lw=1.3, ls="--", label="true world (hidden from policies)",
                 gid="world")
    if snap.infeasible is not None and snap.infeasible.any():
        _shade_infeasible(top, snap.x, snap.infeasible)
    # Trials on the drawn line are shown as observed there; with several inputs the others lie
    # off this slice, so they are drawn at their coordinate along it, in grey, and say so.
    new, on = ~snap.past, snap.on_line
    if (new & on).any():
        top.plot(snap.trials_x[new & on], snap.trials_y[new & on], ls="none", marker="o", ms=6, mfc="white",
                 mec="#000000", mew=1.4, label="trials so far (observed)" if on.all() else "trial on this slice",
                 gid="trials")
    if (new & ~on).any():
        top.plot(snap.trials_x[new & ~on], snap.trials_y[new & ~on], ls="none", marker="o", ms=5, mfc="none",
                 mec=GREY, mew=1.0, label="trials off this slice\n(projected onto it)", gid="trials-projected")
    if snap.past.any():
        top.plot(snap.trials_x[snap.past], snap.trials_y[snap.past], ls="none", marker="s", ms=5, color=GREY,
                 label="past trials (history)" + ("" if on[snap.past].all() else ", projected"), gid="past-trials")
    if not snap.fixed:
        top.plot([snap.best_x], [snap.best_y], ls="none", marker="*", ms=13, color="#E69F00", mec="#000000",
                 mew=0.6, label="true best input", gid="true-best")
    ylabel = f"objective, {unit_label(study)} ({goal})"
    top.set_ylabel(ylabel if len(ylabel) <= 30 else ylabel.replace(" (", "\n(", 1))   # long units: two lines
    top.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)

    for label in labels:
        curve = snap.scores[label]
        if curve is None:
            continue
        if discrete:
            mid.plot(snap.x, curve, color=colors[label], ls="none", label=display_label(label), marker=marks[label],
                     ms=6)
        else:
            mid.plot(snap.x, curve, color=colors[label], ls=styles[label], lw=1.5, label=display_label(label),
                     marker=marks[label], ms=4, markevery=mark_every(snap.x, labels.index(label), after=-np.inf))
        if snap.next_score[label] is not None:
            mid.plot([snap.next_x[label]], [snap.next_score[label]], ls="none", marker="v", ms=7,
                     color=colors[label], mec="#000000", mew=0.5)
    if snap.chance is not None:
        mid.plot(snap.x, snap.chance, color="#000000", ls=":", lw=1.4, label="chance of feasibility\n(belief, 0-1)",
                 gid="feasible-chance")
    mid.set_ylim(-0.04, 1.1)
    mid.set_yticks([0.0, 0.5, 1.0])
    mid.set_ylabel("acquisition\n(scaled to 0-1)")
    if mid.get_legend_handles_labels()[0]:
        mid.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)
    else:
        mid.text(0.5, 0.5, "no policy in this study scores inputs", transform=mid.transAxes, ha="center",
                 color=GREY)

    # One row per policy: where each would run the next trial.
    for i, label in enumerate(labels):
        nxt.plot([snap.next_x[label]], [i], ls="none", marker="v", ms=8, color=colors[label], mec="#000000",
                 mew=0.5, gid=f"next:{label}", label=display_label(label), clip_on=False)
    policy_ticks(nxt.yaxis, labels, colors, fontsize=8.5)
    nxt.set_ylim(len(labels) - 0.5, -0.5)
    nxt.grid(axis="y", color="#e5e5e5", lw=0.6)
    nxt.set_ylabel("policy")
    nxt.set_title(f"next input each policy would choose (trial {snap.trials + 1})", fontsize=9, loc="left")

    names = study.space.names
    lo_x, hi_x = study.space.low[names.index(snap.name)], study.space.high[names.index(snap.name)]
    if discrete:
        counts = [np.count_nonzero(np.isclose(snap.minimisers, v)) for v in snap.x]
        low.bar(snap.x, counts, width=0.6 * (np.min(np.diff(snap.x)) if len(snap.x) > 1 else 1.0), color=GREY,
                alpha=0.75, gid="minimiser-hist")
        pad = 0.5 * (np.min(np.diff(snap.x)) if len(snap.x) > 1 else 1.0)
        lo_x, hi_x = float(snap.x[0]) - pad, float(snap.x[-1]) + pad
    elif snap.kind == "log":
        low.hist(snap.minimisers, bins=np.geomspace(lo_x, hi_x, 41), color=GREY, alpha=0.75, gid="minimiser-hist")
        low.set_xscale("log")
    else:
        low.hist(snap.minimisers, bins=np.linspace(lo_x, hi_x, 41), color=GREY, alpha=0.75, gid="minimiser-hist")
    low.axvline(snap.best_x, color="#000000", lw=1.0, ls="--", label="true best input")
    low.set_ylabel("posterior\nsamples")
    low.set_xlabel(snap.name)
    low.set_xlim(lo_x, hi_x)
    if snap.ticks:
        low.set_xticks(snap.x, list(snap.ticks))
    low.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8.5)
    low.set_title(f"where {snap.minimisers.size} posterior samples put the best {snap.name}", fontsize=9,
                  loc="left")

    if policy is None:
        when = "before the first trial" if snap.trials == 0 else f"after the {snap.trials}-trial initial design"
    else:
        when = f"after {snap.trials} trials of {display_label(policy)}"
    title = f"Campaign snapshot, replicate {replicate}, {when}"
    if snap.past.any():
        title += f" (plus {int(snap.past.sum())} past trials)"
    if snap.lost:
        title += f"; {snap.lost} lost"
    if snap.failed:
        title += f"; {snap.failed} failed"
    if snap.fixed:
        held = ", ".join(f"{display_label(k)} = {v if isinstance(v, str) else format(v, '.4g')}"
                         for k, v in snap.fixed.items())
        title += f"; slice at {held}"
    # over the whole width (the legends take the right of every panel); a long slice (several held
    # inputs) breaks after the "when" part rather than running off the figure
    if len(title) > 110 and "; slice at " in title:
        title = title.replace("; slice at ", ";\nslice at ", 1)
    fig.suptitle(textwrap.fill(title, 120, replace_whitespace=False) if len(title) > 240 else title,
                 fontsize=10, x=0.01, ha="left")
    return fig


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------
