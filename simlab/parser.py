"""The command line's words: subcommands, options, their checks, help texts and examples."""

from __future__ import annotations

import argparse

__all__ = ["build_parser"]


_EPILOG_RUN = """\
examples:
  simlab run configs/demo.toml
  simlab run configs/demo.toml --jobs 2 --replicates 50 --out /tmp/demo-small
  simlab run configs/crystallisation.toml --jobs 2     # categorical, stepped and log-scaled inputs
  simlab run configs/coating-library.toml --jobs 2     # every trial one of 400 listed formulations
"""


_EPILOG_CHECK = """\
examples:
  simlab check configs/demo.toml
  simlab check configs/demo.toml --no-timing
"""


_EPILOG_SWEEP = """\
examples:
  simlab sweep configs/demo.toml --replicates 30 --jobs 2
  simlab sweep configs/sweep-fermentation.toml

The grid comes from the study's [sweep] table (lengthscale = [...], amplitude = [...],
replicates = N); without one, factors 1/4, 1/2, 1, 2, 4 on both and up to 50 replicates.
"""


_EPILOG_CALIBRATE = """\
examples:
  simlab calibrate configs/fermentation-runs.csv --response titre --goal maximize > prior.toml
  simlab calibrate runs.csv --response yield --inputs temp,pressure --kernel auto

Standard output is TOML ([space] and [world] tables) to paste into a study; the fit
table and warnings go to standard error. With --study, a complete study file is written
instead: the fitted [space] and [world], and a suggested [campaign] (budgets 5, 10 and 15
trials per input), [target] and set of policies, every guessed value commented:

  simlab calibrate configs/fermentation-runs.csv --response titre --goal maximize --study ferment.toml
  simlab calibrate runs.csv --response yield --study continue.toml --history

A column of text (solvent names, say) is a categorical input: its levels are the names in order
of first appearance, and one level correlation per such input is fitted with the rest. Whole-number
columns stay continuous unless named in --stepped:

  simlab calibrate crystals.csv --response purity --stepped stages --study seeding.toml
"""


_EPILOG_NEW = """\
examples:
  simlab new line-setpoints.toml
  simlab new greenhouse.toml --inputs day_temp,night_temp,co2 --goal maximize

Writes a study file that runs as written: placeholder inputs and prior (marked PLACEHOLDER,
each saying what to fill in), and the campaign, target and policies suggested for them
(marked guessed). With past runs in a CSV, `simlab calibrate DATA.csv --response COL
--study NEW.toml` fits the inputs and prior instead.
"""


_EPILOG_PLAN = """\
examples:
  simlab plan configs/demo.toml --success 0.9
  simlab plan configs/demo.toml --success 0.8 --jobs 2
"""


_EPILOG_REPORT = """\
examples:
  simlab report results/pilot-extruder
  simlab report results/pilot-extruder --jobs 2     # the figures drawn by two worker processes
"""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit code 2, as for every user mistake
        self.exit(2, f"{self.prog}: error: {message}\n")


def _option(kind, ok, rule: str):
    """An argparse type: convert with ``kind``, accept when ``ok``, else say the rule in one line."""
    def parse(text: str):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be {rule}; got {text!r}") from None
        if not ok(value):
            raise argparse.ArgumentTypeError(f"must be {rule}; got {value:g}")
        return value
    return parse


_positive_int = _option(int, lambda v: v >= 1, "a whole number >= 1")


_share = _option(float, lambda v: 0.0 < v < 1.0, "a number between 0 and 1 (exclusive)")
_jobs = _option(int, lambda v: v >= 1 or v == -1, "a whole number >= 1, or -1 for all cores")


def _replicates(text: str) -> int:
    """--replicates: the same rule and words as ``[study] replicates`` in a study file."""
    from .study.spec import MAX_REPLICATES
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number between 1 and {MAX_REPLICATES}; "
                                         f"got {text!r}") from None
    if not 1 <= value <= MAX_REPLICATES:
        raise argparse.ArgumentTypeError(f"must be between 1 and {MAX_REPLICATES}; got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="simlab", description="Replay Bayesian-optimisation campaigns on synthetic worlds drawn "
                "from your own Gaussian-process prior, to choose a policy and a trial budget.",
                formatter_class=argparse.RawDescriptionHelpFormatter,
                epilog="run `simlab COMMAND --help` for each command's options and examples")
    p.add_argument("--version", action="version", version=f"simlab {_version()}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    run = sub.add_parser("run", help="replay the study and write the results folder",
                         description="Replay every policy on every replicate world, write "
                         "traces.parquet and study.toml, and print a summary table.",
                         epilog=_EPILOG_RUN, formatter_class=argparse.RawDescriptionHelpFormatter)
    run.add_argument("study", metavar="STUDY.toml")
    run.add_argument("--jobs", type=_jobs, default=1, metavar="N",
                     help="worker processes for the replay and the report's figures (-1: all cores; default 1)")
    run.add_argument("--out", metavar="DIR", help="results folder (default results/<study name>)")
    run.add_argument("--replicates", type=_replicates, metavar="N", help="override [study] replicates")
    run.add_argument("--quiet", action="store_true", help="no progress bar")
    again = run.add_mutually_exclusive_group()
    again.add_argument("--resume", action="store_true", help="continue an unfinished run of this study in the folder")
    again.add_argument("--fresh", action="store_true",
                       help="discard the earlier simlab run in the results folder and start over "
                       "(refused if the folder holds anything simlab did not write)")
    run.add_argument("--cluster", metavar="tcp://HOST:PORT",
                     help="run on a dask.distributed scheduler (pip install 'simlab[cluster]')")
    run.add_argument("--no-report", action="store_true",
                     help="write traces only (rebuild the report later with `simlab report DIR`)")
    run.add_argument("--success", type=_share, default=0.9, metavar="P",
                     help="chance of meeting the target used by the budget plan and choice table (default 0.9)")

    check = sub.add_parser("check", help="validate a study and estimate its cost",
                           description="Validate the study file, print it with every default filled in, "
                           "and estimate the work (timed on one replicate unless --no-timing).",
                           epilog=_EPILOG_CHECK, formatter_class=argparse.RawDescriptionHelpFormatter)
    check.add_argument("study", metavar="STUDY.toml")
    check.add_argument("--replicates", type=_replicates, metavar="N", help="override [study] replicates")
    check.add_argument("--jobs", type=_jobs, default=1, metavar="N", help="workers to plan for (default 1)")
    check.add_argument("--no-timing", action="store_true", help="skip the one-replicate timing run")

    sweep = sub.add_parser("sweep", help="replay the study with a wrongly scaled belief on the same worlds",
                           description="Scale the belief's lengthscales and amplitude by a grid of factors, "
                           "replay every policy on the same worlds in every cell, and rank policies by their "
                           "worst shortfall against the best policy of each cell (minimax regret), with the raw "
                           "worst failure risk beside it. Writes DIR/sweep/ (default results/<name>/sweep).",
                           epilog=_EPILOG_SWEEP, formatter_class=argparse.RawDescriptionHelpFormatter)
    sweep.add_argument("study", metavar="STUDY.toml")
    sweep.add_argument("--jobs", type=_jobs, default=1, metavar="N", help="worker processes (-1: all cores; default 1)")
    sweep.add_argument("--out", metavar="DIR", help="results folder (default results/<study name>)")
    sweep.add_argument("--replicates", type=_replicates, metavar="N", help="override [sweep] replicates")
    sweep.add_argument("--quiet", action="store_true", help="no progress bar")

    cal = sub.add_parser("calibrate", help="fit a world prior to past runs (prints TOML)",
                         description="Fit Gaussian-process hyperparameters (lengthscale per input, amplitude, "
                         "constant mean, noise, a level correlation per text column) to a CSV of past runs by maximum marginal likelihood, and "
                         "print [space] and [world] tables for a study.",
                         epilog=_EPILOG_CALIBRATE, formatter_class=argparse.RawDescriptionHelpFormatter)
    cal.add_argument("data", metavar="DATA.csv")
    cal.add_argument("--response", required=True, metavar="COLUMN", help="column holding the measured response")
    cal.add_argument("--inputs", metavar="A,B,...",
                     help="input columns (default: every other numeric column, and every text column in which a "
                     "name repeats); a text column is a categorical input, its levels in order of first appearance")
    cal.add_argument("--stepped", metavar="A[=STEP],...",
                     help="numeric input columns to write as stepped inputs, each with its step (default: the "
                     "smallest gap between its values); other columns stay continuous")
    cal.add_argument("--kernel", default="matern52", choices=[*_kernel_names(), "auto"],
                     help="kernel family, or auto to compare all by leave-one-out (default matern52)")
    cal.add_argument("--goal", default="minimize", choices=["minimize", "maximize"],
                     help="whether the response is minimised or maximised (default minimize)")
    cal.add_argument("--restarts", type=_positive_int, default=8, metavar="N",
                     help="optimiser starts per kernel (default 8)")
    cal.add_argument("--seed", type=int, default=0, help="seed for the optimiser's starting points")
    cal.add_argument("--study", metavar="NEW.toml",
                     help="write a complete study file (fitted prior, suggested campaign, target and policies) "
                     "instead of printing TOML; refused if the file exists")
    cal.add_argument("--history", action="store_true",
                     help="with --study: start every campaign from the data's runs (a [history] table)")
    cal.add_argument("--force", action="store_true", help="with --study: replace an existing file")

    new = sub.add_parser("new", help="write a study file to fill in, without data",
                         description="Write a complete study file with placeholder inputs and prior, and a "
                         "suggested campaign, target and set of policies; it runs as written, and every value "
                         "says whether it is a placeholder or a guess and what to consider.",
                         epilog=_EPILOG_NEW, formatter_class=argparse.RawDescriptionHelpFormatter)
    new.add_argument("study", metavar="NAME.toml")
    new.add_argument("--inputs", metavar="A,B,...", default="x1,x2",
                     help="names of the inputs (default x1,x2); the campaign is suggested from their number")
    new.add_argument("--goal", default="minimize", choices=["minimize", "maximize"],
                     help="whether the response is minimised or maximised (default minimize)")
    new.add_argument("--force", action="store_true", help="replace an existing file")

    report = sub.add_parser("report", help="summarise a results folder again from its stored traces",
                            description="Read traces.parquet and study.toml from a results folder and print "
                            "the summary table, without replaying any campaign.",
                            epilog=_EPILOG_REPORT, formatter_class=argparse.RawDescriptionHelpFormatter)
    report.add_argument("folder", metavar="DIR")
    report.add_argument("--success", type=_share, default=0.9, metavar="P",
                        help="chance of meeting the target for the budget plan and choice table (default 0.9)")
    report.add_argument("--jobs", type=_jobs, default=1, metavar="N",
                        help="worker processes drawing the figures (-1: all cores; default 1)")
    report.add_argument("--quiet", action="store_true", help="no progress bar")

    plan = sub.add_parser("plan", help="smallest budget at which the requested share of campaigns ends within target",
                          description="Print, for each policy, the smallest budget at which the share of simulated "
                          "campaigns whose recommendation after the budget's last trial is within the target "
                          "reaches --success, with its 95 % range and the trial from which the share stays at or "
                          "above --success. Uses the stored results of the study if they exist, otherwise runs "
                          "it first.",
                          epilog=_EPILOG_PLAN, formatter_class=argparse.RawDescriptionHelpFormatter)
    plan.add_argument("study", metavar="STUDY.toml")
    plan.add_argument("--success", type=_share, default=0.9, metavar="P", help="requested share of campaigns within target (default 0.9)")
    plan.add_argument("--jobs", type=_jobs, default=1, metavar="N", help="worker processes if the study must run")
    plan.add_argument("--out", metavar="DIR", help="results folder (default results/<study name>)")
    plan.add_argument("--replicates", type=_replicates, metavar="N", help="override [study] replicates")
    plan.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def _kernel_names():
    from .model.kernels import KERNELS
    return list(KERNELS)


def _version() -> str:
    from . import __version__
    return __version__
