"""Messy lab values to float64: decimal commas, thousands, below-detection and missing markers.

Value rules (one place, so the docs can quote them):

* surrounding blanks are stripped; ``n.d.``, ``nd``, ``na``, ``n/a``, ``nan``, ``-``,
  ``--`` and empty cells are missing (NaN);
* a decimal comma is read as a decimal point (``5,3`` = 5.3); where both ``.`` and ``,``
  appear, the last one is the decimal mark; in a comma-separated file a quoted value like
  ``1,234`` is read as a thousands separator (1234);
* ``<5``-style values below detection become half the detection limit (2.5), with one
  :class:`~pmap.errors.PmapWarning` per column (common practice, no source);
* ``nan`` is missing (it is how numpy and pandas write a missing value), but ``inf``,
  ``-inf``, ``infinity``, ``-nan(ind)``, ``1.#INF``, spreadsheet errors (``#DIV/0!``) and
  numbers too large for a float (``1e400``, read as infinity) or too small (``1e-400``,
  read as 0) are an :class:`~pmap.errors.InputError` that says what they are;
* anything else that is not a number is an :class:`~pmap.errors.InputError`.
"""

from __future__ import annotations

import math
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

_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?", re.ASCII)
_THOUSANDS = re.compile(r"[+-]?\d{1,3}(,\d{3})+", re.ASCII)
# What programs write for infinity and not-a-number (C, Python, R, MSVC, spreadsheets).
_INFINITE = re.compile(r"[+-]?(inf|infinity|1\.#inf\d*)", re.IGNORECASE)
_NOT_A_NUMBER = re.compile(r"[+-]?(nan\(\w*\)|-nan|\+nan|1\.#(qnan|snan|ind)\d*)",
                           re.IGNORECASE)
_SHEET_ERROR = re.compile(r"#(div/0|num|value|ref|name\?|n/a|null|calc|spill)!?", re.IGNORECASE)


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
            out = series.to_numpy(dtype=np.float64, na_value=np.nan)
            infinite = np.isinf(out)
            if infinite.any():
                shown = ", ".join(f"{int(r)} ({v:g})" for r, v in
                                  zip(self.rows[infinite][:5], out[infinite][:5], strict=True))
                raise InputError(
                    f"{self.file_name}: column {column!r} holds infinite values in rows "
                    f"{shown}{_more(int(infinite.sum()))}: infinity is not a measurement; write "
                    "the measured value, or leave the cell empty if there is none"
                )
            return out
        out = np.full(len(series), np.nan)
        bad: list[tuple[int, str]] = []
        odd: list[tuple[int, str, str]] = []
        below: list[str] = []
        for i, raw in enumerate(series.tolist()):
            if raw is None or (isinstance(raw, float) and np.isnan(raw)):
                continue
            if isinstance(raw, (int, float)) and not isinstance(raw, bool):
                value = float(raw)
                if math.isinf(value):
                    odd.append((int(self.rows[i]), repr(raw), "infinity"))
                out[i] = value
                continue
            text = str(raw).strip()
            if text.lower() in MISSING_MARKERS:
                continue
            if allow_below and text.startswith("<"):
                limit = parse_number(text[1:].strip(), thousands_commas=self.thousands_commas)
                if limit is not None and limit >= 0:
                    why = _not_finite(text[1:].strip(), limit)
                    if why:
                        odd.append((int(self.rows[i]), text, why))
                        continue
                    out[i] = limit / 2.0
                    below.append(text)
                    continue
            value = parse_number(text, thousands_commas=self.thousands_commas)
            if value is None:
                why = _special(text)
                if why:
                    odd.append((int(self.rows[i]), text, why))
                else:
                    bad.append((int(self.rows[i]), text))
                continue
            why = _not_finite(text, value)
            if why:
                odd.append((int(self.rows[i]), text, why))
            else:
                out[i] = value
        if odd:
            shown = ", ".join(f"{r} ({v!r}: {why})" for r, v, why in odd[:5])
            raise InputError(
                f"{self.file_name}: column {column!r} has values that are not measurements in "
                f"rows {shown}{_more(len(odd))}: write the measured value, or n.d. for a "
                "missing one"
            )
        if bad:
            shown = ", ".join(f"{r} ({v!r})" for r, v in bad[:5])
            raise InputError(
                f"{self.file_name}: column {column!r} has values that are not numbers in rows "
                f"{shown}{_more(len(bad))}: correct them, or write n.d. for a missing value"
            )
        if below:
            warnings.warn(
                f"{self.file_name}: {len(below)} value(s) in column {column!r} were below "
                f"detection (e.g. {below[0]!r}); each was replaced by half its detection limit",
                PmapWarning, stacklevel=3,
            )
        return out


def _more(count: int, limit: int = 5) -> str:
    return f" and {count - limit} more" if count > limit else ""


def _special(text: str) -> str:
    """What a non-number cell is, when it is how a program writes infinity or not-a-number."""
    if _INFINITE.fullmatch(text):
        return "infinity"
    if _NOT_A_NUMBER.fullmatch(text):
        return "not-a-number, written by a program for a failed calculation"
    if _SHEET_ERROR.fullmatch(text):
        return "a spreadsheet formula error"
    return ""


def _not_finite(text: str, value: float) -> str:
    """Why a parsed number cannot be a measurement: too large (infinity) or too small (0)."""
    if math.isinf(value):
        return "too large for a number, it reads as infinity"
    mantissa = re.split(r"[eE]", text, maxsplit=1)[0]
    if value == 0.0 and re.search(r"[1-9]", mantissa):
        return "too small for a number, it reads as 0"
    return ""
