"""Field boundaries: read, repair, dissolve; the field mask of a grid; samples inside.

A boundary file (GeoJSON, GeoPackage or Shapefile) may hold several polygons and invalid
rings; :func:`load_boundary` returns one valid (Multi)Polygon in the working CRS.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import shapely
from shapely.geometry.base import BaseGeometry

from pmap.errors import InputError
from pmap.grid import GridSpec
from pmap.io.crs import normalise_crs, to_pyproj
from pmap.io.samples import SampleTable

__all__ = [
    "read_boundary",
    "load_boundary",
    "project_boundary",
    "lonlat_centroid",
    "boundary_lonlat_centroid",
    "field_mask",
    "grid_for_boundary",
    "samples_inside",
]

_SUFFIXES = {".geojson", ".json", ".gpkg", ".shp"}


def read_boundary(path: str | Path, crs: str | None = None) -> tuple[BaseGeometry, str]:
    """Read a boundary file as one valid polygonal geometry in the file's own CRS.

    Parameters
    ----------
    path : str or Path
        GeoJSON, GeoPackage or Shapefile with polygon features.
    crs : str, optional
        CRS to assume when the file has none.

    Returns
    -------
    geometry : shapely Polygon or MultiPolygon
        All features dissolved, invalid parts repaired with :func:`shapely.make_valid`.
    crs : str
        The file's CRS (``"EPSG:NNNN"`` or WKT).
    """
    import geopandas as gpd

    path = Path(path)
    if not path.is_file():
        raise InputError(f"boundary file not found: {path}")
    if path.suffix.lower() not in _SUFFIXES:
        raise InputError(f"{path.name}: unsupported boundary format {path.suffix!r}: use "
                         "GeoJSON, GeoPackage or Shapefile")
    try:
        gdf = gpd.read_file(path)
    except Exception as exc:  # pyogrio raises several error types for unreadable files
        raise InputError(f"{path.name}: cannot read the boundary: {exc}") from exc
    if gdf.crs is None:
        if crs is None:
            raise InputError(
                f"{path.name} has no CRS; assign one in your GIS and export again (for a "
                "shapefile, the .prj file is missing), or pass --crs EPSG:NNNN"
            )
        file_crs = normalise_crs(crs)
    else:
        file_crs = normalise_crs(gdf.crs)
    geoms = [g for g in gdf.geometry if g is not None and not g.is_empty]
    parts = []
    for geom in geoms:
        repaired = shapely.make_valid(geom) if not geom.is_valid else geom
        parts.extend(_polygonal_parts(repaired))
    if not parts:
        kinds = sorted({g.geom_type for g in geoms}) or ["no geometry"]
        raise InputError(f"{path.name}: no polygon in the boundary file (found "
                         f"{', '.join(kinds)}): export the field outline as a polygon")
    merged = shapely.union_all(parts)
    merged = shapely.make_valid(merged) if not merged.is_valid else merged
    polygonal = _polygonal_parts(merged)
    if not polygonal or merged.area <= 0:
        raise InputError(f"{path.name}: the boundary has zero area: check the polygon")
    geometry = polygonal[0] if len(polygonal) == 1 else shapely.MultiPolygon(polygonal)
    return geometry, file_crs


def load_boundary(path: str | Path, working_crs: str, *, crs: str | None = None) -> BaseGeometry:
    """Read a boundary file and return it in the working CRS.

    Parameters
    ----------
    path : str or Path
        GeoJSON, GeoPackage or Shapefile with polygon features.
    working_crs : str
        Projected CRS of the run (m).
    crs : str, optional
        CRS to assume when the file has none.

    Returns
    -------
    shapely Polygon or MultiPolygon
        Valid, dissolved, in ``working_crs``; area > 0.

    Raises
    ------
    pmap.errors.InputError
        Missing file, no CRS, no polygon, zero area.
    """
    geometry, file_crs = read_boundary(path, crs)
    return project_boundary(geometry, file_crs, working_crs, Path(path).name)


def project_boundary(geometry: BaseGeometry, file_crs: str, working_crs: str,
                     name: str = "boundary") -> BaseGeometry:
    """A boundary from :func:`read_boundary` reprojected to the working CRS (m).

    ``name`` (the file's name) is used in messages.  Invalid rings after projection are
    repaired; a result that is not finite or has no area is an :class:`InputError`.
    """
    from pyproj import Transformer

    target = normalise_crs(working_crs)
    if file_crs != target:
        tr = Transformer.from_crs(to_pyproj(file_crs), to_pyproj(target), always_xy=True)
        geometry = shapely.transform(geometry, lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))
        if not geometry.is_valid:
            geometry = shapely.make_valid(geometry)
            parts = _polygonal_parts(geometry)
            geometry = parts[0] if len(parts) == 1 else shapely.MultiPolygon(parts)
    if not np.isfinite(shapely.get_coordinates(geometry)).all():
        raise InputError(f"{name}: the boundary cannot be projected to {target}: "
                         "check its CRS")
    if geometry.area <= 0:
        raise InputError(f"{name}: the boundary has zero area: check the polygon")
    return geometry


def boundary_lonlat_centroid(path: str | Path, *, crs: str | None = None) -> tuple[float, float]:
    """Longitude and latitude (degrees, WGS 84) of the boundary's centroid.

    Use it with :func:`pmap.io.crs.utm_crs_for` to choose the working CRS when the samples
    are in projected coordinates.
    """
    return lonlat_centroid(*read_boundary(path, crs))


def lonlat_centroid(geometry: BaseGeometry, file_crs: str) -> tuple[float, float]:
    """Longitude and latitude (degrees, WGS 84) of a geometry's centroid."""
    from pyproj import Transformer

    c = geometry.centroid
    tr = Transformer.from_crs(to_pyproj(file_crs), "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(c.x, c.y)
    return float(lon), float(lat)


def field_mask(grid: GridSpec, boundary: BaseGeometry) -> np.ndarray:
    """Cells whose centre lies inside ``boundary`` (same CRS as ``grid``): bool, shape grid.shape."""
    from rasterio.features import geometry_mask

    return geometry_mask([boundary], out_shape=grid.shape, transform=grid.transform,
                         all_touched=False, invert=True)


def grid_for_boundary(boundary: BaseGeometry, crs: str, cell_size: float) -> GridSpec:
    """A grid covering ``boundary`` with cells of ``cell_size`` (m) and its field mask.

    Raises
    ------
    pmap.errors.InputError
        When no cell centre falls inside the boundary (field smaller than a cell).
    """
    grid = GridSpec.from_bounds(normalise_crs(crs), tuple(boundary.bounds), cell_size)
    mask = field_mask(grid, boundary)
    if not mask.any():
        raise InputError(
            f"the field ({boundary.area / 10_000:.3g} ha) holds no cell centre at a cell size of "
            f"{cell_size:g} m: choose a smaller grid.cell_size_m"
        )
    return grid.with_mask(mask)


def samples_inside(table: SampleTable, boundary: BaseGeometry, buffer_m: float = 0.0) -> np.ndarray:
    """Which samples lie inside the boundary grown by ``buffer_m`` (m); points on the edge count.

    Returns
    -------
    numpy.ndarray of bool, shape (n,)
    """
    area = boundary.buffer(buffer_m) if buffer_m else boundary
    return np.asarray(shapely.intersects_xy(area, table.coords[:, 0], table.coords[:, 1]), bool)


def _polygonal_parts(geom: BaseGeometry) -> list[BaseGeometry]:
    if geom is None or geom.is_empty:
        return []
    if geom.geom_type == "Polygon":
        return [geom] if geom.area > 0 else []
    if geom.geom_type in ("MultiPolygon", "GeometryCollection"):
        out: list[BaseGeometry] = []
        for part in geom.geoms:
            out.extend(_polygonal_parts(part))
        return out
    return []
