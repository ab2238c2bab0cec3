"""Study files: every mistake is one line naming the file, the field and what is allowed."""

import math

import pytest

from simlab.study.dump import dump_study
from simlab.study.spec import StudyError, load_study, parse_study

BASE = """
[study]
name = "line"
goal = "maximize"
replicates = 3
seed = 11

[space]
barrel_temp = [180.0, 240.0]
screw_speed = [40.0, 120.0]

[world]
kernel = "matern52"
lengthscale = [15.0, 25.0]
amplitude = 4.0
mean = 80.0
noise = 0.8

[campaign]
initial = 4
budgets = [8, 12]

[target]
regret = 1.0

[[policy]]
rule = "ei"

[[policy]]
rule = "lcb"
width = 1.5
"""


def write(tmp_path, text, name="study.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_base_study_resolves_defaults(tmp_path):
    s = load_study(write(tmp_path, BASE))
    assert s.space.names == ("barrel_temp", "screw_speed")
    assert s.belief == s.world.prior  # every [belief] key left out copies [world]
    assert s.campaign.design == "sobol" and s.campaign.pool == 2048
    assert s.labels == ("ei", "lcb") and s.policies[1].options["width"] == 1.5
    assert s.sign == -1.0


def test_dump_round_trip(tmp_path):
    s = load_study(write(tmp_path, BASE))
    again = load_study(write(tmp_path, dump_study(s, header={"simlab version": "x"}), "again.toml"))
    assert again == s


def test_floor_dumps_only_when_given(tmp_path):
    plain = load_study(write(tmp_path, BASE))
    assert plain.floor is None and "floor" not in dump_study(plain)   # without it the text (and hash) is as before
    s = load_study(write(tmp_path, BASE.replace("regret = 1.0", "regret = 1.0\nfloor = 76.0"), "floor.toml"))
    assert s.floor == 76.0 and "floor = 76.0" in dump_study(s)
    again = load_study(write(tmp_path, dump_study(s), "again.toml"))
    assert again == s and again != plain


def test_floor_far_from_the_prior_is_advised(tmp_path):
    from simlab.study.spec import advice
    # prior mean 80, amplitude 4, maximise: a floor 5 amplitudes above the mean makes nearly every trial harmful
    for floor, words in ((101.0, "nearly every trial"), (59.0, "almost no trial")):
        s = load_study(write(tmp_path, BASE.replace("regret = 1.0", f"regret = 1.0\nfloor = {floor}")))
        said = [line for line in advice(s) if "target.floor" in line]
        assert len(said) == 1 and words in said[0], said
    s = load_study(write(tmp_path, BASE.replace("regret = 1.0", "regret = 1.0\nfloor = 76.0")))
    assert not [line for line in advice(s) if "target.floor" in line]


def test_single_lengthscale_broadcasts(tmp_path):
    s = load_study(write(tmp_path, BASE.replace("lengthscale = [15.0, 25.0]", "lengthscale = 20")))
    assert s.world.prior.lengthscale == (20.0, 20.0)


def test_belief_overrides_only_given_keys(tmp_path):
    s = load_study(write(tmp_path, BASE + '\n[belief]\nlengthscale = 5.0\n'))
    assert s.belief.lengthscale == (5.0, 5.0) and s.belief.amplitude == 4.0 and s.belief.noise == 0.8


def test_published_function_defaults_its_domain(tmp_path):
    text = """
[world]
function = "branin"
noise = 0.1
[belief]
lengthscale = 3.0
amplitude = 50.0
mean = 50.0
[campaign]
initial = 4
budgets = [10]
[target]
regret = 0.5
[[policy]]
rule = "ei"
"""
    s = load_study(write(tmp_path, text))
    assert s.space.low == (-5.0, 0.0) and s.space.high == (10.0, 15.0)
    assert s.belief.noise == 0.1


# (replacement old -> new, field the message must name)
CASES = [
    ('goal = "maximize"', 'goal = "maximise"', "study.goal"),
    ("replicates = 3", "replicates = 0", "study.replicates"),
    ("replicates = 3", "replicates = 2.5", "study.replicates"),
    ("replicates = 3", 'replicates = "many"', "study.replicates"),
    ("seed = 11", "seed = -1", "study.seed"),
    ('name = "line"', 'name = "../escape"', "study.name"),
    ("barrel_temp = [180.0, 240.0]", "barrel_temp = [240.0, 180.0]", "space.barrel_temp"),
    ("barrel_temp = [180.0, 240.0]", "barrel_temp = [180.0, 180.0]", "space.barrel_temp"),
    ("barrel_temp = [180.0, 240.0]", "barrel_temp = [180.0]", "space.barrel_temp"),
    ("barrel_temp = [180.0, 240.0]", 'barrel_temp = [180.0, "hot"]', "space.barrel_temp"),
    ("barrel_temp = [180.0, 240.0]", "barrel_temp = [nan, 240.0]", "space.barrel_temp"),
    ("barrel_temp = [180.0, 240.0]", "regret = [0.0, 1.0]", "space.regret"),
    ("amplitude = 4.0", "amplitude = 0.0", "world.amplitude"),
    ("amplitude = 4.0", "amplitude = -4.0", "world.amplitude"),
    ("amplitude = 4.0", "amplitude = inf", "world.amplitude"),
    ("amplitude = 4.0", "", "world.amplitude"),
    ("noise = 0.8", "noise = -0.1", "world.noise"),
    ("noise = 0.8", "", "world.noise"),
    ("lengthscale = [15.0, 25.0]", "lengthscale = [15.0, 25.0, 3.0]", "world.lengthscale"),
    ("lengthscale = [15.0, 25.0]", "lengthscale = [15.0, 0.0]", "world.lengthscale"),
    ('kernel = "matern52"', 'kernel = "matern25"', "world.kernel"),
    ('kernel = "matern52"', 'kernal = "matern52"', "world.kernal"),
    ("budgets = [8, 12]", "budgets = [3, 12]", "campaign.budgets"),
    ("budgets = [8, 12]", "budgets = [8, 8]", "campaign.budgets"),
    ("budgets = [8, 12]", "budgets = []", "campaign.budgets"),
    ("budgets = [8, 12]", "budgets = [8, 12.5]", "campaign.budgets"),
    ("initial = 4", "initial = 0", "campaign.initial"),
    ("initial = 4", 'design = "grid"', "campaign.design"),
    ("regret = 1.0", "regret = -1.0", "target.regret"),
    ("regret = 1.0", "tolerance = 1.0", "target.tolerance"),
    ('rule = "ei"', 'rule = "eii"', "policy[0].rule"),
    ('rule = "ei"', 'label = "x"', "policy[0].rule"),
    ("width = 1.5", "widht = 1.5", "policy[1].widht"),
    ("width = 1.5", "width = -1.5", "policy[1].width"),
    ('rule = "lcb"', 'rule = "ei"', "policy[1].width"),  # width is not an EI setting
    ('rule = "lcb"\nwidth = 1.5', 'rule = "lcb"\nlabel = "ei"', "policy[1].label"),
    ("regret = 1.0", 'regret = 1.0\nfloor = "76 MPa"', "target.floor"),
    ("regret = 1.0", "regret = 1.0\nfloor = nan", "target.floor"),
    ("regret = 1.0", "regret = 1.0\nfloor = true", "target.floor"),
    ("[target]", "[targets]", "[targets]"),
    ("[campaign]\n", "", "world.initial: unknown key; it belongs in [campaign]"),  # header missing
]


@pytest.mark.parametrize("old,new,field", CASES)
def test_malformed_study_names_field(tmp_path, old, new, field):
    assert old in BASE
    path = write(tmp_path, BASE.replace(old, new, 1))
    with pytest.raises(StudyError) as info:
        load_study(path)
    msg = str(info.value)
    assert msg.startswith(str(path) + ": "), msg
    assert field in msg, msg
    assert "\n" not in msg


def test_unknown_key_suggests_close_match(tmp_path):
    with pytest.raises(StudyError, match='did you mean "amplitude"'):
        load_study(write(tmp_path, BASE.replace("amplitude = 4.0", "amplitud = 4.0")))


def test_not_toml_and_not_utf8(tmp_path):
    with pytest.raises(StudyError, match="not valid TOML"):
        load_study(write(tmp_path, "[study\nname = 1"))
    p = tmp_path / "latin1.toml"
    p.write_bytes(BASE.replace("line", "lín").encode("latin-1"))
    with pytest.raises(StudyError, match="not UTF-8"):
        load_study(p)
    with pytest.raises(StudyError, match="no such file"):
        load_study(tmp_path / "absent.toml")


def test_missing_sections(tmp_path):
    for section in ("[world]", "[target]"):
        start = BASE.index(section)
        end = BASE.index("\n[", start + 1)
        with pytest.raises(StudyError, match=r"\[" + section[1:-1]):
            load_study(write(tmp_path, BASE[:start] + BASE[end:]))
    with pytest.raises(StudyError, match="policy"):
        load_study(write(tmp_path, BASE[: BASE.index("[[policy]]")]))


def test_function_world_rules(tmp_path):
    text = '[world]\nfunction = "branin"\n[campaign]\ninitial=2\nbudgets=[5]\n[target]\nregret=1.0\n[[policy]]\nrule="ei"\n'
    with pytest.raises(StudyError, match="belief.lengthscale"):
        load_study(write(tmp_path, text))
    bad = text.replace('function = "branin"', 'function = "branin"\namplitude = 2.0')
    with pytest.raises(StudyError, match="world.amplitude"):
        load_study(write(tmp_path, bad))
    dom = text + "[space]\na = [0.0, 1.0]\nb = [0.0, 15.0]\n"
    with pytest.raises(StudyError, match="space.a"):
        load_study(write(tmp_path, dom.replace("[campaign]", "[belief]\nlengthscale=1.0\namplitude=1.0\nmean=0.0\n[campaign]")))
    maxi = text.replace("[world]", '[study]\ngoal = "maximize"\n[world]')
    with pytest.raises(StudyError, match="study.goal"):
        load_study(write(tmp_path, maxi))


def test_grid_worlds_only_up_to_two_inputs(tmp_path):
    text = BASE.replace("screw_speed = [40.0, 120.0]", "screw_speed = [40.0, 120.0]\ndie_gap = [1.0, 2.0]")
    text = text.replace("lengthscale = [15.0, 25.0]", 'lengthscale = 10.0\nmethod = "grid"')
    with pytest.raises(StudyError, match="world.method"):
        load_study(write(tmp_path, text))


def test_parse_rejects_bool_as_number():
    data = {"space": {"a": [0.0, 1.0]},
            "world": {"lengthscale": True, "amplitude": 1.0, "noise": 0.0},
            "campaign": {"budgets": [5], "initial": 2}, "target": {"regret": 0.1},
            "policy": [{"rule": "ei"}]}
    with pytest.raises(StudyError, match="world.lengthscale"):
        parse_study(data, source="mem")
    data["world"]["lengthscale"] = 0.2
    assert math.isclose(parse_study(data, source="mem").world.prior.lengthscale[0], 0.2)
