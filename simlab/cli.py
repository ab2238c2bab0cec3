"""Command line: argparse subcommands; parsing and printing only, the work is in the API."""

from __future__ import annotations

import signal
import sys
import time
import warnings

__all__ = ["main"]

from .parser import build_parser


class _Terminated(KeyboardInterrupt):
    """SIGTERM (``kill PID``), raised in the main thread so that a run stops as after Ctrl-C:
    workers stopped, finished chunks kept, the lock removed."""


def _on_sigterm(signum, frame):
    signal.signal(signal.SIGTERM, signal.SIG_IGN)   # one stop is enough: let the clean-up finish
    raise _Terminated()


def main(argv=None) -> int:
    """Run the command line; the exit code is 0, 2 (a mistake in the input, one line on
    standard error), 130 after Ctrl-C or 143 after SIGTERM (128 + the signal number)."""
    args = build_parser().parse_args(argv)
    from .study.spec import StudyError
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:   # not the main thread (main() called from a thread): leave signals alone
        previous = None
    try:
        return {"run": _run, "check": _check, "report": _report, "sweep": _sweep,
                "calibrate": _calibrate, "plan": _plan, "new": _new}[args.command](args)
    except StudyError as exc:
        print(f"simlab: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt as exc:
        what = "stopped (SIGTERM)" if isinstance(exc, _Terminated) else "interrupted"
        hint = getattr(exc, "simlab_hint", "")
        print(f"simlab: {what}" + (f"; {hint}" if hint else ""), file=sys.stderr)
        return 128 + (signal.SIGTERM if isinstance(exc, _Terminated) else signal.SIGINT)
    except OSError as exc:
        # the file system refused (permission lost, disk full, a path too long...): one line
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"simlab: error: {where}{exc.strerror or exc}", file=sys.stderr)
        return 2
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _stopped(exc: KeyboardInterrupt, hint: str) -> KeyboardInterrupt:
    """Attach what to do next to an interruption (printed by :func:`main`)."""
    if not getattr(exc, "simlab_hint", ""):
        exc.simlab_hint = hint
    return exc


def _resume_command(args, study) -> str:
    from .replay.store import results_dir
    folder = results_dir(study, args.out)
    out = f" --out {args.out}" if args.out is not None else ""
    return (f"finished chunks are kept in {folder}; continue with "
            f"`simlab run {args.study}{out} --resume`")


def _warn_jobs(jobs: int) -> None:
    """One line when more workers are asked for than this machine has cores."""
    cores = _cores()
    if jobs > cores:
        print(f"simlab: warning: --jobs {jobs} is more than the {cores} cores available here; workers "
              "will share cores (and at most one runs per chunk of replicates)", file=sys.stderr)


def _cores() -> int:
    from .replay.workers import cores
    return cores()


def _load(args):
    from .study.spec import load_study
    study = load_study(args.study)
    if getattr(args, "replicates", None):
        study = study.with_replicates(args.replicates)
    _advise(study)
    if getattr(args, "jobs", None):
        _warn_jobs(args.jobs)
    return study


def _advise(study) -> None:
    from .study.spec import advice
    for line in advice(study):
        print(f"simlab: warning: {line}", file=sys.stderr)


def _run(args) -> int:
    study = _load(args)
    if not args.quiet:
        # the first line, before the engine's imports (pandas, SciPy's statistics: seconds on a slow disk)
        c = study.campaign
        print(f"{study.name}: {study.replicates} replicates x {len(study.policies)} policies, "
              f"up to {c.horizon} trials each", file=sys.stderr, flush=True)
    from .report.console import budget_table
    from .api import run_study
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", RuntimeWarning)
        try:
            result = run_study(study, jobs=args.jobs, out=args.out, progress=not args.quiet, resume=args.resume,
                               fresh=args.fresh, cluster=args.cluster)
        except KeyboardInterrupt as exc:
            raise _stopped(exc, _resume_command(args, study))
    for msg in sorted({str(w.message) for w in caught}):
        print(f"simlab: warning: {msg}", file=sys.stderr)
    if result.up_to_date:
        print(f"{result.path} is up to date: it holds the finished run of this study (--fresh to run it again)",
              file=sys.stderr)
    want_report = not args.no_report and not (result.up_to_date and (result.path / "report.html").is_file())
    summary = _write_report(result, success=args.success, quiet=args.quiet, jobs=args.jobs) if want_report else None
    print(budget_table(result.study, summary if summary is not None else result.summary()))
    _print_limits(result)
    if result.up_to_date:
        print(f"\nnothing replayed: {result.path} already held the finished run ({study.replicates} replicates x "
              f"{len(study.policies)} policies)")
    else:
        print(f"\n{study.replicates} replicates x {len(study.policies)} policies in "
              f"{time.perf_counter() - t0:.1f} s; results in {result.path}")
    if (result.path / "report.html").is_file() and not args.no_report:
        print(f"report: {result.path / 'report.html'}")
    return 0


def _write_report(result, *, success: float, quiet: bool, jobs: int = 1):
    """Write the decision files, figures and report.html (the figures on `jobs` worker processes);
    return the summary table."""
    import pandas as pd

    from .report.outputs import report_steps, write_outputs
    bar = None
    if not quiet:
        from tqdm.auto import tqdm
        bar = tqdm(total=report_steps(), unit="step", desc="report", leave=False)
    try:
        files = write_outputs(result.path, result.study, result.traces, success=success,
                              progress=bar.update if bar else None, jobs=jobs)
    finally:
        if bar is not None:
            bar.close()
    return pd.read_csv(files.summary)


def _print_limits(result):
    """One line on limits after the budget table, for a study with limits or hidden failures (from limits.csv)."""
    from .report.files import LIMITS
    path = result.path / LIMITS
    if result.study.constrained and path.is_file():
        import pandas as pd

        from .report.console import limits_line
        print(limits_line(result.study, pd.read_csv(path)))


def _check(args) -> int:
    from .study.dump import dump_study
    study = _load(args)
    print(dump_study(study), end="", flush=True)
    from .report.console import duration   # after the first lines: it brings pandas
    c = study.campaign
    campaigns = study.replicates * len(study.policies)
    print(f"\n# work: {study.replicates} replicates x {len(study.policies)} policies = {campaigns} campaigns "
          f"of {c.horizon} trials ({campaigns * c.horizon:,} trials; {c.initial} initial per campaign)")
    if not args.no_timing:
        from .replay.estimate import measure
        est = measure(study)
        workers = args.jobs if args.jobs > 0 else _cores()
        block = f" and {est.per_block:.1f} s per block" if est.per_block else ""
        print(f"# timing: simlab run needs about {duration(est.run(study, args.jobs))} with --jobs {workers} "
              f"({est.per_replicate:.2f} s per replicate{block}, timed on the first {est.timed} with their world "
              f"optima; {est.report_time(args.jobs):.1f} s for the report; {est.startup:.1f} s to start)")
        sw = study.sweep
        cells = len(sw.lengthscale) * len(sw.amplitude)
        print(f"# timing: simlab sweep ({cells} cells x {sw.replicates} replicates) needs about "
              f"{duration(est.sweep(study, args.jobs))} with --jobs {workers}")
    return 0


def _sweep(args) -> int:
    import dataclasses

    from .api import run_sweep_study
    from .study.spec import load_study
    study = load_study(args.study)
    if args.replicates:
        study = dataclasses.replace(study, sweep=dataclasses.replace(study.sweep, replicates=args.replicates))
    _advise(study)
    _warn_jobs(args.jobs)
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", RuntimeWarning)
        try:
            result = run_sweep_study(study, jobs=args.jobs, out=args.out, progress=not args.quiet)
        except KeyboardInterrupt as exc:
            raise _stopped(exc, "a sweep keeps no partial results; run it again to finish it")
    for msg in sorted({str(w.message) for w in caught}):
        print(f"simlab: warning: {msg}", file=sys.stderr)
    budget = study.campaign.horizon
    print(f"belief misspecification sweep at {budget} trials: lengthscale x {list(study.sweep.lengthscale)}, "
          f"amplitude x {list(study.sweep.amplitude)}, {study.sweep.replicates} replicates per cell\n")
    header = (f"{'rank':>4}  {'policy':<20} {'worst shortfall':>15}  {'(at lengthscale x, amplitude x; best there)':<44} "
              f"{'worst failure risk':>18}  {'(at)':<12} {'mean':>6}")
    print(header)
    print("-" * len(header))
    for row in result.ranking.itertuples():
        short = (f"({row.shortfall_lengthscale_factor:g}, {row.shortfall_amplitude_factor:g}; "
                 f"{str(row.shortfall_best_policy)[:20]})")
        cell = f"({row.worst_lengthscale_factor:g}, {row.worst_amplitude_factor:g})"
        print(f"{row.rank:>4}  {str(row.policy)[:20]:<20} {100 * row.worst_shortfall:>12.0f} pt  {short:<44} "
              f"{row.worst_failure_risk:>18.0%}  {cell:<12} {row.mean_failure_risk:>6.0%}")
    print("(shortfall: percentage points of failure risk given away to the best policy of the same cell)")
    folder = result.path.parent if result.path is not None else None
    if folder is not None and (folder / "traces.parquet").is_file():
        from .api import load_results
        stored = load_results(folder)
        if stored.study == dataclasses.replace(study, sweep=stored.study.sweep):
            _write_report(stored, success=0.9, quiet=args.quiet, jobs=args.jobs)
            print(f"report with a robustness section: {folder / 'report.html'}")
    else:
        out = f" --out {args.out}" if args.out is not None else ""
        print(f"(run `simlab run {args.study}{out}` too: its report will include this sweep)")
    first = result.ranking.iloc[0]
    verdict = ("a clear lead" if first["lead"] == "clear" else
               "not a clear lead once the cells' intervals are allowed for; more replicates would tell")
    print(f"\nsafest across the grid (smallest worst shortfall, minimax regret): {first['policy']} ({verdict})")
    print(f"{time.perf_counter() - t0:.1f} s; results in {result.path}")
    return 0


def _calibrate(args) -> int:
    from .study.calibrate import calibrate
    from .study.data import DataError
    if args.study is None and (args.history or args.force):
        print(f"simlab calibrate: error: {'--history' if args.history else '--force'} needs --study NEW.toml",
              file=sys.stderr)
        return 2
    if args.study is not None:
        from .study.template import check_new_file
        check_new_file(args.study, force=args.force)   # refuse before the fit, not after it
    inputs = [s.strip() for s in args.inputs.split(",")] if args.inputs else None
    try:
        stepped = _stepped(args.stepped, args.data)
        cal = calibrate(args.data, response=args.response, inputs=inputs, kernel=args.kernel,
                        goal=args.goal, restarts=args.restarts, seed=args.seed, stepped=stepped)
    except DataError as exc:
        print(f"simlab: error: {exc}", file=sys.stderr)
        return 2
    if args.study is None:
        sys.stdout.write(cal.toml())
        sys.stderr.write(cal.diagnostics())
        return 0
    from pathlib import Path

    from .study.template import relative_path, study_name, write_study
    history = relative_path(args.data, Path(args.study).parent) if args.history else None
    path = write_study(args.study, cal.study(name=study_name(args.study), history=history), force=args.force)
    sys.stderr.write(cal.diagnostics())
    print(f"wrote {path}: {cal.space.dim} input{'s' * (cal.space.dim > 1)}, the fitted prior, and a suggested "
          "campaign, target and policies (marked guessed: review them)")
    print(f"next: simlab check {path}; simlab run {path}; simlab plan {path}")
    return 0


def _stepped(text, data):
    """``--stepped a,b=0.5`` -> {"a": None, "b": 0.5}; a malformed entry is a DataError naming the option."""
    from .study.data import DataError
    out = {}
    for item in (text or "").split(","):
        if not item.strip():
            continue
        name, _, step = (part.strip() for part in item.partition("="))
        if not step:
            out[name] = None
            continue
        try:
            out[name] = float(step)
        except ValueError:
            raise DataError(str(data), f"--stepped {item.strip()}: the step must be a number, e.g. "
                            f"--stepped {name}=1") from None
    return out


def _new(args) -> int:
    from .study.template import check_inputs, skeleton_text, study_name, write_study
    inputs = check_inputs([s.strip() for s in args.inputs.split(",")])
    path = write_study(args.study, skeleton_text(name=study_name(args.study), goal=args.goal, inputs=inputs),
                       force=args.force)
    print(f"wrote {path}: {len(inputs)} placeholder input{'s' * (len(inputs) > 1)} and prior (marked "
          "PLACEHOLDER: fill them in), and a suggested campaign, target and policies (marked guessed)")
    print(f"next: edit it, then simlab check {path}; simlab run {path}")
    return 0


def _report(args) -> int:
    from .report.console import budget_table
    from .api import load_results
    _warn_jobs(args.jobs)
    result = load_results(args.folder)
    summary = _write_report(result, success=args.success, quiet=args.quiet, jobs=args.jobs)
    print(budget_table(result.study, summary))
    _print_limits(result)
    print(f"\nreport: {result.path / 'report.html'} (rebuilt from stored traces; no campaign replayed)")
    return 0


def _plan(args) -> int:
    from .report.cells import unit_label
    from .report.console import budget_text, pct_interval
    import pandas as pd

    from .api import load_results, run_study
    from .evidence.reach import budget_plan
    from .replay.store import STUDY, TRACES, results_dir
    study = _load(args)
    folder = results_dir(study, args.out)
    result = None
    if (folder / TRACES).is_file() and (folder / STUDY).is_file():
        stored = load_results(folder)
        if stored.study == study:
            result = stored
            print(f"using stored results in {folder}", file=sys.stderr)
    if result is None:
        from . import __version__
        from .replay.runner import chunk_plan
        from .replay.store import FolderBusy, RunFolder
        if folder.is_dir():   # refuse before saying it will run (prepare only reads the folder)
            try:
                RunFolder(folder, study, __version__, chunks=len(chunk_plan(study))).prepare(resume=False, fresh=False)
            except FolderBusy as exc:
                raise _plan_refusal(exc, args) from None
        print(f"no results for this study in {folder}: running it first", file=sys.stderr)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", RuntimeWarning)
            try:
                result = run_study(study, jobs=args.jobs, out=args.out, progress=not args.quiet)
            except FolderBusy as exc:
                raise _plan_refusal(exc, args) from None
            except KeyboardInterrupt as exc:
                raise _stopped(exc, _resume_command(args, study) + ", then plan again")
        for msg in sorted({str(w.message) for w in caught}):
            print(f"simlab: warning: {msg}", file=sys.stderr)
    plan = budget_plan(result.traces, target=study.target, success=args.success)
    print(f"smallest budget at which {args.success:.0%} of campaigns end within the target "
          f"(recommendation after the budget's last trial: regret <= {study.target:g} {unit_label(study)})\n")
    header = (f"{'policy':<20} {'budget':>7}  {'range (optimistic to conservative)':<36} "
              f"{'within target at that budget':>30}  {'stays from':>10}")
    print(header)
    print("-" * len(header))
    for row in plan.itertuples():
        chance = pct_interval(row.share, row.share_low, row.share_high)
        if row.status == "reached":
            conservative = budget_text(row.budget_conservative, above=row.last_trial)
            span = f"{budget_text(row.budget_optimistic, above=row.last_trial)} to {conservative}"
            stays = "not held" if pd.isna(row.budget_sustained) else f"{int(row.budget_sustained)}"
            print(f"{str(row.policy)[:20]:<20} {budget_text(row.budget, above=row.last_trial):>7}  {span:<36} "
                  f"{chance:>30}  {stays:>10}")
        else:
            print(f"{str(row.policy)[:20]:<20} {'-':>7}  not reached within {row.last_trial} trials "
                  f"({chance} after trial {row.last_trial})")
    print("\n'conservative' is where the lower end of the share's 95 % interval (Clopper-Pearson) reaches the "
          "level: the budget to defend in a proposal. The share need not rise with every trial; 'stays from' "
          "is the first trial from which it stays at or above the level through the last simulated trial "
          "('not held': it falls below again).")
    aware = [str(p) for p, a in zip(plan["policy"], plan["horizon_aware"]) if a]
    if aware:
        print(f"{', '.join(aware)}: replayed once per study budget ({', '.join(map(str, study.campaign.budgets))}); "
              "at other budgets the share comes from the campaign planned for the next larger one, stopped early.")
    return 0


def _plan_refusal(exc, args):
    """A folder refusal in the words of `plan`, which has no --resume or --fresh of its own."""
    from .replay.store import FolderBusy
    out = f" --out {args.out}" if args.out is not None else ""
    if exc.kind == "unfinished":
        what = (f"holds an unfinished run of this study; finish it with `simlab run {args.study}{out} --resume`, "
                "then plan again")
    elif exc.kind in ("other-study", "version", "chunks") and exc.fresh_ok:
        what = (f"{exc.message.split(';')[0]}; give plan another --out, or replace them with "
                f"`simlab run {args.study}{out} --fresh`")
    elif exc.kind in ("other-study", "version", "chunks", "foreign"):
        what = f"{exc.message.split(';')[0]}; give plan another --out"
    else:
        return exc
    return FolderBusy(exc.file, exc.field, what, kind=exc.kind)




if __name__ == "__main__":     # `python -m simlab.cli` works as `python -m simlab` does
    raise SystemExit(main())
