"""Campaigns over a [candidates] library: random, sobol and EI choose its rows (issue 15, S4)."""

import pytest

from simlab.replay.runner import replay
from simlab.study.spec import StudyError, load_study

# Six invented fermentation-feed settings (feed rate, temperature); distinct rows.
ROWS = "feed_rate,temp\n0.5,30\n0.9,34\n1.4,31\n1.8,36\n2.2,29\n2.5,33\n"
STUDY = """
[study]
name = "feed-library"
replicates = 20
seed = 17
[candidates]
file = "feeds.csv"
[world]
lengthscale = [0.8, 3.0]
amplitude = 1.0
mean = 5.0
noise = 0.0
[campaign]
initial = 2
budgets = [12]
[target]
regret = 0.01
[[policy]]
rule = "ei"
[[policy]]
rule = "random"
[[policy]]
rule = "sobol"
"""


@pytest.fixture(scope="module")
def traces(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lib")
    (folder / "feeds.csv").write_text(ROWS, encoding="utf-8")
    (folder / "s.toml").write_text(STUDY, encoding="utf-8")
    return replay(load_study(folder / "s.toml"))


def rows_of(frame):
    return list(zip(frame["feed_rate"].round(9), frame["temp"].round(9)))


def test_every_trial_is_a_library_row(traces):
    allowed = {(float(a), float(b)) for a, b in (line.split(",") for line in ROWS.splitlines()[1:])}
    # traces hold user units: the unit-cube round trip of a row may move it by an ulp, hence the rounding
    assert set(rows_of(traces)) <= {(round(a, 9), round(b, 9)) for a, b in allowed}
    assert len(set(rows_of(traces))) == 6


@pytest.mark.parametrize("policy", ["ei", "random", "sobol"])
def test_rows_without_replacement_until_the_library_is_exhausted(traces, policy):
    for _, camp in traces[traces["policy"] == policy].groupby("replicate"):
        camp = camp.sort_values("trial")
        first = rows_of(camp[camp["trial"] <= 6])
        assert len(set(first)) == 6, (policy, first)          # every row once before any repeats


def test_ei_reaches_zero_regret_by_trial_6_in_every_replicate(traces):
    # zero noise: EI of an evaluated row is exactly 0 (Jones, Schonlau & Welch 1998), so EI visits every
    # row before repeating one, and once all six are seen the recommendation is the best row: regret 0
    ei = traces[traces["policy"] == "ei"]
    assert (ei[ei["trial"] >= 6]["regret"] == 0.0).all()
    # control: at trial 3 (half the rows seen) the best row has not been found in every replicate
    assert (ei[ei["trial"] == 3]["regret"] > 0).any()


def test_library_refuses_rules_that_cannot_choose_rows_yet(tmp_path):
    (tmp_path / "feeds.csv").write_text(ROWS, encoding="utf-8")
    (tmp_path / "s.toml").write_text(STUDY.replace('rule = "random"', 'rule = "lcb"'), encoding="utf-8")
    with pytest.raises(StudyError, match=r"policy\[1\].rule: \"lcb\" does not choose from a \[candidates\] library"):
        load_study(tmp_path / "s.toml")


def test_stepped_columns_of_a_library_keep_their_exact_values(tmp_path):
    # a library's rows are on the step grid already, so the prior at the rows needs no rounding;
    # the traces hold the stepped values exactly (low + k step, from the integer k)
    (tmp_path / "feeds.csv").write_text("feed_rate,washes\n0.5,1\n0.9,3\n1.4,2\n1.8,6\n2.2,4\n", encoding="utf-8")
    text = STUDY.replace("[candidates]", "[space]\nfeed_rate = [0.5, 2.5]\nwashes = { low = 1, high = 6, step = 1 }\n"
                         "[candidates]").replace("replicates = 20", "replicates = 3").replace("[0.8, 3.0]", "[0.8, 2.0]")
    (tmp_path / "s.toml").write_text(text, encoding="utf-8")
    traces = replay(load_study(tmp_path / "s.toml"))
    assert set(traces["washes"]) == {1.0, 2.0, 3.0, 4.0, 6.0}
    assert (traces[(traces["policy"] == "ei") & (traces["trial"] >= 5)]["regret"] == 0.0).all()
