"""The decision files and report.html of a tiny study: numbers equal their CSV cells, self-contained, renders."""

import base64
import re
import shutil
import subprocess
from decimal import Decimal
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

import simlab
from simlab.report.outputs import report_steps, write_outputs
from simlab.replay.runner import replay
from simlab.study.spec import parse_study

TRICKY = 'EI <fast> & "bold" $x$'   # a label that must be escaped in HTML and drawn literally
TARGET = 0.05


def _study(policies=None):
    return parse_study({
        "study": {"name": "tiny-report", "replicates": 8, "seed": 3},
        "space": {"feed_rate": [0.5, 2.5]},
        "world": {"kernel": "matern52", "lengthscale": 0.5, "amplitude": 1.0, "mean": 4.0, "noise": 0.05},
        "campaign": {"initial": 3, "budgets": [5, 8], "pool": 128},
        "target": {"regret": TARGET},
        "policy": policies or [{"rule": "ei", "label": TRICKY}, {"rule": "lcb", "label": "UCB"},
                               {"rule": "random", "label": "Random"}],
    }, source="test")


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    study = _study()
    traces = replay(study)
    folder = tmp_path_factory.mktemp("results")
    steps = []
    files = write_outputs(folder, study, traces, progress=steps.append)
    return study, traces, files, steps


@pytest.fixture(scope="module")
def page(written):
    return written[2].report.read_text(encoding="utf-8")


class _Spans(HTMLParser):
    """Collects tagged spans (data-src) with their text, and every img/link/script tag."""

    def __init__(self):
        super().__init__()
        self.spans, self.tags, self._open = [], [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "span":
            self._open.append([attrs, ""] if "data-src" in attrs else None)

    def handle_endtag(self, tag):
        if tag == "span" and self._open:
            item = self._open.pop()
            if item is not None:
                self.spans.append((item[0], item[1]))

    def handle_data(self, data):
        for item in self._open:
            if item is not None:
                item[1] += data


def _parse(text):
    parser = _Spans()
    parser.feed(text)
    return parser


_NUMBER = re.compile(r"^[\u2212-]?\d+(\.\d+)?(e[+\-]\d+)?$")


def _printed(text, unit):
    """The printed number and half a unit of its last printed digit (its rounding error)."""
    plain = text.replace("\u2212", "-")
    step = Decimal(10) ** Decimal(plain).as_tuple().exponent
    value, half = float(plain), float(step) / 2
    if unit == "%":
        value, half = value / 100, half / 100
    return value, half


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------
@pytest.mark.slow
def test_files_and_their_contract_columns(written):
    _, _, files, steps = written
    for path in files.paths():
        assert path.is_file() and path.stat().st_size > 0, path
    assert {p.name for p in files.figures} == {f"{stem}.{ext}" for ext in ("png", "svg") for stem in
                                               ("regret", "failure_risk", "trials_to_target",
                                                "final_regret", "win_rates", "placement", "snapshot")}
    summary = pd.read_csv(files.summary)
    assert {"policy", "budget", "replicates", "regret_median", "regret_q25", "regret_q75", "failure_risk",
            "failure_low", "failure_high", "cvar90"} <= set(summary.columns)
    assert sorted(summary["budget"].unique()) == [5, 8]
    assert {"policy", "trial", "reached", "reached_low", "reached_high"} <= set(pd.read_csv(files.trials_to_target))
    assert {"within_target", "within_low", "within_high"} <= set(summary.columns)
    within = pd.read_csv(files.within_target)
    assert list(within.columns) == ["policy", "trial", "replicates", "campaigns_within", "within_target",
                                    "within_low", "within_high", "horizon", "horizon_aware"]
    assert pd.read_csv(files.pairwise)["budget"].eq(8).all()  # the largest budget
    # Nothing half-written is left behind, and every step reported progress.
    leftovers = [p for p in files.folder.rglob("*") if p.name.endswith(".tmp")]
    assert leftovers == []
    assert sum(steps) == report_steps()


@pytest.mark.slow
def test_failure_risk_in_summary_matches_a_naive_count(written):
    """summary.csv against a plain count from the traces (share with regret above the target)."""
    _, traces, files, _ = written
    summary = pd.read_csv(files.summary)
    for row in summary.itertuples():
        at = traces[(traces["policy"].astype(str) == row.policy) & (traces["trial"] == row.budget)]
        assert row.failure_risk == pytest.approx(float(np.mean(at["regret"].to_numpy() > TARGET)), abs=1e-15)


@pytest.mark.slow
def test_budget_figures_agree_across_files(written):
    """The plan, the within-target table and the summary give one share per (policy, budget)."""
    _, traces, files, _ = written
    within = pd.read_csv(files.within_target).set_index(["policy", "trial"])
    summary = pd.read_csv(files.summary).set_index(["policy", "budget"])
    for (policy, budget), row in summary.iterrows():
        for column in ("within_target", "within_low", "within_high"):
            assert row[column] == within.at[(policy, budget), column]
        assert row["failure_risk"] == pytest.approx(1 - row["within_target"], abs=1e-15)
    for row in pd.read_csv(files.budget_plan).itertuples():
        trial = row.budget if not pd.isna(row.budget) else row.last_trial
        cell = within.loc[(row.policy, int(trial))]
        assert (row.share, row.share_low, row.share_high) == (cell.within_target, cell.within_low, cell.within_high)
        # recomputed from the traces: the share of campaigns with regret <= target after that trial
        at = traces[(traces["policy"].astype(str) == row.policy) & (traces["trial"] == int(trial))]
        assert row.share == pytest.approx(float(np.mean(at["regret"].to_numpy() <= TARGET)), abs=1e-15)


@pytest.mark.slow
def test_a_policy_that_never_reaches_is_not_given_a_number(written, page):
    """Random never gets 90 % of campaigns to the target here: NA in the plan, words in the report."""
    files = written[2]
    plan = pd.read_csv(files.budget_plan)
    random_row = plan.index[plan["policy"] == "Random"][0]
    assert pd.isna(plan.at[random_row, "budget"])
    assert plan["budget"].notna().any()
    cells = [(a, t) for a, t in _parse(page).spans
             if a["data-src"] == "budget_plan.csv" and a["data-row"] == str(random_row) and a["data-col"] == "budget"]
    assert [t for _, t in cells] == ["not reached"]


# ---------------------------------------------------------------------------
# every number in the report is its CSV cell, rounded as printed
# ---------------------------------------------------------------------------
def _check_tagged_numbers(folder, page):
    """Every tagged number equals its CSV cell at the printed precision; returns how many were checked."""
    tables = {}
    checked, seen = 0, set()
    for attrs, text in _parse(page).spans:
        name, row, column = attrs["data-src"], int(attrs["data-row"]), attrs["data-col"]
        if name not in tables:
            tables[name] = pd.read_csv(folder / name, keep_default_na=True)
        cell = tables[name].at[row, column]
        seen.add((name, row, column))
        text = text.strip()
        if "t" in attrs.get("class", "").split():
            # text cells: labels, status and evidence, verbatim
            assert text == ("" if pd.isna(cell) else str(cell)), (name, row, column)
        elif _NUMBER.match(text):
            value, half = _printed(text, attrs.get("data-unit"))
            assert not pd.isna(cell), (name, row, column, text)
            if attrs.get("data-fmt") == "complement":
                cell = 1.0 - float(cell)   # a miss risk shown from a within-target share
            # half a unit of the last printed digit, plus float64 slack
            assert abs(float(cell) - value) <= half * (1 + 1e-9) + 1e-12, (name, row, column, text, cell)
            checked += 1
        else:
            # not a number: the CSV cell must be missing, and the words must say why
            assert pd.isna(cell), (name, row, column, text)
            assert text in ("not reached", "—") or text.startswith((">", "more than")), text
    return checked, seen


@pytest.mark.slow
def test_every_tagged_number_equals_its_csv_cell(written, page):
    files = written[2]
    checked, seen = _check_tagged_numbers(files.folder, page)
    assert checked > 100
    # Coverage: the headline cells of every row of these files are in the report.
    for name, columns in {"summary.csv": ("regret_median", "failure_risk", "failure_low", "failure_high",
                                          "within_target", "within_low", "within_high", "cvar90", "cvar90_low"),
                          "choice.csv": ("leader", "leader_value", "runner_up_value", "lead", "evidence"),
                          "budget_plan.csv": ("policy", "budget", "share", "status"),
                          "pairwise.csv": ("win_rate", "regret_p_holm", "failure_p_holm"),
                          "placement.csv": ("trials", "boundary_share", "boundary_worlds_low",
                                            "boundary_worlds_high", "corner_share", "corner_worlds_low",
                                            "corner_worlds_high")}.items():
        frame = pd.read_csv(files.folder / name)
        for row in range(len(frame)):
            for column in columns:
                if name == "choice.csv" and column == "lead":
                    continue  # shown as "Clear lead" / "Tie"
                assert (name, row, column) in seen, (name, row, column)


@pytest.mark.slow
def test_placement_file_counts_the_traces_and_its_figure_is_shown(written, page):
    """placement.csv against a plain count from the traces (own trials within 1 % of a bound's range)."""
    study, traces, files, _ = written
    placement = pd.read_csv(files.placement)
    low, high = study.space.low[0], study.space.high[0]
    for row in placement.itertuples():
        own = traces[(traces["policy"].astype(str) == row.policy) & (traces["trial"] > study.campaign.initial)]
        x = own["feed_rate"].to_numpy()
        near = np.minimum(x - low, high - x) <= 0.01 * (high - low) * (1 + 1e-9)
        assert row.trials == len(own) and row.on_boundary == int(near.sum())
        assert row.in_corner == row.on_boundary                # one input: every boundary trial is a corner
    assert 'id="fig-placement"' in page and "placement.png" in {p.name for p in files.figures}
    assert page.index("Where the policies put their trials") < page.index('id="fig-placement"')


@pytest.mark.slow
def test_choice_sentences_say_clear_or_tie(written, page):
    files = written[2]
    choice = pd.read_csv(files.choice)
    # One list item per row of choice.csv, in order; each says "Clear lead:" exactly when the row's
    # lead is "clear" and "Tie:" exactly when it is "tie" (anything else, e.g. "not reached", says neither).
    blocks = [b for b in re.findall(r'<ul class="choice">(.*?)</ul>', page, re.S) if 'data-src="choice.csv"' in b]
    assert len(blocks) == 1
    items = re.findall(r"<li>(.*?)</li>", blocks[0], re.S)
    assert len(items) == len(choice)
    for row, (lead, item) in enumerate(zip(choice["lead"], items)):
        assert f'data-src="choice.csv" data-row="{row}"' in item, row   # the sentence of this row
        assert ("Clear lead:" in item) == (lead == "clear"), (row, lead)
        assert ("Tie:" in item) == (lead == "tie"), (row, lead)
    assert {"clear", "tie"} & set(choice["lead"])   # at least one sentence carries a verdict
    assert "misses the target in" in page


# ---------------------------------------------------------------------------
# a self-contained document
# ---------------------------------------------------------------------------
@pytest.mark.slow
def test_report_is_self_contained_and_escaped(page):
    parsed = _parse(page)
    # no links, no external references at all (embedded figure data can spell "http" by chance in base64;
    # the SVGs name their XML namespaces, which are identifiers, not links)
    assert "http" not in re.sub(r"data:image/svg\+xml;base64,[A-Za-z0-9+/=]+", "", page).lower()
    assert "@import" not in page and "url(" not in page and "@font-face" not in page
    tags = [t for t, _ in parsed.tags]
    assert "script" not in tags and "link" not in tags and "iframe" not in tags
    images = [a for t, a in parsed.tags if t == "img"]
    assert len(images) == 7     # every figure of the tiny study, the placement histograms included
    for attrs in images:
        # embedded as SVG (vector: sharp in print), with no external reference of its own
        assert attrs["src"].startswith("data:image/svg+xml;base64,")
        svg = base64.b64decode(attrs["src"].split(",", 1)[1]).decode("utf-8")
        assert svg.lstrip().startswith("<?xml") and "<svg" in svg
        # a bitmap inside (a colour bar's gradient) is embedded too, never fetched
        assert all(ref.startswith("data:image/png;base64,") for ref in re.findall(r'xlink:href="([^"#][^"]*)"', svg))
        assert attrs.get("alt")
    # User strings are escaped: the label's markup never reaches the page as markup.
    assert "<fast>" not in page and "&lt;fast&gt;" in page
    assert all(t != "fast>" for t in tags)
    # Print rules
    assert "@media print" in page and "page-break-inside: avoid" in page


@pytest.mark.slow
def test_report_states_question_assumptions_and_cautions(written, page):
    study = written[0]
    text = re.sub(r"<[^>]+>", " ", page)
    text = re.sub(r"\s+", " ", text)
    for section in ("question", "assumptions", "results", "choice", "budget-plan", "limits", "cautions"):
        assert f'id="{section}"' in page
    assert "feed_rate" in text and "0.5 to 2.5" in text.replace("from 0.5 to 2.5", "0.5 to 2.5")
    assert f"root seed {study.seed}" in text and f"simlab {simlab.__version__}" in text
    assert "Matérn 5/2" in text and "8 worlds" in text
    # one trial at a time: the settings for rounds (fill, lie) play no part and are not listed; the
    # rule's own settings are (the control that the settings column is there at all)
    assert "fill =" not in text and "lie =" not in text and "left out" in text
    assert "width = 2" in text and "margin = 0" in text
    for phrase in ("The prior may be wrong", "Gaussian", "Safety constraints", "local codes and regulations",
                   "ethics review", "licensed professional practice"):
        assert phrase in text, phrase


@pytest.mark.slow
def test_rebuilding_gives_the_same_files(written, tmp_path):
    study, traces, files, _ = written
    again = write_outputs(tmp_path, study, traces)
    for name in ("summary.csv", "within_target.csv", "trials_to_target.csv", "budget_plan.csv", "pairwise.csv",
                 "choice.csv", "report.html"):
        assert (tmp_path / name).read_bytes() == (files.folder / name).read_bytes(), name
    assert again.report == tmp_path / "report.html"


@pytest.fixture
def counted_parallel(monkeypatch):
    """joblib.Parallel, noting the workers each call asks for (the report imports it when it draws);
    the workers are stopped afterwards, so that none idles on through the rest of the session."""
    import joblib

    calls = []

    class Counted(joblib.Parallel):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            calls.append(self.n_jobs)

    monkeypatch.setattr(joblib, "Parallel", Counted)
    yield calls
    from simlab.replay.workers import stop_local_workers
    stop_local_workers()


@pytest.mark.slow
def test_figures_drawn_by_two_workers_are_the_same_files(written, tmp_path, counted_parallel):
    """jobs=2 draws the figures in two worker processes: every figure file (PNG and SVG) and
    report.html are byte-identical to the serial report's, and the progress steps still add up.
    (Common practice: a parallel path checked against the serial one byte for byte.)"""
    study, traces, serial, _ = written
    steps = []
    files = write_outputs(tmp_path, study, traces, jobs=2, progress=steps.append)
    assert counted_parallel == [2, 2]   # the workers' path: their imports while the tables are made, the figures
    assert [p.name for p in files.figures] == [p.name for p in serial.figures]   # in registry order, as serial
    for ours, theirs in zip(files.figures, serial.figures):
        assert ours.read_bytes() == theirs.read_bytes(), ours.name
    assert files.report.read_bytes() == serial.report.read_bytes()
    assert sum(steps) == report_steps() and all(n >= 1 for n in steps)
    assert [p for p in tmp_path.rglob("*") if p.name.endswith(".tmp")] == []   # nothing half-written


def test_an_error_in_a_figure_worker_surfaces_as_in_serial(tmp_path, counted_parallel):
    """A figure that fails in a worker raises the same exception as one drawn here, and jobs=1 starts
    no worker (common practice). The failure: decision tables without the within-target table."""
    from simlab.report.outputs import _figure_files

    study = _study(policies=[{"rule": "ei"}, {"rule": "random"}])
    traces = replay(study)
    raised = {}
    for jobs in (1, 2):
        with pytest.raises(KeyError) as info:
            _figure_files(tmp_path / str(jobs), study, traces, {}, success=0.9, seed=0, jobs=jobs,
                          step=lambda n: None)
        raised[jobs] = (str(info.value), list(counted_parallel))
    assert raised == {1: (repr("within_target.csv"), []), 2: (repr("within_target.csv"), [2])}


@pytest.mark.slow
def test_heavier_noise_lost_trials_rounds_and_refits_are_stated(tmp_path):
    study = parse_study({
        "study": {"name": "rough-line", "replicates": 4, "seed": 9},
        "space": {"feed_rate": [0.5, 2.5]},
        "world": {"kernel": "matern32", "lengthscale": 0.5, "amplitude": 1.0, "noise": 0.1,
                  "noise_kind": "student", "noise_df": 4.0, "lost": 0.3},
        "belief": {"refit_every": 3},
        "campaign": {"initial": 2, "budgets": [6], "pool": 64, "batch": 2},
        "target": {"regret": 0.1},
        "policy": [{"rule": "ei"}, {"rule": "random"}],
    }, source="test")
    traces = replay(study)
    assert traces["lost"].any()  # the snapshot and tables must cope with trials that returned nothing
    files = write_outputs(tmp_path, study, traces)
    text = re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", files.report.read_text(encoding="utf-8")))
    for phrase in ("Student-t noise (4 degrees of freedom", "lost (budget spent, nothing observed) with probability 0.3",
                   "trials per round 2", "refitted by maximum likelihood every 3 trials",
                   "trials fail only at random", "fill = believer", "lie = min"):
        assert phrase in text, phrase   # with rounds, how a round is filled is among the settings shown
    # rounds of trials get a regret-against-round figure: its medians are the regrets at the
    # last trial of each round, recomputed here directly from the traces
    assert (tmp_path / "figures" / "regret_rounds.png").is_file() and "round of 2 trials" in text
    from simlab.report.figures import FIGURES, FigureInput
    from simlab.report.plots import policy_colors
    fig = FIGURES["regret_rounds"].draw(FigureInput(study=study, traces=traces, tables={}, success=0.9, seed=0,
                                                    colors=policy_colors(study.labels)))
    line = next(l for l in fig.axes[0].get_lines() if l.get_label() == "ei")
    ends = traces[(traces.policy == "ei") & traces.trial.isin([2, 4, 6])]
    expected = ends.groupby("trial")["regret"].median().to_numpy()
    np.testing.assert_allclose(np.asarray(line.get_ydata()), np.maximum(expected, 0.1 / 1000))
    np.testing.assert_array_equal(line.get_xdata(), [1, 2, 3])


def test_a_single_policy_gets_a_report_without_comparisons(tmp_path):
    study = _study(policies=[{"rule": "ei"}])
    files = write_outputs(tmp_path, study, replay(study), figures=False)
    assert files.pairwise is None and files.choice is None and files.figures == ()
    page = files.report.read_text(encoding="utf-8")
    assert "nothing to choose between" in page and "<img" not in page


# ---------------------------------------------------------------------------
# renders in a real browser
# ---------------------------------------------------------------------------
_CHECK = """<script>
window.addEventListener("load", function () {
  var imgs = document.images, broken = 0;
  for (var i = 0; i < imgs.length; i++) {
    if (!imgs[i].complete || imgs[i].naturalWidth === 0) { broken++; }
  }
  var out = document.createElement("pre");
  out.id = "image-check";
  out.textContent = "images=" + imgs.length + " broken=" + broken;
  document.body.appendChild(out);
});
</script>"""


def _chromium():
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _headless(binary, profile, *args, url):
    command = [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               "--disable-dev-shm-usage", f"--user-data-dir={profile}", *args, url]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)


@pytest.mark.skipif(_chromium() is None, reason="no chromium binary on this machine")
@pytest.mark.slow
def test_report_renders_in_headless_chromium_with_no_broken_image(written, page, tmp_path):
    binary = _chromium()
    # A copy with a checking script appended; the report itself carries no script.
    probe = tmp_path / "probe.html"
    probe.write_text(page.replace("</body>", _CHECK + "</body>"), encoding="utf-8")
    out = _headless(binary, tmp_path / "profile-a", "--virtual-time-budget=10000", "--dump-dom",
                    url=probe.as_uri())
    found = re.search(r"images=(\d+) broken=(\d+)", out.stdout)
    assert found, out.stderr[-2000:]
    # every figure the report wrote is an image on the page, and none is broken
    assert found.groups() == (str(page.count("<img ")), "0") and int(found.group(1)) >= 7
    # The report itself: a screenshot with ink on it, and a multi-page PDF print.
    shot, pdf = tmp_path / "report.png", tmp_path / "report.pdf"
    _headless(binary, tmp_path / "profile-b", f"--screenshot={shot}", "--window-size=1200,3000",
              url=written[2].report.as_uri())
    from PIL import Image

    pixels = np.asarray(Image.open(shot).convert("L"))
    assert pixels.shape == (3000, 1200) and (pixels < 128).mean() > 0.005
    _headless(binary, tmp_path / "profile-c", f"--print-to-pdf={pdf}", "--no-pdf-header-footer",
              url=written[2].report.as_uri())
    data = pdf.read_bytes()
    assert data[:5] == b"%PDF-" and len(re.findall(rb"/Type\s*/Page[^s]", data)) >= 3


@pytest.mark.slow
def test_sweep_section_numbers_equal_the_sweep_files(tmp_path):
    """With a misspecification sweep in the folder, the report names the safest policy and
    every number of its section equals sweep/ranking.csv (the same check as above)."""
    import dataclasses

    from simlab.api import run_sweep_study
    from simlab.study.spec import SweepSpec

    study = dataclasses.replace(_study(), sweep=SweepSpec(lengthscale=(0.5, 2.0), amplitude=(1.0,), replicates=4))
    traces = replay(study)
    run_sweep_study(study, out=tmp_path)
    files = write_outputs(tmp_path, study, traces, figures=False)
    page = files.report.read_text(encoding="utf-8")
    assert "Robustness to a wrong prior" in page
    ranking = pd.read_csv(tmp_path / "sweep" / "ranking.csv")
    import html
    assert "Safest across the grid: " in page and html.escape(str(ranking["policy"].iloc[0])) in page
    checked, seen = _check_tagged_numbers(tmp_path, page)
    assert {("sweep/ranking.csv", r, "worst_failure_risk") for r in range(len(ranking))} <= seen


def test_horizon_aware_policy_plan_uses_the_campaign_planned_for_each_budget(tmp_path):
    """A rule that exploits its last trials is replayed per budget; the plan says which campaign it read."""
    study = parse_study({
        "study": {"name": "planned-ahead", "replicates": 6, "seed": 4},
        "space": {"dose": [0.0, 1.0]},
        "world": {"lengthscale": 0.2, "amplitude": 1.0, "noise": 0.05},
        "campaign": {"initial": 2, "budgets": [4, 6], "pool": 64},
        "target": {"regret": 0.2},
        "policy": [{"rule": "ei", "label": "EI last", "exploit_last": 1}, {"rule": "random"}],
    }, source="test")
    traces = replay(study)
    files = write_outputs(tmp_path, study, traces, figures=False, success=0.5)
    within = pd.read_csv(files.within_target)
    aware = within[within["policy"] == "EI last"]
    assert list(aware["horizon"]) == [4, 4, 4, 4, 6, 6] and aware["horizon_aware"].all()
    assert not within.loc[within["policy"] == "random", "horizon_aware"].any()
    # the share at each study budget is that of the rows of the campaign planned for it
    for b in (4, 6):
        rows = traces[(traces["policy"] == "EI last") & (traces["trial"] == b)]
        assert (rows["horizon"] == b).all()
        assert aware.set_index("trial").at[b, "within_target"] == pytest.approx(float((rows["regret"] <= 0.2).mean()))
    text = re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", files.report.read_text(encoding="utf-8")))
    assert "EI last plans ahead for the budget" in text and "stopped early" in text
