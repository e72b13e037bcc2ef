"""The messy-value rules of pmap.io.values, cell by cell and column by column."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from pmap.errors import InputError, PmapWarning
from pmap.io.values import MISSING_MARKERS, ValueParser, parse_number


@pytest.mark.parametrize(
    ("text", "thousands_commas", "expected"),
    [
        ("5,3", False, 5.3),  # decimal comma
        ("5,3", True, 5.3),  # not a thousands pattern, so still a decimal comma
        ("1.234,5", False, 1234.5),  # both marks: the last is the decimal mark
        ("1,234.5", False, 1234.5),
        ("1,234", True, 1234.0),  # quoted in a comma-separated file: thousands
        ("1,234", False, 1.234),  # in a ;- or tab-separated file: decimal comma
        ("1,234,567", False, 1234567.0),  # several commas cannot be a decimal mark
        ("-0.5", False, -0.5),
        ("2e3", False, 2000.0),
        (".5", False, 0.5),
    ],
)
def test_decimal_and_thousands_marks(text, thousands_commas, expected):
    assert parse_number(text, thousands_commas=thousands_commas) == pytest.approx(expected)


@pytest.mark.parametrize("text", ["six", "5 mg", "1.2.3", "", "<5"])
def test_not_a_number(text):
    assert parse_number(text, thousands_commas=False) is None


def _parse(cells, *, allow_below=True, rows=None):
    rows = np.arange(2, len(cells) + 2) if rows is None else rows
    parser = ValueParser("lab.csv", rows, thousands_commas=False)
    return parser(pd.Series(cells, dtype=object), "p_m3", allow_below=allow_below)


def test_missing_markers_are_nan_whatever_the_case_and_blanks():
    cells = [f"  {m.upper()} " for m in sorted(MISSING_MARKERS)] + [None, float("nan"), "7,5"]
    out = _parse(cells)
    assert np.isnan(out[:-1]).all()
    assert out[-1] == 7.5


def test_below_detection_is_half_the_limit_with_one_warning_per_column():
    # common practice, no source: half the detection limit stands in for a value below it
    with pytest.warns(PmapWarning, match=r"lab\.csv: 2 value\(s\) in column 'p_m3' were below") as rec:
        out = _parse(["<5", "< 2,4", "12"])
    assert len(rec) == 1
    np.testing.assert_allclose(out, [2.5, 1.2, 12.0])


def test_below_detection_refused_where_not_allowed():
    with pytest.raises(InputError, match=r"rows 2 \('<5'\)"):
        _parse(["<5"], allow_below=False)


def test_bad_values_name_rows_and_count_the_rest():
    cells = ["x"] * 7 + ["3"]
    with pytest.raises(InputError, match=r"lab\.csv: column 'p_m3' has values that are not numbers "
                                         r"in rows 2 \('x'\), 3 .* 6 \('x'\) and 2 more: correct them"):
        _parse(cells)


def test_numeric_columns_pass_through():
    out = _parse(pd.Series([1.5, np.nan, 3.0]).tolist())
    np.testing.assert_array_equal(np.isnan(out), [False, True, False])
    parser = ValueParser("lab.csv", np.array([2, 3]), thousands_commas=False)
    out = parser(pd.Series([4, 5]), "ph", allow_below=False)
    assert out.dtype == np.float64 and list(out) == [4.0, 5.0]


@pytest.mark.parametrize(
    ("cell", "said"),
    [("1e400", "too large for a number, it reads as infinity"),
     ("-1E+999", "too large for a number, it reads as infinity"),
     ("1e-400", "too small for a number, it reads as 0"),
     ("inf", "infinity"), ("+Infinity", "infinity"), ("1.#INF", "infinity"),
     ("-nan(ind)", "not-a-number"), ("1.#QNAN", "not-a-number"),
     ("#DIV/0!", "a spreadsheet formula error"), ("#N/A", "a spreadsheet formula error"),
     ("<1e400", "too large for a number, it reads as infinity")],
)
def test_non_finite_cells_are_errors_that_say_what_they_are(cell, said):
    with pytest.raises(InputError, match=rf"lab\.csv: column 'p_m3' has values that are not "
                                         rf"measurements in rows 3 \({re.escape(repr(cell))}: "
                                         rf"{re.escape(said)}"):
        _parse(["12", cell])


def test_zero_and_tiny_numbers_are_values():
    np.testing.assert_array_equal(_parse(["0", "0.0e5", "1e-300", "-0"]), [0.0, 0.0, 1e-300, 0.0])


def test_nan_text_stays_missing():
    # "nan" is how numpy and pandas write a missing value: a documented missing marker.
    assert np.isnan(_parse(["nan", "NaN"])).all()


def test_infinite_numbers_in_a_numeric_column_are_refused():
    parser = ValueParser("pts.gpkg", np.array([1, 2, 3]), thousands_commas=False)
    with pytest.raises(InputError, match=r"pts\.gpkg: column 'ph' holds infinite values in rows "
                                         r"3 \(-inf\)"):
        parser(pd.Series([6.0, np.nan, -np.inf]), "ph", allow_below=False)


def test_unicode_digits_are_not_numbers():
    assert parse_number("٣", thousands_commas=False) is None  # Arabic-Indic three
