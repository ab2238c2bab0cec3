"""A study with [target] floor, end to end on the command line: harm.csv against a recomputation
from the folder's traces.parquet and worlds.csv, the report's section, the fourth attitude, --fresh."""

import re

import numpy as np
import pandas as pd
import pytest
from command_line import SMALL, one_line, run_study, simlab

# SMALL minimises a world of mean 0 and amplitude 1: a trial above 0.5 is harmful.
FLOORED = (SMALL.replace("replicates = 2\n", "replicates = 12\n", 1)
           .replace("regret = 0.1\n", "regret = 0.1\nfloor = 0.5\n", 1))


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("harm")
    run_study(folder, FLOORED)
    return folder


def test_harm_csv_matches_a_recomputation_from_the_stored_traces(run):
    # Reference: the definitions applied with pandas to traces.parquet and worlds.csv (minimise:
    # a trial is harmful when f > floor; its shortfall is f - reference), no simlab code.
    r = run / "r"
    traces, worlds = pd.read_parquet(r / "traces.parquet"), pd.read_csv(r / "worlds.csv")
    harm = pd.read_csv(r / "harm.csv")
    best = worlds.set_index("replicate")["reference"]
    assert sorted(harm["budget"].unique()) == [4, 6] and set(harm["policy"]) == {"ei", "random"}
    for _, row in harm.iterrows():
        mine = traces[(traces["policy"] == row["policy"]) & (traces["trial"] >= 1) & (traces["trial"] <= row["budget"])]
        mine = mine.assign(harm=mine["f"] > 0.5, short=mine["f"] - best.loc[mine["replicate"]].to_numpy())
        per = mine.groupby("replicate").agg(harmful=("harm", "sum"), short=("short", "sum"),
                                            own=("harm", lambda h: int((h & ~mine.loc[h.index, "initial"]).sum())))
        assert row["replicates"] == 12 and row["floor"] == 0.5
        assert row["harmful_mean"] == pytest.approx(per["harmful"].mean(), abs=1e-12)
        assert row["own_harmful_mean"] == pytest.approx(per["own"].mean(), abs=1e-12)
        assert row["campaigns_harmed"] == int((per["harmful"] > 0).sum())
        assert row["shortfall_mean"] == pytest.approx(per["short"].mean(), abs=1e-9)
        assert row["harmful_low"] <= row["harmful_mean"] <= row["harmful_high"]


def test_report_has_the_section_the_figure_and_the_fourth_attitude(run):
    r = run / "r"
    page = (r / "report.html").read_text(encoding="utf-8")
    assert '<h3 id="harm">Harmful trials</h3>' in page and 'id="harm-caution"' in page
    assert "above the floor of 0.5" in page and "Not a safety assessment" in page
    assert 'id="fig-harm"' in page and (r / "figures" / "harm.png").is_file()
    # the least-harm sentence: every number a tagged cell of harm.csv
    sentence = page[page.index("Least harm:"):page.index("</p>", page.index("Least harm:"))]
    numbers = re.findall(r"<span class=\"v\" data-src=\"([^\"]+)\"", sentence)
    assert numbers and set(numbers) == {"harm.csv"}
    choice = pd.read_csv(r / "choice.csv")
    assert list(choice["attitude"])[-1] == "fewest harmful trials"
    assert "shared by the 4 attitudes" in page or "four attitudes" in page


def test_fresh_knows_the_harm_files(run):
    from simlab.replay.store import foreign_entries
    assert foreign_entries(run / "r", manifest=True) == []
    out = simlab("run", "s.toml", "--out", "r", "--fresh", "--quiet", cwd=run)
    assert out.returncode == 0, out.stderr
    assert (run / "r" / "harm.csv").is_file()


@pytest.mark.parametrize("bad", ['"low"', "nan", "[0.5]"])
def test_a_bad_floor_is_one_line_and_writes_nothing(tmp_path, bad):
    (tmp_path / "s.toml").write_text(FLOORED.replace("floor = 0.5", f"floor = {bad}"))
    line = one_line(simlab("run", "s.toml", "--out", "r", cwd=tmp_path))
    assert "target.floor" in line and "number" in line
    assert not (tmp_path / "r").exists()


def test_without_a_floor_there_is_no_harm_file(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL)
    assert simlab("run", "s.toml", "--out", "r", "--quiet", cwd=tmp_path).returncode == 0
    assert not (tmp_path / "r" / "harm.csv").exists()
    assert len(pd.read_csv(tmp_path / "r" / "choice.csv")) == 3
    assert np.isfinite(pd.read_csv(tmp_path / "r" / "summary.csv")["regret_median"]).all()
