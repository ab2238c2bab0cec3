"""calibrate: past runs in a CSV -> [space] and [world] that paste into a study and run."""

import tomllib
from pathlib import Path

import numpy as np
import pytest

from simlab import load_study
from simlab.study.calibrate import calibrate
from simlab.study.data import DataError
from simlab.model.fit import loo_log_predictive
from simlab.replay.runner import replay
from simlab.study.spec import parse_study

ROOT = Path(__file__).resolve().parents[2]
RUNS = ROOT / "configs" / "fermentation-runs.csv"   # invented past runs (simulated, seed 20261203)

REST = {
    "study": {"name": "pasted", "goal": "maximize", "replicates": 8, "seed": 3},
    "campaign": {"initial": 4, "budgets": [6, 8], "pool": 128},
    "target": {"regret": 0.3},
    "policy": [{"rule": "ei"}, {"rule": "random"}],
}


@pytest.fixture(scope="module")
def cal():
    return calibrate(RUNS, response="titre", kernel="auto", goal="maximize")


def test_toml_parses_and_holds_space_and_world(cal):
    data = tomllib.loads(cal.toml())
    assert set(data) == {"space", "world"}
    assert data["space"] == {"feed_rate": [0.51, 2.43], "temperature": [28.2, 36.8]}   # min..max of the file
    assert set(data["world"]) == {"kernel", "lengthscale", "amplitude", "mean", "noise"}
    assert data["world"]["kernel"] == cal.chosen
    # lengthscales are written in input units: unit-cube value x the data's span
    span = np.array([2.43 - 0.51, 36.8 - 28.2])
    np.testing.assert_allclose(data["world"]["lengthscale"], np.asarray(cal.best.fit.lengthscale) * span, rtol=1e-3)
    assert 'goal = "maximize"' in cal.toml()


def test_pasted_into_a_study_it_loads_and_runs(cal):
    data = {**tomllib.loads(cal.toml()), **REST}
    study = parse_study(data, source="pasted")
    assert study.world.prior.kernel == cal.chosen
    traces = replay(study)
    assert len(traces) == 8 * 2 * 8 and not traces[["y", "f", "regret"]].isna().any().any()
    assert (traces["regret"] >= 0).all()
    # Orientation (Monte Carlo over the 8 worlds): the world mean is in the response's own units and
    # direction, so the initial design's noise-free values centre on it. Their average over 8 worlds
    # x 4 points has sd below amplitude / sqrt(8) ~ 0.46 (points within a world are correlated);
    # 4 x that is the tolerance. A sign slip would centre them on -6.7, 13 units away.
    f0 = traces.loc[traces["initial"] & (traces["policy"] == "ei"), "f"].mean()
    assert abs(f0 - cal.prior.mean) < 4 * cal.prior.amplitude / np.sqrt(8)


def test_auto_chooses_by_leave_one_out_and_reports_all(cal):
    assert [f.kernel for f in cal.fits] == ["sqexp", "matern12", "matern32", "matern52"]
    assert cal.chosen == max(cal.fits, key=lambda f: f.loo).kernel
    # the LOO score is the closed form at the fitted hyperparameters (unit cube of the data's span)
    df_u = (np.loadtxt(RUNS, delimiter=",", skiprows=1, usecols=(1, 2, 3)))
    U = (df_u[:, :2] - df_u[:, :2].min(0)) / np.ptp(df_u[:, :2], axis=0)
    b = cal.best
    assert b.loo == pytest.approx(loo_log_predictive(b.kernel, U, df_u[:, 2], **b.fit.hyper).total)
    text = cal.diagnostics()
    for f in cal.fits:
        assert f.kernel in text
    assert "log ML" in text and "LOO" in text and f"{cal.chosen} *" in text
    assert "left out columns with no numbers: batch" in text


def test_goal_does_not_change_the_fit(cal):
    low = calibrate(RUNS, response="titre", kernel="auto", goal="minimize")
    assert low.prior == cal.prior
    assert 'goal = "maximize"' not in low.toml()
    # repeated settings with different titres are noise, not an error: the noise is fitted above its floor
    assert "noise" not in cal.best.fit.at_bound and cal.prior.noise > 0.05
    ys = np.loadtxt(RUNS, delimiter=",", skiprows=1, usecols=3)
    assert ys.min() <= cal.prior.mean <= ys.max()
    assert cal.best_value == ys.max() and low.best_value == ys.min()


def test_shipped_calibrated_study_matches_calibrate_output(cal):
    shipped = tomllib.loads((ROOT / "configs" / "fermentation-calibrated.toml").read_text(encoding="utf-8"))
    fresh = tomllib.loads(cal.toml())
    assert shipped["space"] == fresh["space"] and shipped["world"] == fresh["world"]
    study = load_study(ROOT / "configs" / "fermentation-calibrated.toml")
    assert study.goal == "maximize" and study.space.names == ("feed_rate", "temperature")


def write(tmp_path, header, rows, name="runs.csv"):
    p = tmp_path / name
    p.write_text(header + "\n" + "\n".join(",".join(f"{v:g}" for v in r) for r in rows) + "\n", encoding="utf-8")
    return p


def test_input_units_only_scale_the_lengthscales(tmp_path):
    rng = np.random.default_rng(4)
    X = rng.random((20, 2))
    y = np.sin(5 * X[:, 0]) + X[:, 1] ** 2 + 0.05 * rng.standard_normal(20)
    a = calibrate(write(tmp_path, "a,b,y", np.column_stack([X, y]), "a.csv"), response="y")
    b = calibrate(write(tmp_path, "a,b,y", np.column_stack([X[:, 0] * 1000 + 7, X[:, 1], y]), "b.csv"), response="y")
    np.testing.assert_allclose(b.prior.lengthscale, np.array(a.prior.lengthscale) * [1000, 1], rtol=1e-5)
    assert b.prior.amplitude == pytest.approx(a.prior.amplitude, rel=1e-5)


def test_warnings_say_what_the_data_cannot_tell(tmp_path):
    rng = np.random.default_rng(8)
    X = rng.random((30, 2))
    y = np.sin(5 * X[:, 0])                                  # noise-free, and b does nothing
    cal = calibrate(write(tmp_path, "a,b,y", np.column_stack([X, y])), response="y")
    text = " | ".join(cal.warnings)
    assert "lengthscale of b is at its upper bound" in text and "cannot tell it" in text
    assert "noise is at its floor" in text
    assert "lengthscale of a" not in text
    assert "# warning: lengthscale of b" in cal.toml()
    tomllib.loads(cal.toml())   # comments keep it valid TOML


def refuse(tmp_path, text, **kw):
    p = tmp_path / "runs.csv"
    p.write_text(text, encoding="utf-8")
    kw.setdefault("response", "y")
    with pytest.raises(DataError) as info:
        calibrate(p, **kw)
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(str(p) + ": ")
    return msg


def test_bad_data_one_line_errors(tmp_path):
    assert "has 3 data rows; calibrating 2 inputs needs at least 4" in refuse(
        tmp_path, "a,b,y\n1,2,3\n2,3,1\n3,1,2\n")
    assert 'column "y": is constant (every row is 5)' in refuse(
        tmp_path, "a,y\n1,5\n2,5\n3,5\n4,5\n")
    assert 'column "b": never varies (every row is 2)' in refuse(
        tmp_path, "a,b,y\n1,2,3\n2,2,1\n3,2,2\n4,2,5\n")
    assert "only 2 distinct input settings among 6 rows" in refuse(
        tmp_path, "a,y\n1,3\n1,3.2\n1,2.9\n2,1\n2,1.1\n2,0.9\n")
    assert 'column "y": is the response' in refuse(tmp_path, "a,y\n1,2\n2,3\n3,1\n", inputs=["a", "y"])
    assert 'did you mean "yield"?' in refuse(tmp_path, "a,yield\n1,2\n2,3\n3,1\n", response="yeild")
    assert 'column "temp (C)": cannot name an input in a study' in refuse(
        tmp_path, "temp (C),y\n1,2\n2,3\n3,1\n")
    assert 'column "trial": is a reserved column name' in refuse(tmp_path, "trial,y\n1,2\n2,3\n3,1\n")
    assert 'column "y", row 3 (the header is row 1): "n/a" marks a missing value' in refuse(
        tmp_path, "a,y\n1,2\n2,n/a\n3,1\n")
    assert 'has no numeric column besides the response "y"' in refuse(tmp_path, "who,y\nann,2\nraj,3\nli,1\n")


def test_bad_options_list_the_valid_names():
    with pytest.raises(ValueError, match="kernel must be one of sqexp, matern12, matern32, matern52 or auto"):
        calibrate(RUNS, response="titre", kernel="rbf")
    with pytest.raises(ValueError, match="goal must be one of minimize, maximize"):
        calibrate(RUNS, response="titre", goal="max")
