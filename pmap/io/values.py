"""Messy lab values to float64: decimal commas, thousands, below-detection and missing markers.

Value rules (one place, so the docs can quote them):

* surrounding blanks are stripped; ``n.d.``, ``nd``, ``na``, ``n/a``, ``nan``, ``-``,
  ``--`` and empty cells are missing (NaN);
* a decimal comma is read as a decimal point (``5,3`` = 5.3); where both ``.`` and ``,``
  appear, the last one is the decimal mark; in a comma-separated file a quoted value like
  ``1,234`` is read as a thousands separator (1234);
* ``<5``-style values below detection become half the detection limit (2.5), with one
  :class:`~pmap.errors.PmapWarning` per column (common practice, no source);
* anything else that is not a number is an :class:`~pmap.errors.InputError`.
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pandas as pd

from pmap.errors import InputError, PmapWarning

__all__ = ["MISSING_MARKERS", "ValueParser", "parse_number"]

#: Cell texts (lower case, blanks stripped) read as a missing value.
MISSING_MARKERS: frozenset[str] = frozenset(
    {"", "-", "--", "na", "n/a", "n.a.", "nd", "n.d.", "n.d", "nan", "null", "none"}
)

_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
_THOUSANDS = re.compile(r"[+-]?\d{1,3}(,\d{3})+")


def parse_number(text: str, *, thousands_commas: bool) -> float | None:
    """One cell's number, reading decimal and thousands marks by the module rules.

    Parameters
    ----------
    text : str
        The cell, blanks already stripped.
    thousands_commas : bool
        The file is comma separated, so a value like ``1,234`` (which had to be quoted) is
        read as 1234 rather than 1.234.

    Returns
    -------
    float or None
        The number, or None when ``text`` is not one.
    """
    if "," in text:
        if "." in text:
            if text.rfind(",") > text.rfind("."):
                text = text.replace(".", "").replace(",", ".")
            else:
                text = text.replace(",", "")
        elif thousands_commas and _THOUSANDS.fullmatch(text):
            text = text.replace(",", "")
        elif text.count(",") == 1:
            text = text.replace(",", ".")
        else:
            text = text.replace(",", "")
    if not _NUMBER.fullmatch(text):
        return None
    return float(text)


class ValueParser:
    """Turns one column of messy lab values into float64, following the module rules.

    Parameters
    ----------
    file_name : str
        Name of the samples file, for messages.
    rows : numpy.ndarray of int
        File row of each value, for messages.
    thousands_commas : bool
        As in :func:`parse_number`.
    """

    def __init__(self, file_name: str, rows: np.ndarray, *, thousands_commas: bool) -> None:
        self.file_name = file_name
        self.rows = rows
        self.thousands_commas = thousands_commas

    def __call__(self, series: pd.Series, column: str, *, allow_below: bool) -> np.ndarray:
        """Values of ``series`` (column ``column``) as float64, NaN where missing.

        ``allow_below`` reads ``<limit`` as half the limit; otherwise it is an error.

        Raises
        ------
        pmap.errors.InputError
            A value that is not a number; the message names the rows and values.
        """
        if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
            return series.to_numpy(dtype=np.float64, na_value=np.nan)
        out = np.full(len(series), np.nan)
        bad: list[tuple[int, str]] = []
        below: list[str] = []
        for i, raw in enumerate(series.tolist()):
            if raw is None or (isinstance(raw, float) and np.isnan(raw)):
                continue
            if isinstance(raw, (int, float)) and not isinstance(raw, bool):
                out[i] = float(raw)
                continue
            text = str(raw).strip()
            if text.lower() in MISSING_MARKERS:
                continue
            if allow_below and text.startswith("<"):
                limit = parse_number(text[1:].strip(), thousands_commas=self.thousands_commas)
                if limit is not None and limit >= 0:
                    out[i] = limit / 2.0
                    below.append(text)
                    continue
            value = parse_number(text, thousands_commas=self.thousands_commas)
            if value is None:
                bad.append((int(self.rows[i]), text))
            else:
                out[i] = value
        if bad:
            shown = ", ".join(f"{r} ({v!r})" for r, v in bad[:5])
            more = f" and {len(bad) - 5} more" if len(bad) > 5 else ""
            raise InputError(
                f"{self.file_name}: column {column!r} has values that are not numbers in rows "
                f"{shown}{more}: correct them, or write n.d. for a missing value"
            )
        if below:
            warnings.warn(
                f"{self.file_name}: {len(below)} value(s) in column {column!r} were below "
                f"detection (e.g. {below[0]!r}); each was replaced by half its detection limit",
                PmapWarning, stacklevel=3,
            )
        return out
