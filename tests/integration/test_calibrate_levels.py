"""calibrate over text and stepped columns: a text column is a categorical input (levels in order of
first appearance, a level correlation fitted with the rest), a whole-number column is stepped only when
--stepped names it, and the written study holds both and runs; mistakes are one line, exit 2."""

import tomllib

import numpy as np
import pytest
from command_line import one_line, simlab
from sklearn.gaussian_process.kernels import Matern

from simlab import load_study
from simlab.model.fit_levels import fit_mixed, mixed_log_likelihood
from simlab.replay.runner import replay
from simlab.study.calibrate import calibrate
from simlab.study.data import DataError
from simlab.study.spec import MIXED_RULES

SOLVENTS = ("water", "ethanol", "acetone")    # the order of first appearance in the file below


def crystal_runs(path, n=60, seed=11, rho=0.5):
    """Invented crystallisation runs: purity over cooling rate (continuous), seeding stages (1-4, whole
    numbers) and solvent (text), drawn exactly from a product prior with level correlation ``rho``."""
    rng = np.random.default_rng(seed)
    rate = np.round(rng.uniform(0.1, 2.0, n), 3)
    stages = rng.integers(1, 5, n)
    solvent = rng.integers(0, 3, n)
    solvent[:3] = [0, 1, 2]
    U = np.column_stack([(rate - 0.1) / 1.9, (stages - 1) / 3.0])
    K = Matern([0.4, 0.6], nu=2.5)(U) * np.where(solvent[:, None] == solvent[None, :], 1.0, rho)
    purity = 90 + 2.0 * np.linalg.cholesky(K + 1e-10 * np.eye(n)) @ rng.standard_normal(n) \
        + 0.2 * rng.standard_normal(n)
    lines = ["run,cooling_rate,stages,solvent,purity"]
    lines += [f"R{i:02d},{r:g},{s},{SOLVENTS[c]},{p:.3f}" for i, (r, s, c, p) in enumerate(zip(rate, stages, solvent,
                                                                                              purity))]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    f = tmp_path_factory.mktemp("levels")
    crystal_runs(f / "crystals.csv")
    return f


def test_text_column_is_categorical_and_its_correlation_is_fitted(folder):
    cal = calibrate(folder / "crystals.csv", response="purity", goal="maximize")
    sp = cal.space
    assert sp.names == ("cooling_rate", "stages", "solvent")     # "run" (a label in every row) is left out
    assert sp.kinds == ("continuous", "continuous", "categorical") and sp.levels[2] == SOLVENTS
    (rho,) = cal.prior.level_correlation
    assert -0.5 < rho < 1.0
    # the fit is simlab.model.fit_levels' on the data's unit cube, and its likelihood is the one reported
    data = np.genfromtxt(folder / "crystals.csv", delimiter=",", skip_header=1, dtype=str)
    X = data[:, 1:3].astype(float)
    U = (X - X.min(0)) / np.ptp(X, axis=0)
    lev = np.array([SOLVENTS.index(v) for v in data[:, 3]])[:, None]
    y = data[:, 4].astype(float)
    f = cal.best.fit
    assert f.log_likelihood == pytest.approx(mixed_log_likelihood(
        cal.chosen, U, lev, (3,), y, lengthscale=f.lengthscale, amplitude=f.amplitude, mean=f.mean, noise=f.noise,
        rho=f.level_correlation), rel=1e-12)
    again = fit_mixed(cal.chosen, U, lev, (3,), y, restarts=8, rng=np.random.default_rng(5))
    assert f.log_likelihood >= again.log_likelihood - 1e-6          # no better optimum from other starts
    # stages holds whole numbers only: kept continuous, and said so (no silent guess either way)
    assert any("stages holds only whole numbers" in w and "--stepped stages" in w for w in cal.warnings)
    text = cal.toml()
    assert 'solvent = { levels = ["water", "ethanol", "acetone"] }' in text
    assert tomllib.loads(text)["world"]["level_correlation"] == {"solvent": pytest.approx(rho, rel=1e-3)}
    assert "level correlation" in cal.diagnostics() and "solvent" in cal.diagnostics()


def test_written_study_holds_levels_steps_and_correlation_and_runs(folder):
    out = simlab("calibrate", "crystals.csv", "--response", "purity", "--goal", "maximize", "--stepped", "stages",
                 "--study", "seeding.toml", cwd=folder)
    assert out.returncode == 0, out.stderr
    text = (folder / "seeding.toml").read_text(encoding="utf-8")
    data = tomllib.loads(text)
    assert data["space"]["solvent"] == {"levels": list(SOLVENTS)}
    assert data["space"]["stages"] == {"low": 1.0, "high": 4.0, "step": 1.0}
    assert "smallest gap between its values, check it" in text and "order of first appearance" in text
    assert set(data["world"]["level_correlation"]) == {"solvent"}
    assert {p["rule"] for p in data["policy"]} <= set(MIXED_RULES) and "thompson" in {p["rule"] for p in data["policy"]}
    study = load_study(folder / "seeding.toml")
    assert study.space.kinds == ("continuous", "stepped", "categorical")
    assert study.world.prior.level_correlation == (data["world"]["level_correlation"]["solvent"],)
    import dataclasses
    small = dataclasses.replace(study, replicates=2, policies=study.policies[:3],
                                campaign=dataclasses.replace(study.campaign, budgets=(8,), pool=128))
    t = replay(small)
    assert set(t["solvent"]) <= set(SOLVENTS) and set(t["stages"]) <= {1.0, 2.0, 3.0, 4.0}
    assert (t["regret"] >= 0).all() and not t[["y", "f", "regret"]].isna().any().any()


def test_history_from_a_text_column_reads_back(folder):
    out = simlab("calibrate", "crystals.csv", "--response", "purity", "--stepped", "stages=1", "--study", "go-on.toml",
                 "--history", "--restarts", "2", cwd=folder)
    assert out.returncode == 0, out.stderr
    study = load_study(folder / "go-on.toml")
    assert study.history.size == 60
    X = np.array(study.history.X)
    assert set(X[:, 2]) == {0.0, 1.0, 2.0} and set(X[:, 1]) <= {1.0, 2.0, 3.0, 4.0}
    text = (folder / "go-on.toml").read_text(encoding="utf-8")
    assert "stepped as asked (--stepped): the data's range" in text and "smallest gap" not in text   # step given


@pytest.mark.parametrize("args,says", [
    (["--stepped", "depth"], 'column "depth": is not an input column'),
    (["--stepped", "solvent"], 'column "solvent": holds level names (text), not numbers'),
    # cooling rates have 3 decimals: a step of 0.001 gives 1,901 values, and the study file is refused
    (["--stepped", "cooling_rate"], "never.toml: space: 5,586 combinations of levels and stepped values"),
    (["--stepped", "stages=0.7"], 'is not on the step 0.7 from 1'),
    (["--stepped", "stages=x"], "--stepped stages=x: the step must be a number"),
    (["--inputs", "cooling_rate,run2"], 'column "run2": no such column'),
])
def test_bad_stepped_and_text_columns_are_one_line(folder, args, says):
    out = one_line(simlab("calibrate", "crystals.csv", "--response", "purity", *args, "--study", "never.toml",
                          cwd=folder))
    assert out.startswith("simlab: error: ") and says in out, out
    assert "never.toml" in says or out.startswith("simlab: error: crystals.csv: ")
    assert not (folder / "never.toml").exists()


def test_text_in_a_numeric_column_and_a_single_level_are_refused(tmp_path):
    p = tmp_path / "runs.csv"
    p.write_text("a,solvent,y\n1,water,2\n2,water,3\nthree,water,1\n4,water,5\n", encoding="utf-8")
    with pytest.raises(DataError, match=r'column "a", row 4 \(the header is row 1\): "three" is not a number'):
        calibrate(p, response="y")
    p.write_text("a,solvent,y\n1,water,2\n2,water,3\n3,water,1\n4,water,5\n5,water,2\n", encoding="utf-8")
    with pytest.raises(DataError, match=r'column "solvent": never varies \(every row is "water"\)'):
        calibrate(p, response="y", inputs=["a", "solvent"])
    # without --inputs it is left out, and the warning says why
    cal = calibrate(p, response="y")
    assert cal.space.names == ("a",) and any("left out columns with no numbers: solvent" in w for w in cal.warnings)
