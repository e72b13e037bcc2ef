"""Field boundaries: read, repair, dissolve; areas; the grid and field mask; samples inside.

A boundary file (GeoJSON, GeoPackage or Shapefile) may hold several polygons and invalid
rings; :func:`load_boundary` returns one valid (Multi)Polygon in the working CRS.  A file
holding several fields is read feature by feature with :func:`boundary_features`; one is
chosen with ``feature=`` (:func:`select_feature`), every one dissolved with a warning
otherwise (:func:`select_boundary` says which), and :func:`split_boundary` writes each to a
file of its own.
:func:`check_field_area` compares the field's area in the working CRS with its geodesic
area on the WGS 84 ellipsoid, and :func:`grid_for_boundary` refuses a grid too large for
memory before allocating it.
"""

from __future__ import annotations

import logging
import math
import os
import re
import unicodedata
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import shapely
from shapely.geometry.base import BaseGeometry

from pmap.errors import ConfigError, InputError, OutputExistsError, PmapWarning
from pmap.grid import GridSpec, estimate_grid, estimate_memory_bytes
from pmap.io.crs import normalise_crs, to_pyproj
from pmap.io.samples import SampleTable

__all__ = [
    "read_boundary",
    "select_boundary",
    "BoundarySelection",
    "BoundaryFeature",
    "boundary_features",
    "select_feature",
    "split_boundary",
    "feature_slugs",
    "NAME_ATTRIBUTES",
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

log = logging.getLogger(__name__)


#: Attribute names that name a boundary's features when ``name_attribute`` is not given: the
#: first of these the file has (any case) is used.  Common practice, no source.
NAME_ATTRIBUTES: tuple[str, ...] = ("field", "field_name", "fieldname", "name", "id")

#: How many feature names an error message or warning lists before "and N more".
_LISTED = 20


@dataclass(frozen=True)
class BoundaryFeature:
    """One polygon feature of a boundary file.

    Attributes
    ----------
    index : int
        0-based position of the feature in the file (its row, counting every row).  The CLI's
        ``--field '#N'`` names the feature with ``index == N - 1``.
    name : str
        The value of the name attribute (see :func:`boundary_features`), else
        ``"feature-<index + 1>"``.
    attributes : dict
        The feature's attribute values as plain Python values (``None`` for missing).
    geometry : shapely Polygon or MultiPolygon
        Valid, polygonal parts only, in ``crs``.
    crs : str
        The file's CRS (``"EPSG:NNNN"`` or WKT).
    """

    index: int
    name: str
    attributes: dict[str, Any] = field(hash=False, repr=False)
    geometry: BaseGeometry = field(hash=False, repr=False)
    crs: str = field(repr=False)

    @property
    def n_parts(self) -> int:
        """Number of polygons the feature's geometry has (1 for a Polygon)."""
        return len(getattr(self.geometry, "geoms", [self.geometry]))

    @property
    def position(self) -> str:
        """The feature's selector by position: ``"#N"`` with N = ``index + 1``."""
        return f"#{self.index + 1}"


@dataclass(frozen=True)
class BoundarySelection:
    """What :func:`select_boundary` read: the field's geometry and the features it came from.

    Attributes
    ----------
    geometry : shapely Polygon or MultiPolygon
        The chosen feature, or every feature dissolved; valid, area > 0, in ``crs``.
    crs : str
        The file's CRS.
    features : tuple of BoundaryFeature
        The feature(s) in ``geometry``: one when a feature was chosen or the file holds one.
    merged : bool
        True when several features were dissolved into one field.
    note : str
        One sentence for the run's record: which feature(s), how many polygons.
    """

    geometry: BaseGeometry = field(repr=False)
    crs: str
    features: tuple[BoundaryFeature, ...]
    merged: bool
    note: str

    @property
    def n_parts(self) -> int:
        """Number of polygons in :attr:`geometry`."""
        return len(getattr(self.geometry, "geoms", [self.geometry]))


def _read_frame(path: Path, crs: str | None):
    """The file as a GeoDataFrame and its CRS; the checks and messages of :func:`read_boundary`."""
    import geopandas as gpd

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
    return gdf, file_crs


def _plain(value: Any) -> Any:
    """An attribute value as a plain Python value; NaN, NaT and None become None."""
    if value is None:
        return None
    if hasattr(value, "isoformat"):  # pandas Timestamp, datetime, date
        return None if str(value) == "NaT" else value.isoformat()
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


def _text(value: Any) -> str:
    """An attribute value as a name: integral floats without ".0", blanks stripped."""
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value).strip()


def _name_column(columns: list[str], name_attribute: str | None, source: str) -> str | None:
    """The column holding the features' names (case-insensitive match), or None."""
    lower = {c.lower(): c for c in reversed(columns)}  # the first of equal-in-case names wins
    if name_attribute:
        if name_attribute.lower() not in lower:
            shown = ", ".join(columns[:_LISTED]) or "none"
            raise InputError(f"{source}: no attribute {name_attribute!r} to name the features "
                             f"by (field.name_attribute); the file's attributes are: {shown}")
        return lower[name_attribute.lower()]
    for key in NAME_ATTRIBUTES:
        if key in lower:
            return lower[key]
    return None


def boundary_features(path: str | Path, crs: str | None = None, *,
                      name_attribute: str | None = None) -> list[BoundaryFeature]:
    """The polygon features of a boundary file, in file order, each repaired and named.

    Parameters
    ----------
    path : str or Path
        GeoJSON, GeoPackage or Shapefile.
    crs : str, optional
        CRS to assume when the file has none.
    name_attribute : str, optional
        Attribute whose value names each feature (any case).  Unset: the first of
        :data:`NAME_ATTRIBUTES` the file has.  A feature whose value is missing or blank, or
        every feature when the file has no such attribute, is named ``feature-<index + 1>``.

    Returns
    -------
    list of BoundaryFeature
        Features without a polygon (empty, points, lines) are left out; their rows still
        count in ``index``.

    Raises
    ------
    pmap.errors.InputError
        The errors of :func:`read_boundary`; ``name_attribute`` not in the file.
    """
    return _load_features(Path(path), crs, name_attribute)[0]


def _load_features(path: Path, crs: str | None, name_attribute: str | None
                   ) -> tuple[list[BoundaryFeature], str, list[str]]:
    """:func:`boundary_features`, the file's CRS and its geometry types (for messages)."""
    gdf, file_crs = _read_frame(path, crs)
    kinds = sorted({g.geom_type for g in gdf.geometry if g is not None and not g.is_empty})
    columns = [str(c) for c in gdf.columns if c != gdf.geometry.name]
    name_column = _name_column(columns, name_attribute, path.name)
    records = gdf.drop(columns=gdf.geometry.name).to_dict("records")
    features = []
    for index, (geom, record) in enumerate(zip(gdf.geometry, records, strict=True)):
        parts = _polygonal_parts(_repaired(geom))
        if not parts:
            continue
        attributes = {str(k): _plain(v) for k, v in record.items()}
        name = _text(attributes.get(name_column)) if name_column else ""
        geometry = parts[0] if len(parts) == 1 else shapely.MultiPolygon(parts)
        features.append(BoundaryFeature(index=index, name=name or f"feature-{index + 1}",
                                        attributes=attributes, geometry=geometry, crs=file_crs))
    return features, file_crs, kinds or ["no geometry"]


def _repaired(geom: BaseGeometry | None) -> BaseGeometry | None:
    """``geom`` made valid with :func:`shapely.make_valid` when it is not."""
    if geom is None or geom.is_empty or geom.is_valid:
        return geom
    return shapely.make_valid(geom)


def _listing(features: Sequence[BoundaryFeature], limit: int = _LISTED) -> str:
    shown = ", ".join(f"{f.name} ({f.position})" for f in features[:limit])
    more = len(features) - limit
    return shown + (f" and {more} more" if more > 0 else "")


def select_feature(features: Sequence[BoundaryFeature], feature: str | int,
                   source: str = "boundary") -> BoundaryFeature:
    """The one feature that ``feature`` names.

    Parameters
    ----------
    features : sequence of BoundaryFeature
        From :func:`boundary_features`.
    feature : str or int
        An int: the feature's 0-based :attr:`BoundaryFeature.index`.  A str: ``"#N"`` for
        the N-th feature of the file (1-based, as listed in messages); ``"ATTR=VALUE"`` for
        the feature whose attribute ATTR (any case) has the value VALUE, when the file has
        an attribute ATTR; else the feature's name (exact, then ignoring case).  A bare
        number such as ``"3"`` is a name, never a position.
    source : str
        The file's name, for messages.

    Raises
    ------
    pmap.errors.InputError
        No feature or several features match; the message lists the features (the first
        20) and how to choose one.
    """
    how = ("choose one with --field NAME, --field ATTRIBUTE=VALUE or --field '#N' for the "
           "N-th feature")
    if isinstance(feature, bool) or not isinstance(feature, (int, np.integer, str)):
        raise InputError(f"{source}: a boundary feature is chosen by a name or a number, not "
                         f"{feature!r}")
    text = feature.strip() if isinstance(feature, str) else ""
    if not isinstance(feature, str):
        hits = [f for f in features if f.index == int(feature)]
    elif re.fullmatch(r"#\d+", text):
        hits = [f for f in features if f.index == int(text[1:]) - 1]
    else:
        key, _, value = text.partition("=")
        keys = {k.lower(): k for f in features for k in f.attributes}
        if value and key.strip().lower() in keys:
            attr = keys[key.strip().lower()]
            hits = [f for f in features if _text(f.attributes.get(attr)) == value.strip()]
        else:
            hits = [f for f in features if f.name == text]
            if not hits:
                hits = [f for f in features if f.name.casefold() == text.casefold()]
    if not hits:
        hint = (f" (for the {text}-th feature by position, use '#{text}')"
                if text.isdigit() else "")
        raise InputError(f"{source}: no feature {feature!r}{hint}; the file holds "
                         f"{len(features)}: {_listing(features)}; {how}")
    if len(hits) > 1:
        raise InputError(f"{source}: {len(hits)} features match {feature!r}: "
                         f"{_listing(hits)}; choose one by position with --field '#N'")
    return hits[0]


def _relation(features: Sequence[BoundaryFeature]) -> str:
    """Whether the features' polygons touch: "do not touch", "touch" or "overlap"."""
    geoms = [f.geometry for f in features]
    tree = shapely.STRtree(geoms)
    left, right = tree.query(geoms, predicate="intersects")
    pairs = [(i, j) for i, j in zip(left.tolist(), right.tolist(), strict=True) if i < j]
    if not pairs:
        return "do not touch"
    if any(geoms[i].intersection(geoms[j]).area > 0 for i, j in pairs):
        return "overlap"
    return "touch"


def select_boundary(path: str | Path, crs: str | None = None, *,
                    feature: str | int | None = None,
                    name_attribute: str | None = None) -> BoundarySelection:
    """Read a boundary file as one field: the chosen feature, or every feature dissolved.

    Parameters are those of :func:`read_boundary`.  Dissolving several features issues a
    :class:`~pmap.errors.PmapWarning` naming them and saying whether they touch; one feature
    of several parts is not a merge (no warning; the parts are in :attr:`BoundarySelection.note`).
    """
    path = Path(path)
    source = path.name
    features, file_crs, kinds = _load_features(path, crs, name_attribute)
    if not features:
        raise InputError(f"{source}: no polygon in the boundary file (found "
                         f"{', '.join(kinds)}): export the field outline as a polygon")
    if feature is not None:
        chosen = [select_feature(features, feature, source)]
    else:
        chosen = features
    merged = len(chosen) > 1
    if merged:
        warnings.warn(
            f"{source}: {len(chosen)} features merged into one field: "
            f"{', '.join(f.name for f in chosen[:_LISTED])}"
            f"{f' and {len(chosen) - _LISTED} more' if len(chosen) > _LISTED else ''}; "
            f"they {_relation(chosen)}; choose one with --field NAME (or '#N' for the N-th) "
            "or run each as its own field with --each-field", PmapWarning, stacklevel=2)
    union = shapely.union_all([f.geometry for f in chosen]) if merged else chosen[0].geometry
    polygonal = _polygonal_parts(_repaired(union))
    if not polygonal or union.area <= 0:
        raise InputError(f"{source}: the boundary has zero area: check the polygon")
    geometry = polygonal[0] if len(polygonal) == 1 else shapely.MultiPolygon(polygonal)
    n_parts = len(polygonal)
    if merged:
        note = f"{len(chosen)} features of {source} merged into one field of {n_parts} polygon(s)"
    else:
        one = chosen[0]
        note = (f"feature {one.name!r} ({one.position} of {len(features)}) of {source}, "
                f"{n_parts} polygon(s)")
    if n_parts > 1 and not merged:
        log.info("%s: %s", source, note)
    return BoundarySelection(geometry=geometry, crs=file_crs, features=tuple(chosen),
                             merged=merged, note=note)


def read_boundary(path: str | Path, crs: str | None = None, *, feature: str | int | None = None,
                  name_attribute: str | None = None) -> tuple[BaseGeometry, str]:
    """Read a boundary file as one valid polygonal geometry in the file's own CRS.

    Parameters
    ----------
    path : str or Path
        GeoJSON, GeoPackage or Shapefile with polygon features.
    crs : str, optional
        CRS to assume when the file has none.
    feature : str or int, optional
        Use only this feature (see :func:`select_feature`): an int is its 0-based index;
        ``"#N"`` the N-th feature (1-based); ``"ATTR=VALUE"``; or its name.  Unset: every
        feature, dissolved, with a :class:`~pmap.errors.PmapWarning` when there are several.
    name_attribute : str, optional
        Attribute that names the features (see :func:`boundary_features`).

    Returns
    -------
    geometry : shapely Polygon or MultiPolygon
        Invalid parts repaired with :func:`shapely.make_valid`.
    crs : str
        The file's CRS (``"EPSG:NNNN"`` or WKT).

    Raises
    ------
    pmap.errors.InputError
        Missing or unreadable file, no CRS, no polygon, zero area, no or several features
        matching ``feature``.
    """
    selection = select_boundary(path, crs, feature=feature, name_attribute=name_attribute)
    return selection.geometry, selection.crs


#: File names Windows reserves for devices, whatever the suffix.  Source: Microsoft,
#: "Naming Files, Paths, and Namespaces" (Win32 documentation).
_DEVICE_NAMES = frozenset({"CON", "PRN", "AUX", "NUL", *(f"COM{i}" for i in range(1, 10)),
                           *(f"LPT{i}" for i in range(1, 10))})


def feature_slugs(names: Sequence[str]) -> list[str]:
    """Safe, distinct file-name stems for feature names, in order.

    A name is folded to ASCII, every run of characters other than letters, digits, ``-``,
    ``.`` and ``_`` becomes ``-``, and the result is cut to 60 characters (``"field"`` when
    nothing is left); a stem already taken, also ignoring case (for case-insensitive file
    systems), gets ``-2``, ``-3``, ... appended; a Windows device name (``CON``, ``NUL``,
    ``COM1``, ...) before the first dot gets ``-field`` there.  ``["North 40", "north/40"]`` gives
    ``["North-40", "north-40-2"]``.
    """
    taken: set[str] = set()
    slugs = []
    for name in names:
        text = unicodedata.normalize("NFKD", str(name)).encode("ascii", "ignore").decode()
        stem = re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-.")[:60].strip("-.") or "field"
        base, dot, rest = stem.partition(".")
        if base.upper() in _DEVICE_NAMES:  # "NUL.x" is the device too: mend the base
            stem = f"{base}-field{dot}{rest}"
        slug, n = stem, 1
        while slug.casefold() in taken:
            n += 1
            slug = f"{stem}-{n}"
        taken.add(slug.casefold())
        slugs.append(slug)
    return slugs


def split_boundary(path: str | Path, out_dir: str | Path, crs: str | None = None,
                   name_attribute: str | None = None) -> list[tuple[BoundaryFeature, Path]]:
    """Write each feature of a boundary file to its own file in ``out_dir``, one field each.

    Files are named by :func:`feature_slugs` of the features' names.  They keep the file's
    CRS: GeoJSON when the CRS has an EPSG code, else GeoPackage (GeoJSON cannot hold any
    other CRS).  Each holds the feature's geometry and attributes.

    Returns
    -------
    list of (BoundaryFeature, Path)
        In file order.

    Raises
    ------
    pmap.errors.InputError
        The errors of :func:`boundary_features`; a file without polygons.
    pmap.errors.OutputExistsError
        A target file exists (nothing is overwritten; nothing is written then).
    """
    import geopandas as gpd

    path = Path(path)
    out_dir = Path(out_dir)
    features = boundary_features(path, crs, name_attribute=name_attribute)
    if not features:
        raise InputError(f"{path.name}: no polygon in the boundary file: export the field "
                         "outlines as polygons")
    suffix, driver = ((".geojson", "GeoJSON") if features[0].crs.startswith("EPSG:")
                      else (".gpkg", "GPKG"))
    targets = [out_dir / f"{slug}{suffix}" for slug in feature_slugs([f.name for f in features])]
    existing = [t for t in targets if t.exists()]
    if existing:
        raise OutputExistsError(f"{existing[0]} exists: choose an empty directory for the "
                                "per-field boundaries, or remove the old ones")
    out_dir.mkdir(parents=True, exist_ok=True)
    out = []
    for feat, target in zip(features, targets, strict=True):
        frame = gpd.GeoDataFrame([feat.attributes], geometry=[feat.geometry],
                                 crs=to_pyproj(feat.crs))
        partial = target.with_name(f".{target.stem}.partial{suffix}")
        partial.unlink(missing_ok=True)
        frame.to_file(partial, driver=driver, layer=target.stem)
        os.replace(partial, target)
        out.append((feat, target))
    return out


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
