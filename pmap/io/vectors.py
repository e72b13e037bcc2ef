"""Zone rasters to polygons, and the vector outputs: GeoPackage, Shapefile, WGS 84 GeoJSON.

Each 4-connected patch of one class becomes one polygon ("zone"), numbered 1..n in the
order :func:`zone_polygons` returns them; :func:`patch_labels` gives the matching label
raster so per-zone statistics can be taken from any layer on the same grid.

The writers are deterministic: the same frame gives the same bytes.  Where a format
stores a date (the GeoPackage's ``gpkg_contents.last_change``, the Shapefile's DBF header)
the caller's ``timestamp`` is written, by default :data:`DEFAULT_TIMESTAMP`, never the
wall clock; the GeoJSON ``"name"`` member is the target's stem, never a temporary name.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
from shapely.geometry import shape
from shapely.geometry.base import BaseGeometry

from pmap.grid import GridSpec
from pmap.io.crs import normalise_crs
from pmap.prescribe.zones import label_patches

__all__ = [
    "ZONE_FIELDS",
    "SHAPEFILE_FIELDS",
    "SHAPEFILE_SUFFIXES",
    "DEFAULT_TIMESTAMP",
    "shapefile_parts",
    "patch_labels",
    "zone_polygons",
    "patch_polygons",
    "zone_frame",
    "write_zone_polygons",
    "write_geopackage",
    "write_shapefile",
    "write_geojson_wgs84",
]

#: Attribute fields of the zone layer, with units, in column order.
ZONE_FIELDS: dict[str, str] = {
    "zone_id": "",
    "class_id": "",
    "class_label": "",
    "area_ha": "ha",
    "mean_stp_mg_kg": "mg/kg",
    "mean_available_p_mg_kg": "mg/kg",
    "p2o5_kg_ha": "kg P2O5/ha",
    "product": "",
    "product_kg_ha": "kg/ha",
    "product_total_kg": "kg",
}

#: Shapefile names (10 characters or fewer) of :data:`ZONE_FIELDS`.
SHAPEFILE_FIELDS: dict[str, str] = {
    "zone_id": "ZONE_ID",
    "class_id": "CLASS_ID",
    "class_label": "CLASS_LBL",
    "area_ha": "AREA_HA",
    "mean_stp_mg_kg": "STP_MGKG",
    "mean_available_p_mg_kg": "AVP_MGKG",
    "p2o5_kg_ha": "P2O5_KGHA",
    "product": "PRODUCT",
    "product_kg_ha": "PROD_KGHA",
    "product_total_kg": "PROD_TOTKG",
}

#: Suffixes of a Shapefile's component files, matched in any case after the exact stem:
#: geometry, index, attributes, CRS, code page, and the spatial/attribute indexes and
#: metadata other programs keep beside them.
SHAPEFILE_SUFFIXES: tuple[str, ...] = (
    ".shp", ".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx", ".fbn", ".fbx",
    ".ain", ".aih", ".atx", ".ixs", ".mxs", ".shp.xml",
)

#: Date written where a vector format stores one and the caller gives none (Unix epoch).
DEFAULT_TIMESTAMP: datetime = datetime(1970, 1, 1, tzinfo=timezone.utc)

Attributes = Sequence[Mapping[str, Any]] | Mapping[int, Mapping[str, Any]] | Callable[[int, int], Mapping[str, Any]]


def patch_labels(zones: np.ndarray, grid: GridSpec) -> np.ndarray:
    """Number every 4-connected patch of equal class 1..n (0 = no zone).

    The numbering of :func:`pmap.prescribe.zones.label_patches`, restricted to
    ``grid.mask``; patch k is item k - 1 of :func:`zone_polygons`.
    """
    zones = np.asarray(zones)
    if zones.shape != grid.shape:
        raise ValueError(f"zones shape {zones.shape} does not match grid {grid.shape}")
    return label_patches(np.where(grid.mask, zones, 0))[0]


def zone_polygons(zones: np.ndarray, grid: GridSpec) -> list[tuple[BaseGeometry, int]]:
    """One polygon per 4-connected patch of a class raster.

    Parameters
    ----------
    zones : numpy.ndarray of int, shape grid.shape
        Class ids; 0 and cells outside ``grid.mask`` are left out.
    grid : GridSpec

    Returns
    -------
    list of (shapely Polygon, int)
        Polygon in ``grid.crs`` and its class id; item k is patch k + 1 of
        :func:`patch_labels`.
    """
    labels = patch_labels(zones, grid)
    zones = np.asarray(zones)
    class_of = np.zeros(int(labels.max(initial=0)) + 1, dtype=np.int64)
    inside = labels > 0
    class_of[labels[inside]] = zones[inside]
    return patch_polygons(labels, class_of[1:], grid)


def patch_polygons(labels: np.ndarray, patch_class: Sequence[int],
                   grid: GridSpec) -> list[tuple[BaseGeometry, int]]:
    """One polygon per numbered patch of a label raster (0 = none).

    ``labels`` and ``patch_class`` are the output of
    :func:`pmap.prescribe.zones.label_patches`; item k of the result is patch k + 1.
    """
    from rasterio.features import shapes

    found: dict[int, BaseGeometry] = {}
    for geom, value in shapes(np.asarray(labels, dtype=np.int32), mask=np.asarray(labels) > 0,
                              connectivity=4, transform=grid.transform):
        found[int(value)] = shape(geom)
    if sorted(found) != list(range(1, len(patch_class) + 1)):
        raise ValueError(f"labels hold patches {sorted(found)[:5]}..., expected 1..{len(patch_class)}")
    return [(found[k + 1], int(cls)) for k, cls in enumerate(patch_class)]


def zone_frame(patches: Sequence[tuple[BaseGeometry, int]], attributes: Attributes | None, crs: str):
    """The zone table as a GeoDataFrame with the :data:`ZONE_FIELDS` columns.

    Parameters
    ----------
    patches : sequence of (geometry, class_id)
        From :func:`zone_polygons`.
    attributes : sequence of mappings, mapping, or callable, optional
        Field values per zone: a list aligned with ``patches``, a mapping class_id -> values
        (the same for every patch of a class), or a function ``(zone_id, class_id) -> values``.
        ``zone_id``, ``class_id`` and ``area_ha`` are computed; ``product_total_kg``
        defaults to ``product_kg_ha * area_ha``.  Missing fields are left empty; extra keys
        are kept as extra columns.
    crs : str
        CRS of the geometries.
    """
    import geopandas as gpd

    if isinstance(attributes, Sequence) and len(attributes) != len(patches):
        raise ValueError(f"got {len(attributes)} attribute rows for {len(patches)} patches")
    records = []
    for k, (geom, cid) in enumerate(patches):
        zone_id = k + 1
        if attributes is None:
            extra: Mapping[str, Any] = {}
        elif callable(attributes):
            extra = attributes(zone_id, int(cid))
        elif isinstance(attributes, Mapping):
            extra = attributes.get(int(cid), {})
        else:
            extra = attributes[k]
        rec: dict[str, Any] = {name: None for name in ZONE_FIELDS}
        rec.update({key: value for key, value in extra.items()
                    if key not in ("zone_id", "class_id", "area_ha")})
        rec["zone_id"], rec["class_id"] = zone_id, int(cid)
        rec["area_ha"] = geom.area / 10_000.0
        if rec.get("product_total_kg") is None and rec.get("product_kg_ha") is not None:
            rec["product_total_kg"] = float(rec["product_kg_ha"]) * rec["area_ha"]
        records.append(rec)
    columns = list(ZONE_FIELDS) + sorted({k for r in records for k in r} - set(ZONE_FIELDS))
    return gpd.GeoDataFrame(records, columns=columns, geometry=[g for g, _ in patches],
                            crs=normalise_crs(crs))


def write_zone_polygons(path: str | Path, patches: Sequence[tuple[BaseGeometry, int]],
                        attributes: Attributes | None, crs: str, *, layer: str = "rate_zones",
                        timestamp: datetime | None = None) -> Path:
    """Write the zones as a GeoPackage layer (default ``rate_zones``) with long field names.

    See :func:`zone_frame` for ``attributes`` and :func:`write_geopackage` for
    ``timestamp``.  Replaces ``path`` atomically.
    """
    return write_geopackage(path, zone_frame(patches, attributes, crs), layer=layer,
                            timestamp=timestamp)


def shapefile_parts(path: str | Path) -> list[Path]:
    """The component files of a Shapefile that exist: ``path`` and its sidecars, sorted.

    A sidecar has exactly the stem of ``path`` and one of :data:`SHAPEFILE_SUFFIXES` in
    any case (``field.PRJ`` belongs to ``field.shp``).  Names are compared as strings,
    never used as glob patterns, so brackets or asterisks in a name are harmless.
    """
    path = Path(path)
    stem = path.name[: -len(path.suffix)] if path.suffix else path.name
    parts = []
    for entry in path.parent.iterdir():
        name = entry.name
        if (name.startswith(stem) and name[len(stem):].lower() in SHAPEFILE_SUFFIXES
                and entry.is_file()):
            parts.append(entry)
    return sorted(parts, key=lambda p: p.name)


def _utc(timestamp: datetime | None) -> datetime:
    timestamp = DEFAULT_TIMESTAMP if timestamp is None else timestamp
    if timestamp.tzinfo is None:
        raise ValueError("timestamp must be timezone-aware (e.g. datetime(..., tzinfo=timezone.utc))")
    return timestamp.astimezone(timezone.utc)


@contextmanager
def _gdal_config(name: str, value: str) -> Iterator[None]:
    """Set a GDAL configuration option of pyogrio's GDAL for a block, then restore it.

    GDAL configuration options are process-wide; pmap writes one file at a time.
    """
    import pyogrio

    old = pyogrio.get_gdal_config_option(name)
    pyogrio.set_gdal_config_options({name: value})
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options({name: old})


def write_geopackage(path: str | Path, gdf, *, layer: str = "rate_zones",
                     timestamp: datetime | None = None) -> Path:
    """Write a zone table (e.g. from :func:`zone_frame`) as a GeoPackage layer, atomically.

    ``timestamp`` (timezone-aware; default :data:`DEFAULT_TIMESTAMP`) is written as the
    layer's ``gpkg_contents.last_change`` through GDAL's ``OGR_CURRENT_DATE`` option, so
    the same table gives the same bytes.
    """
    stamp = _utc(timestamp)
    gpkg_date = stamp.strftime("%Y-%m-%dT%H:%M:%S.") + f"{stamp.microsecond // 1000:03d}Z"
    with _gdal_config("OGR_CURRENT_DATE", gpkg_date):
        return _write_atomic(path, gdf, driver="GPKG", layer=layer)


def write_shapefile(path: str | Path, gdf, *, timestamp: datetime | None = None) -> Path:
    """Write a zone table as a Shapefile with the 10-character :data:`SHAPEFILE_FIELDS` names.

    All component files (.shp, .shx, .dbf, .prj, .cpg) are written in a temporary folder
    beside ``path`` and then moved into place.  The DBF header's last-update date is the
    date of ``timestamp`` in UTC (default :data:`DEFAULT_TIMESTAMP`), not today's.
    """
    path = Path(path)
    renamed = gdf.rename(columns=SHAPEFILE_FIELDS)
    too_long = [c for c in renamed.columns if c != renamed.geometry.name and len(c) > 10]
    if too_long:
        raise ValueError(f"shapefile field names must be 10 characters or fewer: {too_long}")
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp_dir = Path(tempfile.mkdtemp(prefix=f".{path.stem}.", dir=path.parent))
    try:
        renamed.to_file(tmp_dir / path.name, driver="ESRI Shapefile", engine="pyogrio",
                        DBF_DATE_LAST_UPDATE=_utc(timestamp).strftime("%Y-%m-%d"))
        for part in sorted(tmp_dir.iterdir()):
            os.replace(part, path.with_suffix(part.suffix))
    finally:
        shutil.rmtree(tmp_dir, ignore_errors=True)
    return path


def write_geojson_wgs84(path: str | Path, gdf) -> Path:
    """Write ``gdf`` reprojected to WGS 84 (EPSG:4326) as GeoJSON, atomically.

    The collection's ``"name"`` member is the stem of ``path`` (``rate_zones``).
    """
    return _write_atomic(path, gdf.to_crs("EPSG:4326"), driver="GeoJSON", layer=Path(path).stem)


def _write_atomic(path: str | Path, gdf, *, driver: str, layer: str) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".tmp{path.suffix}", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    tmp.unlink()  # GDAL creates the file itself; an empty file would not be a valid GeoPackage
    try:
        gdf.to_file(tmp, driver=driver, engine="pyogrio", layer=layer)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path
