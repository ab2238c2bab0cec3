"""A study with [[stop]] rules through the command line: stopping.csv against a recomputation from
the stored traces, the page's section "When to stop" with every number its CSV cell, the files known
to --fresh, and bad [[stop]] tables refused in one line with nothing written."""

import html
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from command_line import SMALL, one_line, run_study, simlab

STOPS = """
[[stop]]
rule = "confident"
chance = 0.8
[[stop]]
rule = "no-progress"
trials = 2
[[stop]]
rule = "bound-gap"
gap = 0.4
"""
STUDY = SMALL.replace("replicates = 2\nseed", "replicates = 12\nseed").replace("budgets = [4, 6]", "budgets = [6, 12]") + STOPS


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    return run_study(tmp_path_factory.mktemp("stops"), STUDY)


def _recompute(traces, rule, setting, min_trials, horizon, target):
    """Each campaign's stop, written out here: the first trial >= min_trials where the rule holds."""
    rows = []
    for (policy, rep), g in traces[traces["trial"] >= 1].groupby(["policy", "replicate"], observed=True):
        g = g.sort_values("trial")
        t, rec = g["trial"].to_numpy(), g["rec_trial"].to_numpy()
        if rule == "confident":
            holds = g["stop_chance"].to_numpy() >= setting
        elif rule == "bound-gap":
            holds = g["stop_gap"].to_numpy() < setting
        else:                                    # no-progress: the last `setting` trials all off the recommendation
            holds = np.array([j >= setting - 1 and all(rec[w] != t[w] for w in range(j - setting + 1, j + 1))
                              for j in range(len(t))])
        hit = np.flatnonzero(holds & (t >= min_trials))
        j = hit[0] if hit.size else len(t) - 1
        regret = g["regret"].to_numpy()
        rows.append({"policy": str(policy), "trials": t[j], "fail": regret[j] > target,
                     "fail_full": regret[-1] > target})
    frame = pd.DataFrame(rows)
    return frame.groupby("policy").agg(trials_median=("trials", "median"), failure_risk=("fail", "mean"),
                                       failure_full=("fail_full", "mean"))


def test_stopping_csv_matches_a_recomputation_from_the_traces(run):
    traces = pd.read_parquet(run / "traces.parquet")
    table = pd.read_csv(run / "stopping.csv")
    assert set(table["rule"]) == {"confident", "no-progress", "bound-gap"} and len(table) == 6
    for rule, setting in (("confident", 0.8), ("no-progress", 2), ("bound-gap", 0.4)):
        want = _recompute(traces, rule, setting, min_trials=4, horizon=12, target=0.1)
        got = table[table["rule"] == rule].set_index("policy")
        for policy in want.index:
            for column in ("trials_median", "failure_risk", "failure_full"):
                assert got.at[policy, column] == pytest.approx(want.at[policy, column]), (rule, policy, column)
        assert (got["saved_median"] == 12 - got["trials_median"]).all()
    curves = pd.read_csv(run / "stopping_curves.csv")
    assert len(curves) == 6 * 12 and curves["stopped"].between(0, 1).all()


class _Spans(HTMLParser):
    def __init__(self):
        super().__init__()
        self.spans, self._open = [], None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "span" and "data-src" in a:
            self._open = [a, ""]

    def handle_data(self, data):
        if self._open is not None:
            self._open[1] += data

    def handle_endtag(self, tag):
        if tag == "span" and self._open is not None:
            self.spans.append(tuple(self._open))
            self._open = None


def test_report_has_the_section_and_its_numbers_are_stopping_csv_cells(run):
    page = (run / "report.html").read_text()
    assert re.search(r"<h2>\d+\. When to stop</h2>", page)
    section = page[page.index('id="stopping"'):page.index("</section>", page.index('id="stopping"'))]
    plain = html.unescape(re.sub(r"<[^>]+>", "", section))
    assert "could book 12 trials and stop with" in plain or "No stopping rule keeps" in plain
    assert 'id="fig-stopping"' in section
    table = pd.read_csv(run / "stopping.csv")
    parser = _Spans()
    parser.feed(section)
    checked = 0
    for attrs, text in parser.spans:
        assert attrs["data-src"] == "stopping.csv"
        cell = table.at[int(attrs["data-row"]), attrs["data-col"]]
        text = text.strip().replace("\u2212", "-")
        if "t" in attrs.get("class", "").split():
            assert text == str(cell)
            continue
        value = float(text) / (100 if attrs.get("data-unit") == "%" else 1)
        # printed to three significant digits or whole percent: within half a unit of the last digit
        digits = len(text.split(".")[1]) if "." in text else 0
        half = 0.5 * 10.0 ** -digits / (100 if attrs.get("data-unit") == "%" else 1)
        assert abs(float(cell) - value) <= half * (1 + 1e-9) + 1e-12, (attrs, text, cell)
        checked += 1
    assert checked > 40
    assert (run / "figures" / "stopping.png").is_file() and (run / "figures" / "stopping.svg").is_file()


def test_the_answer_says_in_one_sentence_whether_to_stop_early(run):
    # the opening answer names the stopping rule closest to the plan's accepted miss risk, its numbers
    # stopping.csv cells; the same row the section's first sentence uses
    page = (run / "report.html").read_text()
    answer = page[page.index('id="answer"'):page.index("</section>", page.index('id="answer"'))]
    plain = html.unescape(re.sub(r"<[^>]+>", "", answer))
    assert "(section “When to stop”)" in plain
    assert ("Stopping early with" in plain) != ("No stopping rule keeps its miss risk" in plain)
    parser = _Spans()
    parser.feed(answer)
    table = pd.read_csv(run / "stopping.csv")
    cells = [(a, t) for a, t in parser.spans if a.get("data-src") == "stopping.csv"]
    assert cells
    for attrs, text in cells:
        cell = table.at[int(attrs["data-row"]), attrs["data-col"]]
        if "t" in attrs.get("class", "").split():
            assert text.strip() == str(cell)
        elif attrs.get("data-unit") != "%":
            assert float(text.strip().replace("\u2212", "-")) == pytest.approx(float(cell), abs=0.5)


def test_rebuilding_the_report_gives_the_same_stopping_files(run):
    before = {name: (run / name).read_bytes() for name in ("stopping.csv", "stopping_curves.csv")}
    assert simlab("report", run, "--quiet", cwd=run.parent).returncode == 0
    assert {name: (run / name).read_bytes() for name in before} == before


def test_every_stopping_file_is_known_to_fresh(run):
    from simlab.replay.store import foreign_entries
    assert foreign_entries(run, manifest=True) == []


@pytest.mark.parametrize("table, field, words", [
    ('rule = "patience"', "stop[0].rule", "allowed: confident, small-gain, no-progress, bound-gap"),
    ('rule = "confident"\nchance = 1.5', "stop[0].chance", "strictly between 0 and 1; got 1.5"),
    ('rule = "no-progress"\ntrials = -2', "stop[0].trials", "must be between 1 and 100000; got -2"),
])
def test_bad_stop_tables_are_one_line_and_nothing_is_written(tmp_path, table, field, words):
    (tmp_path / "s.toml").write_text(SMALL + "\n[[stop]]\n" + table + "\n")
    line = one_line(simlab("run", "s.toml", "--out", "r", "--quiet", cwd=tmp_path))
    assert line.startswith("simlab: error: s.toml: " + field + ": "), line
    assert words in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.toml"]
