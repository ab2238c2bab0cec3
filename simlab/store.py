"""The results folder: parquet traces and the resolved study, written atomically, in resumable chunks."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import socket
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .spec import Study, StudyError, dump_study, load_study

__all__ = ["TRACES", "STUDY", "HISTORY", "MANIFEST", "PARTIAL", "WORLDS", "results_dir", "write_results",
           "read_results", "read_worlds", "atomic_write", "study_hash", "RunFolder", "FolderBusy"]

TRACES = "traces.parquet"
WORLDS = "worlds.csv"       # one row per replicate: the world's searched optimum and optimum_gap
STUDY = "study.toml"
HISTORY = "history.csv"
MANIFEST = "manifest.json"
PARTIAL = ".partial"        # finished chunks of a run still under way
LOCK = ".lock"


class FolderBusy(StudyError):
    """The results folder cannot be used as asked (busy, unfinished, or holding another study)."""


def results_dir(study: Study, out: str | os.PathLike | None = None) -> Path:
    """``out`` if given, else ``results/<study name>`` under the current directory."""
    return Path(out) if out is not None else Path("results") / study.name


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


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


def study_hash(study: Study) -> str:
    """SHA-256 of the resolved study (and its past runs): equal hashes, equal traces."""
    text = dump_study(study)
    if study.history is not None:
        text += repr((study.history.X, study.history.y))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _study_text(study: Study, version: str, history_file: str | None) -> str:
    return dump_study(study, header={"simlab version": version, "root seed": study.seed,
                                     "source": study.source}, history_file=history_file)


def write_results(path: Path, study: Study, traces: pd.DataFrame, *, version: str,
                  worlds: pd.DataFrame | None = None) -> None:
    """Write ``traces.parquet``, the resolved ``study.toml`` and (if given) ``worlds.csv``
    into ``path`` in one go; the manifest marks the folder complete last."""
    path = Path(path)
    _write_study(path, study, version)
    plain = traces.copy()
    plain.attrs = {}
    if worlds is not None:
        atomic_write(path / WORLDS, lambda p: worlds.to_csv(p, index=False))
    atomic_write(path / TRACES, lambda p: plain.to_parquet(p, index=False))
    _write_manifest(path, study, version, chunks=None, complete=True)


def _write_study(path: Path, study: Study, version: str) -> None:
    history_file = None
    if study.history is not None:
        # Keep a copy beside the traces so the folder stays readable if the original moves.
        data = Path(study.history.file).read_bytes()
        atomic_write(path / HISTORY, lambda p: p.write_bytes(data))
        history_file = HISTORY
    text = _study_text(study, version, history_file)
    atomic_write(path / STUDY, lambda p: p.write_text(text, encoding="utf-8"))


def _write_manifest(path: Path, study: Study, version: str, *, chunks, complete: bool) -> None:
    data = {"study": study.name, "study_hash": study_hash(study), "simlab_version": version,
            "replicates": study.replicates, "chunks": chunks, "complete": complete}
    atomic_write(path / MANIFEST, lambda p: p.write_text(json.dumps(data, indent=2) + "\n", encoding="utf-8"))


def _read_manifest(path: Path) -> dict | None:
    try:
        return json.loads((path / MANIFEST).read_text(encoding="utf-8"))
    except (FileNotFoundError, json.JSONDecodeError):
        return None


def read_results(path: str | os.PathLike) -> tuple[Study, pd.DataFrame]:
    """Read a finished results folder."""
    path = Path(path)
    manifest = _read_manifest(path)
    if manifest is not None and not manifest.get("complete", False):
        raise StudyError(str(path), "", "holds an unfinished run (finish it with `simlab run STUDY.toml --resume`)")
    for name in (STUDY, TRACES):
        if not (path / name).is_file():
            raise StudyError(str(path), "", f"is not a finished results folder (no {name})")
    study = load_study(path / STUDY)
    traces = pd.read_parquet(path / TRACES)
    traces["policy"] = pd.Categorical(traces["policy"].astype(str), categories=list(study.labels))
    return study, traces


def read_worlds(path: str | os.PathLike) -> pd.DataFrame | None:
    """``worlds.csv`` of a results folder (one row per replicate), or None for a folder written
    before simlab recorded it."""
    path = Path(path) / WORLDS
    return pd.read_csv(path) if path.is_file() else None


@dataclass
class RunFolder:
    """A results folder being written chunk by chunk, guarded by a lock file.

    Use as a context manager: entering takes the lock (refusing a second writer), leaving
    releases it. :meth:`prepare` decides what to do with what is already there.
    """

    path: Path
    study: Study
    version: str
    chunks: int

    def __enter__(self):
        self.path.mkdir(parents=True, exist_ok=True)
        lock = self.path / LOCK
        me = f"{socket.gethostname()} {os.getpid()}"
        for _ in range(2):
            try:
                fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                owner = lock.read_text(encoding="utf-8", errors="replace").strip() if lock.exists() else ""
                if _alive(owner):
                    raise FolderBusy(str(self.path), "", f"another simlab run ({owner or 'unknown'}) is writing "
                                     "here; wait for it to finish or choose another --out") from None
                lock.unlink(missing_ok=True)   # stale: its process is gone
                continue
            with os.fdopen(fd, "w") as f:
                f.write(me)
            return self
        raise FolderBusy(str(self.path), "", "could not take the folder's lock file (.lock)")

    def __exit__(self, *exc):
        (self.path / LOCK).unlink(missing_ok=True)
        return False

    # ------------------------------------------------------------------ states
    def prepare(self, *, resume: bool, fresh: bool) -> set[int] | None:
        """Chunks already done (resume), an empty set (start), or None (already complete).

        Raises
        ------
        FolderBusy
            When the folder holds an unfinished run and neither ``resume`` nor ``fresh``
            was asked, or holds a different study (``fresh`` overrides that too).
        """
        manifest = _read_manifest(self.path)
        mine = study_hash(self.study)
        # a sweep of the study may be run before the study itself: its folder is no obstacle
        others = [p.name for p in self.path.iterdir() if p.name not in (LOCK, "sweep")]
        if fresh:
            self._clear()
            return set()
        if manifest is None:
            if others:
                raise FolderBusy(str(self.path), "", "is not empty and holds no simlab run; "
                                 "choose another --out (or --fresh to overwrite it)")
            return set()
        if manifest.get("study_hash") != mine:
            raise FolderBusy(str(self.path), "", f"holds results of a different study (\"{manifest.get('study')}\" or "
                             "other settings); use --out for a new folder or --fresh to replace them")
        if manifest.get("complete"):
            return None
        if not resume:
            raise FolderBusy(str(self.path), "", "holds an unfinished run of this study; add --resume to "
                             "continue it or --fresh to start over")
        if manifest.get("simlab_version") != self.version:
            # campaigns replayed by another version may differ in the last digits (or more):
            # never mix them in one traces file
            raise FolderBusy(str(self.path), "", f"holds an unfinished run made by simlab "
                             f"{manifest.get('simlab_version')}, not {self.version}; use --fresh to start over")
        if manifest.get("chunks") != self.chunks:
            raise FolderBusy(str(self.path), "", "holds an unfinished run cut into different chunks "
                             "(another simlab version?); use --fresh to start over")
        return self.done()

    def _clear(self) -> None:
        for p in self.path.iterdir():
            if p.name == LOCK:
                continue
            if p.is_dir():
                shutil.rmtree(p)
            else:
                p.unlink()

    def start(self) -> None:
        """Record that a run of this study is under way (written before the first chunk)."""
        _write_study(self.path, self.study, self.version)
        _write_manifest(self.path, self.study, self.version, chunks=self.chunks, complete=False)

    def done(self) -> set[int]:
        part = self.path / PARTIAL
        if not part.is_dir():
            return set()
        return {int(p.stem.split("-")[1]) for p in part.glob("chunk-*.parquet")}

    def write_chunk(self, index: int, frame: pd.DataFrame) -> None:
        """Store a finished chunk: its worlds rows (``frame.attrs["worlds"]``) first, then its
        traces, whose file marks the chunk done, so a done chunk always has both."""
        worlds = frame.attrs.get("worlds")
        if worlds is not None:
            atomic_write(self.path / PARTIAL / f"worlds-{index:06d}.parquet",
                         lambda p: worlds.to_parquet(p, index=False))
        plain = frame.copy(deep=False)
        plain.attrs = {}
        atomic_write(self.path / PARTIAL / f"chunk-{index:06d}.parquet", lambda p: plain.to_parquet(p, index=False))

    def finish(self) -> None:
        """Join the chunks into traces.parquet (streamed: one chunk in memory at a time)."""
        import pyarrow.parquet as pq

        files = sorted((self.path / PARTIAL).glob("chunk-*.parquet"))
        if len(files) != self.chunks:
            raise RuntimeError(f"{len(files)} of {self.chunks} chunks on disk; cannot finish")

        def write(tmp):
            writer = None
            try:
                for f in files:
                    table = pq.read_table(f)
                    if writer is None:
                        writer = pq.ParquetWriter(tmp, table.schema)
                    writer.write_table(table.cast(writer.schema))
            finally:
                if writer is not None:
                    writer.close()

        worlds = sorted((self.path / PARTIAL).glob("worlds-*.parquet"))
        if len(worlds) == self.chunks:
            # chunk files sort by index, which is replicate order: the same table however the run went
            table = pd.concat([pd.read_parquet(f) for f in worlds], ignore_index=True)
            atomic_write(self.path / WORLDS, lambda p: table.to_csv(p, index=False))
        else:
            (self.path / WORLDS).unlink(missing_ok=True)   # chunks from before worlds.csv: none at all
        atomic_write(self.path / TRACES, write)
        _write_manifest(self.path, self.study, self.version, chunks=self.chunks, complete=True)
        shutil.rmtree(self.path / PARTIAL, ignore_errors=True)


def _alive(owner: str) -> bool:
    """Whether the process named in a lock file ("host pid") still runs (other hosts: assume so)."""
    try:
        host, pid = owner.rsplit(" ", 1)
        pid = int(pid)
    except ValueError:
        return False
    if host != socket.gethostname():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
