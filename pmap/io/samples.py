"""Read a lab's sample table into checked arrays in a metric working CRS.

Two steps: :func:`read_samples` reads a CSV, GeoJSON, GeoPackage or Shapefile, finds the
columns (:mod:`pmap.io.columns`), parses the messy values (:mod:`pmap.io.values`, which
states the value rules) and validates them, keeping coordinates in the file's own CRS;
:func:`to_working_crs` reprojects to the working CRS and merges samples that share a
location.  :func:`load_samples` does both and is what the pipeline calls.

Rows whose pH (or any other property) is missing are kept: each property is kriged from
the samples where it is present.  Samples whose coordinates are missing are an error.
"""

from __future__ import annotations

import io
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pmap.errors import InputError, PmapWarning
from pmap.io.columns import (
    STP_METHODS,
    SampleColumns,
    find_coordinate_columns,
    find_id_column,
    find_property_columns,
    stp_method_of,
)
from pmap.io.crs import is_projected_metres, normalise_crs, to_pyproj, utm_crs_for
from pmap.io.values import ValueParser

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
_MAX_FIELD_LAT = 80.0  # degrees; common practice, no source
_PERCENT = ("caco3", "clay", "om", "base_saturation")
_DETECT_ALL = SampleColumns()  # every column auto-detected (frozen, so a safe default)


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
    path: str | Path, columns: SampleColumns = _DETECT_ALL, *, crs: str | None = None
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
        xy_names, source_crs = find_coordinate_columns(path, frame, columns, crs)
        points = None
    else:
        raise InputError(
            f"{path.name}: unsupported samples format {path.suffix!r}: use CSV (save a spreadsheet "
            "as CSV), GeoJSON, GeoPackage or Shapefile"
        )
    if len(frame) == 0:
        raise InputError(f"{path.name}: the samples file has no data rows")

    parse = ValueParser(path.name, rows, thousands_commas=(sep == ","))
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

    found = find_property_columns(path, frame, columns, exclude=set(xy_names or ()))
    stp_method = stp_method_of(path, found, columns)
    values = {}
    for name, column in found.items():
        values[name] = parse(frame[column], column, allow_below=True)
    _check_ranges(path.name, values, found, rows)

    id_col = find_id_column(path, frame, columns, exclude=set(found.values()) | set(xy_names or ()))
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
    columns: SampleColumns = _DETECT_ALL,
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

