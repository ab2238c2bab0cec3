"""calibrate --study and new: a complete study file that runs as written, every guess commented,
and refusals that leave nothing behind."""

import os
import re
import tempfile
import tomllib
from pathlib import Path

import pandas as pd
import pytest
from command_line import one_line, simlab

from simlab import load_study
from simlab.study.calibrate import calibrate
from simlab.study.types import StudyError
from simlab.study.template import (skeleton_text, study_name, suggest_campaign, suggest_target,
                                   write_study)

ROOT = Path(__file__).resolve().parents[2]
RUNS = ROOT / "configs" / "fermentation-runs.csv"   # invented past runs (simulated, seed 20261203)
GUESSED = ("study", "campaign", "target", "policy")  # the sections whose values the writer guesses


# --------------------------------------------------------------------------- the comment checker
_HEADER = re.compile(r"^\s*\[\[?\s*([A-Za-z0-9_.-]+)\s*\]\]?\s*(#.*)?$")
_KEY = re.compile(r"^\s*[A-Za-z0-9_\"'.-]+\s*=")


def uncommented(text, sections):
    """Key lines of the given sections that carry no comment of their own: ``[(line number, line)]``.

    A ``#`` starts a comment only where the text before it is complete TOML, so a ``#`` inside
    a quoted value (``label = "PI #2"``) is not mistaken for one.
    """
    out, section = [], None
    for number, line in enumerate(text.splitlines(), start=1):
        header = _HEADER.match(line)
        if header:
            section = header.group(1)
            continue
        if section not in sections or not _KEY.match(line):
            continue
        starts = [i for i, ch in enumerate(line) if ch == "#" and _is_toml(line[:i])]
        if not starts or not line[starts[0] + 1:].strip():
            out.append((number, line))
    return out


def _is_toml(text):
    try:
        tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return False
    return True


def test_the_comment_checker_catches_a_missing_comment():
    """Negative control: the check below must be able to fail."""
    good = '[campaign]\ninitial = 4   # guessed: 2 d\n[[policy]]\nrule = "ei"   # guessed\nlabel = "PI #2"   # any\n'
    assert uncommented(good, GUESSED) == []
    assert uncommented(good.replace("   # guessed: 2 d", ""), GUESSED) == [(2, "initial = 4")]
    # a '#' inside a string is not a comment; an empty comment says nothing
    assert uncommented(good.replace('"PI #2"   # any', '"PI #2"'), GUESSED) == [(5, 'label = "PI #2"')]
    assert uncommented(good.replace("# guessed\n", "#\n"), GUESSED) == [(4, 'rule = "ei"   #')]
    # a section not asked about is not checked
    assert uncommented("[world]\nnoise = 0.1\n", GUESSED) == []


# --------------------------------------------------------------------------- the rules
@pytest.mark.parametrize("d,initial,budgets", [(1, 2, (5, 10, 15)), (2, 4, (10, 20, 30)), (6, 12, (30, 60, 90))])
def test_campaign_follows_ten_runs_per_input(d, initial, budgets):
    # Loeppky, Sacks & Welch (2009), Technometrics 51:366, abstract (from memory): "the number of
    # runs for an effective initial computer experiment should be about 10 times the input
    # dimension". The middle budget is that n = 10 d; the others are half and 1.5 times it.
    s = suggest_campaign(d)
    assert s.budgets[1] == 10 * d
    assert s.budgets == (5 * d, 10 * d, 15 * d) == budgets
    # initial design: 2 d (a fifth of 10 d), never below d + 1, the fewest points that fix a
    # linear trend in d inputs (common practice), and leaving the policy 3 d trials of the smallest budget
    assert s.initial == initial == max(d + 1, 2 * d)
    assert s.initial >= d + 1 and min(s.budgets) - s.initial == 3 * d
    with pytest.raises(ValueError, match="dim must be a whole number >= 1; got 0"):
        suggest_campaign(0)


def test_target_is_a_tenth_of_the_amplitude_but_not_below_the_noise():
    assert suggest_target(2.0, 0.05) == 0.2        # 0.1 x amplitude dominates
    assert suggest_target(1.292, 0.2629) == 0.2629  # the noise sd dominates (the fermentation fit)
    assert suggest_target(1.0, 0.0) == 0.1
    with pytest.raises(ValueError, match="amplitude must be > 0"):
        suggest_target(0.0, 0.1)


def test_study_name_is_folder_safe():
    assert study_name("runs/my study (v2).toml") == "my-study--v2-"
    assert study_name("2026.toml") == "study-2026"   # a name starts with a letter or _ (spec.py)
    assert study_name("(x).toml") == "study--x-"


# --------------------------------------------------------------------------- calibrate --study
@pytest.fixture(scope="module")
def written(tmp_path_factory):
    folder = tmp_path_factory.mktemp("calibrated")
    out = simlab("calibrate", RUNS, "--response", "titre", "--kernel", "auto", "--goal", "maximize",
                 "--study", "ferment.toml", cwd=folder)
    assert out.returncode == 0, out.stderr
    assert "wrote ferment.toml" in out.stdout and "simlab run ferment.toml" in out.stdout
    assert "LOO" in out.stderr   # the fit table still goes to standard error
    return folder


def test_calibrated_study_holds_the_fit_and_the_suggestions(written):
    text = (written / "ferment.toml").read_text(encoding="utf-8")
    assert uncommented(text, GUESSED) == []
    data = tomllib.loads(text)
    assert set(data) == {"study", "space", "world", "campaign", "target", "policy"}
    cal = calibrate(RUNS, response="titre", kernel="auto", goal="maximize")
    # [space] and [world] are what calibrate prints for pasting (tests/integration/test_calibrate.py)
    printed = tomllib.loads(cal.toml())
    assert data["space"] == printed["space"] and data["world"] == printed["world"]
    assert data["study"]["name"] == "ferment" and data["study"]["goal"] == "maximize"
    assert data["campaign"]["initial"] == 4 and data["campaign"]["budgets"] == [10, 20, 30]   # d = 2
    w = data["world"]
    assert data["target"]["regret"] == max(0.1 * w["amplitude"], w["noise"])
    rules = [p["rule"] for p in data["policy"]]
    assert rules == ["random", "pi", "ei", "lcb", "thompson", "mes"]
    assert data["policy"][1]["margin"] == pytest.approx(0.01 * w["amplitude"], rel=0.05)   # 2 digits
    assert "Loeppky, Sacks & Welch 2009" in text and "max(0.1 x amplitude, noise sd)" in text
    # a column name is not a unit: units is left empty (the report says "objective units"), with a
    # comment naming the column and asking for its unit
    assert data["study"]["units"] == ""
    (units_line,) = [line for line in text.splitlines() if line.startswith("units =")]
    assert "TO FILL" in units_line and '"titre"' in units_line


@pytest.mark.slow
def test_calibrated_study_runs_at_8_replicates(written):
    out = simlab("run", "ferment.toml", "--replicates", "8", "--jobs", "1", "--out", "res", "--quiet", cwd=written)
    assert out.returncode == 0, out.stderr
    traces = pd.read_parquet(written / "res" / "traces.parquet")
    assert traces["policy"].nunique() == 6 and traces["replicate"].nunique() == 8
    assert (traces["regret"] >= 0).all() and (written / "res" / "report.html").is_file()


@pytest.mark.slow
def test_calibrate_history_points_at_the_data(tmp_path):
    (tmp_path / "runs.csv").write_bytes(RUNS.read_bytes())
    out = simlab("calibrate", "runs.csv", "--response", "titre", "--goal", "maximize", "--study", "go-on.toml",
                 "--history", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    text = (tmp_path / "go-on.toml").read_text(encoding="utf-8")
    assert uncommented(text, (*GUESSED, "history")) == []
    data = tomllib.loads(text)
    assert data["history"] == {"file": "runs.csv", "response": "titre"}   # relative: they move together
    assert data["campaign"]["initial"] == 0
    study = load_study(tmp_path / "go-on.toml")
    assert study.history.size == 24   # every row of the file (24 batches)
    assert one_line(simlab("calibrate", "runs.csv", "--response", "titre", "--history", cwd=tmp_path)).endswith(
        "--history needs --study NEW.toml")


# --------------------------------------------------------------------------- new
def test_new_skeleton_parses_and_every_value_is_commented(tmp_path):
    out = simlab("new", "line.toml", "--inputs", "barrel_temp,screw_speed,die_gap", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    text = (tmp_path / "line.toml").read_text(encoding="utf-8")
    # placeholders are commented too: every key of every table
    assert uncommented(text, (*GUESSED, "space", "world")) == []
    assert all("PLACEHOLDER" in line for _, line in _lines(text, ("space", "world")))
    study = load_study(tmp_path / "line.toml")
    assert study.space.names == ("barrel_temp", "screw_speed", "die_gap")
    assert study.campaign.initial == 6 and study.campaign.budgets == (15, 30, 45)   # d = 3
    assert study.target == 0.1 and len(study.policies) == 6
    assert study.units == "" and any(line.startswith('units = ""   # TO FILL') for line in text.splitlines())
    assert simlab("check", "line.toml", "--no-timing", cwd=tmp_path).returncode == 0


def _lines(text, sections):
    section = None
    for number, line in enumerate(text.splitlines(), start=1):
        if _HEADER.match(line):
            section = _HEADER.match(line).group(1)
        elif section in sections and _KEY.match(line):
            yield number, line


@pytest.mark.slow
def test_new_skeleton_runs_at_4_replicates(tmp_path):
    assert simlab("new", "plain.toml", cwd=tmp_path).returncode == 0
    out = simlab("run", "plain.toml", "--replicates", "4", "--jobs", "1", "--out", "res", "--quiet", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert pd.read_parquet(tmp_path / "res" / "traces.parquet")["replicate"].nunique() == 4


def test_new_help_has_examples(tmp_path):
    out = simlab("new", "--help", cwd=tmp_path)
    assert out.returncode == 0 and "examples:" in out.stdout and "simlab new" in out.stdout
    assert "--study NEW.toml" in simlab("calibrate", "--help", cwd=tmp_path).stdout


# --------------------------------------------------------------------------- refusals
def listing(folder):
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


@pytest.mark.slow
@pytest.mark.parametrize("command", [["new"], ["calibrate", str(RUNS), "--response", "titre", "--study"]])
def test_an_existing_file_is_refused_unless_forced(tmp_path, command):
    (tmp_path / "mine.toml").write_text("# my own study\n", encoding="utf-8")
    line = one_line(simlab(*command, "mine.toml", cwd=tmp_path))
    assert line == "simlab: error: mine.toml: already exists; give another name, or --force to replace it"
    assert (tmp_path / "mine.toml").read_text(encoding="utf-8") == "# my own study\n"
    assert listing(tmp_path) == ["mine.toml"]
    assert simlab(*command, "mine.toml", "--force", cwd=tmp_path).returncode == 0
    assert load_study(tmp_path / "mine.toml").name == "mine"


@pytest.mark.parametrize("where,says", [
    ("nowhere/s.toml", "folder nowhere does not exist"),
    ("afile/s.toml", "afile is a file, not a folder"),
    ("afolder", "must end in .toml"),
    ("afolder.toml", "is a folder"),
])
def test_a_path_that_cannot_hold_a_study_is_one_line(tmp_path, where, says):
    (tmp_path / "afile").write_text("x", encoding="utf-8")
    (tmp_path / "afolder.toml").mkdir()
    before = listing(tmp_path)
    # `calibrate --study` refuses through the same check (study.template.check_new_file), before
    # fitting; the existing-file test above runs both commands
    line = one_line(simlab("new", where, cwd=tmp_path))
    assert line.startswith(f"simlab: error: {where}: ") and says in line, line
    assert listing(tmp_path) == before


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root writes into read-only folders")
def test_an_unwritable_folder_is_one_line(tmp_path):
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o555)
    try:
        line = one_line(simlab("new", "locked/s.toml", cwd=tmp_path))
        assert "locked/s.toml: cannot be written" in line and list(locked.iterdir()) == []
    finally:
        locked.chmod(0o755)


def test_a_refused_write_leaves_nothing(tmp_path, monkeypatch):
    """The write itself failing (a read-only folder, as root cannot be refused one here; a full
    disk) is one StudyError line, with no temporary file left behind."""
    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied", str(tmp_path))
    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(StudyError) as info:
        write_study(tmp_path / "s.toml", skeleton_text(name="s"))
    assert str(info.value) == f"{tmp_path / 's.toml'}: cannot be written in {tmp_path} (Permission denied); nothing written"
    assert listing(tmp_path) == []


def test_an_invalid_input_name_is_one_line(tmp_path):
    line = one_line(simlab("new", "s.toml", "--inputs", "temp,temp", cwd=tmp_path))
    assert line == 'simlab: error: --inputs: "temp" is listed twice'
    assert "reserved column name" in one_line(simlab("new", "s.toml", "--inputs", "trial", cwd=tmp_path))
    assert listing(tmp_path) == []
