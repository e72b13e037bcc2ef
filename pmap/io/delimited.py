"""Delimited text tables as labs export them: encodings, separators, preamble lines.

:func:`read_delimited` turns a CSV/TSV file into a table of text cells:

* spreadsheet files (xlsx/ods, a zip; legacy xls, an OLE2 file) are recognised by their
  first bytes whatever their suffix, and refused with the advice to save them as CSV;
* the text encoding follows the byte-order mark (UTF-8, UTF-16 LE/BE, UTF-32); UTF-16
  without a mark is recognised by its zero bytes; otherwise UTF-8, then cp1252 (Windows
  Western European), then latin-1, with a note when not UTF-8;
* the separator (``,``, ``;`` or tab) and the header line are found together: the header is
  the first line that has at least the table's usual number of fields (the most common
  count among the lines below it, trailing empty fields ignored) and holds a column name
  pmap knows (:func:`pmap.io.columns.is_recognised_header`).  Lines above it (a lab's name,
  a report date, blank lines) are skipped with a note.
"""

from __future__ import annotations

import csv
import io
import re
import warnings
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from pmap.errors import InputError
from pmap.io.columns import SampleColumns, is_recognised_header

__all__ = ["SPREADSHEET_SUFFIXES", "DelimitedTable", "spreadsheet_kind", "refuse_spreadsheet",
           "decode_text", "read_delimited"]

#: Suffixes of spreadsheet files, and the kind named in messages.
SPREADSHEET_SUFFIXES: dict[str, str] = {".xlsx": "xlsx", ".xlsm": "xlsx", ".xls": "xls",
                                        ".ods": "ods"}
_SEPARATORS = (",", ";", "\t")
_SEPARATOR_NAMES = {",": "comma", ";": "semicolon", "\t": "tab"}
_HEADER_SEARCH_LINES = 100  # a preamble longer than this is not a preamble; no source
_COUNT_LINES = 2000  # lines used for the table's usual field count; no source
_ZIP = b"PK\x03\x04"
_OLE2 = b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"
_DETECT_ALL = SampleColumns()


@dataclass(frozen=True)
class DelimitedTable:
    """A delimited text table read as text cells.

    Attributes
    ----------
    frame : pandas.DataFrame
        One column per header field (names stripped), all cells text; blank rows and empty
        unnamed columns removed.
    separator : str
        ``","``, ``";"`` or ``"\\t"``.
    first_row : int
        File line (1-based) of the first data row, so that row ``i`` of the original table
        is line ``frame.index[i] + first_row``.
    notes : tuple of str
        What was done that the user should know (encoding fallback, skipped lines).
    """

    frame: pd.DataFrame
    separator: str
    first_row: int
    notes: tuple[str, ...] = ()


def spreadsheet_kind(path: Path, head: bytes | None = None) -> str | None:
    """The kind of spreadsheet a file is ("xlsx", "ods", "xls"), "zip" for another zip
    archive, or None for anything else.  Judged by the first bytes, then by the suffix."""
    if head is None:
        try:
            with open(path, "rb") as fh:
                head = fh.read(4096)
        except OSError:
            head = b""
    if head.startswith(_ZIP):
        if b"opendocument.spreadsheet" in head:
            return "ods"
        if b"[Content_Types].xml" in head or b"xl/" in head:
            return "xlsx"
        return SPREADSHEET_SUFFIXES.get(path.suffix.lower(), "zip")
    if head.startswith(_OLE2):
        return "xls"
    return SPREADSHEET_SUFFIXES.get(path.suffix.lower())


def refuse_spreadsheet(path: Path, kind: str) -> InputError:
    """The error for a spreadsheet (or zip) file given where a table was expected."""
    if kind == "zip":
        return InputError(f"{path.name} is a zip archive, not CSV: unzip it and give the CSV, "
                          "GeoPackage or Shapefile inside")
    return InputError(f"{path.name} is a spreadsheet file ({kind}), not CSV: save it as CSV "
                      "(comma separated) and run again")


def decode_text(name: str, raw: bytes) -> tuple[str, str | None]:
    """Decode a text file by its byte-order mark, else UTF-8, cp1252, latin-1.

    Parameters
    ----------
    name : str
        File name, for messages.
    raw : bytes
        The file's contents.

    Returns
    -------
    text : str
        Without a byte-order mark.
    note : str or None
        Which encoding was used when it was not plain UTF-8.

    Raises
    ------
    pmap.errors.InputError
        A byte-order mark whose encoding does not decode the rest, or binary data.
    """
    boms = ((b"\xff\xfe\x00\x00", "utf-32", "UTF-32 LE"), (b"\x00\x00\xfe\xff", "utf-32", "UTF-32 BE"),
            (b"\xef\xbb\xbf", "utf-8-sig", "UTF-8"), (b"\xff\xfe", "utf-16", "UTF-16 LE"),
            (b"\xfe\xff", "utf-16", "UTF-16 BE"))
    codec = label = None
    for bom, c, lab in boms:
        if raw.startswith(bom):
            codec, label = c, lab
            break
    if codec is None:
        codec, label = _utf16_without_bom(raw)
    note = None
    if codec is not None:
        try:
            text = raw.decode(codec)
        except UnicodeDecodeError as exc:
            raise InputError(
                f"{name}: looks like {label} text but byte {exc.start} cannot be decoded as "
                f"{label}: export the table again as CSV (UTF-8)"
            ) from exc
        if label != "UTF-8":
            note = f"{name}: read as {label} text"
    else:
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            try:
                text, used = raw.decode("cp1252"), "cp1252 (Windows Western European)"
            except UnicodeDecodeError:
                text, used = raw.decode("latin-1"), "latin-1"
            note = (f"{name}: not UTF-8 (byte {exc.start} is 0x{raw[exc.start]:02x}); read as "
                    f"{used}: check accented characters in ids and headers")
    text = text.lstrip("\ufeff")
    if "\x00" in text:
        raise InputError(f"{name} holds binary data (NUL characters), not a text table: save "
                         "the table as CSV (comma separated) and run again")
    return text, note


def _utf16_without_bom(raw: bytes) -> tuple[str | None, str | None]:
    """UTF-16 without a byte-order mark: ASCII text has a zero in every other byte."""
    head = raw[:2000]
    if len(head) < 4 or len(head) % 2:
        return None, None
    even, odd = head[0::2], head[1::2]
    if odd.count(0) > 0.8 * len(odd) and even.count(0) < 0.2 * len(even):
        return "utf-16-le", "UTF-16 LE"
    if even.count(0) > 0.8 * len(even) and odd.count(0) < 0.2 * len(odd):
        return "utf-16-be", "UTF-16 BE"
    return None, None


def read_delimited(path: Path, columns: SampleColumns = _DETECT_ALL) -> DelimitedTable:
    """Read a delimited text table: encoding, separator and header line found as described
    in the module docstring.

    Parameters
    ----------
    path : Path
        A CSV/TSV file.
    columns : SampleColumns
        Column names the user set, recognised in the header line like pmap's own names.

    Raises
    ------
    pmap.errors.InputError
        A spreadsheet or binary file, an undecodable byte-order-marked file, no header line,
        a header naming a column twice, or text the CSV parser cannot read.
    """
    raw = path.read_bytes()
    kind = spreadsheet_kind(path, raw[:4096])
    if kind is not None:
        raise refuse_spreadsheet(path, kind)
    text, note = decode_text(path.name, raw)
    notes = [note] if note else []
    lines = re.split(r"\r\n|\r|\n", text)
    header, sep = _find_header(path.name, lines, columns)
    if any(line.strip() for line in lines[:header]):
        notes.append(f"{path.name}: skipped {header} line(s) above the header on line "
                     f"{header + 1}")
    names = [n.strip() for n in _fields(lines[header], sep)]
    seen = Counter(n for n in names if n)
    twice = [n for n, k in seen.items() if k > 1]
    if twice:
        raise InputError(f"{path.name}: column {twice[0]!r} appears more than once in the header "
                         f"(line {header + 1}): rename or delete the copies")
    _check_row_widths(path.name, lines, header, sep, len(names))
    try:
        with warnings.catch_warnings():
            # Rows wider than the header were refused above; the rest only have trailing
            # empty fields, which index_col=False drops (and pandas warns about).
            warnings.simplefilter("ignore", pd.errors.ParserWarning)
            frame = pd.read_csv(io.StringIO("\n".join(lines[header:])), sep=sep, dtype=str,
                                keep_default_na=False, skip_blank_lines=False,
                                skipinitialspace=True, index_col=False)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError, csv.Error) as exc:
        message = " ".join(str(exc).split())
        raise InputError(f"{path.name}: cannot read as CSV ({_SEPARATOR_NAMES[sep]} separated, "
                         f"header on line {header + 1}): {message}") from exc
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.columns.duplicated().any():
        dup = frame.columns[frame.columns.duplicated()][0]
        raise InputError(f"{path.name}: column {dup!r} appears more than once in the header "
                         f"(line {header + 1}): rename or delete the copies")
    frame = frame.fillna("")
    empty_cols = [c for c in frame.columns
                  if c.startswith("Unnamed:") and (frame[c].str.strip() == "").all()]
    frame = frame.drop(columns=empty_cols)
    if frame.shape[1]:
        blank = (frame.apply(lambda col: col.str.strip()) == "").all(axis=1)
        frame = frame.loc[~blank]
    return DelimitedTable(frame, sep, header + 2, tuple(notes))


def _check_row_widths(name: str, lines: list[str], header: int, sep: str, width: int) -> None:
    """Refuse rows with more (non-empty) fields than the header: their values would shift."""
    wide = [i + 1 for i in range(header + 1, len(lines))
            if lines[i].strip() and _width(_fields(lines[i], sep)) > width]
    if wide:
        shown = ", ".join(str(r) for r in wide[:5]) + (f" and {len(wide) - 5} more"
                                                        if len(wide) > 5 else "")
        hint = (" (decimal commas in a comma-separated file? quote such values or save with ; as "
                "the separator)" if sep == "," else "")
        raise InputError(
            f"{name}: rows {shown} have more fields than the {width} columns of the header on "
            f"line {header + 1}{hint}: fix those rows or name the extra columns"
        )


def _fields(line: str, sep: str) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=sep, skipinitialspace=True), [])
    except csv.Error:
        return line.split(sep)


def _width(fields: list[str]) -> int:
    """Number of fields up to the last non-empty one."""
    for i in range(len(fields), 0, -1):
        if fields[i - 1].strip():
            return i
    return 0


def _find_header(name: str, lines: list[str], columns: SampleColumns) -> tuple[int, str]:
    """Index of the header line and the separator (see the module docstring)."""
    shown = lines[:_COUNT_LINES]
    first = next((i for i, line in enumerate(shown) if line.strip()), None)
    if first is None:
        raise InputError(f"{name}: the samples file is empty")
    best: tuple[int, int, str] | None = None
    named: tuple[int, int, str] | None = None  # the first line with known names, any width
    widths: dict[str, list[int]] = {}
    for sep in _SEPARATORS:
        split = [_fields(line, sep) if line.strip() else [] for line in shown]
        widths[sep] = [_width(f) for f in split]
        for i in range(min(len(shown), _HEADER_SEARCH_LINES)):
            if best is not None and i > best[0]:
                break
            w = widths[sep][i]
            if w < 2 or not any(is_recognised_header(f, columns) for f in split[i]):
                continue
            if named is None or (i, -w) < named[:2]:
                named = (i, -w, sep)
            if w >= _usual_width(widths[sep][i + 1:]):
                if best is None or (i, -w) < best[:2]:
                    best = (i, -w, sep)
                break
    if best is not None:
        return best[0], best[2]
    if named is not None:  # rows wider than the header: read_delimited says which
        return named[0], named[2]
    sep = max(_SEPARATORS, key=lambda s: widths[s][first])
    usual = {s: _usual_width(widths[s][first + 1:]) for s in _SEPARATORS}
    if widths[sep][first] < 2 and max(usual.values()) < 2:
        raise InputError(f"{name}: cannot find a column separator (, ; or tab) in the header")
    if widths[sep][first] < 2 or widths[sep][first] < usual[sep]:
        table_sep = max(_SEPARATORS, key=lambda s: usual[s])
        raise InputError(
            f"{name}: cannot find the header line: no line among the first "
            f"{_HEADER_SEARCH_LINES} has the table's {usual[table_sep]} "
            f"{_SEPARATOR_NAMES[table_sep]}-separated columns and a column name pmap knows "
            "(lat/lon or x/y, sample_id, ph, total_p, p_m3, ...): delete the lines above the "
            "header, or name the columns in the [samples] section"
        )
    return first, sep


def _usual_width(widths: list[int]) -> int:
    """The most common non-zero width (the larger on a tie), 0 when there is none."""
    counts = Counter(w for w in widths if w)
    if not counts:
        return 0
    return max(counts, key=lambda w: (counts[w], w))
