"""User rasters (elevation and the like) on the run's grid and at points: pmap.io.rasters."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from pyproj import Transformer
from rasterio.transform import from_origin

from pmap.errors import InputError
from pmap.grid import GridSpec
from pmap.io.rasters import read_onto_grid, sample_at_points

UTM = "EPSG:32616"
# A 400 m x 300 m field near 87 W, 40 N (UTM zone 16N), 10 m cells.
X0, Y0 = 434_000.0, 4_428_000.0


def _grid(cell=10.0):
    grid = GridSpec.from_bounds(UTM, (X0, Y0, X0 + 400, Y0 + 300), cell)
    mask = np.ones(grid.shape, bool)
    mask[:2, :3] = False  # a corner outside the field
    return grid.with_mask(mask)


def _lonlat_plane(lon, lat):
    """A plane in degrees: 1000 units per degree of longitude, 2000 per degree of latitude."""
    return 1000.0 * (lon + 87.0) + 2000.0 * (lat - 40.0)


def _write_lonlat_raster(path, *, nodata=None, hole=None, shift_deg=0.0):
    """A float32 GeoTIFF in EPSG:4326 holding the plane, 0.0001 deg pixels around the field."""
    to_lonlat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    lon_min, lat_min = to_lonlat.transform(X0 - 100, Y0 - 100)
    lon_max, lat_max = to_lonlat.transform(X0 + 500, Y0 + 400)
    res = 0.0001
    west, north = lon_min - 0.001 + shift_deg, lat_max + 0.001
    width = int(np.ceil((lon_max + 0.001 - (lon_min - 0.001)) / res))
    height = int(np.ceil((lat_max + 0.001 - (lat_min - 0.001)) / res))
    lon = west + res * (np.arange(width) + 0.5)
    lat = north - res * (np.arange(height) + 0.5)
    data = _lonlat_plane(lon[None, :] - shift_deg, lat[:, None]).astype(np.float32)
    if hole is not None:
        data[hole] = nodata
    profile = {"driver": "GTiff", "width": width, "height": height, "count": 1,
               "dtype": "float32", "crs": "EPSG:4326", "transform": from_origin(west, north, res, res),
               "nodata": nodata}
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)
    return path


def test_lonlat_raster_lands_on_the_utm_grid(tmp_path):
    grid = _grid()
    path = _write_lonlat_raster(tmp_path / "plane.tif")
    got = read_onto_grid(path, grid)
    assert got.shape == grid.shape and got.dtype == np.float64
    # Source: pyproj (PROJ) transformation of the cell centres to longitude/latitude; a plane
    # in the raster's own coordinates is reproduced exactly by bilinear resampling, up to
    # GDAL's approximate transformer (1/8 pixel, 0.0125 deg x 2000 = 0.025 units at most).
    x, y = grid.cell_centres()
    lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(x, y)
    expected = _lonlat_plane(lon, lat)
    assert np.isfinite(got).all()
    np.testing.assert_allclose(got, expected, atol=0.05)
    # The plane rises 2 units per 0.001 deg north (about 111 m): a transposed or flipped read
    # would be off by far more than the tolerance.
    assert np.ptp(expected) > 5


def test_nodata_becomes_nan_and_coverage_is_checked(tmp_path):
    grid = _grid()
    path = _write_lonlat_raster(tmp_path / "holes.tif", nodata=-9999.0,
                                hole=(slice(None), slice(0, 55)))
    with pytest.raises(InputError, match=r"holes\.tif: the raster covers \d+\.\d% of the field") as err:
        read_onto_grid(path, grid)
    got = read_onto_grid(path, grid, min_coverage=0.0)
    # The share the message reports is the share of field cells that got a value.
    share = float(str(err.value).split("covers ")[1].split("%")[0]) / 100
    assert share == pytest.approx(np.isfinite(got[grid.mask]).mean(), abs=0.001)
    assert 0.2 < share < 0.9
    # Source: pyproj (PROJ) longitudes of the cell centres.  The hole is the raster's first
    # 55 pixel columns: cells a pixel or more west of its edge are NaN, a pixel or more east
    # hold the plane (never the nodata value itself).
    with rasterio.open(path) as src:
        edge_lon = src.transform.c + 55 * src.transform.a
        res = src.transform.a
    x, y = grid.cell_centres()
    lon, _ = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(x, y)
    west, east = lon < edge_lon - res, lon > edge_lon + res
    assert west.sum() > 100 and east.sum() > 100
    assert np.isnan(got[west]).all()
    assert np.isfinite(got[east]).all() and (got[east] > -9000).all()


def test_a_small_hole_is_refused_unless_allowed(tmp_path):
    # A few nodata columns over the field's west edge: about 95% of the cells get a value.
    grid = _grid()
    path = _write_lonlat_raster(tmp_path / "gap.tif", nodata=-9999.0,
                                hole=(slice(None), slice(0, 24)))
    with pytest.raises(InputError, match=r"gap\.tif: the raster covers 9\d\.\d% of the field"):
        read_onto_grid(path, grid)
    got = read_onto_grid(path, grid, min_coverage=0.9)
    assert 0.9 < np.isfinite(got[grid.mask]).mean() < 1.0


def test_raster_beside_the_field_is_refused_with_its_extent(tmp_path):
    path = _write_lonlat_raster(tmp_path / "elsewhere.tif", shift_deg=0.05)  # ~4 km east
    with pytest.raises(InputError, match=r"covers 0\.0% of the field .*EPSG:32616"):
        read_onto_grid(path, _grid())


def test_raster_without_crs_is_refused(tmp_path):
    path = tmp_path / "nocrs.tif"
    profile = {"driver": "GTiff", "width": 4, "height": 4, "count": 1, "dtype": "float32",
               "transform": from_origin(X0, Y0 + 40, 10, 10)}
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.ones((4, 4), np.float32), 1)
    with pytest.raises(InputError, match=r"nocrs\.tif: the raster has no CRS"):
        read_onto_grid(path, _grid())


def test_unreadable_file_is_named(tmp_path):
    path = tmp_path / "dem.tif"
    path.write_text("not a raster\n")
    with pytest.raises(InputError, match=r"dem\.tif: cannot read the raster"):
        read_onto_grid(path, _grid())
    with pytest.raises(InputError, match=r"missing\.tif: cannot read"):
        read_onto_grid(tmp_path / "missing.tif", _grid())


def test_aligned_integer_raster_with_nearest_is_copied(tmp_path):
    # common practice, no source: a raster on the grid itself comes back unchanged.
    grid = _grid()
    values = np.arange(grid.height * grid.width, dtype=np.int16).reshape(grid.shape)
    path = tmp_path / "aligned.tif"
    profile = {"driver": "GTiff", "width": grid.width, "height": grid.height, "count": 1,
               "dtype": "int16", "crs": UTM, "transform": grid.transform}
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(values, 1)
    got = read_onto_grid(path, grid, resampling="nearest")
    np.testing.assert_array_equal(got, values.astype(float))


def _write_utm_raster(path, *, nodata=None, dtype="float32"):
    """A 7 m UTM raster, origin off the 10 m grid, whose cell (r, c) holds 1000 r + c."""
    west, north, res = X0 - 46.5, Y0 + 353.5, 7.0
    height, width = 70, 80
    data = (1000 * np.arange(height)[:, None] + np.arange(width)[None, :]).astype(dtype)
    profile = {"driver": "GTiff", "width": width, "height": height, "count": 1, "dtype": dtype,
               "crs": UTM, "transform": from_origin(west, north, res, res), "nodata": nodata}
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)
    return path, west, north, res


def test_points_take_the_value_of_their_utm_cell(tmp_path):
    path, west, north, res = _write_utm_raster(tmp_path / "cells.tif")
    rows, cols = np.array([0, 5, 69, 33, 12]), np.array([0, 79, 3, 40, 12])
    # Somewhere inside each cell, not at its centre: (0.1, 0.9) of the way across.
    x = west + res * (cols + np.array([0.1, 0.9, 0.5, 0.01, 0.99]))
    y = north - res * (rows + np.array([0.9, 0.1, 0.5, 0.99, 0.01]))
    got = sample_at_points(path, np.column_stack([x, y]), UTM)
    assert got.dtype == np.float64 and got.shape == (5,)
    np.testing.assert_array_equal(got, 1000.0 * rows + cols)
    # Points beyond each edge of the raster (and one inside) are NaN / a value.
    outside = np.array([[west - 0.5, north - 10.0], [west + 80 * res + 0.5, north - 10.0],
                        [west + 10.0, north + 0.5], [west + 10.0, north - 70 * res - 0.5],
                        [west + 3.0, north - 3.0]])
    got = sample_at_points(path, outside, "epsg:32616")
    assert np.isnan(got[:4]).all() and got[4] == 0.0


def test_points_in_another_crs_are_reprojected(tmp_path):
    path, west, north, res = _write_utm_raster(tmp_path / "cells.tif")
    rows, cols = np.array([2, 50, 61]), np.array([7, 8, 77])
    x, y = west + res * (cols + 0.5), north - res * (rows + 0.5)
    # Source: pyproj (PROJ) transformation of the cell centres to longitude/latitude.
    lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(x, y)
    got = sample_at_points(path, np.column_stack([lon, lat]), "EPSG:4326")
    np.testing.assert_array_equal(got, 1000.0 * rows + cols)
    # x/y order: swapping the coordinates lands far outside the raster.
    assert np.isnan(sample_at_points(path, np.column_stack([lat, lon]), "EPSG:4326")).all()


def test_lonlat_raster_sampled_at_utm_points(tmp_path):
    path = _write_lonlat_raster(tmp_path / "plane.tif")
    rng = np.random.default_rng(1)
    pts = np.column_stack([X0 + 400 * rng.random(300), Y0 + 300 * rng.random(300)])
    got = sample_at_points(path, pts, UTM)
    # Source: pyproj (PROJ) longitudes/latitudes of the points; the cell holding a point
    # is found from them and the raster's geotransform, its value read from the file.
    lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(pts[:, 0],
                                                                                  pts[:, 1])
    with rasterio.open(path) as src:
        data, t = src.read(1), src.transform
    col = np.floor((lon - t.c) / t.a).astype(int)
    row = np.floor((lat - t.f) / t.e).astype(int)
    np.testing.assert_array_equal(got, data[row, col].astype(float))
    # The nearest cell's centre is within half a pixel of the point: the plane differs by at
    # most 0.5 * 0.0001 * (1000 + 2000) = 0.15 units; a transposed read would not.
    assert np.max(np.abs(got - _lonlat_plane(lon, lat))) <= 0.15
    assert np.ptp(got) > 5


def test_nodata_cells_are_nan(tmp_path):
    path = _write_lonlat_raster(tmp_path / "holes.tif", nodata=-9999.0,
                                hole=(slice(None), slice(0, 55)))
    pts = _grid().inside_coords()
    got = sample_at_points(path, pts, UTM)
    lon, _ = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(pts[:, 0],
                                                                              pts[:, 1])
    with rasterio.open(path) as src:
        col = np.floor((lon - src.transform.c) / src.transform.a)
    assert (col < 55).sum() > 100 and (col >= 55).sum() > 100
    assert np.isnan(got[col < 55]).all()
    assert np.isfinite(got[col >= 55]).all() and (got[col >= 55] > -9000).all()
    # Integer raster: its nodata value too becomes NaN, the rest the stored integer.
    ipath, west, north, res = _write_utm_raster(tmp_path / "int.tif", nodata=1005,
                                                dtype="int16")
    xy = np.array([[west + 5.5 * res, north - 1.5 * res], [west + 6.5 * res, north - 1.5 * res]])
    got = sample_at_points(ipath, xy, UTM)
    assert np.isnan(got[0]) and got[1] == 1006.0


@pytest.mark.parametrize("raster", ["utm", "lonlat"])
def test_points_agree_with_nearest_read_onto_grid(tmp_path, raster):
    grid = _grid()
    if raster == "utm":
        path = _write_utm_raster(tmp_path / "r.tif", nodata=-1.0)[0]
    else:
        path = _write_lonlat_raster(tmp_path / "r.tif")
    on_grid = read_onto_grid(path, grid, resampling="nearest")
    x, y = grid.cell_centres()
    at_points = sample_at_points(path, np.column_stack([x.ravel(), y.ravel()]), UTM)
    at_points = at_points.reshape(grid.shape)
    if raster == "utm":
        # Same CRS: the warp maps cell centres exactly; every cell agrees.
        np.testing.assert_array_equal(at_points, on_grid)
        return
    # GDAL's approximate transformer (up to 1/8 pixel) may pick the neighbour of a cell
    # centre within 1/8 pixel of a raster cell edge; everywhere else the two agree.
    lon, lat = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(x, y)
    with rasterio.open(path) as src:
        t = src.transform
    fc, fr = (lon - t.c) / t.a % 1.0, (lat - t.f) / t.e % 1.0
    clear = (np.minimum(fc, 1 - fc) > 0.2) & (np.minimum(fr, 1 - fr) > 0.2)
    assert clear.mean() > 0.25
    np.testing.assert_array_equal(at_points[clear], on_grid[clear])
    assert np.mean(at_points == on_grid) > 0.9


def test_sampling_errors_name_the_file(tmp_path):
    pts = np.array([[X0 + 5.0, Y0 + 5.0]])
    nocrs = tmp_path / "nocrs.tif"
    profile = {"driver": "GTiff", "width": 4, "height": 4, "count": 1, "dtype": "float32",
               "transform": from_origin(X0, Y0 + 40, 10, 10)}
    with rasterio.open(nocrs, "w", **profile) as dst:
        dst.write(np.ones((4, 4), np.float32), 1)
    with pytest.raises(InputError, match=r"nocrs\.tif: the raster has no CRS"):
        sample_at_points(nocrs, pts, UTM)
    bad = tmp_path / "dem.tif"
    bad.write_text("not a raster\n")
    with pytest.raises(InputError, match=r"dem\.tif: cannot read the raster"):
        sample_at_points(bad, pts, UTM)
    with pytest.raises(InputError, match=r"missing\.tif: cannot read"):
        sample_at_points(tmp_path / "missing.tif", pts, UTM)
    good = _write_utm_raster(tmp_path / "ok.tif")[0]
    with pytest.raises(InputError, match="cannot read a CRS"):
        sample_at_points(good, pts, "EPSG:not-a-code")
    with pytest.raises(ValueError, match=r"shape \(n, 2\)"):
        sample_at_points(good, pts[0], UTM)
    with pytest.raises(ValueError, match="finite"):
        sample_at_points(good, np.array([[np.nan, Y0]]), UTM)
    assert sample_at_points(good, np.empty((0, 2)), UTM).shape == (0,)
