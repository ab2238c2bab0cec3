"""The results folder: parquet traces and the resolved study, written atomically."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import pandas as pd

from .spec import Study, StudyError, dump_study, load_study

__all__ = ["TRACES", "STUDY", "HISTORY", "results_dir", "write_results", "read_results", "atomic_write"]

TRACES = "traces.parquet"
STUDY = "study.toml"
HISTORY = "history.csv"


def results_dir(study: Study, out: str | os.PathLike | None = None) -> Path:
    """``out`` if given, else ``results/<study name>`` under the current directory."""
    return Path(out) if out is not None else Path("results") / study.name


def atomic_write(path: Path, write) -> None:
    """Call ``write(tmp_path)`` then rename over ``path``, so readers never see half a file."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        write(Path(tmp))
        # mkstemp makes owner-only files; give the result the permissions a plain open()
        # would (0666 less the umask), so results can be shared like any other file.
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_results(path: Path, study: Study, traces: pd.DataFrame, *, version: str) -> None:
    """Write ``traces.parquet`` and the resolved ``study.toml`` into ``path``."""
    history_file = None
    if study.history is not None:
        # Keep a copy beside the traces so the folder stays readable if the original moves.
        data = Path(study.history.file).read_bytes()
        atomic_write(path / HISTORY, lambda p: p.write_bytes(data))
        history_file = HISTORY
    text = dump_study(study, header={"simlab version": version, "root seed": study.seed,
                                     "source": study.source}, history_file=history_file)
    atomic_write(path / STUDY, lambda p: p.write_text(text, encoding="utf-8"))
    plain = traces.copy()
    plain.attrs = {}
    atomic_write(path / TRACES, lambda p: plain.to_parquet(p, index=False))


def read_results(path: str | os.PathLike) -> tuple[Study, pd.DataFrame]:
    """Read a results folder written by :func:`write_results`."""
    path = Path(path)
    for name in (STUDY, TRACES):
        if not (path / name).is_file():
            raise StudyError(str(path), "", f"is not a finished results folder (no {name})")
    study = load_study(path / STUDY)
    traces = pd.read_parquet(path / TRACES)
    traces["policy"] = pd.Categorical(traces["policy"].astype(str), categories=list(study.labels))
    return study, traces
