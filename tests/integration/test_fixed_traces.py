"""Four fixed studies' traces against stored reference traces: moving code must not change a result.

The studies between them take every path of the replay: lockstep rules (random, sobol, mean,
lcb, pi, ei, gp-ucb), rules of their own draws (thompson, pbest, mes, kg, hedge),
rounds of two trials filled by the kriging believer, horizon-aware campaigns (exploit_last),
Student-t noise growing with the response, lost trials, uncertain hyperparameters and past
trials. Every column is compared except `regret` and `regret_seen`, which follow the world
optimum search (checked against independent searches in tests/unit/test_optimum.py).

Why references and tolerances, not a hash: OpenBLAS picks its kernels by CPU, and a different
kernel changes the last bits of a sum, so a polished trial moves by ~1e-7 of the range and the
posterior mean of two trials *at the same point* can swap which one is recommended. Measured on
one machine with OPENBLAS_CORETYPE=Zen against Sandybridge: inputs differ by at most 1.6e-7 of
their range, y and f by 2.2e-5 relative, and 7 of 948 recommendations swapped, every one between
trials of equal f. So: the discrete columns (chosen rounds, initial/history/lost flags, trial
numbers) must match exactly; float columns within 1e-4 of the column's range (a real change to a
rule or a world moves them by a sizeable share of it); a recommendation may name another trial
only if that trial has the same f. On one machine the traces are bit for bit identical across
workers and chunk sizes (test_lockstep.py checks that with ``check_exact=True``).

When a change is *meant* to alter results (a new default, a fixed bug), rewrite the references
with ``python tests/integration/test_fixed_traces.py`` and say why in the commit message.
Otherwise a mismatch means the change altered what a campaign does.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import simlab

# The studies are files (tests/fixed_studies/NAME.toml); their references NAME.traces.csv.
FOLDER = Path(__file__).resolve().parents[1] / "fixed_studies"
STUDIES = sorted(p.stem for p in FOLDER.glob("*.toml"))
SKIP = ("regret", "regret_seen")
KEYS = ("policy", "horizon", "replicate", "trial")
TOLERANCE = 1e-4     # of a float column's range; the BLAS spread measured above is 200x smaller


def run(name: str) -> "simlab.StudyResult":
    return simlab.run_study(simlab.load_study(FOLDER / f"{name}.toml"), write=False)


def comparable(frame: pd.DataFrame) -> pd.DataFrame:
    cols = [c for c in frame.columns if c not in SKIP]
    keys = [c for c in KEYS if c in frame.columns]
    frame = frame[cols].astype({c: str for c in cols if isinstance(frame[c].dtype, pd.CategoricalDtype)})
    return frame.sort_values(keys, kind="stable").reset_index(drop=True)   # text order: as read back


def reference(name: str) -> pd.DataFrame:
    return pd.read_csv(FOLDER / f"{name}.traces.csv", keep_default_na=False, na_values=[""])


def differences(got: pd.DataFrame, want: pd.DataFrame) -> list[str]:
    """What differs between two comparable trace frames beyond the tolerances above."""
    if list(got.columns) != list(want.columns) or len(got) != len(want):
        return [f"shape or columns differ: {got.shape} {list(got.columns)} against {want.shape} {list(want.columns)}"]
    out = []
    for col in got.columns:
        a, b = got[col].to_numpy(), want[col].to_numpy()
        if col == "rec_trial":
            continue
        if pd.api.types.is_float_dtype(got[col]) and pd.api.types.is_float_dtype(want[col]):
            scale = np.nanmax(b) - np.nanmin(b) if np.isfinite(b).any() else 1.0
            close = np.isclose(a, b, rtol=0.0, atol=TOLERANCE * max(scale, 1e-12), equal_nan=True)
        else:
            close = a.astype(str) == b.astype(str)
        if not close.all():
            i = int(np.flatnonzero(~close)[0])
            out.append(f"{col}: {int((~close).sum())} rows differ, first at row {i}: {a[i]!r} against {b[i]!r}")
    if "rec_trial" in got.columns:
        # a recommendation may name another trial of the same campaign only if that trial has the same f
        keys = [c for c in ("policy", "horizon", "replicate") if c in got.columns]
        f = {(tuple(k), t): v for *k, t, v in want[[*keys, "trial", "f"]].itertuples(index=False)}
        scale = np.nanmax(want["f"]) - np.nanmin(want["f"])
        bad = 0
        for row_got, row_want in zip(got[[*keys, "rec_trial"]].itertuples(index=False),
                                     want[[*keys, "rec_trial"]].itertuples(index=False)):
            *k, ra = row_got
            rb = row_want[-1]
            if ra != rb:
                fa, fb = f.get((tuple(k), ra)), f.get((tuple(k), rb))
                if fa is None or fb is None or not abs(fa - fb) <= TOLERANCE * scale:
                    bad += 1
        if bad:
            out.append(f"rec_trial: {bad} recommendations name a trial of another f")
    return out


@pytest.mark.parametrize("name", STUDIES)
def test_traces_match_the_stored_reference(name):
    got = comparable(run(name).traces)
    assert len(got) > 0 and np.isfinite(got["y"].to_numpy(float)).any()
    problems = differences(got, reference(name))
    assert not problems, (f"{name}: the traces changed; if that is intended, rewrite the references "
                          f"(module docstring): " + "; ".join(problems))


def test_the_comparison_sees_a_small_real_change():
    """Negative controls: a chosen input moved by 1e-3 of its range, one flipped lost flag and a
    recommendation of a worse trial must each be caught; the same traces in another row order,
    and a float moved by the measured BLAS spread, must not be."""
    want = reference("rounds-noise-horizon")
    got = want.copy()
    assert differences(comparable(got.sample(frac=1.0, random_state=0)), want) == []
    span = want["feed_rate"].max() - want["feed_rate"].min()
    blas = want.copy()
    blas.loc[7, "feed_rate"] += 2e-7 * span
    assert differences(blas, want) == []
    moved = want.copy()
    moved.loc[7, "feed_rate"] += 1e-3 * span
    assert any(p.startswith("feed_rate") for p in differences(moved, want))
    flipped = want.copy()
    flipped.loc[3, "lost"] = not bool(flipped.loc[3, "lost"])
    assert any(p.startswith("lost") for p in differences(flipped, want))
    worse = want.copy()
    rows = worse.index[(worse["trial"] == worse["trial"].max())]
    r = rows[0]
    same = worse[(worse["policy"] == worse.loc[r, "policy"]) & (worse["replicate"] == worse.loc[r, "replicate"])
                 & (worse["horizon"] == worse.loc[r, "horizon"])]
    other = same.loc[(same["f"] - same.loc[same["trial"] == worse.loc[r, "rec_trial"], "f"].iloc[0]).abs().idxmax(), "trial"]
    worse.loc[r, "rec_trial"] = other
    assert any(p.startswith("rec_trial") for p in differences(worse, want))


if __name__ == "__main__":
    for name in STUDIES:
        comparable(run(name).traces).to_csv(FOLDER / f"{name}.traces.csv", index=False, float_format="%.17g",
                                            lineterminator="\n")
        print(f"wrote {FOLDER / f'{name}.traces.csv'}")
    sys.exit(0)
