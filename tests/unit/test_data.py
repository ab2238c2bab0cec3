"""Strict CSV reading: what parses, and one-line refusals naming file, column and row."""

import numpy as np
import pytest

from simlab.study.data import DataError, read_table

GOOD = "feed_rate,temperature,titre\n0.5,30.0,6.1\n1.5,32.5,9.4\n2.5,35.0,7.2\n"


def write(tmp_path, content, name="runs.csv"):
    p = tmp_path / name
    p.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
    return p


def expected():
    return np.array([[0.5, 30.0, 6.1], [1.5, 32.5, 9.4], [2.5, 35.0, 7.2]])


def test_plain_file_reads_as_floats_indexed_by_spreadsheet_row(tmp_path):
    df = read_table(write(tmp_path, GOOD), columns=["feed_rate", "temperature", "titre"], role="calibration data")
    np.testing.assert_array_equal(df.to_numpy(), expected())
    assert list(df.index) == [2, 3, 4]      # header is row 1
    assert all(df.dtypes == float)


@pytest.mark.parametrize("variant", ["bom", "crlf", "semicolon", "bom+crlf+semicolon", "tab", "spaces"])
def test_spreadsheet_exports_parse_the_same(tmp_path, variant):
    text = GOOD
    if "semicolon" in variant:
        text = text.replace(",", ";")
    if variant == "tab":
        text = text.replace(",", "\t")
    if variant == "spaces":
        text = text.replace(",", ", ")
    if "crlf" in variant:
        text = text.replace("\n", "\r\n")
    data = text.encode("utf-8")
    if "bom" in variant:
        data = b"\xef\xbb\xbf" + data
    df = read_table(write(tmp_path, data), columns=["feed_rate", "temperature", "titre"], role="calibration data")
    np.testing.assert_array_equal(df.to_numpy(), expected())


def test_default_columns_skip_label_columns_and_empty_lines(tmp_path):
    text = "batch,feed_rate,titre,operator\nB1,0.5,6.1,ann\n\nB2,1.5,9.4,raj\n,,,\n"
    df = read_table(write(tmp_path, text), role="history")
    assert list(df.columns) == ["feed_rate", "titre"]
    assert df.attrs["skipped"] == ["batch", "operator"]
    assert list(df.index) == [2, 4]   # row 3 was empty; numbering still follows the file


def refusal(tmp_path, text, **kw):
    kw.setdefault("columns", ["feed_rate", "titre"])
    with pytest.raises(DataError) as info:
        read_table(write(tmp_path, text), role="calibration data", **kw)
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(str(tmp_path / "runs.csv") + ": ")
    return info.value, msg


@pytest.mark.parametrize("cell, why", [
    ("high", '"high" is not a number'),
    ("", "is blank"),
    ("   ", "is blank"),
    ("NaN", '"NaN" marks a missing value'),
    ("NA", '"NA" marks a missing value'),
    ("#N/A", '"#N/A" marks a missing value'),
    ("inf", '"inf" is infinite'),
    ("-Infinity", '"-Infinity" is infinite'),
    ('"1,234"', '"1,234" has a comma'),
    ('"12,5"', '"12,5" has a comma'),
    ("1_000", '"1_000" is not a number'),
    ("0x1A", '"0x1A" is not a number'),
])
def test_bad_cells_named_with_column_and_row(tmp_path, cell, why):
    text = f"feed_rate,titre\n0.5,6.1\n1.5,9.4\n2.5,{cell}\n"
    err, msg = refusal(tmp_path, text)
    assert err.column == "titre" and err.row == 4
    assert 'column "titre", row 4 (the header is row 1): ' in msg and why in msg


def test_short_row_is_refused_with_its_row(tmp_path):
    # a row with too few fields is an error naming the row, never a silent blank (issue 12, defect 2)
    err, msg = refusal(tmp_path, "feed_rate,titre\n0.5,6.1\n1.5\n")
    assert err.row == 3 and "has 1 fields but the header has 2 columns" in msg


def test_long_row_is_refused_with_its_row(tmp_path):
    err, msg = refusal(tmp_path, "feed_rate,titre\n0.5,6.1\n1,5,9.4\n")
    assert err.row == 3 and "has 3 fields but the header has 2 columns" in msg


def test_semicolon_file_with_decimal_commas_is_refused_not_guessed(tmp_path):
    err, msg = refusal(tmp_path, "feed_rate;titre\n0,5;6,1\n")
    assert (err.column, err.row) == ("feed_rate", 2) and '"0,5" has a comma' in msg


def test_missing_column_suggests_the_close_one(tmp_path):
    err, msg = refusal(tmp_path, GOOD, columns=["feed_rate", "titer"])
    assert err.column == "titer" and err.row is None
    assert 'did you mean "titre"?' in msg and "columns are: feed_rate, temperature, titre" in msg


def test_required_column_checked_in_default_mode(tmp_path):
    err, msg = refusal(tmp_path, GOOD, columns=None, required=["yield"])
    assert err.column == "yield" and "no such column" in msg


def test_partly_numeric_column_is_an_error_not_skipped(tmp_path):
    # a typo in one cell must not make the whole column vanish as "labels"
    err, msg = refusal(tmp_path, "feed_rate,titre\n0.5,6.1\nl.5,9.4\n", columns=None)
    assert (err.column, err.row) == ("feed_rate", 3) and '"l.5" is not a number' in msg


@pytest.mark.parametrize("content, why", [
    ("", "is empty"),
    ("\r\n\r\n", "is empty"),
    ("feed_rate,titre\n", "has a header but no data rows"),
    ("feed_rate,feed_rate\n1,2\n", "appears twice in the header"),
    ("feed_rate,,titre\n1,2,3\n", "column 2 of the header has no name"),
    (b"feed_rate,titre\n0.5,\xe96\n", "is not UTF-8 text"),
])
def test_file_level_refusals(tmp_path, content, why):
    _, msg = refusal(tmp_path, content)
    assert why in msg


def test_missing_file(tmp_path):
    with pytest.raises(DataError, match=r"nope\.csv: no such file$"):
        read_table(tmp_path / "nope.csv", columns=["a"], role="history")
