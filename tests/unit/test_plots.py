"""Figures built from a small real run: labels, one colour per policy, and a snapshot that matches the engine."""

import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_hex
from scipy.stats import norm

from simlab.evidence import reach
from simlab.evidence import compare, metrics
from simlab.report import plots
from simlab.model.gp import Posterior
from simlab.replay.runner import make_belief, make_world, replay
from simlab.report.snapshot import snapshot_figure
from studies import study_with

LABELS = ("EI", "Thompson", "Random")


BASE = {
    "study": {"name": "plots", "goal": "maximize", "replicates": 6, "seed": 11},
    "space": {"feed_rate": [0.5, 2.5]},
    "world": {"kernel": "matern52", "lengthscale": 0.4, "amplitude": 1.5, "mean": 10.0, "noise": 0.1},
    "campaign": {"initial": 3, "budgets": [5, 8], "pool": 128},
    "target": {"regret": 0.1},
    "policy": [{"rule": "ei", "label": "EI"}, {"rule": "thompson", "features": 128, "label": "Thompson"},
               {"rule": "random", "label": "Random"}],
}


def _study(**over):
    return study_with(BASE, "test", **over)


@pytest.fixture(scope="module")
def run():
    study = _study()
    return study, replay(study)


@pytest.fixture(scope="module")
def colors(run):
    return plots.policy_colors(run[0].labels)


@pytest.fixture(scope="module")
def figures(run, colors):
    study, traces = run
    horizon = study.campaign.horizon
    return {
        "regret": plots.regret_figure(metrics.regret_curves(traces, n_resamples=200), target=study.target,
                                      budgets=study.campaign.budgets, initial=study.campaign.initial,
                                      colors=colors),
        "failure": plots.failure_figure(reach.within_target_curves(traces, target=study.target),
                                        budgets=study.campaign.budgets, initial=study.campaign.initial,
                                        target=study.target, colors=colors),
        "reach": plots.reach_figure(reach.reach_curves(traces, target=study.target), colors=colors),
        "final": plots.final_regret_figure(metrics.regret_at_budget(traces, budget=horizon), target=study.target,
                                           budget=horizon, colors=colors),
        "win": plots.win_rate_figure(compare.pairwise(traces, budget=horizon, target=study.target),
                                     colors=colors),
        "snapshot": snapshot_figure(study, traces, samples=300, colors=colors),
    }


def _line(ax, gid):
    (line,) = [a for a in ax.get_lines() if a.get_gid() == gid]
    return line


def _legend_colors(ax):
    """Legend label -> hex colour of its line (error-bar handles give their data line)."""
    out = {}
    handles, labels = ax.get_legend_handles_labels()
    for handle, label in zip(handles, labels):
        line = handle[0] if isinstance(handle, tuple) or hasattr(handle, "lines") else handle
        out[label] = to_hex(line.get_color())
    return out


# ---------------------------------------------------------------------------
# colours and labels
# ---------------------------------------------------------------------------
def test_policy_colors_are_distinct_and_keep_study_order():
    many = [f"p{i}" for i in range(8)]
    colors = plots.policy_colors(many)
    assert len(set(colors.values())) == 8
    # Adding a policy at the end leaves the others' colours unchanged.
    assert {k: v for k, v in plots.policy_colors(many + ["extra"]).items() if k != "extra"} == colors
    with pytest.raises(ValueError, match="distinct"):
        plots.policy_colors(["a", "a"])


def test_every_figure_labels_its_axes(figures):
    for name, fig in figures.items():
        axes = [ax for ax in fig.axes if ax.get_label() != "<colorbar>"]
        assert axes, name
        for ax in axes:
            assert ax.get_ylabel().strip(), f"{name}: an axes has no y label"
        # The bottom axes names the horizontal quantity.
        assert axes[-1].get_xlabel().strip(), f"{name}: no x label"
    assert figures["regret"].axes[0].get_ylabel().startswith("simple regret (objective units)")
    assert figures["regret"].axes[0].get_xlabel() == "trial"
    assert figures["reach"].axes[0].get_ylabel() == "share of campaigns within\ntarget at some trial so far"
    assert figures["failure"].axes[0].get_ylabel() == ("miss risk: share of campaigns\n"
                                                       "ending more than 0.1 objective units short")
    assert figures["final"].axes[0].get_xlabel().startswith("simple regret (objective units)")
    assert figures["snapshot"].axes[-1].get_xlabel() == "feed_rate"  # the user's input name


def test_a_policy_keeps_its_colour_in_every_figure(figures, colors):
    for name in ("regret", "failure", "reach"):
        seen = _legend_colors(figures[name].axes[0])
        assert {k: v for k, v in seen.items() if k in LABELS} == {k: to_hex(colors[k]) for k in LABELS}, name
    # Snapshot: acquisition curves (scoring rules only) and next-input markers (every rule).
    _, mid, nxt, _ = figures["snapshot"].axes
    seen = _legend_colors(mid)
    assert set(seen) == {"EI", "Thompson"}
    assert all(seen[k] == to_hex(colors[k]) for k in seen)
    for label in LABELS:
        assert to_hex(_line(nxt, f"next:{label}").get_color()) == to_hex(colors[label])
    # Final regret: the dots of row i have policy i's colour; tick labels are coloured too.
    ax = figures["final"].axes[0]
    rows = {}
    for coll in ax.collections:
        offsets = coll.get_offsets()
        if len(offsets) and coll.get_facecolors().size:
            rows[round(float(np.mean(offsets[:, 1])))] = to_hex(coll.get_facecolors()[0])
    assert rows == {i: to_hex(colors[k]) for i, k in enumerate(LABELS)}
    for fig, axis in ((figures["final"], "y"), (figures["win"], "x"), (figures["win"], "y")):
        ticks = getattr(fig.axes[0], f"get_{axis}ticklabels")()
        assert [t.get_text() for t in ticks] == list(LABELS)
        assert [to_hex(t.get_color()) for t in ticks] == [to_hex(colors[k]) for k in LABELS]


def _styles(ax):
    """Legend label -> (line style, marker) of the policies' entries."""
    handles, labels = ax.get_legend_handles_labels()
    return {label: (str(h.get_linestyle()), h.get_marker()) for h, label in zip(handles, labels) if label in LABELS}


def test_policies_differ_by_line_style_and_marker_not_only_colour(figures):
    """Printed in black and white, colour is lost: each policy's legend entry keeps its own
    (line style, marker) pair (common practice for figures that will be printed)."""
    for name in ("regret", "failure", "reach"):
        styles = _styles(figures[name].axes[0])
        assert set(styles) == set(LABELS), name
        assert len({m for _, m in styles.values()}) == len(LABELS), (name, styles)   # markers alone suffice
    # and the line styles differ too (matplotlib reports every dash pattern as "--", so read the mapping)
    from simlab.report.style import linestyles
    assert len({str(v) for v in linestyles(LABELS).values()}) == len(LABELS)
    # negative control: lines told apart by colour only give one (style, marker) pair for all
    from matplotlib.figure import Figure
    ax = Figure().add_subplot()
    for label, color in zip(LABELS, ("#0072B2", "#009E73", "#D55E00")):
        ax.plot([0, 1], [0, 1], color=color, label=label)
    assert len(set(_styles(ax).values())) == 1


def test_miss_risk_is_drawn_at_every_trial_without_a_sideways_shift(run, figures):
    study, traces = run
    within = reach.within_target_curves(traces, target=study.target)
    ax = figures["failure"].axes[0]
    horizon = study.campaign.horizon
    drawn = [ln for ln in ax.get_lines() if len(ln.get_xdata()) > 2]
    assert drawn
    for line in drawn:
        x = np.asarray(line.get_xdata(), dtype=float)
        assert x.min() >= 1 and x.max() <= horizon + 0.5   # nothing past the last trial's step
    for label in LABELS:   # the step values are one minus the within-target share, trial by trial
        rows = within[within["policy"] == label].sort_values("trial")
        expected = 1.0 - rows["within_target"].to_numpy()
        steps = [ln for ln in drawn if len(ln.get_xdata()) == len(rows) + 1
                 and np.allclose(np.asarray(ln.get_ydata())[:-1], expected)]
        assert steps, label


def test_final_regret_boxes_are_the_quartiles_and_whiskers_the_10th_and_90th_percentiles(run, figures):
    study, traces = run
    final = metrics.regret_at_budget(traces, budget=study.campaign.horizon)
    ax = figures["final"].axes[0]
    # bxp draws each box as a patch; its x extent is the quartiles (numpy's linear rule, as summary.csv)
    boxes = [p for p in ax.patches if p.get_zorder() == 4]
    assert len(boxes) == len(LABELS)
    floor = 0.1 * 1e-3
    for label, box in zip(LABELS, boxes):
        x = box.get_path().vertices[:, 0]
        q25, q75 = np.maximum(np.quantile(final.loc[final["policy"] == label, "regret"], [0.25, 0.75]), floor)
        assert x.min() == pytest.approx(q25) and x.max() == pytest.approx(q75)
    whisker_ends = sorted({round(float(v), 12) for ln in ax.get_lines() for v in ln.get_xdata()})
    for label in LABELS:
        q10, q90 = np.maximum(np.quantile(final.loc[final["policy"] == label, "regret"], [0.1, 0.9]), floor)
        assert any(np.isclose(q10, whisker_ends)) and any(np.isclose(q90, whisker_ends))


def test_win_rates_add_up_across_the_diagonal(run, figures):
    # Ties count half, so cell (a, b) + cell (b, a) = 1 (compare.pairwise's definition).
    ax = figures["win"].axes[0]
    matrix = ax.collections[0].get_array().reshape(len(LABELS), len(LABELS))
    off = ~np.eye(len(LABELS), dtype=bool)
    np.testing.assert_allclose((matrix + matrix.T)[off], 1.0, rtol=0, atol=1e-12)


def test_regret_axes_are_log_scale_and_zero_is_drawn_at_a_stated_floor():
    curves = pd.DataFrame({"policy": ["A"] * 3, "trial": [1, 2, 3], "regret_median": [1.0, 0.1, 0.0],
                           "regret_q25": [0.5, 0.0, 0.0], "regret_q75": [2.0, 0.5, 0.01]})
    fig = plots.regret_figure(curves, target=0.2)
    ax = fig.axes[0]
    assert ax.get_yscale() == "log"
    y = _legend_line(ax, "A").get_ydata()
    assert np.all(y > 0) and y[-1] == pytest.approx(0.2e-3)  # floor = target / 1000
    assert "drawn at 0.0002" in ax.get_ylabel()
    # Nothing below the floor: the label says only "log scale".
    positive = curves.assign(regret_median=[1.0, 0.5, 0.3], regret_q25=[0.5, 0.4, 0.2])
    assert "drawn at" not in plots.regret_figure(positive, target=0.2).axes[0].get_ylabel()


def _legend_line(ax, label):
    handles, labels = ax.get_legend_handles_labels()
    return handles[labels.index(label)]


# ---------------------------------------------------------------------------
# campaign snapshot
# ---------------------------------------------------------------------------
def _posterior_from_traces(study, rows):
    """The belief after the given trace rows, built directly from the GP posterior."""
    belief = make_belief(study)
    post = Posterior(belief.kernel, belief.mean, belief.noise)
    U = study.space.to_unit(rows[list(study.space.names)].to_numpy())
    for u, y in zip(U, study.sign * rows["y"].to_numpy()):
        post.add(u, y)
    return post, U


def _band_at(fig, x):
    """Lower and upper edge of the snapshot's 95 % band at input x."""
    (band,) = [c for c in fig.axes[0].collections if c.get_gid() == "posterior-band"]
    vertices = band.get_paths()[0].vertices
    ys = np.unique(vertices[np.isclose(vertices[:, 0], x, rtol=0, atol=1e-12), 1])
    return ys.min(), ys.max()


def test_snapshot_band_and_truth_match_the_posterior_and_the_world(run, figures):
    study, traces = run
    n0 = study.campaign.initial
    rows = traces[(traces["policy"] == "EI") & (traces["replicate"] == 0) & (traces["trial"] <= n0)]
    post, U = _posterior_from_traces(study, rows)
    mu, sd = post.moments(U)
    z = norm.ppf(0.975)  # scipy.stats: two-sided 95 % normal band
    fig = figures["snapshot"]
    top = fig.axes[0]
    mean = _line(top, "posterior-mean")
    x_trials = rows["feed_rate"].to_numpy()
    for x, m, s in zip(x_trials, mu, sd):
        at = np.flatnonzero(np.isclose(mean.get_xdata(), x, rtol=0, atol=1e-12))
        assert at.size == 1, "the trial inputs lie on the drawn line"
        # float64 rounding of the unit-cube round trip; values are near 10
        assert mean.get_ydata()[at[0]] == pytest.approx(study.sign * m, abs=1e-9)
        low, high = _band_at(fig, x)
        assert low == pytest.approx(study.sign * m - z * s, abs=1e-9)
        assert high == pytest.approx(study.sign * m + z * s, abs=1e-9)
    # The trials drawn are the observed values in the traces.
    trials = _line(top, "trials")
    np.testing.assert_allclose(trials.get_xdata(), x_trials, rtol=0, atol=1e-12)
    np.testing.assert_allclose(trials.get_ydata(), rows["y"].to_numpy(), rtol=0, atol=1e-12)
    # The dashed truth is the replicate's world, and passes through the noise-free values
    # the runner recorded at the trial inputs (traces column f, user orientation).
    world = _line(top, "world")
    assert world.get_linestyle() == "--"
    wx, wy = world.get_xdata(), world.get_ydata()
    truth = study.sign * make_world(study, 0)(study.space.to_unit(wx[:, None]))
    np.testing.assert_allclose(wy, truth, rtol=0, atol=1e-12)
    for x, f in zip(x_trials, rows["f"].to_numpy()):
        assert wy[np.isclose(wx, x, rtol=0, atol=1e-12)][0] == pytest.approx(f, abs=1e-9)


def test_snapshot_next_inputs_are_what_the_campaigns_did(run, figures):
    """Each policy's marked next input equals trial n0 + 1 of its campaign in the traces."""
    study, traces = run
    n0 = study.campaign.initial
    nxt = figures["snapshot"].axes[2]
    for label in LABELS:
        row = traces[(traces["policy"] == label) & (traces["replicate"] == 0) & (traces["trial"] == n0 + 1)]
        # polished optima agree to far better than 1e-6 of the input range (2.0)
        assert _line(nxt, f"next:{label}").get_xdata()[0] == pytest.approx(row["feed_rate"].iloc[0], abs=1e-6)


def test_snapshot_acquisition_is_scaled_and_minimiser_histogram_counts_samples(figures):
    _, mid, _, low = figures["snapshot"].axes
    for line in mid.get_lines():
        if line.get_label() in LABELS and len(line.get_xdata()) > 1:
            y = np.asarray(line.get_ydata())
            assert y.min() == pytest.approx(0.0) and y.max() == pytest.approx(1.0)
    heights = [p.get_height() for p in low.patches if p.get_gid() == "minimiser-hist"]
    assert sum(heights) == 300  # one count per posterior sample
    assert "300 posterior samples" in low.get_title(loc="left")


def test_snapshot_after_a_policys_own_trials(run):
    study, traces = run
    t = 5
    rows = traces[(traces["policy"] == "EI") & (traces["replicate"] == 1)].sort_values("trial")
    # Without traces the replicate is replayed; the trials shown are the campaign's own.
    for given in (traces, None):
        fig = snapshot_figure(study, given, replicate=1, policy="EI", trial=t, samples=50)
        trials = _line(fig.axes[0], "trials")
        np.testing.assert_allclose(trials.get_xdata(), rows["feed_rate"].to_numpy()[:t], rtol=0, atol=1e-12)
        np.testing.assert_allclose(trials.get_ydata(), rows["y"].to_numpy()[:t], rtol=0, atol=1e-12)
    # EI is deterministic given the belief, so its next input is trial t + 1 of its campaign.
    got = _line(fig.axes[2], "next:EI").get_xdata()[0]
    assert got == pytest.approx(rows["feed_rate"].to_numpy()[t], abs=1e-6)


def test_snapshot_slices_a_two_input_study():
    study = _study(space={"feed_rate": [0.5, 2.5], "temp": [28.0, 37.0]},
                   world={"lengthscale": [0.5, 2.0]}, campaign={"initial": 4, "budgets": [6]})
    fig = snapshot_figure(study, along="temp", samples=40, points=64)  # replays replicate 0
    assert fig.axes[-1].get_xlabel() == "temp"
    assert "; slice at feed_rate = " in fig.get_suptitle()
    # the slice runs through the recommended trial: it is drawn on the slice, the others as projected
    assert len(_line(fig.axes[0], "trials").get_xdata()) == 1
    assert len(_line(fig.axes[0], "trials-projected").get_xdata()) == 3
    x = _line(fig.axes[0], "posterior-mean").get_xdata()
    assert x.min() == pytest.approx(28.0) and x.max() == pytest.approx(37.0)


@pytest.mark.parametrize("kwargs,match", [
    ({"policy": "nope"}, "`policy` must be one of"),
    ({"trial": 6}, "name the `policy`"),
    ({"trial": 8, "policy": "EI"}, "`trial` must be"),
    ({"along": "speed"}, "`along` must be one of the inputs"),
    ({"replicate": -1}, "`replicate`"),
])
def test_snapshot_rejects_bad_arguments(run, kwargs, match):
    with pytest.raises(ValueError, match=match):
        snapshot_figure(run[0], run[1], **kwargs)


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------
def test_save_figure_writes_png_and_svg_atomically(tmp_path, figures):
    png, svg = plots.save_figure(figures["failure"], tmp_path / "figures", "failure_risk")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert svg.read_text(encoding="utf-8").lstrip().startswith("<?xml")
    assert sorted(p.name for p in (tmp_path / "figures").iterdir()) == ["failure_risk.png", "failure_risk.svg"]
    assert png.stat().st_mode & 0o044 == 0o044  # readable by others, like any report file
    with pytest.raises(ValueError, match="stem"):
        plots.save_figure(figures["failure"], tmp_path, "../x")


def test_labels_with_dollar_signs_are_drawn_literally(tmp_path, run):
    traces = run[1]
    renamed = traces.assign(policy=traces["policy"].astype(str).replace({"EI": "EI $5 $ budget"}))
    fig = plots.failure_figure(reach.within_target_curves(renamed, target=0.1))
    plots.save_figure(fig, tmp_path, "dollar")  # would fail to draw if parsed as mathematics
    assert "EI \\$5 \\$ budget" in fig.axes[0].get_legend_handles_labels()[1]
