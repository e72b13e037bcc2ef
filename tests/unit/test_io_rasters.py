"""Cloud-Optimized GeoTIFF output and the raster assertion helper."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from affine import Affine

from pmap.grid import NODATA, GridSpec
from pmap.io.rasters import class_colours, read_raster, write_cog
from pmap.testing import assert_raster_equal

UTM = "EPSG:32616"


def _grid(width=40, height=30, cell=5.0):
    grid = GridSpec.from_bounds(UTM, (338000, 4440000, 338000 + width * cell, 4440000 + height * cell), cell)
    mask = np.ones(grid.shape, bool)
    mask[:3, :4] = False  # a corner outside the field
    return grid.with_mask(mask)


def test_float_layer_is_a_cog_with_metadata(tmp_path):
    grid = _grid()
    values = np.linspace(5, 50, grid.width * grid.height).reshape(grid.shape)
    values[10, 10] = np.nan
    path = write_cog(tmp_path / "stp.tif", values, grid, description="soil-test P (Mehlich-3 ICP)",
                     unit="mg/kg", tags={"METHOD": "ordinary kriging", "N_SAMPLES": "25"})
    with rasterio.open(path) as src:
        assert src.driver == "GTiff"
        # Source: GDAL COG driver docs (LAYOUT=COG in the IMAGE_STRUCTURE metadata domain)
        assert src.tags(ns="IMAGE_STRUCTURE")["LAYOUT"] == "COG"
        assert src.tags(ns="IMAGE_STRUCTURE")["COMPRESSION"] == "DEFLATE"
        assert src.dtypes[0] == "float32" and src.nodata == NODATA
        assert src.crs.to_epsg() == 32616
        assert src.descriptions[0] == "soil-test P (Mehlich-3 ICP)" and src.units[0] == "mg/kg"
        tags = src.tags()
        assert tags["METHOD"] == "ordinary kriging" and tags["N_SAMPLES"] == "25"
        assert "PMAP_VERSION" in tags
        raw = src.read(1)
    assert raw[0, 0] == np.float32(NODATA) and raw[10, 10] == np.float32(NODATA)
    expected = np.where(grid.mask, values, np.nan).astype(np.float32)
    assert_raster_equal(path, expected, crs=UTM, transform=grid.transform, nodata=NODATA)
    assert not list(tmp_path.glob(".*tmp*"))  # no temporary file left


def test_class_layer_keeps_colour_table_and_labels(tmp_path):
    grid = _grid()
    zones = np.ones(grid.shape, np.uint8)
    zones[:, 20:] = 2
    zones[15:, 30:] = 3
    labels = {1: "low", 2: "medium", 3: "high"}
    path = write_cog(tmp_path / "zones.tif", zones, grid, description="P availability class",
                     unit="class", class_labels=labels)
    data, info, tags = read_raster(path)
    assert info.dtype == "uint8" and info.nodata == 0 and info.layout == "COG"
    assert data[0, 0] == 0 and data[5, 5] == 1 and data[20, 35] == 3
    assert {tags[f"CLASS_{k}"] for k in labels} == set(labels.values())
    expected = class_colours([1, 2, 3])
    for k in labels:
        assert info.colormap[k] == expected[k]
    given = {1: (200, 0, 0, 255), 2: (0, 200, 0, 255), 3: (0, 0, 200, 255)}
    write_cog(path, zones, grid, description="zones", unit="class", colormap=given)  # replaces
    _, info2, _ = read_raster(path)
    assert info2.colormap[2] == (0, 200, 0, 255) and info2.description == "zones"


def test_overviews_for_a_large_raster(tmp_path):
    grid = _grid(width=700, height=600, cell=1.0)
    rng = np.random.default_rng(3)
    path = write_cog(tmp_path / "big.tif", rng.normal(20, 5, grid.shape), grid,
                     description="pH", unit="pH units")
    zones = write_cog(tmp_path / "bigz.tif", rng.integers(1, 4, grid.shape).astype(np.uint8), grid,
                      description="zones", unit="class")
    for p in (path, zones):
        with rasterio.open(p) as src:
            assert src.overviews(1), p  # 256-px blocks: a 700 x 600 raster gets overviews
            assert src.block_shapes[0] == (256, 256)


def test_bad_shapes_and_class_ranges(tmp_path):
    grid = _grid()
    with pytest.raises(ValueError, match="does not match grid"):
        write_cog(tmp_path / "x.tif", np.zeros((3, 3)), grid, description="d", unit="u")
    with pytest.raises(ValueError, match="0-255"):
        write_cog(tmp_path / "x.tif", np.full(grid.shape, 300), grid, description="d", unit="u")


def test_assert_raster_equal_reports_differences(tmp_path):
    grid = _grid()
    values = np.full(grid.shape, 7.0)
    path = write_cog(tmp_path / "c.tif", values, grid, description="d", unit="u")
    expected = np.where(grid.mask, 7.0, np.nan)
    assert_raster_equal(path, expected)
    with pytest.raises(AssertionError, match="CRS"):
        assert_raster_equal(path, expected, crs="EPSG:32617")
    with pytest.raises(AssertionError, match="transform"):
        assert_raster_equal(path, expected, transform=Affine.translation(1, 0) @ grid.transform)
    with pytest.raises(AssertionError, match="nodata"):
        assert_raster_equal(path, expected, nodata=0.0)
    with pytest.raises(AssertionError, match="NaN pattern"):
        assert_raster_equal(path, np.full(grid.shape, 7.0))
    with pytest.raises(AssertionError, match="values differ"):
        assert_raster_equal(path, np.where(grid.mask, 7.1, np.nan))
    with pytest.raises(AssertionError, match="shape"):
        assert_raster_equal(np.zeros((2, 2)), np.zeros((2, 3)))
    with pytest.raises(AssertionError, match="1 cells differ"):
        assert_raster_equal(np.array([[1, 2]]), np.array([[1, 3]]))


def test_class_colours_are_ordered_dark_to_light():
    colours = class_colours([3, 1, 2])
    brightness = [sum(colours[k][:3]) for k in (1, 2, 3)]
    assert brightness == sorted(brightness) and len(set(brightness)) == 3


def test_same_layer_gives_the_same_bytes_and_no_tiff_date(tmp_path):
    grid = _grid()
    values = np.linspace(5, 50, grid.width * grid.height).reshape(grid.shape)
    zones = np.where(values > 20, 2, 1).astype(np.uint8)
    tags = {"METHOD": "ordinary kriging"}
    for run in ("a", "b"):
        write_cog(tmp_path / run / "stp.tif", values, grid, description="d", unit="mg/kg", tags=tags)
        write_cog(tmp_path / run / "zones.tif", zones, grid, description="z", unit="class",
                  class_labels={1: "low", 2: "high"})
    for name in ("stp.tif", "zones.tif"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
        with rasterio.open(tmp_path / "a" / name) as src:
            # Source: GDAL GTiff driver docs (the TIFF DateTime tag is the TIFFTAG_DATETIME item)
            assert "TIFFTAG_DATETIME" not in src.tags()
