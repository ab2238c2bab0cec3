"""Numbers and text on the page: formatting, and every number tagged with the CSV cell it came from."""

from __future__ import annotations

import html
import math

import numpy as np
import pandas as pd

from ..evidence import compare


# ---------------------------------------------------------------------------
# number formatting: every number shown is tagged with its CSV cell
# ---------------------------------------------------------------------------
def is_missing(value):
    return value is None or value is pd.NA or (isinstance(value, float) and math.isnan(value))


def fmt_sig(value):
    """Three significant digits, plain decimals between 1e-4 and 1e6, a true minus sign."""
    v = float(value)
    if v == 0.0:
        return "0"
    magnitude = math.floor(math.log10(abs(v)))
    text = f"{v:.3g}" if magnitude < -4 or magnitude >= 6 else f"{v:.{max(2 - magnitude, 0)}f}"
    return "\u2212" + text[1:] if text.startswith("-") else text


def fmt_pct(value):
    """A share as a percentage: whole percent, one decimal near 0 % and 100 %."""
    v = 100.0 * float(value)
    if 0.0 < v < 1.0 or 99.0 < v < 100.0:
        return f"{v:.1f}"
    return f"{v:.0f}"


def fmt_int(value):
    return str(round(float(value)))


def fmt_p(value):
    """Two significant digits; "< 0.001" below 0.001 (compare.format_p)."""
    return compare.format_p(float(value))


def fmt_miss(value):
    """The complement of a share as a percentage (a miss risk read from a within-target share)."""
    return fmt_pct(1.0 - float(value))


def fmt_count(value):
    """A count of trials that may be a half (a median of an even number of campaigns): 18 or 18.5."""
    v = float(value)
    return fmt_int(v) if v == round(v) else f"{v:.1f}"


def fmt_points(value):
    """A difference of two shares in percentage points: whole points, one decimal below 1, a true
    minus sign, and 0 rather than "-0"."""
    v = 100.0 * float(value)
    text = f"{v:.1f}" if abs(v) < 1.0 else f"{v:.0f}"
    if float(text) == 0.0:
        return "0"
    return "\u2212" + text[1:] if text.startswith("-") else text


FORMATS = {"sig": fmt_sig, "pct": fmt_pct, "int": fmt_int, "p": fmt_p, "miss": fmt_miss, "count": fmt_count,
           "points": fmt_points}


class Cells:
    """Formats cells of one CSV table as tagged spans."""

    def __init__(self, name, frame):
        self.name, self.frame = name, frame.reset_index(drop=True)

    def row(self, **keys):
        """Index of the single row matching the key columns."""
        mask = np.ones(len(self.frame), dtype=bool)
        for column, value in keys.items():
            mask &= self.frame[column].astype(str).to_numpy() == str(value)
        found = np.flatnonzero(mask)
        if found.size != 1:
            raise ValueError(f"{self.name}: expected one row for {keys}, found {found.size}")
        return int(found[0])

    def value(self, row, column):
        return self.frame.at[row, column]

    def span(self, row, column, kind, *, missing="—"):
        """The cell as ``<span class="v" data-src data-row data-col [data-unit]>text</span>``."""
        value = self.frame.at[row, column]
        unit = ' data-unit="%"' if kind in ("pct", "miss", "points") else ""
        if kind == "miss":
            unit += ' data-fmt="complement"'   # shown as 1 - the cell
        text = html.escape(missing) if is_missing(value) else html.escape(FORMATS[kind](value))
        return (f'<span class="v" data-src="{self.name}" data-row="{row}" data-col="{html.escape(column)}"'
                f'{unit}>{text}</span>')

    def text(self, row, column):
        """A text cell, escaped and tagged (e.g. labels, status, evidence)."""
        value = self.frame.at[row, column]
        shown = "" if is_missing(value) else html.escape(str(value))
        return (f'<span class="t" data-src="{self.name}" data-row="{row}" data-col="{html.escape(column)}">'
                f"{shown}</span>")

    def pct(self, row, column, low, high, *, stacked=False):
        """``12 % [8–17 %]`` from three share columns (interval on its own line if `stacked`)."""
        interval = f"[{self.span(row, low, 'pct')}–{self.span(row, high, 'pct')} %]"
        if stacked:
            return f"{self.span(row, column, 'pct')} %<span class='ci'>{interval}</span>"
        return f"{self.span(row, column, 'pct')} % {interval}"

    def sig(self, row, column, low, high, *, stacked=False):
        """``0.25 [0.1–0.4]`` from three columns (interval on its own line if `stacked`)."""
        values = [self.frame.at[row, c] for c in (low, high)]
        signed = any(not is_missing(v) and float(v) < 0 for v in values)
        dash = " to " if signed else "–"  # "−0.5–−0.1" reads badly
        interval = f"[{self.span(row, low, 'sig')}{dash}{self.span(row, high, 'sig')}]"
        if stacked:
            return f"{self.span(row, column, 'sig')}<span class='ci'>{interval}</span>"
        return f"{self.span(row, column, 'sig')} {interval}"


def escape(text):
    return html.escape(str(text), quote=True)


def unit_words(study, value=None):
    """The objective's unit for the page: ``[study] units`` as written, else "objective unit(s)"
    (singular when `value` is exactly 1)."""
    if study.units:
        return escape(study.units)
    return "objective unit" if value is not None and float(value) == 1.0 else "objective units"


def unit_label(study):
    """The objective's unit as plain text for a figure's axis ("objective units" when none; "$" kept literal)."""
    return (study.units or "objective units").replace("$", r"\$")


def in_units(text, study):
    """Text a policy rule writes in "objective unit(s)" (a setting's help, its ``caution``), in the
    study's own unit (``[study] units``) when it has one; other values (None, NaN) pass through.

    The rules' words are declared in policies/, which knows no study unit when it declares a
    setting's help; the evidence code, which is given the unit, writes it directly
    (``choice_table(units=...)``)."""
    if not study.units or not isinstance(text, str):
        return text
    return text.replace("objective units", study.units).replace("objective unit", study.units)


def number(value):
    """A number from the study file (not a result), shown as written."""
    return escape(f"{value:g}")
