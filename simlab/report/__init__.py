"""Traces and evidence in; the decision tables, figures and the self-contained report page out."""
