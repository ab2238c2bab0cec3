"""The answer first and the study's units: the opening paragraph of report.html against choice.csv,
budget_plan.csv and summary.csv, one line per asked budget, the unit on the page and on every regret
axis, the study dump unchanged without units, and the answer on the first screen in headless Chromium.

References: putting the conclusion first is the "bottom line up front" rule of US Army writing
(AR 25-50, Preparing and Managing Correspondence, from memory); the Clopper–Pearson interval is
checked elsewhere (tests/unit/test_coverage.py); the rest is marked common practice where used.
"""

import hashlib
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest

from simlab.replay.runner import replay
from simlab.report.outputs import write_outputs
from simlab.study.dump import dump_study
from simlab.study.spec import load_study, parse_study
from simlab.study.types import StudyError

ROOT = Path(__file__).resolve().parents[2]

# sha256 of dump_study(load_study("configs/demo.toml")) at commit 73fc4b3, before [study] units
# existed: the results folder's hash is computed from this text, so it must not change.
DEMO_DUMP_SHA256 = "14e7e4fb33ccc96a53262aa57063f025bc6f1de537b07a7edb5db09bb1096168"


def _study(*, units=None, replicates, target, seed):
    data = {
        "study": {"name": "answer-first", "replicates": replicates, "seed": seed},
        "space": {"die_temp": [180.0, 240.0]},
        "world": {"kernel": "matern52", "lengthscale": 15.0, "amplitude": 1.0, "mean": 80.0, "noise": 0.05},
        "campaign": {"initial": 3, "budgets": [5, 8], "pool": 128},
        "target": {"regret": target},
        "policy": [{"rule": "ei", "label": "EI"}, {"rule": "lcb", "label": "UCB"}, {"rule": "pi", "label": "PI"},
                   {"rule": "random", "label": "Random"}],
    }
    if units is not None:
        data["study"]["units"] = units
    return parse_study(data, source="test")


def _write(tmp_path_factory, study, name):
    folder = tmp_path_factory.mktemp(name)
    write_outputs(folder, study, replay(study))
    return folder, (folder / "report.html").read_text(encoding="utf-8")


@pytest.fixture(scope="module")
def easy(tmp_path_factory):
    """In MPa, with a target loose enough that 40 worlds give the plan a conservative end
    (Clopper–Pearson: 40/40 has lower bound 0.025**(1/40) = 0.912 > 0.9)."""
    study = _study(units="MPa", replicates=40, target=1.0, seed=5)
    return (study, *_write(tmp_path_factory, study, "easy"))


@pytest.fixture(scope="module")
def strict(tmp_path_factory):
    """No units, 12 worlds: no conservative budget can reach 90 % (0.025**(1/12) = 0.735)."""
    study = _study(replicates=12, target=0.02, seed=7)
    return (study, *_write(tmp_path_factory, study, "strict"))


class _Page(HTMLParser):
    """The page's top-level sections in order, and the tagged spans (data-src) inside each."""

    def __init__(self):
        super().__init__()
        self.order, self.spans, self.items, self.after_header = [], {}, {}, False
        self._section, self._open, self._li = None, [], None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "section":
            self._section = attrs.get("id")
            self.order.append(self._section)
        elif tag == "span":
            self._open.append([attrs, ""] if "data-src" in attrs else None)
        elif tag == "li" and self._section:
            self._li = [""]
            self.items.setdefault(self._section, []).append(self._li)
            self._li.append([])

    def handle_endtag(self, tag):
        if tag == "span" and self._open:
            item = self._open.pop()
            if item is not None:
                self.spans.setdefault(self._section, []).append((item[0], item[1].strip()))
                if self._li is not None:
                    self._li[1].append((item[0], item[1].strip()))
        elif tag == "li":
            self._li = None
        elif tag == "section":
            self._section = None

    def handle_data(self, data):
        for item in self._open:
            if item is not None:
                item[1] += data
        if self._li is not None:
            self._li[0] += data


def _parse(page):
    parser = _Page()
    parser.feed(page)
    return parser


def _answer_first(page):
    """The check: the first section after the header is the answer."""
    body = page.split("</header>", 1)[1]
    return bool(re.match(r"\s*<section id=\"answer\">", body))


def _pct(value):
    """A share as the page prints it: whole percent, one decimal strictly between 0 and 1 % or 99 and 100 %
    (common practice for shares near the ends)."""
    v = 100.0 * float(value)
    return f"{v:.1f}" if 0.0 < v < 1.0 or 99.0 < v < 100.0 else f"{v:.0f}"


def _cell(spans, src, col):
    found = [(a, t) for a, t in spans if a["data-src"] == src and a["data-col"] == col]
    assert found, (src, col)
    return found


def test_answer_is_the_first_section_and_a_moved_answer_fails(easy, strict):
    # bottom line up front (AR 25-50, from memory): the answer opens the page, right after the title
    for _, _, page in (easy, strict):
        assert _answer_first(page)
        assert _parse(page).order[0] == "answer"
    # negative control: the same page with the answer moved after the assumptions fails the check
    page = easy[2]
    answer = re.search(r'<section id="answer">.*?</section>', page, re.S).group(0)
    moved = page.replace(answer, "", 1).replace('<section id="assumptions">', answer + '<section id="assumptions">')
    assert not _answer_first(moved)
    # the order after it: choice, plan, results, ..., cautions before the appendix (common practice)
    order = _parse(page).order
    assert order.index("choice") < order.index("budget-plan") < order.index("results") < order.index("limits") \
        < order.index("cautions") < order.index("question") < order.index("assumptions")
    assert re.findall(r"<h2>(\d+)\. ", page) == [str(k) for k in range(1, len(re.findall(r"<h2>\d+\. ", page)) + 1)]


@pytest.mark.parametrize("which", ["easy", "strict"])
def test_answer_names_the_policy_budget_and_interval_of_the_csvs(which, request):
    study, folder, page = request.getfixturevalue(which)
    spans = _parse(page).spans["answer"]
    choice = pd.read_csv(folder / "choice.csv")
    plan = pd.read_csv(folder / "budget_plan.csv")
    summary = pd.read_csv(folder / "summary.csv")
    within = pd.read_csv(folder / "within_target.csv")
    row = int(choice.index[choice["attitude"] == "lowest failure risk"][0])
    leader = choice.at[row, "leader"]
    named = _cell(spans, "choice.csv", "leader")
    assert [(int(a["data-row"]), t) for a, t in named][0] == (row, leader)
    k = int(plan.index[plan["policy"] == leader][0])
    conservative = plan.at[k, "budget_conservative"]
    if which == "easy":
        assert not pd.isna(conservative)                        # this fixture is built to reach it
        (a, shown), = _cell(spans, "budget_plan.csv", "budget_conservative")
        assert int(a["data-row"]) == k and shown == str(int(conservative))
        assert f"Book {shown} trials" in re.sub(r"<[^>]+>", "", page)
        j = int(within.index[(within["policy"] == leader) & (within["trial"] == int(conservative))][0])
        for col in ("within_target", "within_low", "within_high"):
            a, shown = _cell(spans, "within_target.csv", col)[0]
            assert int(a["data-row"]) == j and shown == _pct(within.at[j, col]), col
    else:
        assert pd.isna(conservative)                            # 12 worlds cannot defend 90 %
        j = int(summary.index[(summary["policy"] == leader) & (summary["budget"] == study.campaign.horizon)][0])
        for col in ("within_target", "within_low", "within_high", "failure_risk", "failure_low", "failure_high"):
            a, shown = _cell(spans, "summary.csv", col)[0]
            assert int(a["data-row"]) == j and shown == _pct(summary.at[j, col]), col
        assert f"Book at least {study.campaign.horizon} trials" in re.sub(r"<[^>]+>", "", page)
    # the prior, and the command that checks it when no sweep was run
    assert "simlab sweep STUDY.toml" in page and "the prior" in page


@pytest.mark.parametrize("which", ["easy", "strict"])
def test_every_asked_budget_gets_its_line(which, request):
    study, folder, page = request.getfixturevalue(which)
    summary = pd.read_csv(folder / "summary.csv")
    lines = [(re.sub(r"\s+", " ", text).strip(), spans) for text, spans in _parse(page).items["answer"]]
    assert len(lines) == len(study.campaign.budgets)
    choice = pd.read_csv(folder / "choice.csv")
    leader = choice.loc[choice["attitude"] == "lowest failure risk", "leader"].iloc[0]
    for b, (text, spans) in zip(study.campaign.budgets, lines):
        j = int(summary.index[(summary["policy"] == leader) & (summary["budget"] == b)][0])
        v, lo, hi = (_pct(summary.at[j, c]) for c in ("within_target", "within_low", "within_high"))
        assert text == f"at {b} trials: {leader} ends within target in {v} % [{lo}–{hi} %] of campaigns"
        assert {int(a["data-row"]) for a, _ in spans if a["data-src"] == "summary.csv"} == {j}


def _axis_texts(svg):
    """The text matplotlib writes beside each glyph path in an SVG (fonttype "path" keeps it as comments)."""
    return re.findall(r"<!-- (.*?) -->", svg.read_text(encoding="utf-8"))


def _regret_labels_say(folder, unit):
    labels = {svg.stem: [t for t in _axis_texts(svg) if t.startswith("simple regret")]
              for svg in sorted((folder / "figures").glob("*.svg"))}
    with_regret = {stem for stem, found in labels.items() if found}
    assert {"regret", "final_regret"} <= with_regret
    return all(f"simple regret ({unit})" in found for found in labels.values() if found)


def test_units_on_every_regret_axis_and_nowhere_objective_units(easy, strict):
    # common practice: an axis label states its unit
    assert _regret_labels_say(easy[1], "MPa")
    snapshot = _axis_texts(easy[1] / "figures" / "snapshot.svg")
    assert any(t.startswith("objective, MPa") for t in snapshot)
    text = re.sub(r"<[^>]+>", " ", easy[2])
    assert "objective unit" not in text and "1 MPa" in text
    # negative control: the study without units says objective units, so the MPa check fails there
    assert not _regret_labels_say(strict[1], "MPa") and _regret_labels_say(strict[1], "objective units")
    assert "objective units" in strict[2]


# Figures with no objective value on them: the placement histograms' axes are the inputs (whose
# units the study does not state) and shares of trials; the win-rate matrix is a share of worlds.
_NO_OBJECTIVE_AXIS = {"placement", "win_rates"}


def _figures_saying(folder, unit):
    """Stems of the figures whose SVG text (axis labels, titles, legends) names `unit`."""
    return {svg.stem for svg in (folder / "figures").glob("*.svg")
            if any(unit in t for t in _axis_texts(svg))}


def test_units_on_every_figure_with_an_objective_value(easy, strict):
    # common practice: every axis or line in the objective's scale says its unit
    stems = {svg.stem for svg in (easy[1] / "figures").glob("*.svg")}
    assert {"regret", "failure_risk", "final_regret", "trials_to_target", "snapshot"} <= stems
    assert _figures_saying(easy[1], "MPa") == stems - _NO_OBJECTIVE_AXIS
    # the miss-risk and first-passage axes name the target in MPa, the regret axes their unit
    texts = {stem: _axis_texts(easy[1] / "figures" / f"{stem}.svg") for stem in stems}
    assert any("more than 1 MPa short" in t for t in texts["failure_risk"])
    assert any("1 MPa of the best" in t for t in texts["trials_to_target"])
    assert any(t == "simple regret (MPa)" for t in texts["final_regret"])
    # negative control: without units no figure says MPa, and the same figures say "objective units"
    assert _figures_saying(strict[1], "MPa") == set()
    assert _figures_saying(strict[1], "objective units") == stems - _NO_OBJECTIVE_AXIS


def test_singular_and_plural_unit_words():
    # common practice: "1 objective unit", "0.02 objective units"
    from simlab.report.cells import unit_words

    plain = _study(replicates=2, target=1.0, seed=1)
    assert unit_words(plain, 1.0) == "objective unit" and unit_words(plain, 0.02) == "objective units"
    assert unit_words(_study(units="g/L", replicates=2, target=1.0, seed=1), 1.0) == "g/L"


def test_dump_without_units_is_byte_identical_and_with_units_round_trips(tmp_path):
    text = (ROOT / "configs" / "demo.toml").read_text(encoding="utf-8")
    plain = tmp_path / "demo.toml"
    # [study] units, [target] floor and the [[stop]] tables (the last tables of the demo) came later; each
    # is dumped only when given, so without them the dump must not have changed
    text = re.sub(r"(?ms)^\[\[stop\]\].*", "", text)
    plain.write_text(re.sub(r"(?m)^(units|floor) = .*\n", "", text), encoding="utf-8")
    assert hashlib.sha256(dump_study(load_study(plain)).encode("utf-8")).hexdigest() == DEMO_DUMP_SHA256
    demo = load_study(ROOT / "configs" / "demo.toml")
    assert demo.units == "MPa"
    dumped = dump_study(demo)
    assert 'units = "MPa"' in dumped and hashlib.sha256(dumped.encode()).hexdigest() != DEMO_DUMP_SHA256
    again = tmp_path / "again.toml"
    again.write_text(dumped, encoding="utf-8")
    assert load_study(again) == demo


@pytest.mark.parametrize("bad", ["x" * 21, "MPa\n", "", " MPa", 3])
def test_bad_units_are_refused_naming_the_field(bad):
    if bad == "":
        assert _study(units="", replicates=2, target=1.0, seed=1).units == ""   # empty: the same as not given
        return
    with pytest.raises(StudyError, match="study.units"):
        _study(units=bad, replicates=2, target=1.0, seed=1)
    assert _study(units="x" * 20, replicates=2, target=1.0, seed=1).units == "x" * 20


_MEASURE = """<script>
window.addEventListener("load", () => {
  const box = document.querySelector("#answer p").getBoundingClientRect();
  const out = document.createElement("pre");
  out.id = "answer-check";
  out.textContent = "answer top=" + Math.round(box.top) + " bottom=" + Math.round(box.bottom);
  document.body.appendChild(out);
});
</script>"""


def _chromium():
    return next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome") if shutil.which(n)), None)


def _measure(binary, page, tmp_path, name):
    probe = tmp_path / f"{name}.html"
    probe.write_text(page.replace("</body>", _MEASURE + "</body>"), encoding="utf-8")
    out = subprocess.run([binary, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                          "--disable-background-networking", "--disable-component-update", "--disable-sync",
                          "--disable-dev-shm-usage", f"--user-data-dir={tmp_path / ('profile-' + name)}",
                          "--window-size=1200,900", "--virtual-time-budget=10000", "--dump-dom", probe.as_uri()],
                         capture_output=True, text=True, timeout=120, check=False)
    found = re.search(r"answer top=(-?\d+) bottom=(-?\d+)", out.stdout)
    assert found, out.stderr[-2000:]
    return int(found.group(1)), int(found.group(2))


@pytest.mark.skipif(_chromium() is None, reason="no chromium binary on this machine")
@pytest.mark.slow
def test_answer_is_on_the_first_screen_in_chromium(easy, tmp_path):
    binary = _chromium()
    top, bottom = _measure(binary, easy[2], tmp_path, "first")
    assert 0 <= top and bottom <= 900, (top, bottom)         # the first 1200 x 900 screen
    # negative control: moved after the assumptions, the same paragraph is far below the first screen
    page = easy[2]
    answer = re.search(r'<section id="answer">.*?</section>', page, re.S).group(0)
    moved = page.replace(answer, "", 1).replace("</body>", answer + "</body>")
    assert _measure(binary, moved, tmp_path, "moved")[0] > 900


def test_the_sweep_command_names_the_study_file_the_user_gave():
    # common practice: a command to copy names the user's own file, shell-quoted (shlex) when it needs it
    import dataclasses

    from simlab.report.answer import _study_file
    demo = load_study(ROOT / "configs" / "demo.toml")
    assert _study_file(demo) == str(ROOT / "configs" / "demo.toml")
    assert _study_file(dataclasses.replace(demo, source="my runs/extruder.toml")) == "'my runs/extruder.toml'"
    assert _study_file(dataclasses.replace(demo, source="<study>")) == "STUDY.toml"   # not from a file
