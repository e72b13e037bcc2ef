"""Plain tables: the prescription's zone table as CSV, US-unit columns, safe output file names.

pmap computes in SI (ha, kg/ha); :func:`us_values` converts a polygon record to acres and
lb/acre at the interface, for the CSV table and the vector attributes alike.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import os
import re
import tempfile
import unicodedata
from collections.abc import Mapping, Sequence
from numbers import Integral, Real
from pathlib import Path
from typing import Any

__all__ = [
    "HA_PER_ACRE",
    "KG_PER_LB",
    "ZONE_TABLE_COLUMNS",
    "US_TABLE_COLUMNS",
    "output_stem",
    "us_values",
    "write_zone_table_csv",
]

#: Hectares in one international acre (4,046.8564224 m2, exact since the 1959 yard and pound).
HA_PER_ACRE: float = 0.40468564224
#: Kilograms in one international avoirdupois pound (exact since 1959).
KG_PER_LB: float = 0.45359237

#: Columns of the zone table CSV: (record key, header with unit, decimals or None as is).
ZONE_TABLE_COLUMNS: tuple[tuple[str, str, int | None], ...] = (
    ("zone_id", "zone", None),
    ("class_label", "class", None),
    ("role", "role", None),
    ("basis", "basis", None),
    ("area_ha", "area (ha)", 3),
    ("mean_stp_mg_kg", "mean soil-test P (mg/kg)", 1),
    ("mean_deficiency_probability", "probability of deficiency (0-1)", 2),
    ("p2o5_kg_ha", "P2O5 rate (kg/ha)", 1),
    ("product", "product", None),
    ("product_kg_ha", "product rate (kg/ha)", 1),
    ("n_kg_ha", "N supplied (kg/ha)", 1),
    ("product_total_kg", "product total (kg)", 1),
)

#: Columns added when ``units`` is "us", computed by :func:`us_values`.
US_TABLE_COLUMNS: tuple[tuple[str, str, int | None], ...] = (
    ("area_acre", "area (acre)", 2),
    ("p2o5_lb_acre", "P2O5 rate (lb/acre)", 1),
    ("product_lb_acre", "product rate (lb/acre)", 1),
    ("product_total_lb", "product total (lb)", 1),
)

_SAFE = re.compile(r"[a-z0-9.-]+")
#: Names Windows reserves for devices (a folder cannot be called ``con``).
_RESERVED = frozenset({"con", "prn", "aux", "nul", *(f"com{i}" for i in range(1, 10)),
                       *(f"lpt{i}" for i in range(1, 10))})
#: Letters that Unicode does not decompose to ASCII.
_LETTERS = str.maketrans({"ß": "ss", "æ": "ae", "Æ": "AE", "ø": "o", "Ø": "O", "œ": "oe",
                          "Œ": "OE", "ł": "l", "Ł": "L", "đ": "d", "Đ": "D", "þ": "th"})
_MAX_PART = 40


def output_stem(field: str, farm: str = "", date: str = "") -> str:
    """A readable file-name stem naming a field's outputs: ``farm_field_date`` in safe ASCII.

    Each part is folded to ASCII (``Größe`` -> ``Grosse``); runs of anything but letters,
    digits, ``-`` and ``.`` become one ``-``; parts are cut to 40 characters; empty (or
    blank) parts are left out.  A part whose letters the folding drops (``北区``) or that is
    a Windows device name (``con``) gets 8 hex digits of the SHA-1 of its text, so it stays
    distinct.  ``output_stem("North 40", "Hillside", "2026-04-02")`` is
    ``"Hillside_North-40_2026-04-02"``.
    """
    parts = []
    for part in (farm, field, date):
        original = str(part)
        if not original.strip():
            continue
        text = unicodedata.normalize("NFKD", original.translate(_LETTERS))
        text = text.encode("ascii", "ignore").decode()
        text = re.sub(r"[^A-Za-z0-9.-]+", "-", text).strip("-.")[:_MAX_PART].strip("-.")
        kept = sum(c.isalnum() for c in text)
        wanted = sum(c.isalnum() for c in unicodedata.normalize("NFKD", original)
                     if not unicodedata.combining(c))
        if kept < min(wanted, _MAX_PART) or text.lower() in _RESERVED:
            digest = hashlib.sha1(original.encode("utf-8")).hexdigest()[:8]
            text = f"{text}-{digest}" if text else digest
        parts.append(text)
    return "_".join(parts) or "field"


def us_values(record: Mapping[str, Any]) -> dict[str, float | None]:
    """Acre and lb/acre values of a polygon record given in ha and kg/ha.

    Returns ``area_acre``, ``p2o5_lb_acre``, ``product_lb_acre``, ``product_total_lb`` and
    ``out_rate_lb_acre`` from ``area_ha``, ``p2o5_kg_ha``, ``product_kg_ha``,
    ``product_total_kg`` and ``out_rate_kg_ha``; None where the SI value is missing.
    """
    def conv(key: str, factor: float) -> float | None:
        value = record.get(key)
        return None if value is None else float(value) * factor

    return {
        "area_acre": conv("area_ha", 1.0 / HA_PER_ACRE),
        "p2o5_lb_acre": conv("p2o5_kg_ha", HA_PER_ACRE / KG_PER_LB),
        "product_lb_acre": conv("product_kg_ha", HA_PER_ACRE / KG_PER_LB),
        "product_total_lb": conv("product_total_kg", 1.0 / KG_PER_LB),
        "out_rate_lb_acre": conv("out_rate_kg_ha", HA_PER_ACRE / KG_PER_LB),
    }


def _cell(value: Any, decimals: int | None) -> str:
    """One CSV cell: empty for None/NaN, fixed decimals for numbers, text as is."""
    if value is None:
        return ""
    if isinstance(value, bool) or isinstance(value, Integral):
        return str(int(value))
    if isinstance(value, Real):
        value = float(value)
        if not math.isfinite(value):
            return ""
        if decimals is None:
            return repr(value)
        text = f"{value:.{decimals}f}"
        return text[1:] if text.startswith("-") and float(text) == 0 else text  # no "-0.0"
    return str(value)


def write_zone_table_csv(path: str | Path, rows: Sequence[Mapping[str, Any]], *,
                         units: str = "metric") -> Path:
    """Write one line per rate polygon as CSV (UTF-8, header with units), atomically.

    Parameters
    ----------
    path : path of the ``.csv`` file; replaced by a rename when complete.
    rows : per-polygon records with the keys of :data:`ZONE_TABLE_COLUMNS` (ha, mg/kg,
        kg/ha, kg); other keys are ignored, missing values give empty cells.
    units : {"metric", "us"}
        "us" adds the :data:`US_TABLE_COLUMNS` (acre, lb/acre, lb), converted here from the
        SI values.

    Numbers are rounded for reading (area 0.001 ha, rates 0.1 kg/ha, probability 0.01);
    the same rows give the same bytes (``\\n`` line ends, no byte-order mark).
    """
    if units not in ("metric", "us"):
        raise ValueError(f"units must be 'metric' or 'us', got {units!r}")
    columns = ZONE_TABLE_COLUMNS + (US_TABLE_COLUMNS if units == "us" else ())
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([header for _, header, _ in columns])
    for row in rows:
        values = {**row, **us_values(row)} if units == "us" else row
        writer.writerow([_cell(values.get(key), dec) for key, _, dec in columns])
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
            handle.write(buffer.getvalue())
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path
