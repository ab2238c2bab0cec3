"""The shipped configs: every one loads as a runnable study, and the two over real search spaces
replay end to end at a small size, holding the user's values (common practice: shipped examples
must not rot)."""

from pathlib import Path

import pytest

from simlab.study.spec import load_study

CONFIGS = sorted((Path(__file__).resolve().parents[2] / "configs").glob("*.toml"))


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.stem)
def test_every_shipped_config_loads(path):
    study = load_study(path)
    assert study.policies and study.replicates >= 1


@pytest.mark.parametrize("name,column,values", [
    ("crystallisation", "solvent", {"isopropanol", "ethyl acetate", "heptane blend"}),
    ("coating-library", "resin", {"acrylic", "alkyd", "epoxy ester", "polyurethane"}),
])
def test_the_search_space_configs_replay(name, column, values):
    from simlab.replay.runner import replay
    study = load_study(next(p for p in CONFIGS if p.stem == name)).with_replicates(2)
    traces = replay(study)
    assert set(traces[column]) <= values and len(set(traces[column])) > 1
    assert (traces["regret"] >= 0).all()
