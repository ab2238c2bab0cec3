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
from pathlib import Path

import numpy as np
import pytest

import simlab

# The studies are files (tests/fixed_studies/NAME.toml), with the history one of them reads.
FOLDER = Path(__file__).resolve().parents[1] / "fixed_studies"
STUDIES = sorted(p.stem for p in FOLDER.glob("*.toml"))

# sha256 of the traces as text (see the module docstring); regenerate only on purpose.
EXPECTED = {
    "lockstep-and-alone": "93e8bea4f550d7699e4b541c1e7b9d5124921db29f8ba8b175dd86fabb025240",
    "rounds-noise-horizon": "524cc85089d75c140d439f33e00f9ec3c178ba494aa702d56094efd41605878b",
    "history-grid-refit": "787fa75d78fdd71bc82c72e4b86611a408d47b06e9a891b0fe7933a44cc98651",
    "published-function": "ae2ed8e488cbcbe9eaa7f8d084b8bf626029ee179860e2f48452797bde9ddbb2",
}


def traces_hash(frame) -> str:
    """sha256 of every optimum-free column, sorted rows, floats to 12 significant digits."""
    cols = [c for c in frame.columns if c not in ("regret", "regret_seen")]
    keys = [c for c in ("policy", "horizon", "replicate", "trial") if c in frame.columns]
    frame = frame[cols].sort_values(keys, kind="stable").reset_index(drop=True)
    text = frame.to_csv(index=False, float_format="%.12g", lineterminator="\n")
    return hashlib.sha256(text.encode()).hexdigest()


def run(name: str) -> "simlab.StudyResult":
    return simlab.run_study(simlab.load_study(FOLDER / f"{name}.toml"), write=False)


@pytest.mark.parametrize("name", STUDIES)
def test_traces_match_the_stored_hash(name):
    result = run(name)
    assert len(result.traces) > 0 and np.isfinite(result.traces["y"].to_numpy(float)).any()
    assert traces_hash(result.traces) == EXPECTED[name], (
        f"{name}: the traces changed; if that is intended, regenerate the hashes (module docstring)")


def test_hash_sees_a_one_ulp_change_in_a_chosen_input():
    """Negative control: the hash must notice a change far smaller than any real one."""
    traces = run("rounds-noise-horizon").traces
    before = traces_hash(traces)
    changed = traces.copy()
    col = next(c for c in changed.columns if c == "feed_rate")
    changed.loc[changed.index[7], col] *= 1 + 1e-9
    assert traces_hash(changed) != before
    assert traces_hash(traces.sample(frac=1.0, random_state=0)) == before   # row order is not a result


if __name__ == "__main__":
    for name in STUDIES:
        print(f'    "{name}": "{traces_hash(run(name).traces)}",')
    sys.exit(0)
