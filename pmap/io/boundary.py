"""Field boundaries: read, repair, dissolve; areas; the grid and field mask; samples inside.

A boundary file (GeoJSON, GeoPackage or Shapefile) may hold several polygons and invalid
rings; :func:`load_boundary` returns one valid (Multi)Polygon in the working CRS.
:func:`check_field_area` compares the field's area in the working CRS with its geodesic
area on the WGS 84 ellipsoid, and :func:`grid_for_boundary` refuses a grid too large for
memory before allocating it.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import shapely
from shapely.geometry.base import BaseGeometry

from pmap.errors import ConfigError, InputError
from pmap.grid import GridSpec, estimate_grid, estimate_memory_bytes
from pmap.io.crs import normalise_crs, to_pyproj
from pmap.io.samples import SampleTable

__all__ = [
    "read_boundary",
    "load_boundary",
    "project_boundary",
    "lonlat_centroid",
    "boundary_lonlat_centroid",
    "lonlat_geometry",
    "field_lonlat_points",
    "geodesic_area_m2",
    "check_field_area",
    "AREA_TOLERANCE",
    "field_mask",
    "grid_for_boundary",
    "samples_inside",
]

_SUFFIXES = {".geojson", ".json", ".gpkg", ".shp"}

#: Largest accepted relative difference between the field's area in the working CRS and its
#: geodesic area.  A working CRS within grid.max_scale_error (<= 0.005) misstates areas by
#: at most about 1 %; common practice, no source.
AREA_TOLERANCE: float = 0.01


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


def lonlat_geometry(geometry: BaseGeometry, file_crs: str) -> BaseGeometry:
    """A geometry in longitude, latitude (degrees, WGS 84), x = longitude."""
    from pyproj import Transformer

    if normalise_crs(file_crs) == "EPSG:4326":
        return geometry
    tr = Transformer.from_crs(to_pyproj(file_crs), "EPSG:4326", always_xy=True)
    return shapely.transform(geometry, lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))


def field_lonlat_points(geometry: BaseGeometry, file_crs: str) -> tuple[np.ndarray, np.ndarray]:
    """Longitudes and latitudes (degrees, WGS 84) of a field's centroid and extent corners.

    The centroid (the one :func:`lonlat_centroid` gives) comes first, then the four corners
    of the field's longitude/latitude extent: the points at which
    :func:`pmap.io.crs.choose_working_crs` measures a projection's scale.
    """
    lon0, lat0 = lonlat_centroid(geometry, file_crs)
    west, south, east, north = lonlat_geometry(geometry, file_crs).bounds
    lon = np.array([lon0, west, east, east, west], dtype=float)
    lat = np.array([lat0, south, south, north, north], dtype=float)
    return lon, lat


def geodesic_area_m2(geometry: BaseGeometry, file_crs: str) -> float:
    """Area of a (Multi)Polygon on the WGS 84 ellipsoid (m2), holes subtracted.

    Computed with :meth:`pyproj.Geod.geometry_area_perimeter` on the geometry in
    longitude/latitude; rings are oriented first (exterior counter-clockwise), since that
    method signs each ring's area by its orientation.
    """
    from pyproj import Geod
    from shapely.geometry.polygon import orient

    lonlat = lonlat_geometry(geometry, file_crs)
    geod = Geod(ellps="WGS84")
    parts = lonlat.geoms if hasattr(lonlat, "geoms") else [lonlat]
    total = 0.0
    for part in parts:
        if part.geom_type == "Polygon" and not part.is_empty:
            total += geod.geometry_area_perimeter(orient(part, sign=1.0))[0]
    return float(total)


def check_field_area(boundary: BaseGeometry, working_crs: str, geodesic_m2: float,
                     name: str = "boundary", tolerance: float = AREA_TOLERANCE) -> dict[str, float]:
    """Compare the field's area in the working CRS with its geodesic area.

    Parameters
    ----------
    boundary : shapely Polygon or MultiPolygon
        The field in ``working_crs`` (m).
    working_crs : str
        The run's CRS, for the message.
    geodesic_m2 : float
        The field's area on the WGS 84 ellipsoid (m2), from :func:`geodesic_area_m2`.
    name : str
        The boundary file's name, for the message.
    tolerance : float
        Largest accepted relative difference (fraction).

    Returns
    -------
    dict
        ``working_crs_ha``, ``geodesic_ha`` (ha) and ``difference`` (relative, signed:
        positive when the working CRS shows the field larger).

    Raises
    ------
    pmap.errors.InputError
        When the two areas differ by more than ``tolerance``.
    """
    planar = float(boundary.area)
    if not geodesic_m2 > 0:
        raise InputError(f"{name}: the boundary's geodesic area is {geodesic_m2:g} m2: check "
                         "the polygon and its CRS")
    difference = planar / geodesic_m2 - 1.0
    areas = {"working_crs_ha": planar / 10_000, "geodesic_ha": geodesic_m2 / 10_000,
             "difference": difference}
    if not abs(difference) <= tolerance:
        shown = working_crs if len(working_crs) <= 60 else working_crs[:57] + "..."
        raise InputError(
            f"{name}: the field's area is {planar / 10_000:,.2f} ha in the working CRS {shown} "
            f"but {geodesic_m2 / 10_000:,.2f} ha on the WGS 84 ellipsoid ({difference:+.1%}, "
            f"more than {tolerance:.0%}): that CRS distorts areas over the field; leave "
            "grid.crs unset (the field's UTM zone is used) or name a local projection in metres"
        )
    return areas


def field_mask(grid: GridSpec, boundary: BaseGeometry) -> np.ndarray:
    """Cells whose centre lies inside ``boundary`` (same CRS as ``grid``): bool, shape grid.shape."""
    from rasterio.features import geometry_mask

    return geometry_mask([boundary], out_shape=grid.shape, transform=grid.transform,
                         all_touched=False, invert=True)


def grid_for_boundary(boundary: BaseGeometry, crs: str, cell_size: float, *,
                      max_cells: int | None = None, n_samples: int = 0,
                      chunk_size: int = 20_000) -> GridSpec:
    """A grid covering ``boundary`` with cells of ``cell_size`` (m) and its field mask.

    Parameters
    ----------
    boundary : shapely Polygon or MultiPolygon
        The field in ``crs`` (m).
    crs : str
        Working CRS, projected in metres.
    cell_size : float
        Cell edge length (m).
    max_cells : int, optional
        Largest grid (width x height cells) allowed (``grid.max_cells``); checked with
        :func:`pmap.grid.estimate_grid` before anything is allocated.
    n_samples, chunk_size : int
        Samples and kriging block size, for the memory estimate in the message.

    Raises
    ------
    pmap.errors.ConfigError
        When the grid would have more than ``max_cells`` cells; the message gives the
        estimate (cells and GiB) and the smallest cell size that fits.
    pmap.errors.InputError
        When no cell centre falls inside the boundary (field smaller than a cell).
    """
    bounds = tuple(boundary.bounds)
    if max_cells is not None:
        width, height, n_cells = estimate_grid(bounds, cell_size)
        if n_cells > max_cells:
            gib = estimate_memory_bytes(n_cells, n_samples, chunk_size) / 2**30
            xmin, ymin, xmax, ymax = bounds
            fits = _smallest_cell_size(bounds, max_cells, cell_size)
            raise ConfigError(
                f"grid.cell_size_m = {cell_size:g} m over the field's {xmax - xmin:,.0f} x "
                f"{ymax - ymin:,.0f} m extent gives {width:,} x {height:,} = {n_cells:,} cells "
                f"(about {gib:,.1f} GiB of memory by pmap's estimate), more than "
                f"grid.max_cells = {max_cells:,}: choose a cell size of at least {fits:g} m "
                "(--cell-size or grid.cell_size_m), or raise grid.max_cells if the machine "
                "has the memory"
            )
    grid = GridSpec.from_bounds(normalise_crs(crs), bounds, cell_size)
    mask = field_mask(grid, boundary)
    if not mask.any():
        raise InputError(
            f"the field ({boundary.area / 10_000:.3g} ha) holds no cell centre at a cell size of "
            f"{cell_size:g} m: choose a smaller grid.cell_size_m"
        )
    return grid.with_mask(mask)


def _smallest_cell_size(bounds: tuple[float, ...], max_cells: int, start: float) -> float:
    """The smallest cell size, rounded up to 0.1 m, whose grid has at most ``max_cells`` cells."""
    xmin, ymin, xmax, ymax = bounds
    size = max(start, math.sqrt(max((xmax - xmin) * (ymax - ymin), 0.0) / max_cells))
    size = math.ceil(size * 10) / 10
    while estimate_grid(bounds, size)[2] > max_cells:
        size = round(size + 0.1, 1)
    return size


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
