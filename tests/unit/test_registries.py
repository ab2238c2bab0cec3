"""The worked examples of DEVELOPERS.md, "How to add": a noise shape, a world kind and a figure,
each one class plus one registry entry, flow through the study reader, the replay, the results
folder and the report with no other change. The registries are patched for the test only."""

import numpy as np
import pytest
from scipy import stats

from simlab.options import Option
from simlab.replay.runner import make_replicate, make_world, replay
from simlab.report import figures as figures_module
from simlab.report.figures import Figure
from simlab.study.dump import dump_study
from simlab.study.spec import StudyError, parse_study
from simlab.worlds import kinds, noise
from simlab.worlds.draws import FeatureWorld

BASE = {"study": {"replicates": 3, "seed": 4}, "space": {"a": [0.0, 1.0], "b": [0.0, 2.0]},
        "world": {"lengthscale": [0.4, 0.8], "amplitude": 1.0, "noise": 0.1},
        "campaign": {"initial": 3, "budgets": [6], "pool": 128}, "target": {"regret": 0.2},
        "policy": [{"rule": "ei"}, {"rule": "random"}]}


def study(**world):
    return parse_study({**BASE, "world": {**BASE["world"], **world}}, source="registry-test")


# --------------------------------------------------------------------------- a noise shape
class LaplaceNoise(noise.NoiseShape):
    """Laplace shocks rescaled to unit variance: Var Laplace(0, b) = 2 b^2 (e.g. Johnson, Kotz &
    Balakrishnan, Continuous Univariate Distributions vol. 2, ch. 24; from memory), so b = 1/sqrt(2)."""

    name = "laplace"
    options = {"noise_clip": Option(10.0, float, 1.0, 100.0, "largest |shock| kept")}

    def describe(self, sd):
        return f"Laplace noise of sd {sd}"

    def shocks(self, rng, n):
        clip = self.settings["noise_clip"]
        return np.clip(rng.laplace(0.0, 1.0 / np.sqrt(2.0), n), -clip, clip)


def test_a_registered_noise_shape_is_read_validated_written_and_used(monkeypatch):
    monkeypatch.setitem(noise.NOISE_SHAPES, "laplace", LaplaceNoise)
    s = study(noise_kind="laplace", noise_clip=20.0)
    assert s.world.noise_kind == "laplace" and dict(s.world.noise_settings) == {"noise_clip": 20.0}
    assert 'noise_kind = "laplace"' in dump_study(s) and "noise_clip = 20.0" in dump_study(s)
    with pytest.raises(StudyError, match=r"world.noise_clip: must be >= 1"):
        study(noise_kind="laplace", noise_clip=0.5)
    with pytest.raises(StudyError, match='only applies with noise_kind = "laplace"'):
        study(noise_clip=5.0)                                  # a setting of another shape
    # The shocks are the shape's: unit variance and Laplace's excess kurtosis 3 (Gaussian: 0).
    shocks, _ = noise.Observer(sd=1.0, kind="laplace", settings=s.world.noise_settings).draw(
        np.random.default_rng(0), 200_000)
    assert shocks.var() == pytest.approx(1.0, abs=0.02)      # Monte Carlo sd of the variance ~ 0.0055
    assert stats.kurtosis(shocks) == pytest.approx(3.0, abs=0.3)
    traces = replay(s)
    assert np.isfinite(traces["y"].to_numpy(float)).all() and len(traces) > 0


# --------------------------------------------------------------------------- a world kind
class CoarseKind(kinds.WorldKind):
    """Random-feature worlds with few frequencies: cheap, and visibly smoother than the prior."""

    name = "coarse"
    options = {"coarse_features": Option(64, int, 4, 1024, "frequencies per draw")}
    words = "coarse random features ({coarse_features} frequencies)"

    @classmethod
    def draw(cls, kernel, mean, rng, settings):
        return FeatureWorld(kernel, mean, rng, settings["coarse_features"])


def test_a_registered_world_kind_is_read_written_drawn_and_replayed(monkeypatch):
    monkeypatch.setitem(kinds.WORLD_KINDS, "coarse", CoarseKind)
    s = study(method="coarse", coarse_features=32)
    assert s.world.method == "coarse" and dict(s.world.method_settings)["coarse_features"] == 32
    assert 'method = "coarse"' in dump_study(s) and "coarse_features = 32" in dump_study(s)
    world = make_world(s, 0)
    assert isinstance(world, FeatureWorld) and world.sample.omega.shape[0] == 32
    rep = make_replicate(s, 0)                                 # the optimum search works on it too
    assert rep.optimum[1] <= world(np.random.default_rng(1).random((4096, 2))).min() + 1e-12
    traces = replay(s)
    assert (traces["regret"] >= 0).all()
    assert CoarseKind.describe(dict(s.world.method_settings)) == "coarse random features (32 frequencies)"
    with pytest.raises(StudyError, match="world.method"):   # negative control: unknown without the entry
        monkeypatch.delitem(kinds.WORLD_KINDS, "coarse")
        study(method="coarse")


# --------------------------------------------------------------------------- a figure
class RegretHistogram(Figure):
    stem, section, alt = "regret_histogram", "results", "Histogram of regret at the largest budget"

    def caption(self, study, success):
        return f"Regret of every campaign after {study.campaign.horizon} trials, one histogram per policy."

    def draw(self, given):
        from matplotlib.figure import Figure as MplFigure
        fig = MplFigure(figsize=(5, 3))
        ax = fig.subplots()
        final = given.traces[given.traces["trial"] == given.study.campaign.horizon]
        for label, rows in final.groupby("policy", observed=True):
            ax.hist(rows["regret"], bins=10, alpha=0.5, label=str(label), color=given.colors[str(label)])
        ax.legend()
        return fig


def test_a_registered_figure_is_drawn_saved_shown_and_owned(monkeypatch, tmp_path):
    from simlab.replay.store import _own_names
    from simlab.report.outputs import report_steps, write_outputs

    steps = report_steps()
    monkeypatch.setitem(figures_module.FIGURES, "regret_histogram", RegretHistogram())
    assert report_steps() == steps + 1
    s = study()
    files = write_outputs(tmp_path, s, replay(s), seed=0)
    names = {p.name for p in files.figures}
    assert {"regret_histogram.png", "regret_histogram.svg"} <= names
    page = files.report.read_text(encoding="utf-8")
    assert 'id="fig-regret_histogram"' in page and "one histogram per policy" in page
    assert page.index('id="fig-regret_histogram"') < page.index("First passage (descriptive only)")
    own, folders = _own_names()
    assert folders["figures"]("regret_histogram.png") and not folders["figures"]("someone_elses.png")
