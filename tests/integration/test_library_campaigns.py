"""Campaigns over a [candidates] library: every rule chooses its rows (issue 15)."""

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


@pytest.mark.parametrize("rule", ["pi", "lcb", "mean", "gp-ucb", "hedge", "thompson", "pbest", "mes", "kg"])
def test_every_rule_chooses_library_rows(tmp_path, rule):
    # the campaign loop refuses a trial that is not a row (RuntimeError), so a clean run is the check;
    # noise-free, a rule that never repeats a row before all are seen (EI, PI) is tested above
    (tmp_path / "feeds.csv").write_text(ROWS, encoding="utf-8")
    (tmp_path / "s.toml").write_text(STUDY.replace("replicates = 20", "replicates = 2").replace(
        'rule = "random"', f'rule = "{rule}"').replace("noise = 0.0", "noise = 0.1"), encoding="utf-8")
    traces = replay(load_study(tmp_path / "s.toml"))
    allowed = {(round(float(a), 9), round(float(b), 9)) for a, b in (line.split(",") for line in ROWS.splitlines()[1:])}
    assert set(rows_of(traces[traces["policy"] == rule])) <= allowed


def test_library_refuses_rounds_and_a_final_switch(tmp_path):
    (tmp_path / "feeds.csv").write_text(ROWS, encoding="utf-8")
    for text, field in [(STUDY.replace("budgets = [12]", "budgets = [12]\nbatch = 2"), "campaign.batch"),
                        (STUDY.replace('rule = "ei"', 'rule = "ei"\nexploit_last = 2'), r"policy\[0\].exploit_last")]:
        (tmp_path / "s.toml").write_text(text, encoding="utf-8")
        with pytest.raises(StudyError, match=field):
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


def test_a_library_of_100000_rows_runs(tmp_path):
    # the size: every row scored each trial (Thompson ranks its sample in float32), the world
    # evaluated at every row once, and the campaign loop's row check on every trial
    import numpy as np
    rng = np.random.default_rng(8)
    n = 100_000
    carriers = np.array(["oil", "gel", "foam"])[rng.integers(3, size=n)]
    lines = [f"{c},{a:.6f},{b:.4f}" for c, a, b in zip(carriers, rng.random(n), 20 + 60 * rng.random(n))]
    (tmp_path / "big.csv").write_text("carrier,load,temp\n" + "\n".join(lines) + "\n", encoding="utf-8")
    (tmp_path / "s.toml").write_text(STUDY.replace('file = "feeds.csv"', 'file = "big.csv"').replace(
        "replicates = 20", "replicates = 1").replace("lengthscale = [0.8, 3.0]", "lengthscale = [0.3, 20.0]\n"
        "level_correlation = 0.5").replace("noise = 0.0", "noise = 0.1").replace('rule = "sobol"', 'rule = "thompson"'),
        encoding="utf-8")
    traces = replay(load_study(tmp_path / "s.toml"))
    assert len(traces) == 3 * 12 and traces["regret"].ge(0).all()
    assert set(traces["carrier"]) <= {"oil", "gel", "foam"}


def test_a_trial_off_the_library_is_refused_by_the_campaign_loop(tmp_path):
    # the negative control of the checks above: a rule that ignores the library is stopped
    import numpy as np
    from simlab.policies.base import Policy
    from simlab.replay.runner import make_belief
    from simlab.replay.campaign import run_campaign
    from simlab.worlds.replicate import make_replicate

    class Centre(Policy):
        rule = "centre"

        def choose(self, post, t):
            return np.full(post.kernel.dim, 0.5)

    (tmp_path / "feeds.csv").write_text(ROWS, encoding="utf-8")
    (tmp_path / "s.toml").write_text(STUDY, encoding="utf-8")
    s = load_study(tmp_path / "s.toml")
    rep = make_replicate(s, 0)
    with pytest.raises(RuntimeError, match="not a row of the library"):
        run_campaign(Centre(), make_belief(s), rep.world, design=rep.design, sequence=rep.sequence,
                     observe=lambda f, t: f, budget=4, pool=rep.pool, rng=np.random.default_rng(0), library=True)


@pytest.mark.parametrize("noise", [0.0, 0.1])
def test_library_campaigns_in_lockstep_match_one_at_a_time(tmp_path, noise):
    # lockstep covers libraries: the block code scores every row, as each campaign does alone
    import numpy as np
    from simlab.replay.runner import replay_replicate
    rules = ["ei", "pi", "lcb", "mean", "gp-ucb", "hedge", "thompson", "mes", "kg", "random", "sobol"]
    policies = "".join(f'[[policy]]\nrule = "{r}"\n' for r in rules)
    (tmp_path / "feeds.csv").write_text(ROWS, encoding="utf-8")
    text = STUDY.split("[[policy]]")[0].replace("replicates = 20", "replicates = 2").replace(
        "noise = 0.0", f"noise = {noise}") + policies
    (tmp_path / "s.toml").write_text(text, encoding="utf-8")
    s = load_study(tmp_path / "s.toml")
    for r in range(2):
        a, b = replay_replicate(s, r, lockstep=True), replay_replicate(s, r, lockstep=False)
        np.testing.assert_array_equal(a[["feed_rate", "temp", "y", "regret"]].to_numpy(),
                                      b[["feed_rate", "temp", "y", "regret"]].to_numpy())
