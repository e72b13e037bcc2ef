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
from pmap.io.tables import us_values
from pmap.prescribe.zones import label_patches

__all__ = [
    "ZONE_FIELDS",
    "SHAPEFILE_FIELDS",
    "US_FIELDS",
    "SHAPEFILE_SUFFIXES",
    "DEFAULT_TIMESTAMP",
    "shapefile_parts",
    "patch_labels",
    "zone_polygons",
    "patch_polygons",
    "coverage_polygons",
    "polygon_labels",
    "zone_frame",
    "lime_zone_frame",
    "write_zone_polygons",
    "write_geopackage",
    "write_shapefile",
    "write_geojson",
    "write_geojson_wgs84",
    "layer_description",
]

#: Attribute fields of the zone layer, with units, in column order.  ``basis`` says what
#: the rate rests on (measured soil test, model estimate, not sampled); ``field``, ``farm``
#: and ``date`` (sampling date) make every polygon traceable to its field.
ZONE_FIELDS: dict[str, str] = {
    "zone_id": "",
    "class_id": "",
    "class_label": "",
    "role": "",
    "basis": "",
    "area_ha": "ha",
    "mean_stp_mg_kg": "mg/kg",
    "mean_deficiency_probability": "probability 0-1",
    "p2o5_kg_ha": "kg P2O5/ha",
    "product": "",
    "product_kg_ha": "kg/ha",
    "n_kg_ha": "kg N/ha",
    "product_total_kg": "kg",
    "field": "",
    "farm": "",
    "date": "YYYY-MM-DD",
    "out_rate_kg_ha": "kg/ha",
}

#: Extra columns written when rates.units is "us", converted from the SI columns by
#: :func:`pmap.io.tables.us_values` (international acre and pound).
US_FIELDS: dict[str, str] = {
    "area_acre": "acre",
    "p2o5_lb_acre": "lb P2O5/acre",
    "product_lb_acre": "lb/acre",
    "product_total_lb": "lb",
    "out_rate_lb_acre": "lb/acre",
}

#: Shapefile names (10 characters or fewer) of :data:`ZONE_FIELDS` and :data:`US_FIELDS`.
SHAPEFILE_FIELDS: dict[str, str] = {
    "zone_id": "ZONE_ID",
    "class_id": "CLASS_ID",
    "class_label": "CLASS_LBL",
    "role": "ROLE",
    "basis": "BASIS",
    "area_ha": "AREA_HA",
    "mean_stp_mg_kg": "STP_MGKG",
    "mean_deficiency_probability": "P_DEFIC",
    "p2o5_kg_ha": "P2O5_KGHA",
    "product": "PRODUCT",
    "product_kg_ha": "PROD_KGHA",
    "n_kg_ha": "N_KGHA",
    "product_total_kg": "PROD_TOTKG",
    "field": "FIELD",
    "farm": "FARM",
    "date": "DATE",
    "out_rate_kg_ha": "OUT_KGHA",
    "area_acre": "AREA_AC",
    "p2o5_lb_acre": "P2O5_LBAC",
    "product_lb_acre": "PROD_LBAC",
    "product_total_lb": "PROD_TOTLB",
    "out_rate_lb_acre": "OUT_LBAC",
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


def _longest_border(piece: BaseGeometry, geoms: Mapping[int, BaseGeometry], *,
                    nearest: bool) -> int | None:
    """The zone whose polygon shares the longest border with ``piece``.

    Ties go to the lower zone id.  A border shorter than 1 mm (the snapping precision)
    does not count.  With no shared border: the nearest zone if ``nearest``, else None.
    """
    import shapely

    ids = sorted(geoms)
    if not ids:
        return None
    tree = shapely.STRtree([geoms[z] for z in ids])
    best, best_len = None, 1e-3
    edge = piece.boundary
    for idx in sorted(int(i) for i in tree.query(piece.buffer(1e-6))):
        zid = ids[idx]
        length = float(shapely.length(shapely.intersection(edge, geoms[zid].boundary)))
        if length > best_len + 1e-9:
            best, best_len = zid, length
    if best is None and nearest:
        best = min(ids, key=lambda z: (geoms[z].distance(piece), z))
    return best


def _parts(geom: BaseGeometry) -> list[BaseGeometry]:
    return list(getattr(geom, "geoms", [geom]))


def _merge_small_parts(geoms: dict[int, BaseGeometry], min_area_m2: float) -> dict[int, int]:
    """Give every polygon part below ``min_area_m2`` to its longest-border neighbour, in place.

    Smallest part first, so a sliver joins before its neighbour is judged.  A part with no
    neighbour (an island of the boundary itself) stays.  Returns zone id -> zone id for
    the zones that lost all their parts (to the neighbour that took most of their area).
    """
    import shapely

    merged_into: dict[int, int] = {}
    given: dict[int, dict[int, float]] = {}
    stays: set[tuple[int, bytes]] = set()
    budget = 2 * sum(len(_parts(g)) for g in geoms.values()) + 1
    for _ in range(budget):  # each step merges a part or sets one aside; the cap is a guard
        small = sorted((part.area, zid, k, part) for zid, geom in geoms.items()
                       for k, part in enumerate(_parts(geom))
                       if part.area < min_area_m2 and (zid, part.wkb) not in stays)
        if not small:
            break
        area, zid, k, part = small[0][:4]
        target = _longest_border(part, {z: g for z, g in geoms.items() if z != zid},
                                 nearest=False)
        if target is None:
            stays.add((zid, part.wkb))
            continue
        geoms[target] = _polygonal(shapely.union_all([geoms[target], part]))
        given.setdefault(zid, {}).setdefault(target, 0.0)
        given[zid][target] += area
        rest = [p for j, p in enumerate(_parts(geoms[zid])) if j != k]
        if rest:
            geoms[zid] = rest[0] if len(rest) == 1 else shapely.MultiPolygon(rest)
        else:
            del geoms[zid]
            merged_into[zid] = max(given[zid], key=lambda z: (given[zid][z], -z))
    return merged_into


def coverage_polygons(
    labels: np.ndarray, patch_class: Sequence[int], grid: GridSpec, boundary: BaseGeometry,
    *, min_area_m2: float = 0.0, tolerance_m: float | None = None,
) -> tuple[dict[int, BaseGeometry], dict[int, int]]:
    """Rate polygons that tile ``boundary`` exactly: cut to it, gaps filled, simplified.

    1. Each numbered patch of ``labels`` is traced along cell edges and cut to the boundary.
    2. Boundary area no patch covers (cells whose centre lies outside the field) goes to
       the polygon it shares the longest border with.
    3. Every polygon part smaller than ``min_area_m2`` (a sliver left by the cut, a small
       patch) joins the polygon it shares the longest border with, smallest first.  A zone
       left with no part is absent from the result and listed in ``merged_into``.  A part
       that touches no other zone (a small separate piece of the boundary) stays.
    4. Shared edges are matched exactly (:func:`shapely.coverage_clean`, 1 mm snapping)
       and simplified as a coverage (Visvalingam-Whyatt,
       :func:`shapely.coverage_simplify`) with the outer edge kept, so the polygons stay
       without gaps or overlaps and their union is the boundary.

    A zone the boundary cuts in two stays one zone (a MultiPolygon) with one rate.

    Parameters
    ----------
    labels : numpy.ndarray of int, shape grid.shape
        Patch numbers 1..n (0 = none), as :func:`pmap.prescribe.zones.label_patches`.
    patch_class : sequence of int
        Class of patch k at index k - 1.
    grid : GridSpec
    boundary : shapely Polygon or MultiPolygon
        The field in ``grid.crs``.
    min_area_m2 : float
        Minimum mapping unit (m2); 0 keeps every part.
    tolerance_m : float, optional
        Simplification tolerance (m), about the square root of the largest triangle area
        removed; 0 keeps the traced edges.  Default one cell: a cell staircase step is a
        triangle of half a cell's area (square root 0.71 cell), so half a cell removes no
        step, one cell removes them while keeping every bend longer than about a cell -
        the class edges are not known more finely than the grid.

    Returns
    -------
    polygons : dict of int to shapely Polygon or MultiPolygon
        Zone id (the patch number of ``labels``) -> polygon, ascending; merged zones are
        absent.
    merged_into : dict of int to int
        Zone id of each merged zone -> the zone id it joined (may chain: follow it to a
        key of ``polygons``).
    """
    import shapely

    if min_area_m2 < 0 or (tolerance_m is not None and tolerance_m < 0):
        raise ValueError("min_area_m2 and tolerance_m must be >= 0 (m2, m)")
    boundary = _polygonal(shapely.make_valid(boundary))
    if boundary is None:
        raise ValueError("the boundary has no area")
    traced = patch_polygons(labels, patch_class, grid)
    geoms: dict[int, BaseGeometry] = {}
    vanished = []
    for k, (geom, _cls) in enumerate(traced):
        cut = _polygonal(shapely.intersection(geom, boundary))
        if cut is not None:
            geoms[k + 1] = cut
        else:
            vanished.append(k + 1)
    if not geoms:
        return {}, {}
    gaps = _polygonal(shapely.difference(boundary, shapely.union_all(list(geoms.values()))))
    if gaps is not None:
        adds: dict[int, list[BaseGeometry]] = {}
        for piece in _parts(gaps):
            target = _longest_border(piece, geoms, nearest=True)
            adds.setdefault(target, []).append(piece)
        for zid, pieces in adds.items():
            geoms[zid] = _polygonal(shapely.union_all([geoms[zid], *pieces]))
    merged_into = _merge_small_parts(geoms, min_area_m2) if min_area_m2 > 0 else {}
    for zid in vanished:  # outside the boundary altogether: no area to carry
        merged_into[zid] = _longest_border(traced[zid - 1][0], geoms, nearest=True)
    tol = grid.cell_size if tolerance_m is None else float(tolerance_m)
    ids = sorted(geoms)
    # Separate overlay steps leave vertices of one polygon on a neighbour's edge without
    # a twin; coverage_clean nodes them (1 mm snapping) so shared edges match exactly.
    result = shapely.coverage_clean(np.array([geoms[z] for z in ids], dtype=object),
                                    snapping_distance=1e-3)
    if tol > 0:
        result = shapely.coverage_simplify(result, tol, simplify_boundary=False)
    for z, g in zip(ids, result, strict=True):
        g = shapely.make_valid(g) if not g.is_valid else g
        geoms[z] = _polygonal(g) or geoms[z]
    return {z: geoms[z] for z in ids}, merged_into


def polygon_labels(polygons: Mapping[int, BaseGeometry], grid: GridSpec) -> np.ndarray:
    """The zone-id raster of ``polygons``: each cell takes the polygon holding its centre.

    Use it to take per-zone statistics that match the polygons of
    :func:`coverage_polygons` after slivers moved between zones.  Cells outside
    ``grid.mask`` and outside every polygon are 0.
    """
    from rasterio.features import rasterize

    if not polygons:
        return np.zeros(grid.shape, dtype=np.int32)
    out = rasterize(((geom, int(zid)) for zid, geom in sorted(polygons.items())),
                    out_shape=grid.shape, transform=grid.transform, fill=0, all_touched=False,
                    dtype="int32")
    return np.where(grid.mask, out, 0).astype(np.int32)


def _polygonal(geom: BaseGeometry | None) -> BaseGeometry | None:
    """The polygonal part of ``geom`` as a Polygon or MultiPolygon; None if it has none."""
    import shapely

    from pmap.io.boundary import _polygonal_parts

    parts = _polygonal_parts(geom)
    if not parts:
        return None
    return parts[0] if len(parts) == 1 else shapely.MultiPolygon(parts)


def zone_frame(patches: Sequence[tuple[BaseGeometry, int]], attributes: Attributes | None,
               crs: str, *, zone_ids: Sequence[int] | None = None, field: str | None = None,
               farm: str | None = None, date: str | datetime | None = None,
               units: str = "metric", out_of_field_kg_ha: float = 0.0):
    """The zone table as a GeoDataFrame with the :data:`ZONE_FIELDS` columns.

    Parameters
    ----------
    patches : sequence of (geometry, class_id)
        From :func:`zone_polygons`, or the values of :func:`coverage_polygons` with the
        class of each zone.
    attributes : sequence of mappings, mapping, or callable, optional
        Field values per zone: a list aligned with ``patches`` (e.g. the per-polygon records
        of the prescription), a mapping class_id -> values (the same for every patch of a
        class), or a function ``(zone_id, class_id) -> values``.  ``class_id`` and
        ``area_ha`` (from the geometry) are computed; ``product_total_kg`` defaults to
        ``product_kg_ha * area_ha``.  Missing fields are left empty; keys that are not
        :data:`ZONE_FIELDS` are ignored.  A record's ``zone_id``, when given, must be the
        polygon's.
    crs : str
        CRS of the geometries.
    zone_ids : sequence of int, optional
        Zone id of each patch (default 1..n in order).
    field, farm, date : optional
        Written on every polygon when given (``date`` as ISO ``YYYY-MM-DD``); otherwise
        taken from the records.
    units : {"metric", "us"}
        "us" adds the :data:`US_FIELDS` columns, converted from the SI columns.
    out_of_field_kg_ha : float
        Product rate outside the field boundary (kg/ha), the ``out_rate_kg_ha`` column.
    """
    import geopandas as gpd

    if units not in ("metric", "us"):
        raise ValueError(f"units must be 'metric' or 'us', got {units!r}")
    if isinstance(attributes, Sequence) and len(attributes) != len(patches):
        raise ValueError(f"got {len(attributes)} attribute rows for {len(patches)} patches")
    if zone_ids is not None and len(zone_ids) != len(patches):
        raise ValueError(f"got {len(zone_ids)} zone ids for {len(patches)} patches")
    out_rate = float(out_of_field_kg_ha)
    if not out_rate >= 0:
        raise ValueError(f"out_of_field_kg_ha must be >= 0 kg/ha, got {out_of_field_kg_ha!r}")
    fixed = {key: value for key, value in (("field", field), ("farm", farm),
                                           ("date", _iso_date(date))) if value is not None}
    records = []
    for k, (geom, cid) in enumerate(patches):
        zone_id = k + 1 if zone_ids is None else int(zone_ids[k])
        if attributes is None:
            extra: Mapping[str, Any] = {}
        elif callable(attributes):
            extra = attributes(zone_id, int(cid))
        elif isinstance(attributes, Mapping):
            extra = attributes.get(int(cid), {})
        else:
            extra = attributes[k]
        if extra.get("zone_id") is not None and int(extra["zone_id"]) != zone_id:
            raise ValueError(f"attribute row {k} is zone {extra['zone_id']} but its polygon is "
                             f"zone {zone_id}: pass the records in polygon order")
        rec: dict[str, Any] = {name: None for name in ZONE_FIELDS}
        rec.update({key: value for key, value in extra.items()
                    if key in ZONE_FIELDS and key not in ("zone_id", "class_id", "area_ha")})
        rec.update(fixed)
        rec["date"] = _iso_date(rec["date"])
        rec["zone_id"], rec["class_id"] = zone_id, int(cid)
        rec["area_ha"] = geom.area / 10_000.0
        rec["out_rate_kg_ha"] = out_rate
        if rec.get("product_total_kg") is None and rec.get("product_kg_ha") is not None:
            rec["product_total_kg"] = float(rec["product_kg_ha"]) * rec["area_ha"]
        prob = rec.get("mean_deficiency_probability")
        if prob is not None and not (prob != prob or 0.0 <= float(prob) <= 1.0):
            raise ValueError(f"zone {zone_id}: mean_deficiency_probability {prob} is not in 0-1")
        if units == "us":
            rec.update(us_values(rec))
        records.append(rec)
    columns = list(ZONE_FIELDS) + (list(US_FIELDS) if units == "us" else [])
    return gpd.GeoDataFrame(records, columns=columns, geometry=[g for g, _ in patches],
                            crs=normalise_crs(crs))


#: Columns of the lime-zone polygons (shapefile-safe names of at most 10 characters).
LIME_ZONE_FIELDS: tuple[str, ...] = ("zone_id", "lime_class", "label", "lime_t_ha",
                                     "lime_t_ac", "area_ha", "lime_tot_t", "target_ph",
                                     "field", "farm")


def lime_zone_frame(patches: Sequence[tuple[BaseGeometry, int]],
                    classes: Mapping[int, Mapping[str, Any]], crs: str, *, target_ph: float,
                    field: str | None = None, farm: str | None = None):
    """Lime-rate polygons as a GeoDataFrame with the :data:`LIME_ZONE_FIELDS` columns.

    Parameters
    ----------
    patches : sequence of (geometry, class_code)
        From :func:`zone_polygons` on the lime-class raster (class 0 = no data, left out).
    classes : mapping of int to mapping
        Per class code: ``label``, ``rate_t_ha`` (t/ha) and ``rate_t_acre`` (short tons
        per acre), as the run's lime record holds them.
    crs : str
        CRS of the geometries (projected, m).
    target_ph : float
        The pH the rates lime to (pH units), written on every polygon.
    """
    import geopandas as gpd

    rows = []
    for k, (geom, code) in enumerate(patches, start=1):
        info = classes.get(int(code))
        if info is None:
            continue
        area_ha = geom.area / 10_000.0
        rate = float(info["rate_t_ha"])
        rows.append({"zone_id": k, "lime_class": int(code), "label": str(info["label"]),
                     "lime_t_ha": rate, "lime_t_ac": float(info["rate_t_acre"]),
                     "area_ha": area_ha, "lime_tot_t": rate * area_ha,
                     "target_ph": float(target_ph), "field": field, "farm": farm,
                     "geometry": geom})
    frame = gpd.GeoDataFrame(rows, columns=[*LIME_ZONE_FIELDS, "geometry"], geometry="geometry",
                             crs=crs)
    return frame


def _iso_date(value: str | datetime | Any | None) -> str | None:
    """``value`` (a date, datetime or ISO string) as ``YYYY-MM-DD``; None or "" -> None."""
    from datetime import date as _date

    if value is None or value == "":
        return None
    if isinstance(value, datetime):
        return value.date().isoformat()
    if isinstance(value, _date):
        return value.isoformat()
    try:
        return _date.fromisoformat(str(value)).isoformat()
    except ValueError:
        raise ValueError(f"date {value!r} is not an ISO date (YYYY-MM-DD)") from None


def write_zone_polygons(path: str | Path, patches: Sequence[tuple[BaseGeometry, int]],
                        attributes: Attributes | None, crs: str, *, layer: str = "rate_zones",
                        timestamp: datetime | None = None, **frame_options: Any) -> Path:
    """Write the zones as a GeoPackage layer (default ``rate_zones``) with long field names.

    See :func:`zone_frame` for ``attributes`` and ``frame_options`` (``field``, ``units``,
    ...) and :func:`write_geopackage` for ``timestamp``.  Replaces ``path`` atomically.
    """
    return write_geopackage(path, zone_frame(patches, attributes, crs, **frame_options),
                            layer=layer, timestamp=timestamp)


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


def _in_crs(gdf, crs: str | None):
    """``gdf`` reprojected to ``crs``; None or "working" keeps the frame's own CRS."""
    if crs is None or str(crs).strip().lower() == "working":
        return gdf
    return gdf.to_crs(normalise_crs(crs))


def layer_description(gdf) -> str | None:
    """The text stored as a zone layer's description: units, out-of-field rate, basis column.

    None when ``gdf`` has no ``out_rate_kg_ha`` column (not a :func:`zone_frame` table).
    """
    if "out_rate_kg_ha" not in gdf.columns or len(gdf) == 0:
        return None
    rate = float(gdf["out_rate_kg_ha"].iloc[0])
    return (f"pmap rate zones. Rates in kg/ha (P2O5 and product); product rate outside the "
            f"field boundary {rate:g} kg/ha; column basis says whether each rate rests on a "
            f"measured soil test or a model estimate.")


def write_geopackage(path: str | Path, gdf, *, layer: str = "rate_zones", crs: str | None = None,
                     timestamp: datetime | None = None, description: str | None = None) -> Path:
    """Write a zone table (e.g. from :func:`zone_frame`) as a GeoPackage layer, atomically.

    ``timestamp`` (timezone-aware; default :data:`DEFAULT_TIMESTAMP`) is written as the
    layer's ``gpkg_contents.last_change`` through GDAL's ``OGR_CURRENT_DATE`` option, so
    the same table gives the same bytes.  ``crs`` reprojects the table first ("working" or
    None: as it is; e.g. "EPSG:4326").  ``description`` (default
    :func:`layer_description`) goes to ``gpkg_contents.description``.
    """
    gdf = _in_crs(gdf, crs)
    description = layer_description(gdf) if description is None else description
    options = {"DESCRIPTION": description} if description else {}
    stamp = _utc(timestamp)
    gpkg_date = stamp.strftime("%Y-%m-%dT%H:%M:%S.") + f"{stamp.microsecond // 1000:03d}Z"
    with _gdal_config("OGR_CURRENT_DATE", gpkg_date):
        return _write_atomic(path, gdf, driver="GPKG", layer=layer, **options)


def write_shapefile(path: str | Path, gdf, *, timestamp: datetime | None = None,
                    crs: str | None = None) -> Path:
    """Write a zone table as a Shapefile with the 10-character :data:`SHAPEFILE_FIELDS` names.

    ``crs`` reprojects the table first (e.g. ``"EPSG:4326"`` for in-cab displays; "working"
    or None: as it is).

    All component files (.shp, .shx, .dbf, .prj, .cpg) are written in a temporary folder
    beside ``path`` and then moved into place.  The DBF header's last-update date is the
    date of ``timestamp`` in UTC (default :data:`DEFAULT_TIMESTAMP`), not today's.
    """
    path = Path(path)
    renamed = _in_crs(gdf, crs).rename(columns=SHAPEFILE_FIELDS)
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


def write_geojson(path: str | Path, gdf, *, crs: str | None = "EPSG:4326") -> Path:
    """Write ``gdf`` as GeoJSON, atomically, by default reprojected to WGS 84 (EPSG:4326).

    RFC 7946 GeoJSON is WGS 84 longitude/latitude; ``crs="working"`` (or None) keeps the
    frame's CRS, which GDAL records in a legacy ``"crs"`` member.  The collection's
    ``"name"`` member is the stem of ``path`` (``rate_zones``).
    """
    return _write_atomic(path, _in_crs(gdf, crs), driver="GeoJSON", layer=Path(path).stem)


def write_geojson_wgs84(path: str | Path, gdf) -> Path:
    """Write ``gdf`` reprojected to WGS 84 (EPSG:4326) as GeoJSON (:func:`write_geojson`)."""
    return write_geojson(path, gdf, crs="EPSG:4326")


def _write_atomic(path: str | Path, gdf, *, driver: str, layer: str, **options: str) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".tmp{path.suffix}", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    tmp.unlink()  # GDAL creates the file itself; an empty file would not be a valid GeoPackage
    try:
        gdf.to_file(tmp, driver=driver, engine="pyogrio", layer=layer, **options)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path
