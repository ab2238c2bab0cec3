"""Honest words and limits (issue 12): reserved names, caps, warnings, estimates; each reproduction as a user meets it.

Every check here runs the command line in a subprocess unless it needs a fault that cannot be
made from outside (a permission lost part-way while running as root): those call
``simlab.cli.main`` in-process with the fault injected. Rules are `common practice` for a
command-line tool (exit 2 and one line for a user's mistake, nothing written, 128 + signal
number after a signal) and the project's own RULES.md.
"""

import re
from pathlib import Path

import pandas as pd
import pytest
from command_line import SMALL, one_line, simlab

ROOT = Path(__file__).resolve().parents[2]
@pytest.fixture
def small(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL)
    return tmp_path


# --------------------------------------------------------------------------- 3. reserved names
def test_trace_columns_are_exactly_the_reserved_names_plus_inputs():
    """Every column the runner writes (traces and worlds.csv) is refused as an input name (columns.py);
    the stopping rules' columns, written only for a study with [[stop]] rules, and the limits' columns,
    written only for a study with [[limit]]s or fails_where, are reserved too."""
    from simlab.columns import LIMIT_COLUMNS, STOP_COLUMNS, TRACE_COLUMNS, WORLD_COLUMNS
    from simlab.replay.runner import replay
    from simlab.study.spec import RESERVED, load_study
    study = load_study(ROOT / "configs" / "quick-1d.toml").with_replicates(1)
    traces = replay(study)
    assert set(traces.columns) == set(TRACE_COLUMNS) | set(study.space.names)
    assert set(RESERVED) == set(TRACE_COLUMNS) | set(STOP_COLUMNS) | set(LIMIT_COLUMNS) | set(WORLD_COLUMNS)
    assert "horizon" in RESERVED and "optimum_gap" in RESERVED


def test_calibrate_refuses_a_column_named_horizon(tmp_path):
    rows = ["horizon,temp,y"] + [f"{i / 10},{20 + i},{(i - 4) ** 2}" for i in range(10)]
    (tmp_path / "runs.csv").write_text("\n".join(rows) + "\n")
    line = one_line(simlab("calibrate", "runs.csv", "--response", "y", cwd=tmp_path))
    assert 'column "horizon"' in line and "reserved" in line


def test_readme_lists_the_reserved_names():
    from simlab.columns import TRACE_COLUMNS
    readme = (ROOT / "README.md").read_text()
    listed = re.search(r"names the traces use[^\n]*", readme)
    assert listed, "README's study reference must list the reserved input names"
    assert all(f"`{c}`" in listed.group(0) for c in TRACE_COLUMNS)


# --------------------------------------------------------------------------- 4. --replicates cap
@pytest.mark.parametrize("command", ["run", "check", "sweep", "plan"])
def test_replicates_option_has_the_study_files_cap(small, command):
    line = one_line(simlab(command, "s.toml", "--replicates", "100000000000", cwd=small))
    assert "--replicates" in line and "must be between 1 and 10000000; got 100000000000" in line
    huge = small / "h.toml"
    huge.write_text(SMALL.replace("replicates = 2\nseed", "replicates = 100000000000\nseed"))
    same = one_line(simlab("check", "h.toml", "--no-timing", cwd=small))
    assert "must be between 1 and 10000000; got 100000000000" in same
    assert not (small / "results").exists()


# --------------------------------------------------------------------------- 5. --jobs
def test_jobs_above_the_cores_warns_in_one_line(small):
    out = simlab("run", "s.toml", "--out", "r", "--jobs", "64", "--quiet", "--no-report", cwd=small)
    assert out.returncode == 0, out.stderr
    lines = [line for line in out.stderr.splitlines() if line.strip()]
    assert len(lines) == 1 and "--jobs 64" in lines[0] and "cores" in lines[0], out.stderr


def test_jobs_is_capped_at_the_number_of_chunks(monkeypatch):
    import joblib

    from simlab.replay.runner import chunk_plan, replay
    from simlab.study.spec import load_study
    study = load_study(ROOT / "configs" / "quick-1d.toml").with_replicates(3)
    asked = []
    real = joblib.Parallel

    def spy(*args, **kwargs):
        asked.append(kwargs.get("n_jobs"))
        return real(*args, **kwargs)

    monkeypatch.setattr(joblib, "Parallel", spy)
    replay(study, jobs=1000)
    assert asked == [len(chunk_plan(study))] == [3]


# --------------------------------------------------------------------------- 10. messages
def test_plan_names_only_commands_and_options_that_exist(small):
    assert simlab("run", "s.toml", "--out", "r", "--quiet", "--no-report", cwd=small).returncode == 0
    (small / "s2.toml").write_text(SMALL.replace("seed = 1", "seed = 2"))
    line = one_line(simlab("plan", "s2.toml", "--out", "r", "--quiet", cwd=small))
    assert "different study" in line and "another --out" in line
    # --fresh and --resume only inside a `simlab run ...` command, never as plan's own options
    assert "--fresh" not in line.replace("`simlab run s2.toml --out r --fresh`", "")
    manifest = small / "r" / "manifest.json"
    manifest.write_text(manifest.read_text().replace('"complete": true', '"complete": false'))
    (small / "r" / "traces.parquet").unlink()
    line = one_line(simlab("plan", "s.toml", "--out", "r", "--quiet", cwd=small))
    assert "unfinished" in line and "`simlab run s.toml --out r --resume`" in line
    assert "--fresh" not in line


def test_plan_help_prints_a_plain_percent(small):
    out = simlab("plan", "--help", cwd=small)
    assert out.returncode == 0 and "95 % range" in out.stdout and "%%" not in out.stdout


def test_resume_and_fresh_together_are_refused(small):
    line = one_line(simlab("run", "s.toml", "--resume", "--fresh", cwd=small))
    assert "--resume" in line and "--fresh" in line
    assert not (small / "results").exists()


@pytest.mark.parametrize("edit,words", [
    (("batch = 1\n", "batch = 8\n"), "campaign.batch: 8 trials per round is more than the budget 4"),
    (('rule = "ei"\n', 'rule = "ei"\nexploit_last = 5\n'), "policy[0].exploit_last: 5"),
    (("regret = 0.1", "regret = 0"), "target.regret: 0 asks for the exact optimum"),
])
def test_allowed_but_doubtful_settings_warn_in_one_line(small, edit, words):
    text = SMALL.replace("pool = 128\n", "pool = 128\nbatch = 1\n").replace(*edit)
    (small / "w.toml").write_text(text)
    out = simlab("check", "w.toml", "--no-timing", cwd=small)
    line = one_line(out, code=0)
    assert line.startswith("simlab: warning: w.toml: ") and words in line, line


# --------------------------------------------------------------------------- 11. check
def test_check_estimates_the_run_and_the_sweep(small):
    out = simlab("check", "s.toml", "--jobs", "2", cwd=small)
    assert out.returncode == 0, out.stderr
    assert re.search(r"# timing: simlab run needs about [\d.]+ (s|min|h) with --jobs 2", out.stdout), out.stdout
    assert re.search(r"# timing: simlab sweep \(2 cells x 2 replicates\) needs about [\d.]+ (s|min|h)", out.stdout), out.stdout
    assert not (small / "results").exists()


# --------------------------------------------------------------------------- 12. report and sweep words
def test_report_states_the_sweeps_own_world_count(small):
    out = simlab("sweep", "s.toml", "--out", "r", "--replicates", "3", "--quiet", cwd=small)
    assert out.returncode == 0, out.stderr
    assert "`simlab run s.toml --out r`" in out.stdout          # the hint keeps the --out it was given
    assert simlab("run", "s.toml", "--out", "r", "--quiet", cwd=small).returncode == 0
    page = (small / "r" / "report.html").read_text()
    assert (pd.read_csv(small / "r" / "sweep" / "sweep.csv")["replicates"] == 3).all()
    worlds = re.search(r"on the same (?:<span[^>]*>)?(\d+)(?:</span>)? worlds in every cell", page)
    assert worlds and worlds.group(1) == "3"


def test_up_to_date_prints_no_timing(small):
    assert simlab("run", "s.toml", "--out", "r", "--quiet", "--no-report", cwd=small).returncode == 0
    out = simlab("run", "s.toml", "--out", "r", "--quiet", "--no-report", cwd=small)
    assert out.returncode == 0 and "up to date" in out.stderr
    assert not re.search(r"policies in [\d.]+ s", out.stdout) and "nothing replayed" in out.stdout
