"""Stopping rules: the study's [[stop]] tables in, what each rule reads recorded after every trial out.

rules.py holds the rules (`STOP_RULES`, one small class each, settings declared as `Option`s);
record.py the per-trial record both campaign loops fill when a rule needs the posterior. The
stopping times and what they cost are evidence: :mod:`simlab.evidence.stopping`.
"""

from .record import RecordPlan, StopLog, record_plan
from .rules import STOP_RULES, BoundGap, Confident, NoProgress, SmallGain, StopRule, make_rule

__all__ = ["STOP_RULES", "StopRule", "Confident", "SmallGain", "NoProgress", "BoundGap", "make_rule",
           "RecordPlan", "StopLog", "record_plan"]
