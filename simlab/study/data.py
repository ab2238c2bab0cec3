"""Strict reading of the team's CSV files (past runs): numbers only, every mistake named."""

from __future__ import annotations

import csv
import difflib
import io
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["DataError", "read_table"]

# A plain decimal number: optional sign, digits with at most one point, optional exponent.
# Deliberately narrower than float(): "inf", "nan", "1_000", "0x1p3" and " " are refused.
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
# Something a person meant as a number but wrote with a comma: "1,234" or "12,5".
_COMMA_NUMBER = re.compile(r"^[+-]?[\d.,]*\d[\d.,]*([eE][+-]?\d+)?$")
_MISSING = {"nan", "na", "n/a", "#n/a", "null", "none", "missing", "-", "?", "#value!", "#div/0!"}
_INFINITE = {"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"}
# Largest magnitude accepted. The fits square and sum the values (and their spread); with
# |x| <= 1e100 a sum of squares over a million rows stays far below float64's 1.8e308.
_LIMIT = 1e100


class DataError(ValueError):
    """A mistake in a data file: carries the file, the column and row (when known) and what is allowed.

    The message is one line: ``file: column "c", row r: message``. Rows are counted as a
    spreadsheet shows them: the header is row 1, the first data row is row 2.
    """

    def __init__(self, file: str, message: str, *, column: str | None = None, row: int | None = None):
        self.file, self.column, self.row, self.message = file, column, row, message
        where = []
        if column is not None:
            where.append(f'column "{column}"')
        if row is not None:
            where.append(f"row {row}" + (" (the header is row 1)" if row > 1 else ""))
        prefix = f"{file}: " + (", ".join(where) + ": " if where else "")
        super().__init__(prefix + message)


def read_table(path, *, columns: Sequence[str] | None = None, role: str = "data",
               required: Sequence[str] = (), text: Sequence[str] | bool = ()) -> pd.DataFrame:
    """Read a CSV file of numbers, refusing anything that would need a guess.

    Parameters
    ----------
    path : str or Path
        The CSV file. UTF-8 (a byte-order mark is accepted), Windows or Unix line endings.
        The separator is ``,``; if the header line holds ``;`` and no ``,`` it is ``;`` (a
        spreadsheet in a decimal-comma locale), and if it holds only tabs it is a tab.
    columns : sequence of str, optional
        Columns to return, in this order; each must exist and hold only numbers. If omitted,
        every column holding at least one number is returned (and must hold only numbers);
        columns with no number at all (labels, dates, operator names) are left out and their
        names listed in ``df.attrs["skipped"]``.
    role : str
        What the file is for, used in messages ("calibration data", "history").
    required : sequence of str
        Columns that must be present and numeric even with ``text=True`` (and, with ``columns``
        omitted, even if they hold no number).
    text : sequence of str or True
        Columns returned as text (stripped strings; a blank cell is refused) instead of numbers.
        True: every column (of ``columns``, if given) with no number at all is returned as text
        (a library's or a calibration's categorical inputs) instead of being skipped or refused;
        a column holding some numbers is still read as numbers, so text in it is an error.

    Returns
    -------
    pandas.DataFrame
        Float columns, one row per data row, index = spreadsheet row number (2, 3, ...).
        ``df.attrs["header"]`` lists every column name in the file.

    Raises
    ------
    DataError
        One line naming the file, the column and the row, for: a missing or unreadable file,
        an empty file or one with no data rows, duplicate or blank column names, a missing
        column (with a did-you-mean), rows with too many fields, and in a numeric column: text,
        blank cells, missing-value markers (NaN, NA, ...), infinities, and numbers written with
        a comma ("1,234" or "12,5": thousands separator or decimal comma, never guessed).
    """
    name = str(path)
    as_text = text
    text = _read_text(Path(path), name)
    lines = text.splitlines()
    if not lines or not any(line.strip() for line in lines):
        raise DataError(name, f"is empty; {role} needs a header line and one row per run")
    header_line = lines[0]
    if ";" in header_line and "," not in header_line:
        sep = ";"
    elif "\t" in header_line and "," not in header_line and ";" not in header_line:
        sep = "\t"
    else:
        sep = ","
    header = [h.strip() for h in next(csv.reader([header_line], delimiter=sep))]
    for i, h in enumerate(header):
        if not h:
            raise DataError(name, f"column {i + 1} of the header has no name; give every column a name "
                            "(or delete the empty column)", row=1)
    seen = {}
    for h in header:
        if h in seen:
            raise DataError(name, "appears twice in the header; column names must be unique", column=h, row=1)
        seen[h] = True
    _check_fields(name, text, sep, len(header))
    try:
        raw = pd.read_csv(io.StringIO(text), sep=sep, header=None, skiprows=1, dtype=str,
                          keep_default_na=False, na_filter=False, skip_blank_lines=False,
                          names=header, index_col=False, engine="python", on_bad_lines="error")
    except pd.errors.ParserError as exc:
        line = re.search(r"line (\d+)", str(exc))
        row = int(line.group(1)) if line else None   # pandas counts file lines, header included
        raise DataError(name, f"has more fields than the header's {len(header)} columns "
                        f"(a stray '{sep}' or an unquoted comma inside a value?)", row=row) from None
    raw.index = np.arange(2, len(raw) + 2)
    # Wholly empty lines (or lines of separators only, as spreadsheets export) carry no data.
    blank = raw.apply(lambda col: col.fillna("").str.strip() == "").all(axis=1)
    raw = raw[~blank.to_numpy()]
    if raw.empty:
        raise DataError(name, f"has a header but no data rows; {role} needs one row per run")
    raw.attrs = {}

    if columns is None:
        for c in required:
            _need(name, header, c, role)
        if as_text is True:
            as_text = [c for c in header if c not in required and not _looks_numeric(raw[c])]
        wanted = [c for c in header if c in required or c in as_text or _looks_numeric(raw[c])]
        skipped = [c for c in header if c not in wanted]
    else:
        columns = list(columns)
        for c in columns:
            _need(name, header, c, role)
        if as_text is True:
            as_text = [c for c in columns if c not in required and not _looks_numeric(raw[c])]
        wanted, skipped = columns, []
    as_text = () if as_text is True else tuple(as_text)
    out = pd.DataFrame({c: _texts(name, raw[c], c, role) if c in as_text else _numbers(name, raw[c], c, role)
                        for c in wanted}, index=raw.index)
    out.attrs["header"] = list(header)
    out.attrs["skipped"] = skipped
    out.attrs["source"] = name
    return out


def _check_fields(name: str, text: str, sep: str, width: int) -> None:
    """Every row holds as many fields as the header (blank rows aside), else a DataError.

    Read with the csv module first because pandas silently takes an extra field in the first
    data row as the row's index, shifting every value of that row one column to the right.
    """
    for k, record in enumerate(csv.reader(io.StringIO(text, newline=""), delimiter=sep)):
        if k == 0 or len(record) == width or all(not cell.strip() for cell in record):
            continue
        why = ("a stray separator or an unquoted comma inside a value?" if len(record) > width else
               "a missing value or separator? leave a cell empty as two separators in a row")
        raise DataError(name, f"has {len(record)} fields but the header has {width} columns ({why})", row=k + 1)


def _read_text(path: Path, name: str) -> str:
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise DataError(name, "no such file") from None
    except IsADirectoryError:
        raise DataError(name, "is a folder, not a CSV file") from None
    except OSError as exc:
        raise DataError(name, f"cannot be read ({exc.strerror})") from None
    try:
        return data.decode("utf-8-sig")   # utf-8-sig drops a leading byte-order mark if present
    except UnicodeDecodeError as exc:
        raise DataError(name, f"is not UTF-8 text (bad byte at position {exc.start}); "
                        "save it from the spreadsheet as \"CSV UTF-8\"") from None


def _need(name: str, header: list[str], column: str, role: str) -> None:
    if column in header:
        return
    close = difflib.get_close_matches(column, header, n=1)
    hint = f'did you mean "{close[0]}"? ' if close else ""
    raise DataError(name, f"no such column in the {role}; {hint}columns are: {', '.join(header)}",
                    column=column)


def _looks_numeric(col: pd.Series) -> bool:
    """A column someone meant as numbers: at least one cell is (or nearly is) a number."""
    cells = col.fillna("").str.strip()
    return bool(cells.str.match(_COMMA_NUMBER).any() or cells.str.lower().isin(_INFINITE).any())


def _numbers(name: str, col: pd.Series, column: str, role: str) -> np.ndarray:
    cells = col.fillna("").str.strip()
    ok = cells.str.fullmatch(_NUMBER).to_numpy()
    if not ok.all():
        row = int(col.index[np.argmin(ok)])
        cell = cells.loc[row]
        raise DataError(name, _why(cell, role), column=column, row=row)
    values = cells.astype(float).to_numpy()
    big = ~(np.abs(values) <= _LIMIT)          # also "1e400", which reads as inf
    if big.any():
        row = int(col.index[np.argmax(big)])
        raise DataError(name, f'"{cells.loc[row]}" is beyond ±{_LIMIT:g}; {role} needs numbers of a sensible size '
                        "(rescale the column, e.g. into other units)", column=column, row=row)
    return values


def _texts(name: str, col: pd.Series, column: str, role: str) -> np.ndarray:
    cells = col.fillna("").str.strip()
    blank = (cells == "").to_numpy()
    if blank.any():
        row = int(col.index[np.argmax(blank)])
        raise DataError(name, f"is blank; {role} needs a value in every cell of this column (delete the row or "
                        "fill it in)", column=column, row=row)
    return cells.to_numpy(dtype=object)


def _why(cell: str, role: str) -> str:
    low = cell.lower()
    if cell == "":
        return f"is blank; {role} needs a number in every cell of this column (delete the row or fill it in)"
    if low in _MISSING:
        return f'"{cell}" marks a missing value; {role} needs a number in every cell (delete the row or fill it in)'
    if low in _INFINITE:
        return f'"{cell}" is infinite; {role} needs finite numbers'
    if _COMMA_NUMBER.match(cell) and "," in cell:
        return (f'"{cell}" has a comma, which could be a thousands separator or a decimal comma; '
                "write plain numbers with a decimal point and no separators, e.g. 1234 or 12.5")
    return f'"{cell}" is not a number; {role} must hold plain numbers here, e.g. 31.5 or 2e-3'
