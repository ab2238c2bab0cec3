"""Safe with the user's files (issue 12): --fresh, destinations, reports, faults; each reproduction as a user meets it.

Every check here runs the command line in a subprocess unless it needs a fault that cannot be
made from outside (a permission lost part-way while running as root): those call
``simlab.cli.main`` in-process with the fault injected. Rules are `common practice` for a
command-line tool (exit 2 and one line for a user's mistake, nothing written, 128 + signal
number after a signal) and the project's own RULES.md.
"""

import os
from pathlib import Path

import pytest
from command_line import SMALL, one_line, simlab

def tree(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.read_bytes() if p.is_file() else None for p in sorted(folder.rglob("*"))}


@pytest.fixture
def small(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL)
    return tmp_path


# --------------------------------------------------------------------------- 1. --fresh
@pytest.mark.slow
def test_fresh_refuses_a_folder_holding_foreign_files(small):
    d = small / "d"
    (d / "sub").mkdir(parents=True)
    (d / "notes.txt").write_text("x")
    before = tree(d)
    line = one_line(simlab("run", "s.toml", "--out", "d", "--fresh", "--quiet", cwd=small))
    assert "notes.txt" in line and "sub/" in line and "--fresh deletes only what simlab wrote" in line
    assert tree(d) == before
    # without --fresh the refusal must not suggest --fresh (it would be refused too)
    line = one_line(simlab("run", "s.toml", "--out", "d", "--quiet", cwd=small))
    assert "notes.txt" in line and "--fresh" not in line


def test_fresh_out_dot_keeps_the_study_file_beside_it(small):
    line = one_line(simlab("run", "s.toml", "--out", ".", "--fresh", "--quiet", cwd=small))
    assert "s.toml" in line
    assert (small / "s.toml").read_text() == SMALL


@pytest.mark.slow
def test_fresh_replaces_a_simlab_run_but_not_a_file_added_to_it(small):
    assert simlab("run", "s.toml", "--out", "r", "--quiet", "--no-report", cwd=small).returncode == 0
    assert simlab("run", "s.toml", "--out", "r", "--quiet", "--no-report", "--fresh", cwd=small).returncode == 0
    (small / "r" / "my-notes.md").write_text("keep me")
    other = small / "s2.toml"
    other.write_text(SMALL.replace("seed = 1", "seed = 2"))
    line = one_line(simlab("run", "s2.toml", "--out", "r", "--quiet", cwd=small))
    assert "different study" in line and "--fresh cannot" in line and "my-notes.md" in line
    line = one_line(simlab("run", "s2.toml", "--out", "r", "--quiet", "--fresh", cwd=small))
    assert "my-notes.md" in line
    assert (small / "r" / "my-notes.md").read_text() == "keep me"
    assert (small / "r" / "traces.parquet").is_file()


@pytest.mark.slow
def test_every_file_a_run_report_and_sweep_write_is_known_to_fresh(small):
    """A new output file must be added to store.OWN_FILES (or page's names), or --fresh
    would refuse simlab's own folders."""
    from simlab.replay.store import foreign_entries
    assert simlab("sweep", "s.toml", "--out", "r", "--quiet", cwd=small).returncode == 0
    assert simlab("run", "s.toml", "--out", "r", "--quiet", cwd=small).returncode == 0
    assert (small / "r" / "sweep" / "sweep.csv").is_file() and (small / "r" / "figures").is_dir()
    assert foreign_entries(small / "r", manifest=True) == []
    (small / "r" / "figures" / "mine.png").write_bytes(b"x")          # negative control
    assert foreign_entries(small / "r", manifest=True) == ["figures/"]


# --------------------------------------------------------------------------- 2. ragged first row
# The reproduction: pandas took the extra field of the *first* data row as the row's
# index and shifted its values one column (exit 0, the traces held 0.9 for a and 7 for b).
RAGGED = "a,b,y\n0.5,0.9,7,0.4\n0.2,0.1,6.5\n0.8,0.3,7.1\n0.4,0.6,6.9\n"


def test_ragged_first_row_of_a_history_is_one_line_and_nothing_written(tmp_path):
    study = (SMALL.replace("dose = [0.0, 1.0]", "a = [0.0, 1.0]\nb = [0.0, 10.0]")
             .replace("[campaign]", '[history]\nfile = "past.csv"\nresponse = "y"\n[campaign]'))
    (tmp_path / "s.toml").write_text(study)
    (tmp_path / "past.csv").write_text(RAGGED)
    for command in (["check", "s.toml", "--no-timing"], ["run", "s.toml", "--out", "r", "--quiet"]):
        out = simlab(*command, cwd=tmp_path)
        line = one_line(out)
        assert "past.csv" in line and "row 2" in line and "4 fields but the header has 3" in line, line
        assert out.stdout == ""
    assert sorted(p.name for p in tmp_path.iterdir()) == ["past.csv", "s.toml"]
    # positive control: the same file with the stray field removed is accepted
    (tmp_path / "past.csv").write_text(RAGGED.replace("0.5,0.9,7,0.4", "0.5,0.9,7"))
    assert simlab("check", "s.toml", "--no-timing", cwd=tmp_path).returncode == 0


def test_ragged_first_row_of_a_calibration_file_is_one_line_and_prints_no_prior(tmp_path):
    rows = RAGGED + "".join(f"{i / 10},{(i * 3 % 10) / 10},{6 + i / 5}\n" for i in range(10))
    (tmp_path / "runs.csv").write_text(rows)
    out = simlab("calibrate", "runs.csv", "--response", "y", cwd=tmp_path)
    line = one_line(out)
    assert "runs.csv" in line and "row 2" in line and "4 fields but the header has 3" in line, line
    assert out.stdout == "" and sorted(p.name for p in tmp_path.iterdir()) == ["runs.csv"]
    (tmp_path / "runs.csv").write_text(rows.replace("0.5,0.9,7,0.4", "0.5,0.9,7"))   # positive control
    assert simlab("calibrate", "runs.csv", "--response", "y", cwd=tmp_path).returncode == 0


# --------------------------------------------------------------------------- 8. one line, nothing written
def test_calibration_response_of_1e308_is_one_line(tmp_path):
    rows = ["temp,y"] + [f"{20 + i},{i}" for i in range(10)] + ["31,1e308"]
    (tmp_path / "runs.csv").write_text("\n".join(rows) + "\n")
    line = one_line(simlab("calibrate", "runs.csv", "--response", "y", cwd=tmp_path))
    assert 'column "y", row 12' in line and "1e308" in line


@pytest.mark.slow
def test_a_300_character_name_leaves_no_results_folder(tmp_path):
    (tmp_path / "s.toml").write_text(SMALL.replace('name = "safe-small"', f'name = "{"n" * 300}"'))
    line = one_line(simlab("run", "s.toml", "--quiet", cwd=tmp_path))
    assert "study.name" in line and "100" in line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.toml"]


@pytest.mark.slow
def test_a_too_long_out_leaves_nothing_behind(small):
    line = one_line(simlab("run", "s.toml", "--out", "new/" + "x" * 300, "--quiet", cwd=small))
    assert "cannot be created" in line
    assert not (small / "new").exists()


@pytest.mark.slow
def test_out_an_existing_file_or_a_path_under_a_file(small):
    (small / "afile").write_text("mine")
    line = one_line(simlab("run", "s.toml", "--out", "afile", "--quiet", cwd=small))
    assert "afile" in line and "is a file" in line
    line = one_line(simlab("run", "s.toml", "--out", "afile/sub", "--quiet", cwd=small))
    assert "afile is a file" in line
    assert (small / "afile").read_text() == "mine"


def test_out_in_a_read_only_folder(small):
    """A read-only file system stops root too (permission bits do not); /sys is one in
    containers and on most Linux systems."""
    target = Path("/sys/simlab-test-out")
    try:
        target.mkdir()
    except OSError as exc:
        if exc.errno not in (30, 1, 13):   # EROFS, EPERM, EACCES
            pytest.skip(f"/sys refuses folders with {exc.strerror}, not as read-only")
    else:
        target.rmdir()
        pytest.skip("/sys is writable here; nowhere read-only to test with")
    line = one_line(simlab("run", "s.toml", "--out", target, "--quiet", cwd=small))
    assert str(target) in line and "cannot be created" in line


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders; see the test above and below")
def test_out_in_a_folder_without_write_permission(small):
    ro = small / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        line = one_line(simlab("run", "s.toml", "--out", ro / "out", "--quiet", cwd=small))
        assert "cannot be created" in line
    finally:
        ro.chmod(0o755)


def test_permission_refused_on_creating_the_folder(small, monkeypatch, capsys):
    """The same code path as a folder without write permission, for a root test runner."""
    from simlab.cli import main
    real = Path.mkdir

    def refuse(self, *args, **kwargs):
        if self.name == "ro-out":
            raise PermissionError(13, "Permission denied", str(self))
        return real(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", refuse)
    assert main(["run", str(small / "s.toml"), "--out", str(small / "ro-out"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot be created (Permission denied)" in err[0]


def test_write_permission_lost_part_way_is_one_line_and_removes_the_lock(small, monkeypatch, capsys):
    from simlab.replay import store
    from simlab.cli import main
    (small / "s.toml").write_text(SMALL.replace("replicates = 2\nseed", "replicates = 16\nseed"))
    real = store.RunFolder.write_chunk
    calls = []

    def lose(self, index, frame):
        calls.append(index)
        if len(calls) == 2:
            raise PermissionError(13, "Permission denied", str(self.path / ".partial" / "chunk.parquet"))
        return real(self, index, frame)

    monkeypatch.setattr(store.RunFolder, "write_chunk", lose)
    assert main(["run", str(small / "s.toml"), "--out", str(small / "r"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Permission denied" in err[0], err
    assert not (small / "r" / ".lock").exists()
    resumed = simlab("run", "s.toml", "--out", "r", "--resume", "--quiet", "--no-report", cwd=small)
    assert resumed.returncode == 0, resumed.stderr


@pytest.mark.parametrize("address,words", [("not-an-address", "must be a scheduler address"),
                                           ("tcp://127.0.0.1:1", "cannot reach a dask scheduler")])
def test_a_bad_cluster_is_one_line_before_anything_is_written(small, address, words):
    pytest.importorskip("distributed")
    line = one_line(simlab("run", "s.toml", "--out", "c", "--cluster", address, "--quiet", cwd=small))
    assert "--cluster" in line and words in line
    assert not (small / "c").exists()


def test_report_given_a_file_a_study_file_or_corrupt_traces(small):
    line = one_line(simlab("report", "s.toml", cwd=small))
    assert "is a study file" in line
    (small / "notes.txt").write_text("x")
    line = one_line(simlab("report", "notes.txt", cwd=small))
    assert "is a file, not a results folder" in line
    assert simlab("run", "s.toml", "--out", "r", "--quiet", "--no-report", cwd=small).returncode == 0
    (small / "r" / "traces.parquet").write_bytes(b"not parquet at all")
    line = one_line(simlab("report", "r", cwd=small))
    assert "traces.parquet" in line and "cannot be read" in line
