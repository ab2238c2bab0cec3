"""The command line on the new space forms: a mistake or a kind not runnable yet is one line, exit 2,
nothing written; a log-scaled study runs."""

from command_line import SMALL, one_line, simlab


def test_bad_step_and_unsupported_kind_write_nothing(tmp_path):
    for text, words in [
        (SMALL.replace("dose = [0.0, 1.0]", "dose = { low = 0, high = 1, step = 0.3 }"), "space.dose.step"),
        (SMALL.replace("dose = [0.0, 1.0]", "dose = { low = 0, high = 1, step = 0.25 }"),
         "space.dose: stepped inputs are not supported yet by"),
        (SMALL.replace("dose = [0.0, 1.0]", 'dose = { levels = ["a", "b"] }').replace(
            "lengthscale = 0.2\n", "level_correlation = 0.3\n"), "space.dose: categorical inputs are not supported yet"),
    ]:
        (tmp_path / "s.toml").write_text(text, encoding="utf-8")
        for command in ("run", "check"):
            line = one_line(simlab(command, "s.toml", "--out", "res", cwd=tmp_path) if command == "run"
                            else simlab(command, "s.toml", cwd=tmp_path))
            assert line.startswith("simlab: error: s.toml: ") and words in line, line
        assert not (tmp_path / "res").exists() and not (tmp_path / "results").exists()


def test_log_study_runs_from_the_command_line(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL.replace("dose = [0.0, 1.0]", 'dose = { low = 0.1, high = 100.0, scale = "log" }'),
                                     encoding="utf-8")
    out = simlab("run", "s.toml", "--out", "res", "--quiet", "--no-report", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert 'dose = { low = 0.1, high = 100.0, scale = "log" }' in (tmp_path / "res" / "study.toml").read_text()
