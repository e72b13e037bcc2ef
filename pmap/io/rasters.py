"""GeoTIFF output in Cloud-Optimized layout, and reading it back.

:func:`write_cog` writes a GTiff in memory with band description, unit, tags and (for
class rasters) a colour table, then copies it with GDAL's COG driver to a temporary file
beside the target and renames it into place, so a reader never sees half a file.  The
same array, grid and tags give the same bytes: GDAL writes a TIFF date (``TIFFTAG_DATETIME``)
only when asked, and pmap never asks.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from affine import Affine

from pmap._version import __version__
from pmap.errors import ConfigError, InputError
from pmap.grid import NODATA, GridSpec
from pmap.io.crs import normalise_crs, to_pyproj

__all__ = ["CLASS_NODATA", "class_colours", "write_cog", "TiledGeoTIFF", "RasterInfo", "read_raster", "pmap_version",
           "read_onto_grid", "sample_at_points"]

#: Value written for cells outside the field in class (uint8) rasters.
CLASS_NODATA: int = 0


def pmap_version() -> str:
    """The pmap version written into provenance tags."""
    return __version__


def class_colours(class_ids: list[int] | tuple[int, ...]) -> dict[int, tuple[int, int, int, int]]:
    """Ordered, colour-blind-safe RGBA colours for class ids (low id = dark, high id = light).

    Samples matplotlib's viridis colour map evenly between 0.1 and 0.9, so maps and the
    GeoTIFF colour table agree.
    """
    from matplotlib import colormaps

    ids = sorted(int(c) for c in class_ids)
    cmap = colormaps["viridis"]
    pos = np.linspace(0.1, 0.9, len(ids)) if len(ids) > 1 else np.array([0.5])
    out = {}
    for cid, p in zip(ids, pos, strict=True):
        r, g, b, _ = cmap(float(p))
        out[cid] = (round(r * 255), round(g * 255), round(b * 255), 255)
    return out


def write_cog(
    path: str | Path,
    array: np.ndarray,
    grid: GridSpec,
    *,
    description: str,
    unit: str,
    tags: Mapping[str, str] | None = None,
    class_labels: Mapping[int, str] | None = None,
    colormap: Mapping[int, tuple[int, int, int, int]] | None = None,
) -> Path:
    """Write one band as a Cloud-Optimized GeoTIFF.

    Parameters
    ----------
    path : str or Path
        Target file; replaced atomically if it exists (the caller decides whether it may).
    array : numpy.ndarray, shape grid.shape
        Float values (written float32, NaN and cells outside ``grid.mask`` -> :data:`NODATA`)
        or integer classes 0-255 (written uint8, 0 and cells outside -> nodata 0).
    grid : GridSpec
        CRS, transform and field mask.
    description, unit : str
        Band description and unit (e.g. ``"mg/kg"``).
    tags : mapping, optional
        Provenance tags (method, variogram, n, ...); ``PMAP_VERSION`` is added.
    class_labels : mapping of int to str, optional
        For class rasters: written as tags ``CLASS_<id>=<label>``.
    colormap : mapping of int to RGBA, optional
        For class rasters: the colour table; default :func:`class_colours` of the labelled
        (or present) classes.

    Returns
    -------
    Path
        The written file.
    """
    import rasterio
    import rasterio.shutil
    from rasterio.io import MemoryFile

    path = Path(path)
    array = np.asarray(array)
    if array.shape != grid.shape:
        raise ValueError(f"array shape {array.shape} does not match grid {grid.shape}")
    is_class = array.dtype.kind in "uib"
    if is_class:
        if array.size and (array.min() < 0 or array.max() > 255):
            raise ValueError("class rasters hold integers 0-255")
        data = np.where(grid.mask, array, CLASS_NODATA).astype(np.uint8)
        dtype, nodata, resampling = "uint8", CLASS_NODATA, "NEAREST"
    else:
        data = np.asarray(array, dtype=np.float32)
        data = np.where(grid.mask & np.isfinite(data), data, np.float32(NODATA)).astype(np.float32)
        dtype, nodata, resampling = "float32", NODATA, "AVERAGE"
    all_tags = {str(k): str(v) for k, v in (tags or {}).items()}
    all_tags["PMAP_VERSION"] = pmap_version()
    if is_class:
        for cid, label in (class_labels or {}).items():
            all_tags[f"CLASS_{int(cid)}"] = str(label)
        if colormap is None:
            present = set(class_labels or {}) | {int(v) for v in np.unique(data) if v != 0}
            colormap = class_colours(sorted(present)) if present else None
    profile = {
        "driver": "GTiff", "width": grid.width, "height": grid.height, "count": 1,
        "dtype": dtype, "crs": rasterio.crs.CRS.from_user_input(normalise_crs(grid.crs)),
        "transform": grid.transform, "nodata": nodata,
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp.tif", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        with MemoryFile() as memfile:
            with memfile.open(**profile) as dst:
                dst.write(data, 1)
                dst.set_band_description(1, description)
                dst.set_band_unit(1, unit)
                dst.update_tags(**all_tags)
                if is_class and colormap:
                    dst.write_colormap(1, {int(k): tuple(int(c) for c in v) for k, v in colormap.items()})
            with memfile.open() as src:
                options = {"COMPRESS": "DEFLATE", "BLOCKSIZE": 256, "OVERVIEW_RESAMPLING": resampling}
                if not is_class:
                    options["PREDICTOR"] = "YES"
                rasterio.shutil.copy(src, tmp, driver="COG", **options)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()
    return path


@dataclass(frozen=True, eq=False)
class RasterInfo:
    """What a GeoTIFF says about itself (see :func:`read_raster`)."""

    crs: str
    transform: Affine
    width: int
    height: int
    dtype: str
    nodata: float | None
    description: str | None
    unit: str | None
    driver: str
    layout: str | None
    overviews: tuple[int, ...]
    colormap: dict[int, tuple[int, int, int, int]] | None
    band_tags: dict[str, str] = field(default_factory=dict)

    def grid(self, valid: np.ndarray) -> GridSpec:
        """A :class:`GridSpec` with ``valid`` (bool, shape (height, width)) as the field mask."""
        return GridSpec(self.crs, self.transform, self.width, self.height, np.asarray(valid, bool))


def read_raster(path: str | Path) -> tuple[np.ndarray, RasterInfo, dict[str, str]]:
    """Read band 1 of a raster.

    Returns
    -------
    array : numpy.ndarray
        Float rasters as float64 with nodata -> NaN; integer rasters as stored.
    info : RasterInfo
        CRS, transform, nodata, description, unit, layout, overviews, colour table.
    tags : dict of str to str
        Dataset tags (default namespace).
    """
    import rasterio

    with rasterio.open(path) as src:
        data = src.read(1)
        if data.dtype.kind == "f":
            data = data.astype(np.float64)
            if src.nodata is not None:
                data[data == src.nodata] = np.nan
        try:
            colormap = src.colormap(1)
        except ValueError:
            colormap = None
        info = RasterInfo(
            crs=normalise_crs(src.crs) if src.crs else "",
            transform=src.transform, width=src.width, height=src.height, dtype=src.dtypes[0],
            nodata=src.nodata, description=src.descriptions[0], unit=src.units[0],
            driver=src.driver, layout=src.tags(ns="IMAGE_STRUCTURE").get("LAYOUT"),
            overviews=tuple(src.overviews(1)), colormap=colormap, band_tags=src.tags(1),
        )
        tags = src.tags()
    return data, info, tags


def _require_crs(src: Any, path: Path) -> None:
    """Raise :class:`InputError` naming ``path`` when the open raster ``src`` has no CRS."""
    if src.crs is None:
        raise InputError(
            f"{path}: the raster has no CRS; assign the one its coordinates are in "
            f"(e.g. gdal_edit.py -a_srs EPSG:<code> {path.name}) and run again")


_RESAMPLING = ("nearest", "bilinear", "cubic", "cubic_spline", "lanczos", "average", "mode")


def read_onto_grid(
    path: str | Path,
    grid: GridSpec,
    *,
    resampling: str = "bilinear",
    min_coverage: float = 1.0,
) -> np.ndarray:
    """Band 1 of a user raster (e.g. elevation) resampled onto the run's grid.

    The raster is reprojected from its own CRS to ``grid.crs`` and ``grid.transform``
    (``rasterio.warp.reproject``); its nodata cells and cells beyond its extent are NaN.

    Parameters
    ----------
    path : str or Path
        A raster GDAL reads (GeoTIFF); it must carry a CRS.
    grid : GridSpec
        The run's grid and field mask.
    resampling : str
        nearest, bilinear (default, for continuous layers), cubic, cubic_spline, lanczos,
        average or mode.
    min_coverage : float
        Least fraction (0-1) of the field's cells that must get a value; default every cell.

    Returns
    -------
    numpy.ndarray of float64, shape grid.shape
        Values in the raster's own unit (cells outside the field included); NaN where the
        raster has no value.

    Raises
    ------
    pmap.errors.InputError
        The file cannot be read, has no CRS, or covers less than ``min_coverage`` of the
        field (the message says how much it covers).
    """
    import rasterio
    from rasterio.enums import Resampling
    from rasterio.errors import RasterioError
    from rasterio.warp import reproject, transform_bounds

    if resampling not in _RESAMPLING:
        raise ConfigError(f"resampling must be one of {', '.join(_RESAMPLING)}, got {resampling!r}")
    if not 0.0 <= min_coverage <= 1.0:
        raise ValueError(f"min_coverage must lie in [0, 1], got {min_coverage}")
    path = Path(path)
    dst_crs = rasterio.crs.CRS.from_user_input(normalise_crs(grid.crs))
    out = np.full(grid.shape, np.nan, dtype=np.float64)
    try:
        with rasterio.open(path) as src:
            _require_crs(src, path)
            reproject(
                source=rasterio.band(src, 1), destination=out, src_nodata=src.nodata,
                dst_transform=grid.transform, dst_crs=dst_crs, dst_nodata=np.nan,
                resampling=Resampling[resampling])
            src_bounds = transform_bounds(src.crs, dst_crs, *src.bounds)
    except RasterioError as exc:
        raise InputError(f"{path}: cannot read the raster ({exc}); give a GeoTIFF") from exc
    inside = np.asarray(grid.mask, dtype=bool)
    n_inside = int(inside.sum())
    n_covered = int(np.isfinite(out[inside]).sum())
    if n_inside and n_covered < min_coverage * n_inside:
        share = n_covered / n_inside
        extent = ", ".join(f"{b:.1f}" for b in src_bounds)
        field = ", ".join(f"{b:.1f}" for b in grid.bounds)
        raise InputError(
            f"{path}: the raster covers {share:.1%} of the field ({n_covered} of {n_inside} "
            f"cells with a value; its extent in {grid.crs} is ({extent}), the field's grid "
            f"({field})); give a raster that covers the whole field")
    return out


def sample_at_points(path: str | Path, coords: np.ndarray, crs: Any) -> np.ndarray:
    """Band 1 of a user raster at points: the value of the raster cell holding each point.

    The points are transformed from ``crs`` to the raster's CRS (pyproj, x/y order), then
    located with the raster's inverse geotransform, as ``DatasetReader.index`` does (floor):
    in a north-up raster a point on a cell edge belongs to the cell east / south of it.
    No interpolation.

    Parameters
    ----------
    path : str or Path
        A raster GDAL reads (GeoTIFF) in any CRS; it must carry one.
    coords : numpy.ndarray, shape (n, 2)
        x and y of the points in ``crs`` (m for a projected run CRS); finite.
    crs : str, pyproj.CRS or rasterio CRS
        The CRS of ``coords`` (the run's CRS), e.g. ``"EPSG:32616"``.

    Returns
    -------
    numpy.ndarray of float64, shape (n,)
        Values in the raster's own unit; NaN for points outside the raster, on its nodata
        (or masked) cells, or that cannot be transformed to its CRS.

    Raises
    ------
    ValueError
        ``coords`` not of shape (n, 2) or not finite.
    pmap.errors.InputError
        The file cannot be read or has no CRS, or ``crs`` cannot be parsed.
    """
    import rasterio
    from pyproj import Transformer
    from rasterio.errors import RasterioError
    from rasterio.windows import Window

    coords = np.asarray(coords, dtype=float)
    if coords.ndim != 2 or coords.shape[1] != 2:
        raise ValueError(f"coords must have shape (n, 2), got {coords.shape}")
    if not np.all(np.isfinite(coords)):
        raise ValueError("coords must be finite (no NaN or inf)")
    path = Path(path)
    run_crs = to_pyproj(crs)
    out = np.full(coords.shape[0], np.nan, dtype=np.float64)
    try:
        with rasterio.open(path) as src:
            _require_crs(src, path)
            to_raster = Transformer.from_crs(run_crs, to_pyproj(src.crs), always_xy=True)
            x, y = to_raster.transform(coords[:, 0], coords[:, 1], errcheck=False)
            x, y = np.asarray(x, float), np.asarray(y, float)
            inv = ~src.transform
            col_f, row_f = inv.a * x + inv.b * y + inv.c, inv.d * x + inv.e * y + inv.f
            ok = np.isfinite(col_f) & np.isfinite(row_f)
            col = np.full(out.shape, -1, dtype=np.int64)
            row = np.full(out.shape, -1, dtype=np.int64)
            col[ok], row[ok] = np.floor(col_f[ok]), np.floor(row_f[ok])
            inside = ok & (col >= 0) & (col < src.width) & (row >= 0) & (row < src.height)
            if inside.any():
                r0, r1 = int(row[inside].min()), int(row[inside].max()) + 1
                c0, c1 = int(col[inside].min()), int(col[inside].max()) + 1
                block = src.read(1, window=Window(c0, r0, c1 - c0, r1 - r0), masked=True)
                picked = block[row[inside] - r0, col[inside] - c0]
                out[inside] = np.ma.filled(picked.astype(np.float64), np.nan)
    except RasterioError as exc:
        raise InputError(f"{path}: cannot read the raster ({exc}); give a GeoTIFF") from exc
    return out


class TiledGeoTIFF:
    """One band GeoTIFF written window by window, for grids too large to hold in memory.

    Tiled in :attr:`BLOCK` x :attr:`BLOCK` blocks, DEFLATE-compressed (with the
    floating-point predictor for float bands), BigTIFF when the file could pass 4 GB.
    Float bands are float32 with nodata :data:`NODATA` (NaN is written as nodata), class
    bands uint8 with nodata 0, a colour table and ``CLASS_<n>`` tags; the provenance tags
    and ``PMAP_VERSION`` are written as by :func:`write_cog`.  Blocks never written read
    as nodata.  :meth:`close` adds the overviews.  The caller writes into a staging
    directory (:mod:`pmap.io.publish`): a file is complete only once closed.

    Parameters
    ----------
    path : path
        The file to create (must not exist).
    crs, transform, width, height
        The whole grid: projected CRS, upper-left transform, columns and rows.
    is_class : bool
        uint8 classes rather than float32 values.
    description, unit, tags, class_labels, colormap
        As for :func:`write_cog`.
    """

    BLOCK: int = 512

    def __init__(self, path: str | Path, *, crs: str, transform: Affine, width: int,
                 height: int, is_class: bool, description: str, unit: str,
                 tags: Mapping[str, str] | None = None,
                 class_labels: Mapping[int, str] | None = None,
                 colormap: Mapping[int, tuple[int, int, int, int]] | None = None):
        import rasterio

        self.path = Path(path)
        self.is_class = is_class
        self._resampling = "nearest" if is_class else "average"
        options: dict[str, Any] = {
            "tiled": True, "blockxsize": self.BLOCK, "blockysize": self.BLOCK,
            "compress": "deflate", "bigtiff": "IF_SAFER", "sparse_ok": False,
        }
        if not is_class:
            options["predictor"] = 3
        self._dst = rasterio.open(
            self.path, "w", driver="GTiff", width=width, height=height, count=1,
            dtype="uint8" if is_class else "float32",
            crs=rasterio.crs.CRS.from_user_input(normalise_crs(crs)), transform=transform,
            nodata=CLASS_NODATA if is_class else NODATA, **options)
        all_tags = {str(k): str(v) for k, v in (tags or {}).items()}
        all_tags["PMAP_VERSION"] = pmap_version()
        for cid, label in (class_labels or {}).items():
            all_tags[f"CLASS_{int(cid)}"] = str(label)
        self._dst.set_band_description(1, description)
        self._dst.set_band_unit(1, unit)
        self._dst.update_tags(**all_tags)
        if is_class:
            if colormap is None and class_labels:
                colormap = class_colours(sorted(class_labels))
            if colormap:
                self._dst.write_colormap(
                    1, {int(k): tuple(int(c) for c in v) for k, v in colormap.items()})

    def write(self, array: np.ndarray, row0: int, col0: int) -> None:
        """Write ``array`` (2-D) with its upper-left cell at row ``row0``, column ``col0``."""
        from rasterio.windows import Window

        array = np.asarray(array)
        if self.is_class:
            data = array.astype(np.uint8)
        else:
            data = np.asarray(array, dtype=np.float32)
            data = np.where(np.isfinite(data), data, np.float32(NODATA)).astype(np.float32)
        height, width = data.shape
        self._dst.write(data, 1, window=Window(col0, row0, width, height))

    def close(self, overviews: bool = True) -> Path:
        """Finish the file: overviews (halving until under one block), then close it."""
        import rasterio
        from rasterio.enums import Resampling

        self._dst.close()
        if overviews:
            with rasterio.open(self.path, "r+") as dst:
                factors = []
                size = max(dst.width, dst.height)
                while size > self.BLOCK:
                    factors.append(2 ** (len(factors) + 1))
                    size //= 2
                if factors:
                    dst.build_overviews(factors, Resampling[self._resampling])
                    dst.update_tags(ns="rio_overview", resampling=self._resampling)
        return self.path

    def abort(self) -> None:
        """Close without overviews (the staging directory is thrown away after)."""
        if not self._dst.closed:
            self._dst.close()
