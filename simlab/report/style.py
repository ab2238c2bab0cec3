"""The look shared by every figure: policy colours (Okabe-Ito) and line styles, axes, regret floors,
legends, and saving as PNG and SVG. Figures import these; nothing here draws a result."""

from __future__ import annotations

import warnings
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pandas as pd

# Okabe & Ito (2008), "Color Universal Design": eight colours distinguishable under the
# common colour-vision deficiencies. Yellow comes last because it is faint on white.
OKABE_ITO = (
    "#0072B2",  # blue
    "#E69F00",  # orange
    "#009E73",  # bluish green
    "#D55E00",  # vermillion
    "#CC79A7",  # reddish purple
    "#56B4E9",  # sky blue
    "#000000",  # black
    "#F0E442",  # yellow
)


# Every policy also gets its own line style and marker, so that the figures still tell the
# policies apart printed in black and white (Okabe-Ito blue, green and vermillion are close
# greys). Eight of each, in step with the colours; beyond eight, colours repeat with the next style.
LINESTYLES = ("-", (0, (5, 2)), (0, (1.2, 1.6)), (0, (6, 1.5, 1.2, 1.5)), (0, (2.5, 1.5)),
              (0, (8, 2, 1.2, 2, 1.2, 2)), (0, (10, 3)), (0, (3, 1.5, 3, 1.5, 1.2, 1.5)))
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")


GREY = "#6b6b6b"


DPI = 150


Z95 = 1.959963984540054  # standard normal 97.5% quantile (common practice)


# Regret is clipped at a floor on log axes (exact zeros are common: a policy that
# evaluated the best point any policy found has regret 0). The floor sits three decades
# below the target: differences that far below the target do not change a decision.
FLOOR_BELOW_TARGET = 1e-3


JITTER_SEED = 7


KIND_WIDTH = 7.6  # inches; fits an A4 page with margins at 100 %


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
    return {label: OKABE_ITO[i % len(OKABE_ITO)] for i, label in enumerate(labels)}


def linestyles(labels):
    """One line style per policy, in study order (see `LINESTYLES`)."""
    return {str(label): LINESTYLES[(i + i // len(OKABE_ITO)) % len(LINESTYLES)] for i, label in enumerate(labels)}


def markers(labels):
    """One marker per policy, in study order (see `MARKERS`)."""
    return {str(label): MARKERS[i % len(MARKERS)] for i, label in enumerate(labels)}


def mark_every(trials, i, *, after=0, count=6):
    """Which points of a curve over `trials` get the marker of policy number `i` (indices): about
    `count` of those past trial `after` (the shared initial design, where every curve coincides),
    staggered by policy so that the markers of curves lying together do not hide each other."""
    trials = np.asarray(trials)
    later = np.flatnonzero(trials > after)
    if later.size == 0:
        return []
    step = max(1, later.size // count)
    return later[i % step::step].tolist()


def display_label(label):
    """A label as matplotlib should draw it: a literal "$" must not start mathematics."""
    return str(label).replace("$", r"\$")


def policy_ticks(axis, labels, colors, *, offset=0.0, fontsize=None):
    """Put the policy labels on a categorical axis (positions offset + 0, 1, ...) in their colours."""
    axis.set_ticks(np.arange(len(labels)) + offset, [display_label(label) for label in labels])
    for tick, label in zip(axis.get_ticklabels(), labels):
        tick.set_color(colors[label])
        if fontsize:
            tick.set_fontsize(fontsize)


@contextmanager
def quiet_seaborn():
    """Silence deprecation notices raised by seaborn's own calls into matplotlib (not ours to fix)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=DeprecationWarning, module="seaborn")
        warnings.filterwarnings("ignore", category=PendingDeprecationWarning, module="seaborn")
        yield


def band_alpha(labels):
    """Fainter bands when many overlap, so that the lines stay readable."""
    return 0.14 if len(labels) <= 4 else 0.08


def policies_in(frame, column="policy"):
    """Policy labels in order of first appearance (metrics tables keep study order)."""
    return [str(p) for p in pd.unique(frame[column].astype(str))]


def colors_for(labels, colors):
    if colors is None:
        return policy_colors(labels)
    missing = [label for label in labels if label not in colors]
    if missing:
        raise ValueError(f"`colors` has no colour for policies {missing}")
    return colors


def new_axes(ax, size):
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


def regret_floor(values, target):
    """Positive floor for log-scale regret axes."""
    if target > 0:
        return target * FLOOR_BELOW_TARGET
    values = np.asarray(values, dtype=float)
    positive = values[values > 0]
    if positive.size == 0:
        return 1e-12
    return 10.0 ** np.floor(np.log10(positive.min()))


def floor_note(floor, values):
    """Second line of a regret axis label; says so when values below the floor are drawn at it."""
    values = np.asarray(values, dtype=float)
    if np.any(values[np.isfinite(values)] < floor):
        return f"log scale; below {floor:.2g} (including 0) drawn at {floor:.2g}"
    return "log scale"


def legend_outside(ax, **kw):
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False,
                  fontsize=9, **kw)


def check_columns(frame, name, columns):
    if not isinstance(frame, pd.DataFrame):
        raise ValueError(f"`{name}` must be a pandas DataFrame; got {type(frame).__name__}")
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ValueError(f"`{name}` lacks column(s) {missing}; it has {list(frame.columns)}")


def percent_axis(axis):
    from matplotlib.ticker import PercentFormatter

    axis.set_major_formatter(PercentFormatter(1.0, decimals=0))


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
    _check_stem(stem)
    return write_figure(folder, stem, *figure_bytes(fig))


def figure_bytes(fig):
    """The PNG (150 dpi) and SVG bytes :func:`save_figure` writes, rendered in memory (so that a
    worker process can render a figure and hand the bytes back to be written).

    Returns
    -------
    png, svg : bytes
    """
    import io

    import matplotlib

    # Metadata without dates and a fixed hash salt make repeated reports byte-identical.
    png, svg = io.BytesIO(), io.BytesIO()
    with matplotlib.rc_context({"svg.hashsalt": "simlab", "svg.fonttype": "path"}):
        fig.savefig(png, format="png", dpi=DPI, facecolor="white", metadata={"Software": None})
        fig.savefig(svg, format="svg", facecolor="white", metadata={"Date": None, "Creator": None})
    return png.getvalue(), svg.getvalue()


def write_figure(folder, stem, png, svg):
    """Write the bytes of :func:`figure_bytes` as ``<stem>.png`` and ``<stem>.svg`` in `folder`, each
    atomically; returns both paths."""
    from ..replay.store import atomic_write

    _check_stem(stem)
    folder = Path(folder)
    paths = folder / f"{stem}.png", folder / f"{stem}.svg"
    for path, data in zip(paths, (png, svg)):
        atomic_write(path, lambda p, data=data: p.write_bytes(data))
    return paths


def _check_stem(stem):
    if not isinstance(stem, str) or not stem or "/" in stem or "\\" in stem or stem.startswith("."):
        raise ValueError(f"`stem` must be a plain file name without folders; got {stem!r}")
