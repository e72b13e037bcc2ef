"""The region's grid, its tiles and the windowed GeoTIFF writer."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from shapely.geometry import Polygon, box

from pmap.grid import GridSpec
from pmap.io.boundary import field_mask
from pmap.io.rasters import TiledGeoTIFF
from pmap.region.tiles import RegionGrid, plan_tiles, tile_grid

CRS = "EPSG:32616"
# An L-shaped field whose top-right quarter is empty.
L_SHAPE = Polygon([(500_000, 4_400_000), (500_800, 4_400_000), (500_800, 4_400_400),
                   (500_400, 4_400_400), (500_400, 4_400_800), (500_000, 4_400_800)])
# The same, off the 5 m lattice (the grid snaps outward to whole cells).
L_SHIFTED = Polygon([(x + 3.0, y + 7.0) for x, y in L_SHAPE.exterior.coords])


def test_region_grid_is_the_field_grid_without_its_mask():
    # common practice, no source: a region and a field over the same ground share cells
    whole = GridSpec.from_bounds(CRS, L_SHAPE.bounds, 5.0)
    region = RegionGrid.from_bounds(CRS, L_SHAPE.bounds, 5.0)
    assert region.transform == whole.transform
    assert (region.width, region.height) == (whole.width, whole.height)
    assert region.n_cells == whole.width * whole.height


@pytest.mark.parametrize("shape", [L_SHAPE, L_SHIFTED])
@pytest.mark.parametrize("tile_cells", [16, 37, 64, 1024])
def test_tiles_cover_every_inside_cell_once(tile_cells, shape):
    region = RegionGrid.from_bounds(CRS, shape.bounds, 5.0)
    whole = GridSpec.from_bounds(CRS, shape.bounds, 5.0)
    mask = field_mask(whole, shape)
    seen = np.zeros(mask.shape, dtype=int)
    for tile in plan_tiles(region, shape, tile_cells):
        spec = tile_grid(region, tile, shape)
        rows, cols = tile.slices
        np.testing.assert_array_equal(spec.mask, mask[rows, cols])
        # the tile's cell centres are the whole grid's centres in that window
        x, y = spec.cell_centres()
        wx, wy = whole.cell_centres()
        np.testing.assert_allclose(x, wx[rows, cols])
        np.testing.assert_allclose(y, wy[rows, cols])
        seen[rows, cols] += 1
    assert seen[mask].min() == 1 and seen.max() <= 1


def test_tiles_outside_the_boundary_are_not_planned():
    region = RegionGrid.from_bounds(CRS, L_SHAPE.bounds, 5.0)  # 160 x 160 cells
    tiles = plan_tiles(region, L_SHAPE, 40)  # 4 x 4 tiles, the top-right 2 x 2 empty
    assert len(tiles) == 12
    empty_quarter = box(500_400, 4_400_400, 500_800, 4_400_800)
    for tile in tiles:
        assert not box(*tile.bounds(region)).within(empty_quarter)
    assert len(plan_tiles(RegionGrid.from_bounds(CRS, L_SHIFTED.bounds, 5.0), L_SHIFTED, 40)) > 12
    assert [t.index for t in tiles] == sorted(t.index for t in tiles)
    with pytest.raises(ValueError, match="tile_cells"):
        plan_tiles(region, L_SHAPE, 8)


def test_windowed_geotiff_reads_back_what_was_written(tmp_path):
    rng = np.random.default_rng(3)
    height, width = 700, 1100
    values = rng.random((height, width)).astype(np.float32)
    values[5, 7] = np.nan
    grid = RegionGrid.from_bounds(CRS, (500_000, 4_400_000, 500_000 + width, 4_400_000 + height),
                                  1.0)
    writer = TiledGeoTIFF(tmp_path / "v.tif", crs=CRS, transform=grid.transform, width=width,
                          height=height, is_class=False, description="test values", unit="mg/kg",
                          tags={"PMAP_LAYER": "v"})
    windows = [(r, c) for r in range(0, height, 512) for c in range(0, width, 512)]
    skipped = windows.pop(1)  # a window never written reads as nodata
    for r, c in reversed(windows):  # any order
        writer.write(values[r:r + 512, c:c + 512], r, c)
    writer.close()
    with rasterio.open(tmp_path / "v.tif") as src:
        data = src.read(1)
        assert src.block_shapes[0] == (512, 512)
        assert src.nodata == -9999.0 and src.dtypes[0] == "float32"
        assert src.overviews(1) == [2, 4]
        assert src.tags()["PMAP_LAYER"] == "v" and "PMAP_VERSION" in src.tags()
        assert src.descriptions[0] == "test values" and src.units[0] == "mg/kg"
        assert src.transform == grid.transform
    r, c = skipped
    assert (data[r:r + 512, c:c + 512] == -9999.0).all()
    keep = np.ones(data.shape, bool)
    keep[r:r + 512, c:c + 512] = False
    assert data[5, 7] == -9999.0
    keep[5, 7] = False
    np.testing.assert_array_equal(data[keep], values[keep])


def test_windowed_class_geotiff_has_labels_and_colours(tmp_path):
    codes = np.zeros((300, 300), np.uint8)
    codes[:150] = 1
    codes[150:, :100] = 3
    grid = RegionGrid.from_bounds(CRS, (500_000, 4_400_000, 500_300, 4_400_300), 1.0)
    writer = TiledGeoTIFF(tmp_path / "c.tif", crs=CRS, transform=grid.transform, width=300,
                          height=300, is_class=True, description="classes", unit="class",
                          class_labels={1: "low", 2: "moderate", 3: "high"},
                          colormap={1: (255, 0, 0, 255), 3: (0, 0, 255, 255)})
    writer.write(codes, 0, 0)
    writer.close()
    with rasterio.open(tmp_path / "c.tif") as src:
        np.testing.assert_array_equal(src.read(1), codes)
        assert src.nodata == 0 and src.tags()["CLASS_3"] == "high"
        assert src.colormap(1)[3] == (0, 0, 255, 255)
        assert src.overviews(1) == []  # under one block: none needed


def test_progress_estimates_the_time_left_at_the_pace_so_far():
    from pmap.region import RegionProgress

    assert RegionProgress(0, 10, 5.0).eta_s is None
    assert RegionProgress(4, 10, 20.0).eta_s == pytest.approx(30.0)
    assert RegionProgress(10, 10, 50.0).eta_s == 0.0
