"""Spaces beyond boxes of reals (issue 15, first slice): stepped, log-scaled and categorical inputs and
[candidates] libraries read, refuse mistakes in one line, dump back to the same Study, and encode
on the unit cube; kinds no part can run yet are refused, never run as real numbers."""

import math
import tomllib

import numpy as np
import pytest

from simlab.replay.runner import replay
from simlab.study.dump import dump_study
from simlab.study.spec import StudyError, advice, load_study, parse_study
from simlab.worlds.replicate import unit_kernel

MIXED = """
[study]
name = "crystallisation"
replicates = 2
seed = 3

[space]
cooling_rate = [0.1, 2.0]
stages = { low = 1, high = 4, step = 1 }
seed_load = { low = 0.01, high = 10.0, scale = "log" }
solvent = { levels = ["acetone", "ethanol", "water"] }

[world]
lengthscale = [0.5, 1.0, 1.5]
amplitude = 2.0
mean = 10.0
noise = 0.1
level_correlation = 0.4

[campaign]
initial = 4
budgets = [8]

[target]
regret = 0.2

[[policy]]
rule = "ei"
"""

LIBRARY_TOML = """
[study]
name = "formulations"
replicates = 2

[candidates]
file = "library.csv"

[world]
lengthscale = [0.5, 2.0]
amplitude = 1.0
noise = 0.0
level_correlation = { binder = 0.3 }

[campaign]
initial = 2
budgets = [6]

[target]
regret = 0.1

[[policy]]
rule = "ei"
"""

LIBRARY_CSV = """filler,binder,layers
0.5,starch,1
1.0,gum,2
0.5,starch,1
1.5,pectin,3
2.0,gum,3
1.5,pectin,3
"""


def write(tmp_path, text, name="study.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def round_trip(study, tmp_path):
    return load_study(write(tmp_path, dump_study(study), "again.toml"), runnable=False)


def test_mixed_space_reads_kinds_and_dumps_back(tmp_path):
    s = load_study(write(tmp_path, MIXED), runnable=False)
    sp = s.space
    assert sp.kinds == ("continuous", "stepped", "log", "categorical")
    assert sp.steps[1] == 1.0 and sp.levels[3] == ("acetone", "ethanol", "water")
    assert sp.numeric == (0, 1, 2) and sp.categorical == (3,)
    assert s.world.prior.level_correlation == (0.4,) and s.belief.level_correlation == (0.4,)
    assert round_trip(s, tmp_path) == s
    # the lengthscale of a log input is in natural-log units: on the unit cube it is ls / log(high / low)
    assert np.allclose(sp.width, [1.9, 3.0, math.log(1000.0)])


def test_box_study_keeps_its_old_form(tmp_path):
    box = MIXED.replace('stages = { low = 1, high = 4, step = 1 }\n', "").replace(
        'seed_load = { low = 0.01, high = 10.0, scale = "log" }\n', "").replace(
        'solvent = { levels = ["acetone", "ethanol", "water"] }\n', "").replace(
        "lengthscale = [0.5, 1.0, 1.5]", "lengthscale = 0.5").replace("level_correlation = 0.4\n", "")
    s = load_study(write(tmp_path, box))
    assert s.space.kinds == () and s.space.is_box and s.world.prior.level_correlation == ()
    text = dump_study(s)
    assert "level_correlation" not in text and "[candidates]" not in text and "cooling_rate = [0.1, 2.0]" in text


def test_encoding_on_the_unit_cube(tmp_path):
    sp = load_study(write(tmp_path, MIXED), runnable=False).space
    U = np.random.default_rng(0).random((500, 4))
    X = sp.from_unit(U)
    # stepped values exactly low + k step; log inputs in natural units; levels as indices 0..L-1
    assert set(np.unique(X[:, 1])) <= {1.0, 2.0, 3.0, 4.0} and set(np.unique(X[:, 3])) == {0.0, 1.0, 2.0}
    assert X[:, 2].min() >= 0.01 and X[:, 2].max() <= 10.0
    # back to the cube lands on the rounded coordinate (the one world and belief see)
    assert np.allclose(sp.to_unit(X), sp.round_unit(U))
    assert np.allclose(sp.to_unit(X)[:, [0, 2]], U[:, [0, 2]])
    # log: equal steps in log are equal steps on the cube (0.01, 0.1, 1, 10 -> 0, 1/3, 2/3, 1)
    u = sp.to_unit(np.array([[0.1, 1.0, v, 0.0] for v in (0.01, 0.1, 1.0, 10.0)]))[:, 2]
    assert np.allclose(u, [0.0, 1 / 3, 2 / 3, 1.0])
    # uniform points give uniform levels: each of 3 levels near 1/3 (binomial sd sqrt(2/9/500) = 0.021)
    share = np.bincount(X[:, 3].astype(int), minlength=3) / len(X)
    assert np.all(np.abs(share - 1 / 3) < 4 * 0.021)
    assert list(sp.level_names([2, 0], 3)) == ["water", "acetone"]
    assert np.allclose(sp.grid(1), [0, 1 / 3, 2 / 3, 1]) and np.allclose(sp.grid(3), [1 / 6, 1 / 2, 5 / 6])


def test_library_without_space_infers_inputs_and_drops_duplicates(tmp_path):
    write(tmp_path, LIBRARY_CSV, "library.csv")
    s = load_study(write(tmp_path, LIBRARY_TOML), runnable=False)
    sp = s.space
    assert sp.names == ("filler", "binder", "layers") and sp.kinds == ("continuous", "categorical", "continuous")
    assert sp.levels[1] == ("starch", "gum", "pectin")          # order of first appearance
    assert (sp.low[0], sp.high[0]) == (0.5, 2.0)
    assert sp.library.size == 4 and sp.library.dropped == (4, 7)   # spreadsheet rows (the header is row 1)
    assert sp.library.rows[1] == (1.0, "gum", 2.0)
    warn = advice(s)
    assert len(warn) == 1 and "2 duplicated rows dropped" in warn[0] and "4 distinct candidates" in warn[0]
    again = round_trip(s, tmp_path)                              # dumped with an explicit [space]
    assert again == s and again.space.library.rows == sp.library.rows
    U = sp.library_unit()
    assert U.shape == (4, 3) and np.allclose(sp.from_unit(U)[:, 0], [0.5, 1.0, 1.5, 2.0])


def test_library_beside_space_checks_each_row(tmp_path):
    write(tmp_path, LIBRARY_CSV, "library.csv")
    space = ('[space]\nfiller = [0.0, 2.0]\nbinder = { levels = ["gum", "pectin", "starch"] }\n'
             "layers = { low = 1, high = 3, step = 1 }\n")
    s = load_study(write(tmp_path, LIBRARY_TOML.replace("[candidates]", space + "[candidates]")), runnable=False)
    assert s.space.kinds == ("continuous", "categorical", "stepped") and s.space.levels[1] == ("gum", "pectin", "starch")
    assert s.space.library.size == 4 and round_trip(s, tmp_path) == s


BAD_SPACE = [
    ("stages = { low = 1, high = 4, step = 1 }", "stages = { low = 1, high = 4, step = 0.7 }", "space.stages.step",
     "whole steps"),
    ("stages = { low = 1, high = 4, step = 1 }", "stages = { low = 1, high = 4, step = 0 }", "space.stages.step", "> 0"),
    ("stages = { low = 1, high = 4, step = 1 }", "stages = { low = 4, high = 1, step = 1 }", "space.stages", "below"),
    ("stages = { low = 1, high = 4, step = 1 }", "stages = { low = 1, high = 4, stepp = 1 }", "space.stages.stepp",
     'did you mean "step"'),
    ("stages = { low = 1, high = 4, step = 1 }", "stages = { high = 4, step = 1 }", "space.stages.low", "required"),
    ('scale = "log"', 'scale = "ln"', "space.seed_load.scale", "allowed: linear, log"),
    ("low = 0.01, high = 10.0", "low = 0.0, high = 10.0", "space.seed_load.low", "positive"),
    ("low = 0.01, high = 10.0", "low = -1.0, high = 10.0", "space.seed_load.low", "positive"),
    ('levels = ["acetone", "ethanol", "water"]', 'levels = ["acetone"]', "space.solvent.levels", "at least two"),
    ('levels = ["acetone", "ethanol", "water"]', 'levels = ["acetone", "water", "acetone"]', "space.solvent.levels",
     "twice"),
    ('levels = ["acetone", "ethanol", "water"]', "levels = [1, 2, 3]", "space.solvent.levels", "stepped"),
    ('levels = ["acetone", "ethanol", "water"]', 'levels = ["acetone", "ethanol"], low = 0', "space.solvent.low",
     "unknown key"),
    ("level_correlation = 0.4", "level_correlation = -0.5", "world.level_correlation", "-1/(L-1) = -0.5"),
    ("level_correlation = 0.4", "level_correlation = 1.0", "world.level_correlation", "strictly between"),
    ("level_correlation = 0.4", "level_correlation = { solvnt = 0.4 }", "world.level_correlation.solvnt",
     "not a categorical input"),
    ("level_correlation = 0.4", "", "world.level_correlation", "required with categorical inputs"),
    ("lengthscale = [0.5, 1.0, 1.5]", "lengthscale = [0.5, 1.0, 1.5, 2.0]", "world.lengthscale",
     "one per non-categorical input (3: cooling_rate, stages, seed_load)"),
]


@pytest.mark.parametrize("old,new,field,words", BAD_SPACE)
def test_bad_space_is_one_line_naming_the_field(tmp_path, old, new, field, words):
    assert old in MIXED
    path = write(tmp_path, MIXED.replace(old, new, 1))
    with pytest.raises(StudyError) as info:
        load_study(path, runnable=False)
    msg = str(info.value)
    assert msg.startswith(f"{path}: {field}: ") and words in msg and "\n" not in msg, msg


def test_level_correlation_needs_a_categorical_input(tmp_path):
    text = MIXED.replace('solvent = { levels = ["acetone", "ethanol", "water"] }\n', "")
    with pytest.raises(StudyError, match="world.level_correlation: applies only to categorical inputs"):
        load_study(write(tmp_path, text), runnable=False)
    # just inside the valid range for 3 levels (-1/2 < rho) reads
    ok = load_study(write(tmp_path, MIXED.replace("= 0.4", "= -0.49")), runnable=False)
    assert ok.world.prior.level_correlation == (-0.49,)


BAD_LIBRARY = [
    # (csv text, [space] or None, words the one line must hold)
    ("filler,binder\n0.5,starch\n1.0,gum\n", "full", 'column "layers": no such column'),
    (LIBRARY_CSV.replace("filler,binder,layers", "filler,binder,layers,colour").replace("\n", ",red\n").replace(
        "colour,red", "colour"), "full", 'column "colour" is not an input'),
    (LIBRARY_CSV.replace("1.0,gum,2", "1.0,gum,two"), "full", 'column "layers", row 3 (the header is row 1): "two" is not a number'),
    (LIBRARY_CSV.replace("1.0,gum,2", "abc,gum,2"), None, 'column "filler", row 3 (the header is row 1): "abc" is not a number'),
    (LIBRARY_CSV.replace("2.0,gum,3", "2.0,agar,3"), "full", 'row 6 (the header is row 1): "agar" is not a level'),
    (LIBRARY_CSV.replace("2.0,gum,3", "2.5,gum,3"), "full", 'column "filler", row 6 (the header is row 1): 2.5 lies outside'),
    (LIBRARY_CSV.replace("2.0,gum,3", "2.0,gum,2.5"), "full", 'column "layers", row 6 (the header is row 1): 2.5 is not one of'),
    (LIBRARY_CSV.replace("2.0,gum,3", "2.0,,3"), "full", 'column "binder", row 6 (the header is row 1): is blank'),
    ("filler,binder,layers\n0.5,gum,1\n0.5,gum,1\n", None, "constant column"),
    ("filler,binder,layers\n0.5,gum,1\n1.5,gum,2\n", None, 'every row holds "gum"'),
]
FULL_SPACE = ('[space]\nfiller = [0.0, 2.0]\nbinder = { levels = ["gum", "pectin", "starch"] }\n'
              "layers = { low = 1, high = 3, step = 1 }\n")


@pytest.mark.parametrize("csv,space,words", BAD_LIBRARY)
def test_bad_library_is_one_line_naming_file_field_and_row(tmp_path, csv, space, words):
    lib = write(tmp_path, csv, "library.csv")
    text = LIBRARY_TOML if space is None else LIBRARY_TOML.replace("[candidates]", FULL_SPACE + "[candidates]")
    path = write(tmp_path, text)
    with pytest.raises(StudyError) as info:
        load_study(path, runnable=False)
    msg = str(info.value)
    assert msg.startswith(f"{path}: candidates.file: {lib}") and words in msg and "\n" not in msg, msg


def test_library_of_one_distinct_row_and_a_missing_file(tmp_path):
    write(tmp_path, "filler,layers\n0.5,1\n0.5,1\n", "library.csv")
    text = LIBRARY_TOML.replace("level_correlation = { binder = 0.3 }\n", "").replace(
        "[candidates]", "[space]\nfiller = [0.0, 1.0]\nlayers = [1.0, 2.0]\n[candidates]")
    with pytest.raises(StudyError, match="1 distinct row; a library needs at least two"):
        load_study(write(tmp_path, text), runnable=False)
    with pytest.raises(StudyError, match="candidates.file: .*absent.csv: no such file"):
        load_study(write(tmp_path, text.replace("library.csv", "absent.csv")), runnable=False)


@pytest.mark.parametrize("old,new", [
    ('stages = { low = 1, high = 4, step = 1 }', 'stages = { low = 1, high = 4, step = 1 }'),
    ('stages = { low = 1, high = 4, step = 1 }', "stages = [1.0, 4.0]"),
])
def test_stepped_and_categorical_studies_are_runnable(tmp_path, old, new):
    # issue 15 landed: the belief, every rule and the report run over these kinds
    from simlab.study.spec import unsupported
    study = load_study(write(tmp_path, MIXED.replace(old, new)))
    assert unsupported(study) is None and study.space.categorical


def test_library_with_a_categorical_column_is_runnable(tmp_path):
    write(tmp_path, LIBRARY_CSV, "library.csv")
    study = load_study(write(tmp_path, LIBRARY_TOML))
    assert study.space.library.size > 1 and study.space.categorical


def test_history_reads_stepped_and_categorical_inputs(tmp_path):
    """Past trials over this space read (tests/integration/test_mixed_history.py checks them in full)."""
    write(tmp_path, "cooling_rate,stages,seed_load,solvent,y\n0.5,2,0.1,water,9.0\n", "past.csv")
    s = load_study(write(tmp_path, MIXED + '\n[history]\nfile = "past.csv"\n'))
    assert s.history.X == ((0.5, 2.0, 0.1, 2.0),) and round_trip(s, tmp_path) == s


LOG_STUDY = {
    "study": {"name": "feed", "replicates": 3, "seed": 7},
    "space": {"temp": [28.0, 37.0], "dose": {"low": 0.01, "high": 10.0, "scale": "log"}},
    "world": {"kernel": "matern52", "lengthscale": [3.0, 1.5], "amplitude": 1.0, "mean": 0.0, "noise": 0.05},
    "campaign": {"initial": 3, "budgets": [6], "pool": 64},
    "target": {"regret": 0.1},
    "policy": [{"rule": "ei"}, {"rule": "random"}],
}


def test_log_inputs_run_stationary_in_the_log():
    s = parse_study(LOG_STUDY, source="mem")
    assert s.space.kinds == ("continuous", "log")
    # the unit-cube lengthscale of the log input is 1.5 / ln(1000): 1.5 natural-log units
    k = unit_kernel(s.world.prior, s)
    assert np.allclose(k.lengthscale, [3.0 / 9.0, 1.5 / math.log(1000.0)])
    traces = replay(s)
    assert traces["dose"].between(0.01, 10.0).all() and traces["temp"].between(28.0, 37.0).all()
    assert parse_study(tomllib.loads(dump_study(s)), source="again") == s
