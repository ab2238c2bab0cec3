"""Two fixed studies' traces against stored hashes: moving code must not change a result.

The studies between them take every path of the replay: lockstep rules (random, sobol, mean,
lcb, pi, ei, gp-ucb), rules run one campaign at a time (thompson, pbest, mes, kg, hedge),
rounds of two trials filled by the kriging believer, horizon-aware campaigns (exploit_last),
Student-t noise growing with the response, lost trials, uncertain hyperparameters and past
trials. The hash covers every column of the traces that does not depend on the world optimum
(`regret` and `regret_seen` do: they move whenever the optimum search is improved, and
`worlds.csv` is checked against independent searches in tests/unit/test_optimum.py).

Values are hashed as text to 12 significant digits, so that a different BLAS build (last-bit
differences in a sum) does not flip the hash while any real change does; the discrete columns
(chosen trials, recommendations, lost flags) are exact. On one machine the traces are bit for
bit identical (test_lockstep.py checks that with ``check_exact=True``).

When a change is *meant* to alter results (a new default, a fixed bug), print the new hashes
with ``python tests/integration/test_fixed_traces.py``, paste them below and say why in the
commit message. Otherwise a mismatch means the change altered what a campaign does.
"""

from __future__ import annotations

import hashlib
import sys
import textwrap

import numpy as np
import pytest

import simlab

STUDIES = {
    "lockstep-and-alone": """
        [study]
        name = "fixed-a"
        goal = "maximize"
        replicates = 4
        seed = 2024

        [space]
        screw_speed = [100.0, 400.0]
        barrel_temperature = [180.0, 240.0]

        [world]
        kernel = "matern52"
        lengthscale = [90.0, 20.0]
        amplitude = 2.0
        mean = 10.0
        noise = 0.1

        [campaign]
        initial = 4
        budgets = [8, 12]
        pool = 256

        [target]
        regret = 0.3

        [[policy]]
        rule = "random"
        [[policy]]
        rule = "sobol"
        [[policy]]
        rule = "mean"
        [[policy]]
        rule = "lcb"
        [[policy]]
        rule = "pi"
        [[policy]]
        rule = "ei"
        [[policy]]
        rule = "gp-ucb"
        [[policy]]
        rule = "thompson"
        [[policy]]
        rule = "pbest"
        [[policy]]
        rule = "mes"
        [[policy]]
        rule = "kg"
        [[policy]]
        rule = "hedge"
    """,
    "rounds-noise-horizon": """
        [study]
        name = "fixed-b"
        goal = "minimize"
        replicates = 3
        seed = 77

        [space]
        feed_rate = [0.5, 4.0]
        temperature = [28.0, 37.0]
        ph = [5.5, 7.5]

        [world]
        kernel = "matern32"
        lengthscale = [1.5, 4.0, 1.0]
        amplitude = 1.0
        mean = 0.0
        noise = 0.2
        noise_kind = "student"
        noise_df = 4.0
        noise_growth = 0.2
        lost = 0.15

        lengthscale_within = 1.5
        amplitude_within = 1.3

        [campaign]
        initial = 5
        budgets = [9, 13]
        batch = 2
        pool = 256

        [target]
        regret = 0.2

        [[policy]]
        rule = "ei"
        label = "EI, last two exploit"
        exploit_last = 2
        [[policy]]
        rule = "ei"
        label = "EI, liar"
        fill = "liar"
        [[policy]]
        rule = "ei"
        label = "EI, penalized"
        fill = "penalize"
        [[policy]]
        rule = "thompson"
        [[policy]]
        rule = "lcb"
    """,
    "history-grid-refit": """
        [study]
        name = "fixed-c"
        goal = "maximize"
        replicates = 3
        seed = 5

        [space]
        vent_opening = [0.0, 100.0]

        [world]
        kernel = "matern52"
        method = "grid"
        lengthscale = 15.0
        amplitude = 1.0
        mean = 0.0
        noise = 0.05

        [belief]
        kernel = "sqexp"
        lengthscale = 25.0
        refit_every = 3

        [history]
        file = "past-vents.csv"
        response = "yield"

        [campaign]
        initial = 0
        budgets = [6, 10]
        pool = 128

        [target]
        regret = 0.1

        [[policy]]
        rule = "ei"
        [[policy]]
        rule = "mes"
        [[policy]]
        rule = "random"
    """,
    "published-function": """
        [study]
        name = "fixed-d"
        goal = "minimize"
        replicates = 3
        seed = 9

        [world]
        function = "branin"
        noise = 1.0

        [belief]
        kernel = "matern52"
        lengthscale = [4.0, 4.0]
        amplitude = 50.0
        mean = 50.0

        [campaign]
        initial = 5
        design = "lhs"
        budgets = [10]
        pool = 256

        [target]
        regret = 1.0

        [[policy]]
        rule = "ei"
        [[policy]]
        rule = "pi"
    """,
}

HISTORY = "vent_opening,yield\n12.5,0.31\n48.0,-0.20\n81.0,0.74\n"

# sha256 of the traces as text (see the module docstring); regenerate only on purpose.
EXPECTED = {
    "lockstep-and-alone": "bbbb09d08961580ff07bc17c7254e3f91b14fd79be4552007cb942e4d379603f",
    "rounds-noise-horizon": "9312fd9391fb42c160778060b71f50fea647aeb60f60670b0e1c8c0c4944fe0e",
    "history-grid-refit": "21dcd84101f57642233256d46b3d9cd2ab34f90b27350ce1e7bd4cfe8b498fea",
    "published-function": "ae2ed8e488cbcbe9eaa7f8d084b8bf626029ee179860e2f48452797bde9ddbb2",
}


def traces_hash(frame) -> str:
    """sha256 of every optimum-free column, sorted rows, floats to 12 significant digits."""
    cols = [c for c in frame.columns if c not in ("regret", "regret_seen")]
    keys = [c for c in ("policy", "horizon", "replicate", "trial") if c in frame.columns]
    frame = frame[cols].sort_values(keys, kind="stable").reset_index(drop=True)
    text = frame.to_csv(index=False, float_format="%.12g", lineterminator="\n")
    return hashlib.sha256(text.encode()).hexdigest()


def run(name: str, tmp_dir) -> "simlab.StudyResult":
    (tmp_dir / "past-vents.csv").write_text(HISTORY, encoding="utf-8")
    path = tmp_dir / f"{name}.toml"
    path.write_text(textwrap.dedent(STUDIES[name]), encoding="utf-8")
    return simlab.run_study(simlab.load_study(path), write=False)


@pytest.mark.parametrize("name", sorted(STUDIES))
def test_traces_match_the_stored_hash(name, tmp_path):
    result = run(name, tmp_path)
    assert len(result.traces) > 0 and np.isfinite(result.traces["y"].to_numpy(float)).any()
    assert traces_hash(result.traces) == EXPECTED[name], (
        f"{name}: the traces changed; if that is intended, regenerate the hashes (module docstring)")


def test_hash_sees_a_one_ulp_change_in_a_chosen_input(tmp_path):
    """Negative control: the hash must notice a change far smaller than any real one."""
    traces = run("rounds-noise-horizon", tmp_path).traces
    before = traces_hash(traces)
    changed = traces.copy()
    col = next(c for c in changed.columns if c == "feed_rate")
    changed.loc[changed.index[7], col] *= 1 + 1e-9
    assert traces_hash(changed) != before
    assert traces_hash(traces.sample(frac=1.0, random_state=0)) == before   # row order is not a result


if __name__ == "__main__":
    import pathlib
    import tempfile
    with tempfile.TemporaryDirectory() as tmp:
        for name in sorted(STUDIES):
            print(f'    "{name}": "{traces_hash(run(name, pathlib.Path(tmp)).traces)}",')
    sys.exit(0)
