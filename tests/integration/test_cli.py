"""The command line as a user meets it: exit codes, one-line errors, nothing written on bad input."""

from pathlib import Path

import pandas as pd
import pytest
from command_line import simlab

ROOT = Path(__file__).resolve().parents[2]
SMALL = """
[study]
name = "cli-small"
replicates = 2
seed = 1
[space]
dose = [0.0, 1.0]
[world]
lengthscale = 0.2
amplitude = 1.0
noise = 0.05
[campaign]
initial = 2
budgets = [4, 6]
pool = 128
[target]
regret = 0.1
[[policy]]
rule = "ei"
[[policy]]
rule = "random"
"""


@pytest.mark.parametrize("command", [[], ["run"], ["check"], ["report"]])
def test_help_has_examples(tmp_path, command):
    out = simlab(*command, "--help", cwd=tmp_path)
    assert out.returncode == 0
    assert "example" in out.stdout or command == []


def test_the_cli_module_runs_as_the_package_does(tmp_path):
    """`python -m simlab.cli` is the same command as `python -m simlab` (it printed nothing before)."""
    import subprocess
    import sys

    module = subprocess.run([sys.executable, "-m", "simlab.cli", "--version"], cwd=tmp_path, capture_output=True,
                            text=True, timeout=60)
    package = simlab("--version", cwd=tmp_path)
    assert module.returncode == package.returncode == 0
    assert module.stdout == package.stdout and module.stdout.startswith("simlab ")
    assert "Warning" not in module.stderr


@pytest.mark.parametrize("text,field", [
    (SMALL.replace("noise = 0.05", "noise = -0.05"), "world.noise"),
    (SMALL.replace("dose = [0.0, 1.0]", "dose = [1.0, 0.0]"), "space.dose"),
    (SMALL.replace("[space]\ndose = [0.0, 1.0]", "[space]"), "space"),
    (SMALL.replace('rule = "random"', 'rule = "randm"'), 'did you mean "random"'),
    ("[study\n", "not valid TOML"),
])
@pytest.mark.slow
def test_bad_study_one_line_exit_2_nothing_written(tmp_path, text, field):
    (tmp_path / "s.toml").write_text(text)
    before = sorted(p.name for p in tmp_path.iterdir())
    for cmd in ("run", "check"):
        out = simlab(cmd, "s.toml", cwd=tmp_path)
        assert out.returncode == 2, out.stderr
        lines = out.stderr.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in out.stderr, out.stderr
        assert "s.toml" in lines[0] and field in lines[0], lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == before


@pytest.mark.parametrize("args", [["--jobs", "0"], ["--replicates", "-3"], ["--replicates", "x"]])
def test_bad_options_exit_2(tmp_path, args):
    (tmp_path / "s.toml").write_text(SMALL)
    out = simlab("run", "s.toml", *args, cwd=tmp_path)
    assert out.returncode == 2 and len(out.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "results").exists()


@pytest.mark.slow
def test_missing_file_and_missing_results(tmp_path):
    out = simlab("run", "nope.toml", cwd=tmp_path)
    assert out.returncode == 2 and "nope.toml: no such file" in out.stderr
    out = simlab("report", tmp_path, cwd=tmp_path)
    assert out.returncode == 2 and "not a finished results folder" in out.stderr


@pytest.mark.slow
def test_run_check_report(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL)
    out = simlab("check", "s.toml", cwd=tmp_path)
    assert out.returncode == 0 and "# work: 2 replicates x 2 policies" in out.stdout
    assert not (tmp_path / "results").exists()
    out = simlab("run", "s.toml", "--quiet", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    folder = tmp_path / "results" / "cli-small"
    traces = pd.read_parquet(folder / "traces.parquet")
    assert len(traces) == 2 * 2 * 6
    # the printed table's EI row at budget 6 shows the median of the stored regrets
    med = traces[(traces.policy == "ei") & (traces.trial == 6)]["regret"].median()
    assert any(line.startswith("ei") and f"{med:.3g}" in line for line in out.stdout.splitlines())
    again = simlab("report", folder, cwd=tmp_path)
    assert again.returncode == 0 and f"{med:.3g}" in again.stdout
    # the figures again, drawn by two worker processes: the same files byte for byte (common practice)
    figures = {p.name: p.read_bytes() for p in (folder / "figures").iterdir()}
    page = (folder / "report.html").read_bytes()
    twice = simlab("report", folder, "--jobs", "2", "--quiet", cwd=tmp_path)
    assert twice.returncode == 0 and twice.stdout == again.stdout, twice.stderr
    assert "Traceback" not in twice.stderr and "Warning" not in twice.stderr, twice.stderr   # nothing from the workers
    assert {p.name: p.read_bytes() for p in (folder / "figures").iterdir()} == figures
    assert (folder / "report.html").read_bytes() == page


@pytest.mark.slow
def test_plan_and_printed_table_show_the_shares_of_the_files(tmp_path):
    """`simlab plan` and the run's table print the within-target share of budget_plan.csv / summary.csv."""
    import re

    (tmp_path / "s.toml").write_text(SMALL.replace("replicates = 2", "replicates = 6"))
    run = simlab("run", "s.toml", "--quiet", cwd=tmp_path)
    assert run.returncode == 0, run.stderr
    folder = tmp_path / "results" / "cli-small"
    out = simlab("plan", "s.toml", "--success", "0.5", "--quiet", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert "using stored results" in out.stderr
    traces = pd.read_parquet(folder / "traces.parquet")

    def pct(v):  # the report's percentage format (simlab.report.cells.fmt_pct), written out again
        v = 100 * float(v)
        return f"{v:.1f}" if (0 < v < 1 or 99 < v < 100) else f"{v:.0f}"

    def share(policy, trial):
        at = traces[(traces["policy"] == policy) & (traces["trial"] == trial)]["regret"]
        return float((at <= 0.1).mean())  # the study's target

    lines = {line.split()[0]: line for line in out.stdout.splitlines() if line.startswith(("ei ", "random "))}
    assert set(lines) == {"ei", "random"}
    for policy, line in lines.items():
        shares = [share(policy, t) for t in range(1, 7)]
        first = next((t for t, s in enumerate(shares, start=1) if s >= 0.5), None)
        if first is None:
            assert "not reached within 6 trials" in line and f"{pct(shares[-1])} %" in line
        else:
            assert re.match(rf"^{policy} +{first} ", line), line
            assert f"{pct(shares[first - 1])} % [" in line
    summary = pd.read_csv(folder / "summary.csv")
    for row in summary.itertuples():
        printed = f"{pct(row.within_target)} % [{pct(row.within_low)}-{pct(row.within_high)} %]"
        assert row.within_target == share(row.policy, row.budget)
        assert any(line.startswith(row.policy) and f" {row.budget} " in line and line.endswith(printed)
                   for line in run.stdout.splitlines()), printed
