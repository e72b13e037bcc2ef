"""Read a lab's sample table into checked arrays in a metric working CRS.

Two steps: :func:`read_samples` reads a CSV, GeoJSON, GeoPackage or Shapefile, finds the
columns, parses the messy values and validates them, keeping coordinates in the file's own
CRS; :func:`to_working_crs` reprojects to the working CRS and merges samples that share a
location.  :func:`load_samples` does both and is what the pipeline calls.

Value rules (one place, so the docs can quote them):

* surrounding blanks are stripped; ``n.d.``, ``nd``, ``na``, ``n/a``, ``nan``, ``-``,
  ``--`` and empty cells are missing (NaN);
* a decimal comma is read as a decimal point (``5,3`` = 5.3); where both ``.`` and ``,``
  appear, the last one is the decimal mark; in a comma-separated file a quoted value like
  ``1,234`` is read as a thousands separator (1234);
* ``<5``-style values below detection become half the detection limit (2.5), with one
  :class:`~pmap.errors.PmapWarning` per column (common practice, no source);
* anything else that is not a number is an :class:`~pmap.errors.InputError`.

Rows whose pH (or any other property) is missing are kept: each property is kriged from
the samples where it is present.  Samples whose coordinates are missing are an error.
"""

from __future__ import annotations

import io
import re
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pmap.errors import ConfigError, InputError, PmapWarning
from pmap.io.crs import is_projected_metres, normalise_crs, to_pyproj, utm_crs_for

__all__ = [
    "STP_METHODS",
    "SAMPLE_PROPERTIES",
    "SampleColumns",
    "SourceSamples",
    "SampleTable",
    "read_samples",
    "to_working_crs",
    "load_samples",
]

#: Soil-test P extraction methods pmap knows.
STP_METHODS: tuple[str, ...] = ("mehlich3_icp", "mehlich3_colorimetric", "bray1", "olsen")

#: Canonical property names with their units.
SAMPLE_PROPERTIES: dict[str, str] = {
    "ph": "pH units",
    "total_p": "mg/kg",
    "stp": "mg/kg",
    "caco3": "%",
    "clay": "%",
    "om": "%",
    "base_saturation": "%",
    "fe": "mg/kg",
    "al": "mg/kg",
    "ca": "mg/kg",
    "buffer_ph": "pH units",
}

_VECTOR_SUFFIXES = {".geojson", ".json", ".gpkg", ".shp"}
_CSV_SUFFIXES = {".csv", ".txt", ".tsv"}
_MISSING = {"", "-", "--", "na", "n/a", "n.a.", "nd", "n.d.", "n.d", "nan", "null", "none"}
_NUMBER = re.compile(r"[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?")
_THOUSANDS = re.compile(r"[+-]?\d{1,3}(,\d{3})+")
_MAX_FIELD_LAT = 80.0  # degrees; common practice, no source
_MG_KG_SUFFIX = re.compile(r"_(ppm|mg_kg|mgkg|mg_per_kg|pct|percent)$")
_LB_SUFFIX = re.compile(r"_(lbs?_?(ac|a|acre))$")

# Compact (lower case, no separators, unit suffix removed) header names, in priority order.
_LAT = ("latitude", "lat", "latdd", "latdeg")
_LON = ("longitude", "lon", "long", "lng", "londd", "londeg")
_X = ("x", "easting", "east", "xcoord", "utmx", "utme")
_Y = ("y", "northing", "north", "ycoord", "utmy", "utmn")
_ID = ("sampleid", "id", "sample", "sampleno", "samplenumber", "pointid", "labid", "name")
_PH_WATER = ("ph", "phwater", "soilph", "phh2o", "waterph", "phw", "ph11")
_PH_SALT = ("phsalt", "phcacl2", "phkcl", "saltph")
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
_PERCENT = ("caco3", "clay", "om", "base_saturation")


def _meta(doc: str) -> dict[str, str]:
    return {"unit": "", "doc": doc, "source": "common practice, no source"}


@dataclass(frozen=True)
class SampleColumns:
    """Which columns of the samples file hold what (config section ``[samples]``).

    Every column name left unset is found by matching common header names, ignoring case,
    blanks, punctuation and a unit suffix such as ``_ppm`` or ``_mg_kg``.
    """

    x_column: str | None = field(default=None, metadata=_meta(
        "column of easting (m) or, with a geographic CRS, longitude; unset: auto-detect "
        "(longitude/lon/long/lng, x/easting/east)"))
    y_column: str | None = field(default=None, metadata=_meta(
        "column of northing (m) or latitude; unset: auto-detect (latitude/lat, y/northing/north)"))
    id_column: str | None = field(default=None, metadata=_meta(
        "column of sample identifiers; unset: auto-detect (sample_id, id, sample), else row numbers"))
    ph_column: str | None = field(default=None, metadata=_meta(
        "column of soil pH (water); unset: auto-detect (ph, ph_water, soil_ph, ph_h2o; "
        "ph_salt/ph_cacl2 accepted with a warning)"))
    total_p_column: str | None = field(default=None, metadata=_meta(
        "column of total P (mg/kg); unset: auto-detect (total_p, tp, p_total, totalp)"))
    stp_column: str | None = field(default=None, metadata=_meta(
        "column of soil-test P (mg/kg); unset: auto-detect (p_m3, mehlich3_p, bray1_p, olsen_p, stp)"))
    stp_method: str | None = field(default=None, metadata=_meta(
        "soil-test P method: mehlich3_icp, mehlich3_colorimetric, bray1 or olsen; unset: "
        "inferred from the column name"))

    def __post_init__(self) -> None:
        if self.stp_method is not None and self.stp_method not in STP_METHODS:
            raise ConfigError(
                f"samples.stp_method must be one of {', '.join(STP_METHODS)}, got {self.stp_method!r}"
            )
        if (self.x_column is None) != (self.y_column is None):
            raise ConfigError("samples.x_column and samples.y_column must be set together")


@dataclass(frozen=True, eq=False)
class SourceSamples:
    """Parsed, validated samples with coordinates still in the file's CRS.

    Attributes
    ----------
    coords : numpy.ndarray, shape (n, 2)
        x, y in ``crs`` (longitude, latitude in degrees for geographic CRSs).
    values : dict of str to numpy.ndarray
        Canonical property name -> float64 values (NaN = missing); units in
        :data:`SAMPLE_PROPERTIES`.
    ids, rows, source, stp_method, source_columns
        As in :class:`SampleTable`.
    crs : str
        CRS of ``coords``.
    """

    coords: np.ndarray
    values: dict[str, np.ndarray]
    ids: np.ndarray
    crs: str
    source: str
    stp_method: str | None
    rows: np.ndarray
    source_columns: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class SampleTable:
    """Samples ready for the numerics: metric coordinates, canonical values.

    Attributes
    ----------
    coords : numpy.ndarray, shape (n, 2)
        x, y in the working CRS (m).
    values : dict of str to numpy.ndarray
        Canonical property name -> float64 array of shape (n,), NaN = missing.  pH in pH
        units, P, Fe, Al, Ca in mg/kg, CaCO3, clay, OM, base saturation in %.
    ids : numpy.ndarray of str
        Sample identifiers; merged duplicates are joined with ``+``.
    crs : str
        Working CRS (``"EPSG:NNNN"``), projected in metres.
    source : str
        Path of the samples file.
    stp_method : str or None
        Soil-test P method of ``values["stp"]`` (one of :data:`STP_METHODS`).
    rows : numpy.ndarray of int
        Row of each sample in the file, for messages: the spreadsheet row for a CSV (header
        = row 1), the 1-based feature number for a vector file.
    lonlat : numpy.ndarray, shape (n, 2)
        Longitude, latitude (degrees, WGS 84), for reports.
    source_columns : dict of str to str
        Canonical name -> header in the file.
    """

    coords: np.ndarray
    values: dict[str, np.ndarray]
    ids: np.ndarray
    crs: str
    source: str
    stp_method: str | None
    rows: np.ndarray
    lonlat: np.ndarray
    source_columns: dict[str, str] = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.coords.shape[0])

    @property
    def n(self) -> int:
        """Number of samples."""
        return len(self)

    def subset(self, keep: np.ndarray) -> SampleTable:
        """The samples where the boolean array ``keep`` is True."""
        keep = np.asarray(keep, dtype=bool)
        return SampleTable(
            self.coords[keep], {k: v[keep] for k, v in self.values.items()}, self.ids[keep],
            self.crs, self.source, self.stp_method, self.rows[keep], self.lonlat[keep],
            dict(self.source_columns),
        )


# ----------------------------------------------------------------------------- reading


def read_samples(
    path: str | Path, columns: SampleColumns = SampleColumns(), *, crs: str | None = None
) -> SourceSamples:
    """Read and validate a samples file, keeping coordinates in the file's CRS.

    Parameters
    ----------
    path : str or Path
        CSV (``,``, ``;`` or tab separated) or a point GeoJSON, GeoPackage or Shapefile.
    columns : SampleColumns
        Column names; unset ones are auto-detected.
    crs : str, optional
        CRS of projected x/y CSV columns (required for them); for a vector file without a
        CRS, the CRS to assume.  Ignored for lat/lon columns (always EPSG:4326).

    Raises
    ------
    pmap.errors.InputError
        Missing file, unreadable format, missing columns, bad values or coordinates.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"samples file not found: {path}")
    suffix = path.suffix.lower()
    if suffix in _VECTOR_SUFFIXES:
        frame, points, source_crs, rows, sep = _read_vector(path, crs)
        xy_names = None
    elif suffix in _CSV_SUFFIXES:
        frame, sep = _read_csv(path)
        rows = frame.index.to_numpy(dtype=np.int64) + 2
        xy_names, source_crs = _coordinate_columns(path, frame, columns, crs)
        points = None
    else:
        raise InputError(
            f"{path.name}: unsupported samples format {path.suffix!r}: use CSV (save a spreadsheet "
            "as CSV), GeoJSON, GeoPackage or Shapefile"
        )
    if len(frame) == 0:
        raise InputError(f"{path.name}: the samples file has no data rows")

    parse = _ValueParser(path.name, rows, thousands_commas=(sep == ","))
    if xy_names is not None:
        x = parse(frame[xy_names[0]], xy_names[0], allow_below=False)
        y = parse(frame[xy_names[1]], xy_names[1], allow_below=False)
        points = np.column_stack([x, y])
    assert points is not None
    bad = ~np.isfinite(points).all(axis=1)
    if bad.any():
        raise InputError(
            f"{path.name}: missing coordinates in rows {_rows_text(rows[bad])}: fill them in or "
            "delete those rows"
        )
    if to_pyproj(source_crs).is_geographic:
        _check_lonlat(path.name, points, rows, xy_names or ("longitude", "latitude"))

    found = _property_columns(path, frame, columns, exclude=set(xy_names or ()))
    stp_method = _stp_method(path, found, columns)
    values = {}
    for name, column in found.items():
        values[name] = parse(frame[column], column, allow_below=True)
    _check_ranges(path.name, values, found, rows)

    id_col = _id_column(path, frame, columns, exclude=set(found.values()) | set(xy_names or ()))
    if id_col is None:
        ids = np.array([f"row{r}" for r in rows], dtype=str)
    else:
        raw = frame[id_col].astype(str).str.strip().to_numpy()
        ids = np.array([v if v and v.lower() != "nan" else f"row{r}" for v, r in zip(raw, rows, strict=True)],
                       dtype=str)
        found = {**found, "sample_id": id_col}
    if xy_names is not None:
        found = {**found, "x": xy_names[0], "y": xy_names[1]}
    return SourceSamples(points.astype(np.float64), values, ids, source_crs, str(path),
                         stp_method, rows, found)


def to_working_crs(samples: SourceSamples, working_crs: str | None = None) -> SampleTable:
    """Reproject samples to the working CRS and merge samples at the same location.

    Parameters
    ----------
    samples : SourceSamples
        Output of :func:`read_samples`.
    working_crs : str, optional
        Projected CRS in metres; None: the UTM zone of the samples' centroid.

    Notes
    -----
    Samples closer than 1e-6 m after reprojection are merged: their values are averaged
    (NaN ignored) and their ids joined with ``+``, with a :class:`~pmap.errors.PmapWarning`;
    kriging cannot use coincident points.
    """
    from pyproj import Transformer

    name = Path(samples.source).name
    to_ll = Transformer.from_crs(to_pyproj(samples.crs), "EPSG:4326", always_xy=True)
    lon, lat = to_ll.transform(samples.coords[:, 0], samples.coords[:, 1])
    lonlat = np.column_stack([lon, lat]).astype(np.float64)
    if not np.isfinite(lonlat).all():
        bad = ~np.isfinite(lonlat).all(axis=1)
        raise InputError(
            f"{name}: coordinates in rows {_rows_text(samples.rows[bad])} cannot be placed on the "
            f"globe from {samples.crs}: check the CRS (--crs / grid.crs)"
        )
    if working_crs is None:
        target = utm_crs_for(float(np.mean(lon)), float(np.mean(lat)))
    else:
        target = normalise_crs(working_crs)
        if not is_projected_metres(target):
            raise InputError(
                f"working CRS {target[:60]} is not projected in metres: use a UTM zone such as "
                f"{utm_crs_for(float(np.mean(lon)), float(np.mean(lat)))}"
            )
    to_work = Transformer.from_crs(to_pyproj(samples.crs), to_pyproj(target), always_xy=True)
    x, y = to_work.transform(samples.coords[:, 0], samples.coords[:, 1])
    coords = np.column_stack([x, y]).astype(np.float64)
    table = SampleTable(coords, dict(samples.values), samples.ids.copy(), target, samples.source,
                        samples.stp_method, samples.rows.copy(), lonlat,
                        dict(samples.source_columns))
    return _merge_duplicates(table)


def load_samples(
    path: str | Path,
    columns: SampleColumns = SampleColumns(),
    *,
    input_crs: str | None = None,
    working_crs: str | None = None,
) -> SampleTable:
    """Read, validate and reproject a samples file: :func:`read_samples` + :func:`to_working_crs`.

    Parameters
    ----------
    path : str or Path
        Samples file (CSV, GeoJSON, GeoPackage, Shapefile).
    columns : SampleColumns
        Column names (config section ``[samples]``).
    input_crs : str, optional
        CRS of projected x/y CSV columns; lat/lon columns are EPSG:4326 and vector files
        carry their own CRS.
    working_crs : str, optional
        Projected metric CRS of the run; None: UTM zone of the samples' centroid.
    """
    return to_working_crs(read_samples(path, columns, crs=input_crs), working_crs)


# ----------------------------------------------------------------------------- internals


def _read_csv(path: Path) -> tuple[pd.DataFrame, str]:
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError:
        text = raw.decode("latin-1")
    header = next((line for line in text.splitlines() if line.strip()), "")
    counts = {sep: header.count(sep) for sep in (";", "\t", ",")}
    sep = max(counts, key=lambda s: counts[s])
    if counts[sep] == 0:
        raise InputError(f"{path.name}: cannot find a column separator (, ; or tab) in the header")
    try:
        frame = pd.read_csv(io.StringIO(text), sep=sep, dtype=str, keep_default_na=False,
                            skip_blank_lines=False, skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"{path.name}: cannot read as CSV: {exc}") from exc
    frame.columns = [str(c).strip() for c in frame.columns]
    empty_cols = [c for c in frame.columns
                  if c.startswith("Unnamed:") and (frame[c].str.strip() == "").all()]
    frame = frame.drop(columns=empty_cols)
    blank = frame.apply(lambda col: col.str.strip() == "").all(axis=1)
    return frame.loc[~blank], sep


def _read_vector(path: Path, crs: str | None):
    import geopandas as gpd
    import pyogrio

    try:
        layers = pyogrio.list_layers(path)
        layer = None
        if len(layers) > 1:
            points = [name for name, gtype in layers if gtype and "Point" in str(gtype)]
            layer = points[0] if points else None
        gdf = gpd.read_file(path, layer=layer)
    except Exception as exc:  # pyogrio raises several error types for unreadable files
        raise InputError(f"{path.name}: cannot read as a vector file: {exc}") from exc
    rows = np.arange(1, len(gdf) + 1, dtype=np.int64)
    if gdf.crs is None:
        if crs is None:
            raise InputError(
                f"{path.name} has no CRS; assign one in your GIS and export again (for a "
                "shapefile, the .prj file is missing), or pass --crs EPSG:NNNN"
            )
        source_crs = normalise_crs(crs)
    else:
        source_crs = normalise_crs(gdf.crs)
    geoms = gdf.geometry
    missing = geoms.isna().to_numpy() | geoms.is_empty.to_numpy()
    if missing.any():
        raise InputError(f"{path.name}: features {_rows_text(rows[missing])} have no geometry: "
                         "delete them or give them a point")
    kinds = geoms.geom_type.to_numpy()
    single_multi = (kinds == "MultiPoint") & (geoms.count_geometries().to_numpy() == 1)
    not_point = (kinds != "Point") & ~single_multi
    if not_point.any():
        raise InputError(
            f"{path.name}: samples must be points; features {_rows_text(rows[not_point])} are "
            f"{kinds[not_point][0]}: export the sample points (or their centroids)"
        )
    pts = geoms.centroid if single_multi.any() else geoms
    points = np.column_stack([pts.x.to_numpy(), pts.y.to_numpy()])
    frame = pd.DataFrame(gdf.drop(columns=gdf.geometry.name))
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame.reset_index(drop=True), points, source_crs, rows, "vector"


def _compact(name: str) -> tuple[str, bool]:
    """Compact form of a header and whether it carries a lb/acre unit suffix."""
    s = str(name).strip().lower().replace("%", "_pct").replace("µ", "u")
    s = re.sub(r"[^0-9a-z]+", "_", s).strip("_")
    is_lb = bool(_LB_SUFFIX.search(s))
    s = _LB_SUFFIX.sub("", s)
    s = _MG_KG_SUFFIX.sub("", s)
    return s.replace("_", ""), is_lb


def _find(frame: pd.DataFrame, candidates: Sequence[str], exclude: Iterable[str] = ()) -> str | None:
    excluded = set(exclude)
    compact = {c: _compact(c)[0] for c in frame.columns if c not in excluded}
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


def _coordinate_columns(path: Path, frame: pd.DataFrame, columns: SampleColumns,
                        crs: str | None) -> tuple[tuple[str, str], str]:
    if columns.x_column is not None and columns.y_column is not None:
        xy = (_named(path, frame, columns.x_column, "x_column"),
              _named(path, frame, columns.y_column, "y_column"))
        if crs is not None:
            return xy, normalise_crs(crs)
        if _compact(xy[0])[0] in _LON and _compact(xy[1])[0] in _LAT:
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


def _property_columns(path: Path, frame: pd.DataFrame, columns: SampleColumns,
                      exclude: set[str]) -> dict[str, str]:
    found: dict[str, str] = {}
    taken = set(exclude)

    def claim(key: str, col: str | None) -> None:
        if col is not None:
            found[key] = col
            taken.add(col)

    if columns.ph_column is not None:
        claim("ph", _named(path, frame, columns.ph_column, "ph_column"))
        if _compact(found["ph"])[0] in _PH_SALT:
            _warn_salt(path, found["ph"])
    else:
        claim("ph", _find(frame, _PH_WATER, taken))
        if "ph" not in found:
            claim("ph", _find(frame, _PH_SALT, taken))
            if "ph" in found:
                _warn_salt(path, found["ph"])
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
    for key, col in found.items():
        if _compact(col)[1]:
            raise InputError(
                f"{path.name}: column {col!r} ({key}) looks like lb/acre; pmap reads P and "
                "nutrients in mg/kg (ppm): convert the column (lb/acre / 2 for a 2-million-lb "
                "furrow slice) and rename it"
            )
    return found


def _warn_salt(path: Path, col: str) -> None:
    warnings.warn(
        f"{path.name}: using salt pH column {col!r} as pH; pmap's pH thresholds assume water pH "
        "(salt pH reads lower), so classes near a threshold may shift",
        PmapWarning, stacklevel=4,
    )


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
    key = _compact(col)[0]
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


def _stp_method(path: Path, found: dict[str, str], columns: SampleColumns) -> str | None:
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
    return method


def _id_column(path: Path, frame: pd.DataFrame, columns: SampleColumns, exclude: set[str]) -> str | None:
    if columns.id_column is not None:
        return _named(path, frame, columns.id_column, "id_column")
    return _find(frame, _ID, exclude)


class _ValueParser:
    """Turns one column of messy lab values into float64, following the module rules."""

    def __init__(self, file_name: str, rows: np.ndarray, *, thousands_commas: bool) -> None:
        self.file_name = file_name
        self.rows = rows
        self.thousands_commas = thousands_commas

    def __call__(self, series: pd.Series, column: str, *, allow_below: bool) -> np.ndarray:
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
            if text.lower() in _MISSING:
                continue
            if allow_below and text.startswith("<"):
                limit = self._number(text[1:].strip())
                if limit is not None and limit >= 0:
                    out[i] = limit / 2.0
                    below.append(text)
                    continue
            value = self._number(text)
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

    def _number(self, text: str) -> float | None:
        if "," in text:
            if "." in text:
                if text.rfind(",") > text.rfind("."):
                    text = text.replace(".", "").replace(",", ".")
                else:
                    text = text.replace(",", "")
            elif self.thousands_commas and _THOUSANDS.fullmatch(text):
                text = text.replace(",", "")
            elif text.count(",") == 1:
                text = text.replace(",", ".")
            else:
                text = text.replace(",", "")
        if not _NUMBER.fullmatch(text):
            return None
        return float(text)


def _rows_text(rows: np.ndarray, limit: int = 5) -> str:
    rows = np.asarray(rows)
    shown = ", ".join(str(int(r)) for r in rows[:limit])
    return shown + (f" and {rows.size - limit} more" if rows.size > limit else "")


def _values_text(rows: np.ndarray, values: np.ndarray, limit: int = 5) -> str:
    pairs = [f"{int(r)} ({v:g})" for r, v in zip(rows[:limit], values[:limit], strict=True)]
    return ", ".join(pairs) + (f" and {rows.size - limit} more" if rows.size > limit else "")


def _check_lonlat(name: str, points: np.ndarray, rows: np.ndarray, cols: Sequence[str]) -> None:
    lon, lat = points[:, 0], points[:, 1]
    # Beyond 80 degrees there is no farmland: such a latitude is a longitude in the wrong column.
    bad_lat = np.abs(lat) > _MAX_FIELD_LAT
    if bad_lat.any():
        swapped = bad_lat & (np.abs(lon) <= _MAX_FIELD_LAT) & (np.abs(lat) <= 180)
        note = (f"; the values look swapped with {cols[0]!r}: exchange the two column names"
                if swapped[bad_lat].all() else
                ": projected coordinates? name the columns x/y and pass --crs EPSG:NNNN")
        raise InputError(
            f"{name}: latitude outside -{_MAX_FIELD_LAT:g}..{_MAX_FIELD_LAT:g} (no farmland "
            f"beyond) in column {cols[1]!r}, rows {_values_text(rows[bad_lat], lat[bad_lat])}{note}"
        )
    bad_lon = np.abs(lon) > 180
    if bad_lon.any():
        raise InputError(
            f"{name}: longitude outside -180..180 in column {cols[0]!r}, rows "
            f"{_values_text(rows[bad_lon], lon[bad_lon])}: projected coordinates? name the "
            "columns x/y and pass --crs EPSG:NNNN"
        )


def _check_ranges(name: str, values: dict[str, np.ndarray], found: dict[str, str],
                  rows: np.ndarray) -> None:
    checks: list[tuple[str, float, float, str]] = [
        ("ph", 2.0, 11.0, "soil pH must lie in 2-11: check the column"),
        ("buffer_ph", 2.0, 11.0, "buffer pH must lie in 2-11: check the column"),
        ("total_p", 0.0, np.inf, "P cannot be negative: check the column"),
        ("stp", 0.0, np.inf, "P cannot be negative: check the column"),
        ("fe", 0.0, np.inf, "a concentration cannot be negative"),
        ("al", 0.0, np.inf, "a concentration cannot be negative"),
        ("ca", 0.0, np.inf, "a concentration cannot be negative"),
    ]
    checks += [(k, 0.0, 100.0, "a percentage must lie in 0-100") for k in _PERCENT]
    for key, lo, hi, fix in checks:
        if key not in values:
            continue
        v = values[key]
        with np.errstate(invalid="ignore"):
            bad = np.isfinite(v) & ((v < lo) | (v > hi))
        if bad.any():
            raise InputError(
                f"{name}: column {found[key]!r} ({key}) out of range in rows "
                f"{_values_text(rows[bad], v[bad])}: {fix}"
            )


def _merge_duplicates(table: SampleTable, tol_m: float = 1e-6) -> SampleTable:
    from scipy.spatial import cKDTree

    n = len(table)
    if n < 2:
        return table
    pairs = cKDTree(table.coords).query_pairs(tol_m, output_type="ndarray")
    if pairs.size == 0:
        return table
    parent = np.arange(n)

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return int(i)

    for a, b in pairs:
        ra, rb = root(int(a)), root(int(b))
        if ra != rb:
            parent[max(ra, rb)] = min(ra, rb)
    group = np.array([root(i) for i in range(n)])
    firsts = np.flatnonzero(group == np.arange(n))
    members = [np.flatnonzero(group == g) for g in firsts]

    def mean_of(arr: np.ndarray) -> np.ndarray:
        out = []
        for m in members:
            finite = arr[m][np.isfinite(arr[m])]
            out.append(finite.mean() if finite.size else np.nan)
        return np.asarray(out, dtype=np.float64)

    merged_ids = np.array(["+".join(table.ids[m]) for m in members], dtype=str)
    groups = [merged_ids[k] for k, m in enumerate(members) if m.size > 1]
    shown = ", ".join(groups[:5]) + (f" and {len(groups) - 5} more" if len(groups) > 5 else "")
    warnings.warn(
        f"{Path(table.source).name}: {len(groups)} group(s) of samples share a location "
        f"({shown}); their values were averaged into one sample each, as kriging cannot use "
        "coincident points",
        PmapWarning, stacklevel=3,
    )
    return SampleTable(
        np.vstack([table.coords[m].mean(axis=0) for m in members]),
        {k: mean_of(v) for k, v in table.values.items()},
        merged_ids, table.crs, table.source, table.stp_method,
        table.rows[firsts], np.vstack([table.lonlat[m].mean(axis=0) for m in members]),
        dict(table.source_columns),
    )

