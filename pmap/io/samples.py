"""Read a lab's sample table into checked arrays in a metric working CRS.

Two steps: :func:`read_samples` reads a CSV (:mod:`pmap.io.delimited`: encodings,
separators, preamble lines), GeoJSON, GeoPackage or Shapefile, finds the columns
(:mod:`pmap.io.columns`), parses the messy values (:mod:`pmap.io.values`, which states the
value rules), converts them to pmap's units (:mod:`pmap.io.units`, from the unit in each
header) and validates them, keeping coordinates in the file's own CRS;
:func:`to_working_crs` reprojects to the working CRS and merges samples closer than a
tolerance.  :func:`load_samples` does both and is what the pipeline calls.

Validation has two levels: values outside physical limits (pH outside 2-11, negative P, a
percentage outside 0-100) are errors; values outside the usual range of a property
(:data:`pmap.io.units.PLAUSIBLE_RANGES`) are questioned with a warning naming the column,
rows and the likely unit mistake.

Rows whose pH (or any other property) is missing are kept: each property is kriged from
the samples where it is present.  Samples whose coordinates are missing are an error.
"""

from __future__ import annotations

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
    ph_kind_of,
    stp_method_of,
)
from pmap.io.crs import is_projected_metres, normalise_crs, to_pyproj, utm_crs_for
from pmap.io.delimited import read_delimited, refuse_spreadsheet, spreadsheet_kind
from pmap.io.units import (
    CANONICAL_UNITS,
    PLAUSIBLE_RANGES,
    PROPERTY_LABELS,
    example_header,
    split_unit,
    to_canonical,
)
from pmap.io.values import ValueParser

__all__ = [
    "STP_METHODS",
    "SAMPLE_PROPERTIES",
    "DUPLICATE_TOLERANCE_CELLS",
    "SampleColumns",
    "SourceSamples",
    "SampleTable",
    "read_samples",
    "to_working_crs",
    "load_samples",
    "duplicate_tolerance_m",
]

#: Canonical property names with their units.
SAMPLE_PROPERTIES: dict[str, str] = dict(CANONICAL_UNITS)

#: Default merge tolerance as a fraction of the grid cell size: samples a quarter cell apart
#: fall in one cell, where the map cannot tell them apart.  Common practice, no source.
DUPLICATE_TOLERANCE_CELLS: float = 0.25
_EXACT_M = 1e-6  # samples this close (m) are the same point whatever the tolerance
# Lab repeatability of each property, (absolute, relative to the mean): merged samples whose
# values spread more are named in the warning.  From memory, unverified.
_LAB_ERROR: dict[str, tuple[float, float]] = {
    "ph": (0.2, 0.0), "buffer_ph": (0.1, 0.0), "total_p": (20.0, 0.10), "stp": (2.0, 0.15),
    "fe": (5.0, 0.15), "al": (5.0, 0.15), "ca": (20.0, 0.15), "caco3": (0.5, 0.10),
    "clay": (3.0, 0.10), "om": (0.3, 0.10), "base_saturation": (5.0, 0.0),
}

_VECTOR_SUFFIXES = {".geojson", ".json", ".gpkg", ".shp"}
_CSV_SUFFIXES = {".csv", ".txt", ".tsv"}
_MAX_FIELD_LAT = 80.0  # degrees; common practice, no source
_PERCENT = tuple(k for k, unit in CANONICAL_UNITS.items() if unit == "%")
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
    ids, rows, source, stp_method, source_columns, notes
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
    notes: tuple[str, ...] = ()


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
    notes : tuple of str
        One line per thing done to the data that a reader of the results should know:
        unit conversions (``"total P: column 'Total P (%)' read as % and converted to mg/kg
        (x 10000)"``), an encoding fallback, skipped preamble lines, merged samples.
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
    notes: tuple[str, ...] = ()

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
            dict(self.source_columns), self.notes,
        )


# ----------------------------------------------------------------------------- reading


def read_samples(
    path: str | Path, columns: SampleColumns = _DETECT_ALL, *, crs: str | None = None
) -> SourceSamples:
    """Read and validate a samples file, keeping coordinates in the file's CRS.

    Parameters
    ----------
    path : str or Path
        CSV (``,``, ``;`` or tab separated; UTF-8, UTF-16 or cp1252; lines above the header
        are skipped) or a point GeoJSON, GeoPackage or Shapefile.
    columns : SampleColumns
        Column names; unset ones are auto-detected.
    crs : str, optional
        CRS of projected x/y CSV columns (required for them); for a vector file without a
        CRS, the CRS to assume.  Ignored for lat/lon columns (always EPSG:4326).

    Returns
    -------
    SourceSamples
        Values in pmap's units (:data:`SAMPLE_PROPERTIES`), converted from the unit each
        header names; each conversion is a line of ``notes``.

    Raises
    ------
    pmap.errors.InputError
        Missing file, a spreadsheet or unreadable format, missing columns, a unit that
        cannot be converted, bad values or coordinates.

    Warns
    -----
    pmap.errors.PmapWarning
        Values outside the usual range of their property (a likely unit mistake), and the
        warnings of the column and value readers.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"samples file not found: {path}")
    kind = spreadsheet_kind(path)
    if kind is not None:
        raise refuse_spreadsheet(path, kind)
    suffix = path.suffix.lower()
    notes: list[str] = []
    if suffix in _VECTOR_SUFFIXES:
        frame, points, source_crs, rows, sep = _read_vector(path, crs)
        xy_names = None
    elif suffix in _CSV_SUFFIXES:
        table = read_delimited(path, columns)
        frame, sep = table.frame, table.separator
        notes += table.notes
        rows = frame.index.to_numpy(dtype=np.int64) + table.first_row
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
        raw = parse(frame[column], column, allow_below=True)
        values[name], note = to_canonical(name, column, raw, path.name)
        if note:
            notes.append(note)
    note = _to_water_ph(path.name, values, found, columns)
    if note:
        notes.append(note)
    _check_ranges(path.name, values, found, rows)
    _check_plausible(path.name, values, found, rows)

    id_col = find_id_column(path, frame, columns, exclude=set(found.values()) | set(xy_names or ()))
    if id_col is None:
        ids = np.array([f"row{r}" for r in rows], dtype=str)
    else:
        raw_ids = frame[id_col].astype(str).str.strip().to_numpy()
        ids = np.array([v if v and v.lower() != "nan" else f"row{r}"
                        for v, r in zip(raw_ids, rows, strict=True)], dtype=str)
        found = {**found, "sample_id": id_col}
    if xy_names is not None:
        found = {**found, "x": xy_names[0], "y": xy_names[1]}
    return SourceSamples(points.astype(np.float64), values, ids, source_crs, str(path),
                         stp_method, rows, found, tuple(notes))


def to_working_crs(
    samples: SourceSamples,
    working_crs: str | None = None,
    *,
    duplicate_tolerance_m: float | None = None,
) -> SampleTable:
    """Reproject samples to the working CRS and merge samples at (nearly) the same location.

    Parameters
    ----------
    samples : SourceSamples
        Output of :func:`read_samples`.
    working_crs : str, optional
        Projected CRS in metres; None: the UTM zone of the samples' centroid.
    duplicate_tolerance_m : float, optional
        Samples closer than this (m, after reprojection) are merged; chains of close
        samples merge into one.  None or 0: only samples at the same point (1e-6 m).

    Notes
    -----
    Merged samples have their values averaged (NaN ignored), their coordinates averaged and
    their ids joined with ``+``, with a :class:`~pmap.errors.PmapWarning` naming the ids and
    rows and, where their values differ by more than the lab error, the spread; kriging
    cannot use coincident points, and near-coincident ones with different values turn a
    variogram into pure nugget.
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
    if not np.isfinite(coords).all():
        bad = ~np.isfinite(coords).all(axis=1)
        raise InputError(
            f"{name}: coordinates in rows {_rows_text(samples.rows[bad])} cannot be projected "
            f"from {samples.crs[:60]} to {target[:60]}: check them and the CRS (--crs / grid.crs)"
        )
    table = SampleTable(coords, dict(samples.values), samples.ids.copy(), target, samples.source,
                        samples.stp_method, samples.rows.copy(), lonlat,
                        dict(samples.source_columns), samples.notes)
    return _merge_duplicates(table, duplicate_tolerance_m)


def load_samples(
    path: str | Path,
    columns: SampleColumns = _DETECT_ALL,
    *,
    input_crs: str | None = None,
    working_crs: str | None = None,
    duplicate_tolerance_m: float | None = None,
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
    duplicate_tolerance_m : float, optional
        Samples closer than this (m) are merged (:func:`to_working_crs`); the pipeline
        passes :func:`duplicate_tolerance_m` of the config.  None: exact duplicates only.
    """
    return to_working_crs(read_samples(path, columns, crs=input_crs), working_crs,
                          duplicate_tolerance_m=duplicate_tolerance_m)


def duplicate_tolerance_m(columns: SampleColumns, cell_size_m: float) -> float:
    """The merge tolerance of a run (m): ``samples.duplicate_tolerance_m`` when set, else
    :data:`DUPLICATE_TOLERANCE_CELLS` x the grid cell size (m)."""
    if columns.duplicate_tolerance_m is not None:
        return float(columns.duplicate_tolerance_m)
    return DUPLICATE_TOLERANCE_CELLS * float(cell_size_m)


# ----------------------------------------------------------------------------- internals


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


def _unit_read(column: str, key: str) -> str:
    """How the values of a column were read, for messages: "read as mg/kg" or "converted
    from %"."""
    unit = split_unit(column)[1]
    canonical = CANONICAL_UNITS[key]
    if unit is None or unit == canonical:
        return f"read as {canonical}" if unit is not None else f"no unit in the header, read as {canonical}"
    return f"converted from {unit} to {canonical}"


def _converted(column: str, key: str) -> str:
    """", converted from g/kg to %" when the column was converted, else ""."""
    unit = split_unit(column)[1]
    return "" if unit is None or unit == CANONICAL_UNITS[key] else f", {_unit_read(column, key)}"


def _to_water_ph(name: str, values: dict[str, np.ndarray], found: dict[str, str],
                 columns: SampleColumns) -> str | None:
    """Convert a CaCl2 or KCl pH column to water pH in place; the note says how."""
    kind = ph_kind_of(found["ph"], columns)
    if kind == "water":
        return None
    offset = columns.ph_cacl2_offset if kind == "cacl2" else columns.ph_kcl_offset
    values["ph"] = values["ph"] + offset
    label = "CaCl2" if kind == "cacl2" else "KCl"
    note = (f"pH: column {found['ph']!r} read as {label} pH and converted to water pH "
            f"(+{offset:g}, samples.ph_{kind}_offset; set samples.ph_kind if it is water pH)")
    warnings.warn(f"{name}: {note}", PmapWarning, stacklevel=3)
    return note


def _check_ranges(name: str, values: dict[str, np.ndarray], found: dict[str, str],
                  rows: np.ndarray) -> None:
    """Physical limits, in pmap's units: a value outside is an error."""
    checks: list[tuple[str, float, float, str]] = [
        ("ph", 2.0, 11.0, "soil pH must lie in 2-11: check the column"),
        ("buffer_ph", 2.0, 11.0, "buffer pH must lie in 2-11: check the column"),
        ("total_p", 0.0, np.inf, "P cannot be negative: check the column"),
        ("stp", 0.0, np.inf, "P cannot be negative: check the column"),
        ("fe", 0.0, np.inf, "a concentration cannot be negative"),
        ("al", 0.0, np.inf, "a concentration cannot be negative"),
        ("ca", 0.0, np.inf, "a concentration cannot be negative"),
    ]
    checks += [(k, 0.0, 100.0, "a percentage must lie in 0-100: is the column in g/kg? name "
                f"the unit in the header, e.g. '{split_unit(found.get(k, k))[0] or k} (g/kg)'")
               for k in _PERCENT]
    for key, lo, hi, fix in checks:
        if key not in values:
            continue
        v = values[key]
        with np.errstate(invalid="ignore"):
            bad = np.isfinite(v) & ((v < lo) | (v > hi))
        if bad.any():
            raise InputError(
                f"{name}: column {found[key]!r} ({key}{_converted(found[key], key)}) out of "
                f"range in rows {_values_text(rows[bad], v[bad])}: {fix}"
            )


def _check_plausible(name: str, values: dict[str, np.ndarray], found: dict[str, str],
                     rows: np.ndarray) -> None:
    """Usual ranges (:data:`pmap.io.units.PLAUSIBLE_RANGES`): one warning per column with
    values outside.  Zeros are exempt from the lower bound: no unit changes a zero."""
    for key, v in values.items():
        band = PLAUSIBLE_RANGES.get(key)
        if band is None:
            continue
        with np.errstate(invalid="ignore"):
            low = np.isfinite(v) & (v < band.low) & (v != 0)
            high = np.isfinite(v) & (v > band.high)
        if not (low.any() or high.any()):
            continue
        out = low | high
        cause = band.below if low.sum() >= high.sum() else band.above
        unit = CANONICAL_UNITS[key]
        if unit != "pH units":
            cause += f" name the unit in the header, e.g. {example_header(key, found[key])!r}"
        warnings.warn(
            f"{name}: column {found[key]!r} ({PROPERTY_LABELS[key]}, "
            f"{_unit_read(found[key], key)}) has values outside the usual "
            f"{band.low:g}-{band.high:g} {unit} in rows {_values_text(rows[out], v[out])}: "
            f"{cause}",
            PmapWarning, stacklevel=3,
        )


def _merge_duplicates(table: SampleTable, tol_m: float | None = None) -> SampleTable:
    """Merge samples closer than ``tol_m`` (m; None or less than 1e-6: 1e-6), chains included."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    n = len(table)
    tol = max(float(tol_m or 0.0), _EXACT_M)
    if n < 2:
        return table
    pairs = cKDTree(table.coords).query_pairs(tol, output_type="ndarray")
    if pairs.size == 0:
        return table
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    _, label = connected_components(graph, directed=False)
    # Groups numbered in file order: the group of sample i is the rank of its first member.
    _, first_index, group = np.unique(label, return_index=True, return_inverse=True)
    order = np.argsort(first_index)
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    group = rank[group.ravel()]
    firsts = np.sort(first_index)
    n_groups = firsts.size
    size = np.bincount(group, minlength=n_groups)
    by_group = np.argsort(group, kind="stable")
    members = np.split(by_group, np.cumsum(size)[:-1])

    def mean_of(arr: np.ndarray) -> np.ndarray:
        finite = np.isfinite(arr)
        total = np.bincount(group, weights=np.where(finite, arr, 0.0), minlength=n_groups)
        count = np.bincount(group, weights=finite.astype(float), minlength=n_groups)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(count > 0, total / np.maximum(count, 1), np.nan)

    merged_ids = np.array(["+".join(table.ids[m]) for m in members], dtype=str)
    multi = [k for k in range(n_groups) if size[k] > 1]
    described = [f"{merged_ids[k]} (rows {', '.join(str(int(r)) for r in table.rows[members[k]])})"
                 for k in multi]
    spreads = _spreads(table, members, multi, merged_ids)
    name = Path(table.source).name
    within = "share a location" if tol <= _EXACT_M else f"lie within {tol:g} m of each other"
    message = (
        f"{name}: {len(multi)} group(s) of samples {within} ({_listed(described)}); their "
        "values were averaged into one sample each, as kriging cannot use coincident or "
        "near-coincident points"
    )
    if spreads:
        message += (f"; values differ by more than the lab error in {_listed(spreads)}: check "
                    "for re-sampled or mislabelled points")
    if tol > _EXACT_M:
        message += "; samples.duplicate_tolerance_m sets the distance"
    warnings.warn(message, PmapWarning, stacklevel=3)
    note = (f"{name}: {int(size[multi].sum())} samples within {tol:g} m of another merged into "
            f"{len(multi)}")
    return SampleTable(
        np.column_stack([mean_of(table.coords[:, 0]), mean_of(table.coords[:, 1])]),
        {k: mean_of(v) for k, v in table.values.items()},
        merged_ids, table.crs, table.source, table.stp_method,
        table.rows[firsts], np.column_stack([mean_of(table.lonlat[:, 0]), mean_of(table.lonlat[:, 1])]),
        dict(table.source_columns), (*table.notes, note),
    )


def _spreads(table: SampleTable, members: list[np.ndarray], multi: list[int],
             merged_ids: np.ndarray) -> list[str]:
    """"A+B: pH 5.1-7.3" for merged groups whose values spread more than the lab error."""
    out = []
    for k in multi:
        parts = []
        for key, v in table.values.items():
            vals = v[members[k]]
            vals = vals[np.isfinite(vals)]
            if vals.size < 2:
                continue
            absolute, relative = _LAB_ERROR.get(key, (0.0, 0.0))
            spread = float(vals.max() - vals.min())
            allowed = absolute + relative * abs(float(vals.mean()))
            if spread > allowed * (1 + 1e-9):
                parts.append(f"{PROPERTY_LABELS.get(key, key)} {vals.min():g}-{vals.max():g}")
        if parts:
            out.append(f"{merged_ids[k]}: {', '.join(parts)}")
    return out


def _listed(items: list[str], limit: int = 5) -> str:
    shown = "; ".join(items[:limit])
    return shown + (f" and {len(items) - limit} more" if len(items) > limit else "")
