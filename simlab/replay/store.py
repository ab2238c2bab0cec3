"""The results folder: parquet traces and the resolved study, written atomically, in resumable chunks."""

from __future__ import annotations

import errno
import fcntl
import hashlib
import json
import os
import shutil
import socket
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ..study.dump import dump_study
from ..study.spec import Study, StudyError, load_study

__all__ = ["TRACES", "STUDY", "HISTORY", "MANIFEST", "PARTIAL", "WORLDS", "OWN_FILES", "results_dir", "write_results",
           "read_results", "read_worlds", "atomic_write", "study_hash", "RunFolder", "FolderBusy", "make_folder",
           "foreign_entries"]

TRACES = "traces.parquet"
WORLDS = "worlds.csv"       # one row per replicate: the world's searched optimum and optimum_gap
STUDY = "study.toml"
HISTORY = "history.csv"
MANIFEST = "manifest.json"
PARTIAL = ".partial"        # finished chunks of a run still under way
LOCK = ".lock"
# Files a run writes at the top of its folder besides the report's (names from page.py, read
# in _own_names): --fresh deletes only these, and only in a folder holding a simlab manifest.
# A new file written by simlab belongs here (tests/integration/test_safety_files.py checks a full run).
OWN_FILES = (TRACES, WORLDS, STUDY, HISTORY, MANIFEST, LOCK)
SWEEP = "sweep"
_SWEEP_FILES = ("sweep.csv", "ranking.csv", "heatmap.png", "heatmap.svg")


class FolderBusy(StudyError):
    """The results folder cannot be used as asked (busy, unfinished, or holding another study).

    ``kind`` says why (busy, foreign, foreign-fresh, other-study, unfinished, version, chunks)
    and ``fresh_ok`` whether ``--fresh`` would be allowed, so callers can word their own advice.
    """

    def __init__(self, file: str, field: str, message: str, *, kind: str = "busy", fresh_ok: bool = False):
        super().__init__(file, field, message)
        self.kind, self.fresh_ok = kind, fresh_ok


def _own_names() -> tuple[set[str], dict[str, object]]:
    """Top-level files and sub-folders (with a test for their entries) that simlab writes."""
    from ..report import files as report_files
    from ..report.figures import FIGURES as FIGURE_REGISTRY
    files = set(OWN_FILES) | set(report_files.TABLES)
    figures = {f"{stem}.{ext}" for stem in FIGURE_REGISTRY for ext in report_files.FIGURE_FORMATS}
    folders = {
        PARTIAL: lambda n: n.startswith(("chunk-", "worlds-")) and n.endswith(".parquet"),
        report_files.FIGURES: lambda n: n in figures,
        SWEEP: lambda n: n in _SWEEP_FILES,
    }
    return files, folders


def _tmp_target(name: str) -> str | None:
    """The file a temporary of :func:`atomic_write` (``.NAME.xxxx.tmp``) was for, or None."""
    if not (name.startswith(".") and name.endswith(".tmp")):
        return None
    target = name[1:-4].rsplit(".", 1)[0]
    return target or None


def foreign_entries(path: Path, *, manifest: bool) -> list[str]:
    """Entries of ``path`` that simlab did not write (``name/`` for folders), sorted.

    Without a simlab manifest only a sweep folder (``sweep/``, which ``simlab sweep`` may
    write before the study runs) and the lock count as simlab's.
    """
    files, folders = _own_names()
    if not manifest:
        files, folders = {LOCK}, {SWEEP: folders[SWEEP]}

    def own_file(p: Path, ok) -> bool:
        return p.is_file() and not p.is_symlink() and (ok(p.name) or ok(_tmp_target(p.name) or ""))

    out = []
    for p in path.iterdir():
        if p.is_dir() and not p.is_symlink():
            ok = folders.get(p.name)
            if ok is None or not all(own_file(q, ok) for q in p.iterdir()):
                out.append(p.name + "/")
        elif not own_file(p, files.__contains__):
            out.append(p.name)
    return sorted(out)


def _listing(names: list[str], limit: int = 4) -> str:
    shown = ", ".join(names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")


def make_folder(path: Path) -> list[Path]:
    """Create ``path`` (and missing parents) or raise a one-line :class:`StudyError`.

    Returns the folders created, outermost first, so a caller can remove them again; on
    failure the ones made so far are removed before raising.
    """
    path = Path(path)
    if path.exists() and not path.is_dir():
        raise StudyError(str(path), "", "is a file, not a folder; give --out a folder (new or a results folder)")
    missing = []
    for p in [path, *path.parents]:
        if p.exists():
            if not p.is_dir():
                raise StudyError(str(path), "", f"cannot be created: {p} is a file, not a folder")
            break
        missing.append(p)
    made = []
    try:
        for p in reversed(missing):
            try:
                p.mkdir()
            except FileExistsError:
                if not p.is_dir():
                    raise
                continue          # made meanwhile by another process (two runs starting together)
            made.append(p)
    except OSError as exc:
        _remove_made(made)
        raise StudyError(str(path), "", f"cannot be created ({exc.strerror or exc}); choose another --out") from None
    return made


def _remove_made(made: list[Path]) -> None:
    for p in reversed(made):
        try:
            p.rmdir()
        except OSError:
            pass


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
    """The folder's simlab manifest, or None (no file, or a file simlab did not write)."""
    try:
        data = json.loads((path / MANIFEST).read_text(encoding="utf-8"))
    except (FileNotFoundError, NotADirectoryError, UnicodeDecodeError, json.JSONDecodeError):
        return None
    if not isinstance(data, dict) or not {"study_hash", "simlab_version", "complete"} <= data.keys():
        return None
    return data


def read_results(path: str | os.PathLike) -> tuple[Study, pd.DataFrame]:
    """Read a finished results folder."""
    path = Path(path)
    if not path.exists():
        raise StudyError(str(path), "", "no such folder")
    if not path.is_dir():
        what = ("is a study file, not a results folder; run it with `simlab run` and give its results folder "
                "(results/<study name> unless --out)" if path.suffix == ".toml" else
                "is a file, not a results folder (the folder holding traces.parquet and study.toml)")
        raise StudyError(str(path), "", what)
    manifest = _read_manifest(path)
    if manifest is not None and not manifest.get("complete", False):
        raise StudyError(str(path), "", "holds an unfinished run (finish it with `simlab run STUDY.toml --resume`)")
    for name in (STUDY, TRACES):
        if not (path / name).is_file():
            raise StudyError(str(path), "", f"is not a finished results folder (no {name})")
    study = load_study(path / STUDY)
    try:
        traces = pd.read_parquet(path / TRACES)
    except (OSError, ValueError) as exc:   # pyarrow's ArrowInvalid is a ValueError
        reason = " ".join(str(exc).split())[:160]
        raise StudyError(str(path / TRACES), "", f"cannot be read ({reason}); replay the study into this folder "
                         "with `simlab run STUDY.toml --fresh`") from None
    need = ["policy", "replicate", "trial", "regret", *study.space.names]
    missing = [c for c in need if c not in traces.columns]
    if missing:
        raise StudyError(str(path / TRACES), "", f"lacks the column(s) {', '.join(missing)}; it was not written "
                         "for this study.toml (replay it with `simlab run STUDY.toml --fresh`)")
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
        self._made = make_folder(self.path)
        try:
            self._lock = _take_lock(self.path)
        except BaseException:
            _remove_made(self._made)
            raise
        return self

    def __exit__(self, *exc):
        _release_lock(self.path, self._lock)
        return False

    # ------------------------------------------------------------------ states
    def prepare(self, *, resume: bool, fresh: bool) -> set[int] | None:
        """Chunks already done (resume), an empty set (start), or None (already complete).

        Raises
        ------
        FolderBusy
            When the folder holds an unfinished run and neither ``resume`` nor ``fresh``
            was asked, or holds a different study (``fresh`` overrides that too), or holds
            anything simlab did not write (``fresh`` never deletes that).
        """
        if resume and fresh:
            raise ValueError("`resume` and `fresh` exclude each other; got both")
        manifest = _read_manifest(self.path)
        mine = study_hash(self.study)
        foreign = foreign_entries(self.path, manifest=manifest is not None)
        where = str(self.path)
        if fresh:
            if foreign:
                raise FolderBusy(where, "", f"--fresh deletes only what simlab wrote, and this folder also holds "
                                 f"{_listing(foreign)}; move that away or choose another --out", kind="foreign-fresh")
            self._clear()
            return set()
        if manifest is None:
            if foreign:
                raise FolderBusy(where, "", f"is not empty and holds no simlab run ({_listing(foreign)}); "
                                 "choose another --out", kind="foreign")
            return set()
        fresh_ok = not foreign
        or_fresh = (" or --fresh to replace them" if fresh_ok else
                    f" (--fresh cannot: the folder also holds {_listing(foreign)}, which simlab did not write)")
        if manifest.get("study_hash") != mine:
            raise FolderBusy(where, "", f"holds results of a different study (\"{manifest.get('study')}\" or "
                             f"other settings); use --out for a new folder{or_fresh}", kind="other-study",
                             fresh_ok=fresh_ok)
        if manifest.get("complete"):
            return None
        if not resume:
            raise FolderBusy(where, "", "holds an unfinished run of this study; add --resume to continue it"
                             + (" or --fresh to start over" if fresh_ok else ""), kind="unfinished", fresh_ok=fresh_ok)
        start_over = "use --fresh to start over" if fresh_ok else "use another --out to start over"
        if manifest.get("simlab_version") != self.version:
            # campaigns replayed by another version may differ in the last digits (or more):
            # never mix them in one traces file
            raise FolderBusy(where, "", f"holds an unfinished run made by simlab "
                             f"{manifest.get('simlab_version')}, not {self.version}; {start_over}", kind="version",
                             fresh_ok=fresh_ok)
        if manifest.get("chunks") != self.chunks:
            raise FolderBusy(where, "", "holds an unfinished run cut into different chunks "
                             f"(another simlab version?); {start_over}", kind="chunks", fresh_ok=fresh_ok)
        return self.done()

    def _clear(self) -> None:
        """Delete what an earlier simlab run wrote here (callers have checked nothing else is)."""
        if _read_manifest(self.path) is None:
            keep = {LOCK}
            own = [p for p in self.path.iterdir() if p.name == SWEEP]
        else:
            keep = {LOCK}
            own = list(self.path.iterdir())
        for p in own:
            if p.name in keep:
                continue
            if p.is_dir() and not p.is_symlink():
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


def _take_lock(folder: Path) -> int:
    """Take the folder's lock; return its open descriptor (keep it open while writing).

    The lock is an OS file lock (``flock``) on ``.lock``, so taking it is atomic and it dies
    with its process (``kill -9`` included); the file names the holder ("host pid") for the
    refusal message. A lock file naming a live process is honoured even when no flock is
    held (a run on another host over a shared file system, or an older simlab).
    """
    lock = folder / LOCK
    me = f"{socket.gethostname()} {os.getpid()}"
    for _ in range(100):
        try:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise StudyError(str(folder), "", f"cannot be written ({exc.strerror or exc}); choose another --out") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            owner = _owner(fd)
            os.close(fd)
            if exc.errno not in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
                raise
            raise FolderBusy(str(folder), "", f"another simlab run ({owner or 'starting up'}) is writing here; "
                             "wait for it to finish or choose another --out") from None
        # Its last holder may have removed the file between our open and flock (then we
        # hold a lock on a file nobody else can see): try again on the current file.
        try:
            current = os.path.samestat(os.fstat(fd), os.stat(lock))
        except FileNotFoundError:
            current = False
        if not current:
            os.close(fd)
            continue
        owner = _owner(fd)
        if owner and _alive(owner):
            os.close(fd)
            raise FolderBusy(str(folder), "", f"another simlab run ({owner}) is writing here; "
                             "wait for it to finish or choose another --out")
        os.ftruncate(fd, 0)
        os.pwrite(fd, me.encode(), 0)
        return fd
    raise FolderBusy(str(folder), "", "could not take the folder's lock file (.lock)")


def _owner(fd: int) -> str:
    try:
        return os.pread(fd, 512, 0).decode("utf-8", errors="replace").strip()
    except OSError:
        return ""


def _release_lock(folder: Path, fd: int) -> None:
    """Remove the lock file (while still holding it), then let go. If the folder can no
    longer be written the file stays, naming a finished process: the next run takes it over."""
    try:
        (folder / LOCK).unlink(missing_ok=True)
    except OSError:
        pass
    finally:
        os.close(fd)


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
