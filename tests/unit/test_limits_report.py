"""The report of a study with limits and hidden failures (report/limits_section.py, answer.py, outputs.py,
console.py): limits.csv written and owned, the page's subsection and its caution, the answer's sentence at
the budget to book, harmful trials without a floor, and the command line's one line. The traces are a small
replayed study's with seeded limit columns, as the runner writes them, so that every share and count is
known in advance (tests/integration/test_limits_run.py replays real constrained campaigns)."""

import re

import numpy as np
import pandas as pd
import pytest
from studies import constrained, study_with

from simlab.evidence.limits import limit_table
from simlab.replay.runner import replay
from simlab.report.console import limits_line
from simlab.report.outputs import write_outputs

BASE = {"study": {"name": "limits-report", "replicates": 40, "seed": 4},
        "space": {"die_temp": [180.0, 240.0]},
        "world": {"kernel": "matern52", "lengthscale": 15.0, "amplitude": 1.0, "mean": 80.0, "noise": 0.05},
        "campaign": {"initial": 3, "budgets": [4, 8], "pool": 128},
        "target": {"regret": 1.0},
        "policy": [{"rule": "ei", "label": "EI"}, {"rule": "random", "label": "Random"}]}
# per policy: a trial fails, a trial breaks a limit, the recommendation after a trial breaks a limit
CHANCE = {"EI": (0.05, 0.1, 0.005), "Random": (0.15, 0.3, 0.3)}


def _with_limit_columns(traces, seed):
    """Seeded flags as the runner writes them: a failed trial has no observation (y NaN, lost) and
    breaks no limit; a row whose recommendation breaks a limit gets a penalty regret (here the
    replicate's largest regret plus 1, standing in for the world's worst feasible regret)."""
    rng = np.random.default_rng(seed)
    traces = traces.copy()
    run = (traces["trial"] >= 1).to_numpy()
    fail, brk, rec = (traces["policy"].astype(str).map({p: c[i] for p, c in CHANCE.items()}).to_numpy(dtype=float)
                      for i in (0, 1, 2))
    failed = run & (rng.uniform(size=len(traces)) < fail)
    breaks = run & ~failed & (rng.uniform(size=len(traces)) < brk)
    rec_breaks = run & (rng.uniform(size=len(traces)) < rec)
    traces["failed"], traces["breaks"], traces["rec_breaks"] = failed, breaks, rec_breaks
    traces.loc[failed, "y"] = np.nan
    traces.loc[failed, "lost"] = True
    worst = traces.groupby("replicate")["regret"].transform("max") + 1.0
    traces.loc[rec_breaks, "regret"] = worst[rec_breaks]
    return traces


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    plain = study_with(BASE)
    study = constrained(plain, fails=True)
    traces = _with_limit_columns(replay(plain), seed=9)
    folder = tmp_path_factory.mktemp("limits")
    files = write_outputs(folder, study, traces)
    return study, traces, files, files.report.read_text(encoding="utf-8")


def _between(page, start, end):
    i = page.index(start)
    return page[i:page.index(end, i)]


def test_limits_csv_is_the_table_at_the_study_and_booked_budgets(written):
    study, traces, files, _ = written
    assert files.limits is not None and files.limits in files.paths()
    stored = pd.read_csv(files.limits)
    plan = pd.read_csv(files.budget_plan)
    booked = {int(b) for b in plan["budget_conservative"].dropna()}
    expect = limit_table(traces, study, budgets=sorted(set(study.campaign.budgets) | booked))
    pd.testing.assert_frame_equal(stored, expect.astype({"policy": object}), check_dtype=False)
    assert set(stored.loc[stored["study_budget"], "budget"]) == set(study.campaign.budgets)
    from simlab.replay.store import _own_names
    assert "limits.csv" in _own_names()[0]          # --fresh may delete it


def test_the_page_has_the_subsection_with_every_number_from_limits_csv(written):
    study, _, files, page = written
    assert '<h3 id="limit-breaks">Limits and failed trials</h3>' in page
    section = _between(page, '<h3 id="limit-breaks">', '<div class="caution" id="limits-caution">')
    assert "<b>viscosity below 40</b>" in section and "about 20 % of the space" in section
    spans = re.findall(r'<span class="v" data-src="([^"]+)" data-row="(\d+)" data-col="([^"]+)"', section)
    assert spans and {src for src, _, _ in spans} == {"limits.csv"}
    stored = pd.read_csv(files.limits)
    # every policy's share at each study budget is shown, and only study budgets' rows are used
    for src, row, col in spans:
        assert bool(stored.at[int(row), "study_budget"])
    shown = {(int(r), c) for _, r, c in spans}
    for i in np.flatnonzero(stored["study_budget"].to_numpy()):
        for col in ("rec_breaks_share", "breaks_mean", "failed_mean", "own_breaks_mean", "own_failed_mean"):
            assert (int(i), col) in shown
    for budget in study.campaign.budgets:
        assert f'<td colspan="6">after {budget} trials</td>' in section
    caution = _between(page, 'id="limits-caution"', "</div>")
    assert "only as good as their priors" in caution and "safety review" in caution
    # the report's own cautions stay as they were
    assert "This report comes from simulation." in page and "licensed professional practice" in page
    # what the simulation does not cover: no longer "Safety constraints are not modelled"
    assert "Safety constraints are not modelled" not in page
    assert "Only the limits stated (viscosity below 40) and a region where trials fail are modelled" in page


def test_the_answer_quotes_limits_at_the_budget_to_book(written):
    study, _, files, page = written
    answer = _between(page, '<section id="answer">', "</section>")
    sentence = _between(answer, "<b>Limits:</b>", "only as good as their priors")
    spans = re.findall(r'data-src="([^"]+)" data-row="(\d+)" data-col="([^"]+)"', sentence)
    assert {src for src, _, _ in spans} == {"limits.csv"}
    assert {c for _, _, c in spans} == {"rec_breaks_share", "rec_breaks_low", "rec_breaks_high", "breaks_mean",
                                        "breaks_low", "breaks_high", "failed_mean", "failed_low", "failed_high"}
    stored, plan = pd.read_csv(files.limits), pd.read_csv(files.budget_plan)
    choice = pd.read_csv(files.choice)
    policy = str(choice.loc[choice["attitude"] == "lowest failure risk", "leader"].iloc[0])
    conservative = plan.loc[plan["policy"] == policy, "budget_conservative"].iloc[0]
    booked = study.campaign.horizon if pd.isna(conservative) else int(conservative)
    rows = {int(r) for _, r, _ in spans}
    assert len(rows) == 1
    row = stored.iloc[rows.pop()]
    assert row["policy"] == policy and row["budget"] == booked
    # the booked budget here (5) is none of the study's: limits.csv holds a row for it all the same
    assert not row["study_budget"] and booked not in study.campaign.budgets
    assert f"at {booked} trials its recommendation breaks a limit or lies where trials fail" in sentence


def test_harmful_trials_without_a_floor(written):
    study, traces, files, page = written
    assert study.floor is None and files.harm is not None
    harm = pd.read_csv(files.harm)
    assert harm["floor"].isna().all() and (harm["counted"] == "breaks a limit or failed").all()
    section = _between(page, '<h3 id="harm">', 'id="harm-caution"')
    assert "it breaks a limit (viscosity below 40) or it fails" in section
    assert 'id="fig-harm"' in page
    choice = pd.read_csv(files.choice)
    assert list(choice["attitude"])[-1] == "fewest harmful trials"
    assert "breaks a limit or failed" in choice["criterion"].iloc[-1]


def test_the_command_line_line(written):
    study, _, files, _ = written
    line = limits_line(study, pd.read_csv(files.limits))
    assert "\n" not in line and line.startswith("limits after 8 trials")
    from simlab.report.cells import fmt_sig
    from simlab.report.console import pct_interval
    stored = pd.read_csv(files.limits)
    for row in stored[stored["budget"] == 8].itertuples():
        # the share and its Clopper-Pearson interval as the report prints them, read from limits.csv
        assert f"{row.policy} " in line
        assert pct_interval(row.rec_breaks_share, row.rec_breaks_low, row.rec_breaks_high) in line
        assert fmt_sig(row.breaks_mean) in line
    assert line.endswith("(limits.csv)")


def test_traces_without_the_columns_are_refused_and_a_plain_study_has_no_limits(tmp_path):
    plain = study_with(BASE)
    traces = replay(plain)
    with pytest.raises(ValueError, match="lacks the column.*'failed', 'breaks', 'rec_breaks'"):
        write_outputs(tmp_path / "x", constrained(plain), traces, figures=False)
    files = write_outputs(tmp_path / "y", plain, traces, figures=False)
    page = files.report.read_text(encoding="utf-8")
    assert files.limits is None and not (tmp_path / "y" / "limits.csv").exists()
    assert 'id="limit-breaks"' not in page and "<b>Limits:</b>" not in page
    assert "Safety constraints are not modelled" in page


def test_run_and_report_print_the_line_for_a_constrained_study_only(written, capsys):
    # simlab.cli._print_limits, what `simlab run` and `simlab report` call after the budget table
    from types import SimpleNamespace

    from simlab.cli import _print_limits
    study, _, files, _ = written
    _print_limits(SimpleNamespace(path=files.folder, study=study))
    out = capsys.readouterr().out
    assert out.count("\n") == 1 and out.startswith("limits after 8 trials")
    _print_limits(SimpleNamespace(path=files.folder, study=study_with(BASE)))
    assert capsys.readouterr().out == ""


def test_no_recommendation_broke_a_limit_reads_as_no_lead(written):
    """With no recommendation breaking a limit, the subsection says so (and quotes the largest upper bound)
    instead of ranking policies on a tie at 0 %."""
    from simlab.report.cells import Cells
    from simlab.report.limits_section import limits_section
    study, traces, _, _ = written
    clean = traces.copy()
    clean["rec_breaks"] = False
    table = limit_table(clean, study)
    html = limits_section(study, Cells("limits.csv", table))
    assert "no policy's recommendation broke a limit" in html and "least often" not in html
    sentence = html[html.index("no policy's recommendation"):html.index("(95 % intervals)")]
    assert 'data-col="rec_breaks_high"' in sentence      # the largest upper bound, tagged to its cell


def test_the_appendix_states_the_limits_and_hides_feasible_elsewhere(written, tmp_path):
    """The appendix lists each limit's prior and the failing region with how the campaigns model them; a study
    without limits does not show the policies' `feasible` setting (it plays no part there)."""
    study, traces, _, page = written
    appendix = page[page.index('<section id="assumptions">'):]
    assert "<h3>Limits and failures</h3>" in appendix and "viscosity below 40" in appendix
    assert "Gaussian-process classifier" in appendix and "feasible = ignore" in appendix
    plain = study_with(BASE)
    files = write_outputs(tmp_path, plain, replay(plain))
    text = files.report.read_text(encoding="utf-8")
    assert "Limits and failures" not in text and "feasible =" not in text
