"""The command line on the new space forms: a mistake or a kind not runnable yet is one line, exit 2,
nothing written; a log-scaled study runs."""

from command_line import SMALL, one_line, simlab


CATEGORICAL = SMALL.replace("dose = [0.0, 1.0]", 'dose = [0.0, 1.0]\nwashes = { low = 1, high = 4, step = 1 }\n'
                             'carrier = { levels = ["oil", "gel", "foam"] }').replace(
    "lengthscale = 0.2\n", "lengthscale = [0.2, 2.0]\nlevel_correlation = 0.3\n")


def test_bad_step_correlation_and_unsupported_refit_write_nothing(tmp_path):
    for text, words in [
        (SMALL.replace("dose = [0.0, 1.0]", "dose = { low = 0, high = 1, step = 0.3 }"), "space.dose.step"),
        (CATEGORICAL.replace("level_correlation = 0.3", "level_correlation = -0.6"), "world.level_correlation"),
        (CATEGORICAL.replace("[campaign]", "[belief]\nrefit_every = 2\n[campaign]"), "belief.refit_every"),
    ]:
        (tmp_path / "s.toml").write_text(text, encoding="utf-8")
        for command in ("run", "check"):
            line = one_line(simlab(command, "s.toml", "--out", "res", cwd=tmp_path) if command == "run"
                            else simlab(command, "s.toml", cwd=tmp_path))
            assert line.startswith("simlab: error: s.toml: ") and words in line, line
        assert not (tmp_path / "res").exists() and not (tmp_path / "results").exists()


def test_mixed_study_runs_and_traces_hold_the_users_values(tmp_path):
    import pandas as pd
    (tmp_path / "s.toml").write_text(CATEGORICAL.replace("[sweep]", "[unused]").split("[unused]")[0]
                                     + '[[policy]]\nrule = "ei"\n[[policy]]\nrule = "random"\n', encoding="utf-8")
    out = simlab("run", "s.toml", "--out", "res", "--quiet", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    traces = pd.read_parquet(tmp_path / "res" / "traces.parquet")
    assert set(traces["carrier"]) <= {"oil", "gel", "foam"} and len(set(traces["carrier"])) > 1
    assert set(traces["washes"]) <= {1.0, 2.0, 3.0, 4.0}
    assert traces["dose"].between(0.0, 1.0).all() and traces["dose"].nunique() > 8
    worlds = pd.read_csv(tmp_path / "res" / "worlds.csv")
    assert set(worlds["carrier"]) <= {"oil", "gel", "foam"}
    html = (tmp_path / "res" / "report.html").read_text(encoding="utf-8")
    assert "categorical input has one bar per allowed value" in html


def test_log_study_runs_from_the_command_line(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL.replace("dose = [0.0, 1.0]", 'dose = { low = 0.1, high = 100.0, scale = "log" }'),
                                     encoding="utf-8")
    out = simlab("run", "s.toml", "--out", "res", "--quiet", "--no-report", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert 'dose = { low = 0.1, high = 100.0, scale = "log" }' in (tmp_path / "res" / "study.toml").read_text()
