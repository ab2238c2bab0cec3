"""The notebook-facing API: run a study, get its traces as a pandas DataFrame."""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .replay.runner import replay_study
from .study.spec import Study, load_study
from .replay.store import read_results, read_worlds, results_dir

__all__ = ["StudyResult", "SweepResult", "WorldView", "run_study", "run_sweep_study", "load_results", "world"]


@dataclass
class StudyResult:
    """A finished study: the resolved study, its traces and where they were written."""

    study: Study
    traces: pd.DataFrame
    path: Path | None = None
    up_to_date: bool = False     # the folder already held this finished run; nothing was replayed
    worlds: pd.DataFrame | None = None   # worlds.csv: one row per replicate (None for older folders)

    def final(self, budget: int | None = None) -> pd.DataFrame:
        """Rows at one budget (default the largest): one per policy and replicate."""
        budget = self.study.campaign.horizon if budget is None else budget
        return self.traces[self.traces["trial"] == budget]

    def summary(self, *, seed: int = 0) -> pd.DataFrame:
        """One row per policy and budget: median regret (order-statistic interval), quartiles,
        within-target share and failure risk (Clopper-Pearson intervals) and CVaR-90 (with a
        lower bound); see :func:`simlab.evidence.metrics.budget_summary`."""
        from .evidence.metrics import budget_summary
        return budget_summary(self.traces, budgets=list(self.study.campaign.budgets),
                              target=self.study.target, seed=seed)


def run_study(study: Study | str | os.PathLike, *, jobs: int = 1, out: str | os.PathLike | None = None,
              write: bool = True, progress: bool = False, resume: bool = False, fresh: bool = False,
              cluster: str | None = None) -> StudyResult:
    """Replay every policy on every replicate and (by default) write the results folder.

    Parameters
    ----------
    study : Study or path
        A study from :func:`simlab.load_study`, or the path of a study file.
    jobs : int
        Worker processes; traces are identical for any value.
    out : path, optional
        Results folder; default ``results/<study name>``.
    write : bool
        Write the folder: chunks of replicates land in ``.partial/`` as they finish
        (atomically), then are joined into ``traces.parquet``; ``study.toml`` and
        ``manifest.json`` record what ran.
    progress : bool
        Show a progress bar (tqdm) on standard error: campaigns done, rate, time left.
    resume : bool
        Continue an unfinished run of the same study in ``out``.
    fresh : bool
        Discard whatever ``out`` holds and start over.
    cluster : str, optional
        ``tcp://host:port`` of a dask.distributed scheduler to run the chunks on.

    Returns
    -------
    StudyResult
        ``up_to_date`` is True when ``out`` already held the finished run of this study
        (nothing was replayed).

    Raises
    ------
    simlab.replay.store.FolderBusy
        When ``out`` holds an unfinished run (and neither ``resume`` nor ``fresh``), a
        different study, or another run is writing to it.
    """
    from .replay.runner import connect

    if resume and fresh:
        raise ValueError("`resume` and `fresh` exclude each other; got both")
    if not isinstance(study, Study):
        study = load_study(study)
    from . import __version__

    client = None
    if cluster is not None:
        # reach the scheduler before anything is written: a bad address leaves no folder behind
        client = connect(cluster)
        cluster = client
    try:
        return _run_study(study, jobs=jobs, out=out, write=write, progress=progress, resume=resume, fresh=fresh,
                          cluster=cluster, version=__version__)
    finally:
        if client is not None:
            client.close()


def _run_study(study: Study, *, jobs, out, write, progress, resume, fresh, cluster, version) -> StudyResult:
    from .replay.runner import chunk_plan, replay_chunks
    from .replay.store import RunFolder

    if not write:
        with _progress_bar(study, progress) as bar:
            traces, worlds = replay_study(study, jobs=jobs, progress=bar, cluster=cluster)
        _rewarn(traces.attrs.get("warnings", ()))
        return StudyResult(study=study, traces=traces, path=None, worlds=worlds)

    path = results_dir(study, out)
    plan = chunk_plan(study)
    messages: set[str] = set()
    with RunFolder(path, study, version, chunks=len(plan)) as folder:
        done = folder.prepare(resume=resume, fresh=fresh)
        if done is None:
            _, traces = read_results(path)
            return StudyResult(study=study, traces=traces, path=path, up_to_date=True, worlds=read_worlds(path))
        if not done:
            folder.start()
        with _progress_bar(study, progress, initial=sum(len(plan[i]) for i in done)) as bar:
            for i, frame in replay_chunks(study, jobs=jobs, skip=done, cluster=cluster):
                folder.write_chunk(i, frame)
                messages.update(frame.attrs.get("warnings", ()))
                if bar is not None:
                    bar(len(plan[i]) * len(study.policies))
        folder.finish()
    _rewarn(sorted(messages))
    _, traces = read_results(path)
    return StudyResult(study=study, traces=traces, path=path, worlds=read_worlds(path))


def _rewarn(messages) -> None:
    for message in messages:
        warnings.warn(message, RuntimeWarning, stacklevel=3)


class _progress_bar:
    """tqdm over campaigns (or nothing): yields the bar's update function or None."""

    def __init__(self, study: Study, show: bool, initial: int = 0):
        self.study, self.show, self.initial = study, show, initial

    def __enter__(self):
        if not self.show:
            self.bar = None
            return None
        from tqdm.auto import tqdm
        per = len(self.study.policies)
        self.bar = tqdm(total=self.study.replicates * per, initial=self.initial * per, unit="campaign",
                        desc=self.study.name, smoothing=0.1)
        return self.bar.update

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.close()
        return False


def load_results(path: str | os.PathLike) -> StudyResult:
    """Read a results folder written by :func:`run_study`."""
    study, traces = read_results(path)
    return StudyResult(study=study, traces=traces, path=Path(path), worlds=read_worlds(path))


@dataclass
class SweepResult:
    """A finished misspecification sweep."""

    study: Study
    rows: pd.DataFrame       # regret per policy, replicate, budget and cell
    summary: pd.DataFrame    # failure risk and median regret per policy, budget and cell
    ranking: pd.DataFrame    # policies by worst failure risk over the grid at the largest budget
    path: Path | None = None


def run_sweep_study(study: Study | str | os.PathLike, *, jobs: int = 1, out: str | os.PathLike | None = None,
                    write: bool = True, progress: bool = False) -> SweepResult:
    """Replay the study with the belief's lengthscales and amplitude scaled by the ``[sweep]``
    factors, on the same worlds, and rank policies by their worst failure risk.

    Writes ``sweep/sweep.csv`` (one row per policy, budget and cell) and
    ``sweep/ranking.csv`` under the results folder.
    """
    from .replay.store import atomic_write
    from .replay.sweep import run_sweep, safest_policy, summarize_sweep

    if not isinstance(study, Study):
        study = load_study(study)
    cells = len(study.sweep.lengthscale) * len(study.sweep.amplitude)
    bar = None
    if progress:
        from tqdm.auto import tqdm
        bar = tqdm(total=cells * study.sweep.replicates * len(study.policies), unit="campaign",
                   desc=f"{study.name} sweep", smoothing=0.1)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", RuntimeWarning)
            rows = run_sweep(study, jobs=jobs, progress=bar.update if bar else None)
    finally:
        if bar is not None:
            bar.close()
    for message in sorted({str(w.message) for w in caught}):
        warnings.warn(message, RuntimeWarning, stacklevel=2)
    summary = summarize_sweep(rows, study)
    ranking = safest_policy(summary, budget=study.campaign.horizon)
    path = None
    if write:
        from .report.plots import policy_colors, save_figure, sweep_figure

        path = results_dir(study, out) / "sweep"
        atomic_write(path / "sweep.csv", lambda p: summary.to_csv(p, index=False))
        atomic_write(path / "ranking.csv", lambda p: ranking.to_csv(p, index=False))
        save_figure(sweep_figure(summary, budget=study.campaign.horizon, colors=policy_colors(study.labels)),
                    path, "heatmap")
    return SweepResult(study=study, rows=rows, summary=summary, ranking=ranking, path=path)


@dataclass(frozen=True, eq=False)
class WorldView:
    """One replicate's true objective, in the user's units and orientation (see :func:`world`)."""

    study: Study
    replicate: int
    best_x: np.ndarray        # (d,) where the search found the optimum, user units
    best_value: float         # the searched optimum, user orientation
    optimum_gap: float        # how far a second, independent search disagreed (>= 0)
    optimum_searches: int = 1     # independent searches run (more while the best two disagreed)
    optimum_spread: float = 0.0   # worst minus best of their values (>= optimum_gap)
    _world: object = None

    @property
    def names(self) -> tuple[str, ...]:
        """The inputs, in the order of the columns of ``x``."""
        return self.study.space.names

    def __call__(self, x) -> np.ndarray:
        """Noise-free values at inputs ``x`` of shape (n, d) in the user's units: shape (n,)."""
        space = self.study.space
        x = np.asarray(x, dtype=float)
        if x.ndim != 2 or x.shape[1] != space.dim:
            raise ValueError(f"x must have shape (n, {space.dim}), one column per input "
                             f"({', '.join(space.names)}); got shape {x.shape}")
        if not np.all(np.isfinite(x)):
            raise ValueError("x must be finite; got NaN or infinity")
        u = space.to_unit(x)
        slack = 1e-9                      # from_unit(to_unit(x)) may step past an edge by rounding
        outside = np.flatnonzero(((u < -slack) | (u > 1.0 + slack)).any(axis=1))
        if outside.size:
            i = int(outside[0])
            raise ValueError(f"x must lie in the study's space {dict(zip(space.names, zip(space.low, space.high)))}; "
                             f"row {i} is {x[i].tolist()}")
        from threadpoolctl import threadpool_limits

        with threadpool_limits(1):        # as the runner's workers evaluate it
            return self.study.sign * self._world(np.clip(u, 0.0, 1.0))


def world(study: Study | str | os.PathLike, replicate: int) -> WorldView:
    """The true objective of one replicate of a study, to evaluate or check by hand.

    Parameters
    ----------
    study : Study or path
        A study from :func:`simlab.load_study`, the path of a study file, or a results
        folder (its ``study.toml`` is read).
    replicate : int
        0-based replicate index, ``0 <= replicate < study.replicates``.

    Returns
    -------
    WorldView
        Callable on an array of shape (n, d) in the user's units (columns in the order of
        ``[space]``), giving noise-free values of shape (n,) in the user's orientation (for
        ``goal = "maximize"`` larger is better, as in the traces' ``f`` column). Attributes:

        - ``best_x`` (d,), ``best_value``: the world's optimum as simlab's search found it,
          the better of two independent searches (:func:`simlab.worlds.replicate.world_optimum`);
          the maximum for a ``maximize`` study.
        - ``optimum_gap``: how far the two searches disagreed (>= 0, objective units).
        - ``optimum_searches``, ``optimum_spread``: how many searches ran (two, and up to four more
          while the best two disagreed) and how far their values spread (worst minus best); as in
          ``worlds.csv``.

    Notes
    -----
    ``best_value`` is the *searched* optimum. Regret in the traces is measured against
    ``reference`` in ``worlds.csv``: the better of ``best_value`` and every input any
    campaign of the study evaluated on this replicate (equal to ``best_value`` unless a
    campaign found a better point than the search). The world is rebuilt from the study's
    keyed random streams, so it is the same world the campaigns met, whatever ran before.

    Raises
    ------
    ValueError
        If ``replicate`` is not an integer in range, or (when called) ``x`` is not of
        shape (n, d), not finite, or outside the space.

    Examples
    --------
    >>> import simlab
    >>> w = simlab.world("configs/quick-1d.toml", 0)          # doctest: +SKIP
    >>> w([[20.0], [40.0]])                                  # doctest: +SKIP
    array([50.80..., 51.64...])
    >>> w.best_x, w.best_value                               # doctest: +SKIP
    (array([37.93...]), 51.97...)
    """
    from threadpoolctl import threadpool_limits

    from .worlds.replicate import make_world, optimum_searches, searched

    if not isinstance(study, Study):
        path = Path(study)
        study = load_study(path / "study.toml" if path.is_dir() else path)
    if isinstance(replicate, bool) or not isinstance(replicate, (int, np.integer)) \
            or not 0 <= int(replicate) < study.replicates:
        raise ValueError(f"replicate must be an integer from 0 to {study.replicates - 1} "
                         f"(the study has {study.replicates} replicates); got {replicate!r}")
    r = int(replicate)
    with threadpool_limits(1):
        w = make_world(study, r)
        u, v, gap, searches, spread = searched(optimum_searches(w, study, r))
    return WorldView(study=study, replicate=r, best_x=study.space.from_unit(u), best_value=float(study.sign * v),
                     optimum_gap=float(gap), optimum_searches=searches, optimum_spread=float(spread), _world=w)
