"""The traces' own column names: the runner writes them, the study and calibrate refuse them as inputs."""

__all__ = ["TRACE_COLUMNS", "STOP_COLUMNS", "LIMIT_COLUMNS", "WORLD_COLUMNS"]

# Every column of traces.parquet other than the inputs. Add a new trace column here and
# runner._frame, spec (input names) and calibrate (column names) all follow; a test checks
# that the columns a replay builds are exactly these plus the inputs.
TRACE_COLUMNS = ("policy", "replicate", "trial", "round", "initial", "history", "y", "f", "lost", "regret",
                 "regret_seen", "rec_trial", "horizon")
# What stopping rules read, recorded after each trial only when a study's [[stop]] rules need it
# (simlab.stopping.record): present in the traces of such studies alone, reserved like the others.
STOP_COLUMNS = ("stop_chance", "stop_gain", "stop_gap")
# Present only in studies with [[limit]]s or [world] fails_where (Study.constrained), reserved like the others:
# the trial failed (spent the budget, returned nothing); its true values break a limit (a failed trial
# breaks none: it returned nothing to break); the recommendation after this row breaks a limit or lies
# where trials fail (that campaign has failed at this budget, whatever its regret).
LIMIT_COLUMNS = ("failed", "breaks", "rec_breaks")
# worlds.csv, one row per replicate (the input columns, named as in [space], follow "replicate").
WORLD_COLUMNS = ("replicate", "best_value", "optimum_gap", "optimum_searches", "optimum_spread", "reference",
                 "reference_from_trial")
