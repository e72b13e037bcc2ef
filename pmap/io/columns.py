"""Which column of a lab's sample table holds what: the ``[samples]`` section and header detection.

Headers are compared in a compact form: lower case, without blanks or punctuation and
without the unit they name (``Total P (%)``, ``p_m3_ppm``, ``clay [g/kg]``: see
:mod:`pmap.io.units`, which also converts the values).  Each property has a list of
candidate names in priority order; a column the user names in :class:`SampleColumns`
always wins.  The soil-test P method is taken from the config or inferred from the name of
the soil-test P column (``p_m3`` -> ``mehlich3_icp``, ``bray1_p`` -> ``bray1``, ...).
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from pmap._checks import check_choice, check_number
from pmap.errors import ConfigError, InputError, PmapWarning
from pmap.io.crs import normalise_crs
from pmap.io.units import split_unit
from pmap.soil.conversions import SOIL_TEST_METHODS

__all__ = [
    "STP_METHODS",
    "SampleColumns",
    "find_coordinate_columns",
    "find_property_columns",
    "find_id_column",
    "stp_method_of",
    "is_recognised_header",
]

#: Soil-test P extraction methods pmap knows.
STP_METHODS: tuple[str, ...] = SOIL_TEST_METHODS

# Compact (lower case, no separators, unit removed) header names, in priority order.
_LAT = ("latitude", "lat", "latdd", "latdeg")
_LON = ("longitude", "lon", "long", "lng", "londd", "londeg")
_X = ("x", "easting", "east", "xcoord", "utmx", "utme")
_Y = ("y", "northing", "north", "ycoord", "utmy", "utmn")
_ID = ("sampleid", "id", "sample", "sampleno", "samplenumber", "pointid", "labid", "name")
_PH_WATER = ("ph", "phwater", "soilph", "phh2o", "waterph", "phw", "ph11")
_PH_SALT = ("phsalt", "phcacl2", "phkcl", "saltph")
#: What a pH column can measure (``samples.ph_kind``).
PH_KINDS: tuple[str, ...] = ("auto", "water", "cacl2", "kcl")
_TOTAL_P = ("totalp", "tp", "ptotal", "totalphosphorus")
_STP_NAMED = {
    "mehlich3_colorimetric": ("m3pcol", "pm3col", "m3pcolorimetric", "pm3colorimetric",
                              "mehlich3pcol", "mehlich3pcolorimetric"),
    "mehlich3_icp": ("pm3", "mehlich3p", "m3p", "pmehlich3", "mehlich3", "mehlichp", "m3picp",
                     "pm3icp", "mehlich3picp"),
    "bray1": ("bray1p", "pbray", "pbray1", "brayp", "bray1", "brayp1"),
    "olsen": ("olsenp", "polsen", "olsen"),
}
_STP_GENERIC = ("stp", "soiltestp", "availablep", "p")
_OPTIONAL = {
    "caco3": ("caco3", "carbonate", "calciumcarbonate"),
    "clay": ("clay", "claycontent"),
    "om": ("om", "organicmatter", "som", "soilom"),
    "base_saturation": ("basesaturation", "basesat", "bs"),
    "fe": ("fe", "iron"),
    "al": ("al", "aluminium", "aluminum"),
    "ca": ("ca", "calcium"),
    "buffer_ph": ("bufferph", "bph", "phbuffer", "buffer"),
}

_KNOWN: frozenset[str] = frozenset(
    _LAT + _LON + _X + _Y + _ID + _PH_WATER + _PH_SALT + _TOTAL_P + _STP_GENERIC
    + tuple(n for names in _STP_NAMED.values() for n in names)
    + tuple(n for names in _OPTIONAL.values() for n in names)
)


def _column(doc: str) -> Any:
    """A ``str | None`` column field, unset by default, with its documentation."""
    return field(default=None, metadata={"unit": "", "doc": doc, "source": "common practice, no source"})


@dataclass(frozen=True)
class SampleColumns:
    """Which columns of the samples file hold what (config section ``[samples]``).

    Every column name left unset is found by matching common header names, ignoring case,
    blanks, punctuation and the unit the header names (``(%)``, ``_ppm``, ``[g/kg]``).
    """

    x_column: str | None = _column(
        "column of easting (m) or, with a geographic CRS, longitude; unset: auto-detect "
        "(longitude/lon/long/lng, x/easting/east)")
    y_column: str | None = _column(
        "column of northing (m) or latitude; unset: auto-detect (latitude/lat, y/northing/north)")
    id_column: str | None = _column(
        "column of sample identifiers; unset: auto-detect (sample_id, id, sample), else row numbers")
    ph_column: str | None = _column(
        "column of soil pH; unset: auto-detect (ph, ph_water, soil_ph, ph_h2o; else "
        "ph_cacl2, ph_kcl, ph_salt, converted to water pH, see ph_kind)")
    ph_kind: str = field(default="auto", metadata={
        "unit": "",
        "doc": "what the pH column measures: water, cacl2 (0.01 M CaCl2), kcl (1 M KCl), or "
        "auto (from the column name; salt pH columns count as cacl2)",
        "source": "common practice, no source"})
    ph_cacl2_offset: float = field(default=0.6, metadata={
        "unit": "pH units",
        "doc": "water pH = CaCl2 pH + this offset (CaCl2 usually reads 0.5-1.0 lower)",
        "source": "Rayment & Lyons, Soil Chemical Methods - Australasia, method 4B1 (0.5-1.0 "
        "lower, Conyers & Davey 1988)"})
    ph_kcl_offset: float = field(default=0.8, metadata={
        "unit": "pH units",
        "doc": "water pH = KCl pH + this offset (KCl reads below CaCl2)",
        "source": "from memory, unverified (order H2O > CaCl2 > KCl: USDA Soil Survey "
        "Laboratory Methods Manual, 1992)"})
    total_p_column: str | None = _column(
        "column of total P (mg/kg); unset: auto-detect (total_p, tp, p_total, totalp)")
    stp_column: str | None = _column(
        "column of soil-test P (mg/kg); unset: auto-detect (p_m3, mehlich3_p, bray1_p, olsen_p, stp)")
    stp_method: str | None = _column(
        "soil-test P method: mehlich3_icp, mehlich3_colorimetric, bray1 or olsen; unset: "
        "inferred from the column name")
    duplicate_tolerance_m: float | None = field(default=None, metadata={
        "unit": "m",
        "doc": "samples closer than this are merged like exact duplicates (values averaged, "
        "with a warning); unset: a quarter of grid.cell_size_m",
        "source": "common practice, no source"})

    def __post_init__(self) -> None:
        if self.stp_method is not None:
            check_choice("samples.stp_method", self.stp_method, STP_METHODS)
        check_choice("samples.ph_kind", self.ph_kind, PH_KINDS)
        for key in ("ph_cacl2_offset", "ph_kcl_offset"):
            check_number(f"samples.{key}", getattr(self, key), ge=0, le=2)
        if self.duplicate_tolerance_m is not None:
            check_number("samples.duplicate_tolerance_m", self.duplicate_tolerance_m, ge=0,
                         finite=True)
        if (self.x_column is None) != (self.y_column is None):
            raise ConfigError("samples.x_column and samples.y_column must be set together")


def find_coordinate_columns(
    path: Path, frame: pd.DataFrame, columns: SampleColumns, crs: str | None
) -> tuple[tuple[str, str], str]:
    """The x and y (or longitude and latitude) columns of a table, and their CRS.

    Parameters
    ----------
    path : Path
        The samples file, for messages.
    frame : pandas.DataFrame
        The table, all columns as text.
    columns : SampleColumns
        Columns the user named.
    crs : str, optional
        CRS of projected x/y columns; lat/lon columns are always EPSG:4326.

    Raises
    ------
    pmap.errors.InputError
        No coordinate columns, a named column that is missing, or x/y without a CRS.
    """
    if columns.x_column is not None and columns.y_column is not None:
        xy = (_named(path, frame, columns.x_column, "x_column"),
              _named(path, frame, columns.y_column, "y_column"))
        if crs is not None:
            return xy, normalise_crs(crs)
        if _compact(xy[0]) in _LON and _compact(xy[1]) in _LAT:
            return xy, "EPSG:4326"
        return xy, _no_crs(path, frame, xy)
    lon, lat = _find(frame, _LON), _find(frame, _LAT)
    if lon is not None and lat is not None:
        return (lon, lat), "EPSG:4326"
    x, y = _find(frame, _X), _find(frame, _Y)
    if x is not None and y is not None:
        if crs is None:
            return (x, y), _no_crs(path, frame, (x, y))
        return (x, y), normalise_crs(crs)
    raise InputError(
        f"{path.name}: no coordinate columns found (columns: {_columns_text(frame)}): name them "
        "lat/lon or x/y, or set samples.x_column and samples.y_column"
    )


def find_property_columns(
    path: Path, frame: pd.DataFrame, columns: SampleColumns, exclude: set[str]
) -> dict[str, str]:
    """Canonical property name -> column of the table, for pH, P and the optional properties.

    A salt-pH column is accepted as pH with a :class:`~pmap.errors.PmapWarning`.

    Raises
    ------
    pmap.errors.InputError
        No pH column, no P column (total or soil-test), several soil-test P columns or a
        named column that is missing.
    """
    found: dict[str, str] = {}
    taken = set(exclude)

    def claim(key: str, col: str | None) -> None:
        if col is not None:
            found[key] = col
            taken.add(col)

    if columns.ph_column is not None:
        claim("ph", _named(path, frame, columns.ph_column, "ph_column"))
    else:
        claim("ph", _find(frame, _PH_WATER, taken))
        if "ph" not in found:
            claim("ph", _find(frame, _PH_SALT, taken))
    if "ph" not in found:
        raise InputError(
            f"{path.name}: no pH column found (columns: {_columns_text(frame)}): name it ph or "
            "ph_water, or set samples.ph_column"
        )
    if columns.total_p_column is not None:
        claim("total_p", _named(path, frame, columns.total_p_column, "total_p_column"))
    else:
        claim("total_p", _find(frame, _TOTAL_P, taken))
    if columns.stp_column is not None:
        claim("stp", _named(path, frame, columns.stp_column, "stp_column"))
    else:
        claim("stp", _auto_stp(path, frame, columns, taken))
    if "total_p" not in found and "stp" not in found:
        raise InputError(
            f"{path.name}: no phosphorus column found (columns: {_columns_text(frame)}): name "
            "total P total_p (mg/kg) and/or soil-test P e.g. p_m3, bray1_p, olsen_p, or set "
            "samples.total_p_column / samples.stp_column"
        )
    for key, names in _OPTIONAL.items():
        claim(key, _find(frame, names, taken))
    return found


def find_id_column(
    path: Path, frame: pd.DataFrame, columns: SampleColumns, exclude: set[str]
) -> str | None:
    """The column of sample identifiers, or None when the table has none."""
    if columns.id_column is not None:
        return _named(path, frame, columns.id_column, "id_column")
    return _find(frame, _ID, exclude)


def stp_method_of(path: Path, found: dict[str, str], columns: SampleColumns) -> str | None:
    """Soil-test P method of ``found["stp"]``: from the config, else from the column name.

    Raises
    ------
    pmap.errors.InputError
        The table has a soil-test P column whose method neither the config nor its name tells.
    """
    if "stp" not in found:
        return columns.stp_method
    if columns.stp_method is not None:
        return columns.stp_method
    method = _infer_method(found["stp"])
    if method is None:
        raise InputError(
            f"{path.name}: cannot tell the soil-test P method of column {found['stp']!r}: set "
            f"samples.stp_method to one of {', '.join(STP_METHODS)}"
        )
    if method == "mehlich3_icp" and "icp" not in found["stp"].lower():
        warnings.warn(
            f"{path.name}: column {found['stp']!r} read as Mehlich-3 P measured by ICP; if the "
            "lab measured it colorimetrically, set samples.stp_method = "
            "'mehlich3_colorimetric' (the class limits differ)",
            PmapWarning,
            stacklevel=3,
        )
    return method


def is_recognised_header(name: str, columns: SampleColumns = SampleColumns()) -> bool:
    """Whether a header is one pmap knows (a coordinate, id, pH, P or optional property
    name, or a column named in ``columns``); used to find the header line of a table."""
    named = {getattr(columns, f) for f in ("x_column", "y_column", "id_column", "ph_column",
                                           "total_p_column", "stp_column")}
    named = {n.strip().lower() for n in named if n}
    if str(name).strip().lower() in named:
        return True
    return _compact(name) in _KNOWN


def _compact(name: str) -> str:
    """Compact form of a header: its name without the unit (:func:`~pmap.io.units.split_unit`),
    lower case, without blanks or punctuation."""
    s = split_unit(name)[0].lower().replace("µ", "u")
    return re.sub(r"[^0-9a-z]+", "", s)


def _find(frame: pd.DataFrame, candidates: Sequence[str], exclude: Iterable[str] = ()) -> str | None:
    excluded = set(exclude)
    compact = {c: _compact(c) for c in frame.columns if c not in excluded}
    for cand in candidates:
        for col, key in compact.items():
            if key == cand:
                return col
    return None


def _named(path: Path, frame: pd.DataFrame, name: str, key: str) -> str:
    """The column the user named in the config (exact, then case- and blank-insensitive)."""
    if name in frame.columns:
        return name
    for col in frame.columns:
        if col.strip().lower() == name.strip().lower():
            return col
    raise InputError(f"{path.name}: samples.{key} = {name!r} is not a column; columns are: "
                     f"{_columns_text(frame)}")


def _columns_text(frame: pd.DataFrame) -> str:
    return ", ".join(str(c) for c in frame.columns)


def _no_crs(path: Path, frame: pd.DataFrame, xy: tuple[str, str]) -> str:
    hint = ""
    x = pd.to_numeric(frame[xy[0]].str.replace(",", ".", regex=False), errors="coerce")
    y = pd.to_numeric(frame[xy[1]].str.replace(",", ".", regex=False), errors="coerce")
    if x.notna().any() and (x.abs() <= 180).all() and (y.abs() <= 90).all():
        hint = " (the values look like degrees: then pass --crs EPSG:4326)"
    raise InputError(
        f"{path.name} has projected x/y columns ({xy[0]}, {xy[1]}) but no CRS: pass --crs "
        f"EPSG:NNNN or set grid.crs{hint}"
    )


def ph_kind_of(column: str, columns: SampleColumns) -> str:
    """What a pH column measures: ``samples.ph_kind``, or with "auto" its name's hint."""
    if columns.ph_kind != "auto":
        return columns.ph_kind
    name = _compact(column)
    if name in _PH_SALT:
        return "kcl" if "kcl" in name else "cacl2"
    return "water"


def _auto_stp(path: Path, frame: pd.DataFrame, columns: SampleColumns, taken: set[str]) -> str | None:
    hits = {m: _find(frame, names, taken) for m, names in _STP_NAMED.items()}
    hits = {m: c for m, c in hits.items() if c is not None}
    if columns.stp_method is not None and columns.stp_method in hits:
        return hits[columns.stp_method]
    if len(hits) > 1:
        raise InputError(
            f"{path.name}: several soil-test P columns ({', '.join(hits.values())}): set "
            "samples.stp_column (and samples.stp_method) to choose one"
        )
    if hits:
        return next(iter(hits.values()))
    return _find(frame, _STP_GENERIC, taken)


def _infer_method(col: str) -> str | None:
    key = _compact(col)
    for method, names in _STP_NAMED.items():
        if key in names:
            return method
    if "mehlich" in key or "m3" in key:
        return "mehlich3_colorimetric" if "col" in key else "mehlich3_icp"
    if "bray1" in key or key.startswith("bray") and "2" not in key:
        return "bray1"
    if "olsen" in key:
        return "olsen"
    return None
