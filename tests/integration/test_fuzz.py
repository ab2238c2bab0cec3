"""Malformed and borderline study files, generated and collected: one-line error and exit 2, or a clean run."""

import math
import re
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from simlab.cli import main

CORPUS = Path(__file__).resolve().parents[1] / "corpus" / "studies"


def _error_line(err: str, path: Path) -> str:
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith(f"simlab: error: {path}"), lines[0]
    return lines[0]


@pytest.mark.parametrize("case", sorted(CORPUS.glob("*.toml")), ids=lambda p: p.stem)
def test_corpus_of_bad_studies(case, tmp_path, capsys):
    """Each collected bad study ends with one line naming the file and field, exit 2, nothing written."""
    expect = case.read_bytes().split(b"\n", 1)[0].decode().removeprefix("# expect: ")
    for command in (["check", str(case), "--no-timing"], ["run", str(case), "--out", str(tmp_path / "out")]):
        assert main(command) == 2
        line = _error_line(capsys.readouterr().err, case)
        assert expect in line, line
    assert not (tmp_path / "out").exists()


# --------------------------------------------------------------------------- generated studies
BASE = {
    "study": {"name": "fuzz", "replicates": 2, "seed": 1},
    "space": {"a": [0.0, 1.0], "b": [10.0, 20.0]},
    "world": {"kernel": "matern52", "lengthscale": [0.3, 3.0], "amplitude": 1.0, "mean": 0.0, "noise": 0.1},
    "campaign": {"initial": 3, "budgets": [5, 7], "pool": 64},
    "target": {"regret": 0.1},
    "policy": [{"rule": "ei"}, {"rule": "lcb", "width": 2.0}, {"rule": "random"}],
}
KEYS = [("study", "name"), ("study", "goal"), ("study", "replicates"), ("study", "seed"), ("space", "a"),
        ("space", "b"), ("space", "c"), ("world", "kernel"), ("world", "lengthscale"), ("world", "amplitude"),
        ("world", "mean"), ("world", "noise"), ("world", "method"), ("world", "features"), ("world", "lost"),
        ("world", "noise_kind"), ("world", "function"), ("campaign", "initial"), ("campaign", "budgets"),
        ("campaign", "pool"), ("campaign", "batch"), ("campaign", "design"), ("target", "regret"),
        ("belief", "lengthscale"), ("belief", "refit_every"), ("policy", 0, "rule"), ("policy", 1, "width"),
        ("policy", 2, "label"), ("policy", 0, "fill"), ("world", "typo")]
VALUES = st.one_of(
    st.none(),                                                  # delete the key
    st.integers(-5, 40), st.integers(-10**12, 10**12),
    st.floats(allow_nan=True, allow_infinity=True, width=64),
    st.floats(-1e3, 1e3), st.booleans(),
    st.text(alphabet="abcdeilmnoprstxy_ -.", max_size=8),
    st.sampled_from(["ei", "thompson", "sqexp", "grid", "lhs", "maximize", "branin", "student", "liar"]),
    st.lists(st.floats(-2.0, 30.0), max_size=3),
    st.lists(st.integers(-3, 12), max_size=3),
    st.just({}),
)
SECTIONS = st.sampled_from(["study", "space", "world", "campaign", "target", "policy"])


def _checked(path: Path, out: Path, capsys):
    """`simlab check` on a generated study: None when it is refused (one line, exit 2, and `simlab run`
    refuses it the same way and writes nothing), else what check printed."""
    code = main(["check", str(path), "--no-timing"])
    captured = capsys.readouterr()
    assert code in (0, 2)
    if code == 0:
        return captured
    _error_line(captured.err, path)
    assert main(["run", str(path), "--out", str(out), "--quiet"]) == 2
    _error_line(capsys.readouterr().err, path)
    assert not out.exists()
    return None


def _toml(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return "nan" if math.isnan(value) else ("inf" if value == math.inf else "-inf" if value == -math.inf
                                                else repr(value))
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_toml(v)}" for k, v in value.items()) + "}"
    raise TypeError(type(value))


def _document(data: dict) -> str:
    lines = []
    for section, table in data.items():
        if section in ("policy", "limit"):
            for p in table:
                lines.append(f"[[{section}]]")
                lines += [f"{k} = {_toml(v)}" for k, v in p.items()]
        else:
            lines.append(f"[{section}]")
            lines += [f'"{k}" = {_toml(v)}' for k, v in table.items()]
    return "\n".join(lines) + "\n"


def _mutate(edits, drops, base=BASE):
    import copy
    data = copy.deepcopy(base)
    data.setdefault("belief", {})
    for path, value in edits:
        table = data[path[0]]
        if path[0] in ("policy", "limit"):
            table = table[path[1]]
        key = path[-1]
        if value is None:
            table.pop(key, None)
        else:
            table[key] = value
    for section in drops:
        data.pop(section, None)
    return data


@settings(max_examples=250, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(edits=st.lists(st.tuples(st.sampled_from(KEYS), VALUES), min_size=1, max_size=3),
       drops=st.lists(SECTIONS, max_size=1))
@pytest.mark.slow
def test_generated_studies_fail_cleanly_or_run(edits, drops, tmp_path_factory, capsys):
    """Hypothesis (fixed seed, 250 examples) edits a valid study: wrong types, NaN and inf,
    negative, zero and huge numbers, empty tables, missing sections, unknown keys. Each either
    passes `simlab check` and then runs (one replicate) without NaN in the traces and with
    regret >= 0, or ends with the one-line error, exit 2, and writes nothing."""
    tmp = tmp_path_factory.mktemp("fuzz")
    path = tmp / "study.toml"
    path.write_text(_document(_mutate(edits, drops)), encoding="utf-8")
    out = tmp / "out"
    captured = _checked(path, out, capsys)
    event("refused" if captured is None else "accepted")
    if captured is None:
        return
    # valid: run it small unless the generated sizes make that slow
    budgets = re.search(r"^budgets = \[(.*)\]$", captured.out, re.M).group(1)
    horizon = max(int(v) for v in budgets.split(","))
    dim = len(re.search(r"^\[space\]\n(.*?)\n\n", captured.out, re.M | re.S).group(1).splitlines())
    pool = int(re.search(r"^pool = (\d+)$", captured.out, re.M).group(1))
    if horizon > 40 or pool > 4096 or dim > 3:
        event("accepted, too large to run here")
        return
    event("accepted and run")
    code = main(["run", str(path), "--out", str(out), "--replicates", "1", "--quiet", "--no-report"])
    err = capsys.readouterr().err
    assert code == 0, err
    assert "Traceback" not in err
    traces = pd.read_parquet(out / "traces.parquet")
    observed = traces[~traces["lost"]]
    assert not observed.isna().any().any()
    assert (traces["regret"] >= 0).all()


# A study with a limit and a failing region: edits of those tables and of the settings that go with them.
LIMITED = {**BASE,
           "world": {**BASE["world"], "fails_where": {"share": 0.2, "lengthscale": 0.3}},
           "target": {"regret": 0.1, "feasible_chance": 0.9},
           "policy": [{"rule": "ei", "feasible": "weight"}, {"rule": "thompson", "feasible": "weight"},
                      {"rule": "random"}],
           "limit": [{"name": "pressure", "below": 1.0, "lengthscale": 0.4, "amplitude": 1.0, "noise": 0.1}]}
LIMIT_KEYS = [("limit", 0, "name"), ("limit", 0, "below"), ("limit", 0, "above"), ("limit", 0, "lengthscale"),
              ("limit", 0, "amplitude"), ("limit", 0, "mean"), ("limit", 0, "noise"), ("limit", 0, "kernel"),
              ("limit", 0, "correlation"), ("limit", 0, "typo"), ("world", "fails_where"), ("target", "feasible_chance"),
              ("policy", 0, "feasible"), ("policy", 2, "feasible"), ("space", "c"), ("world", "function")]
LIMIT_VALUES = st.one_of(VALUES, st.sampled_from(["weight", "ignore", "a", "pressure", "regret"]),
                         st.fixed_dictionaries({"share": st.floats(-0.5, 1.5), "lengthscale": st.floats(-1.0, 2.0)}),
                         st.floats(-1.5, 1.5))


@settings(max_examples=80, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(edits=st.lists(st.tuples(st.sampled_from(LIMIT_KEYS), LIMIT_VALUES), min_size=1, max_size=3))
@pytest.mark.slow
def test_generated_limit_studies_fail_cleanly_or_run(edits, tmp_path_factory, capsys):
    """Hypothesis (fixed seed, 80 examples) edits a study with a [[limit]] and fails_where: names that clash,
    both or neither bound, correlations at and beyond +-1, shares outside (0, 0.9], feasible settings
    without limits or on rules without the option. Each is refused in one line (exit 2, nothing written) or
    runs one replicate with regret >= 0 and the limit columns in the traces."""
    tmp = tmp_path_factory.mktemp("fuzz-limits")
    path = tmp / "study.toml"
    path.write_text(_document(_mutate(edits, [], LIMITED)), encoding="utf-8")
    out = tmp / "out"
    if _checked(path, out, capsys) is None:
        return
    code = main(["run", str(path), "--out", str(out), "--replicates", "1", "--quiet", "--no-report"])
    err = capsys.readouterr().err
    assert code == 0, err
    traces = pd.read_parquet(out / "traces.parquet")
    assert (traces["regret"] >= 0).all() and traces["regret"].notna().all()
    assert {"failed", "breaks", "rec_breaks"} <= set(traces.columns)


@settings(max_examples=60, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=st.binary(max_size=200))
def test_arbitrary_bytes_fail_cleanly(raw, tmp_path_factory, capsys):
    path = tmp_path_factory.mktemp("bytes") / "study.toml"
    path.write_bytes(raw)
    assert main(["check", str(path), "--no-timing"]) == 2
    _error_line(capsys.readouterr().err, path)
