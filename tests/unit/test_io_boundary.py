"""Field boundaries: reading, repair, reprojection, field masks and samples inside."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pytest
import shapely
from pyproj import Transformer
from shapely.geometry import LineString, Point, Polygon, box

from pmap.errors import InputError
from pmap.grid import GridSpec
from pmap.io.boundary import (
    boundary_lonlat_centroid,
    field_mask,
    grid_for_boundary,
    load_boundary,
    samples_inside,
)
from pmap.io.samples import SampleTable

UTM = "EPSG:32616"
SQUARE = box(338000, 4440000, 338400, 4440300)  # 400 m x 300 m = 12 ha


def _save(tmp_path, name, geoms, crs=UTM):
    path = tmp_path / name
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        gpd.GeoDataFrame({"name": [f"f{i}" for i in range(len(geoms))]}, geometry=geoms,
                         crs=crs).to_file(path)
    return path


@pytest.mark.parametrize("name", ["b.geojson", "b.gpkg", "b.shp"])
def test_formats_round_trip(tmp_path, name):
    geom = load_boundary(_save(tmp_path, name, [SQUARE]), UTM)
    assert geom.geom_type == "Polygon"
    assert geom.area == pytest.approx(120_000.0)


def test_reprojection_matches_pyproj(tmp_path):
    to_ll = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    ll = shapely.transform(SQUARE, lambda xy: np.column_stack(to_ll.transform(xy[:, 0], xy[:, 1])))
    geom = load_boundary(_save(tmp_path, "ll.geojson", [ll], crs="EPSG:4326"), UTM)
    np.testing.assert_allclose(geom.bounds, SQUARE.bounds, atol=1e-4)
    lon, lat = boundary_lonlat_centroid(tmp_path / "ll.geojson")
    assert (lon, lat) == pytest.approx(to_ll.transform(338200, 4440150), abs=1e-6)


def test_multiple_features_are_dissolved(tmp_path):
    parts = [box(0, 0, 100, 100), box(100, 0, 200, 100), box(500, 0, 600, 100)]
    geom = load_boundary(_save(tmp_path, "m.gpkg", parts), UTM)
    assert geom.geom_type == "MultiPolygon" and len(geom.geoms) == 2
    assert geom.area == pytest.approx(30_000.0)


def test_invalid_bowtie_is_repaired(tmp_path):
    bowtie = Polygon([(0, 0), (100, 100), (100, 0), (0, 100)])
    assert not bowtie.is_valid
    geom = load_boundary(_save(tmp_path, "bow.gpkg", [bowtie]), UTM)
    assert geom.is_valid and geom.area == pytest.approx(5000.0)


def test_missing_file():
    with pytest.raises(InputError, match="boundary file not found: .*gone.gpkg"):
        load_boundary("/nonexistent/gone.gpkg", UTM)


def test_no_crs(tmp_path):
    path = _save(tmp_path, "nocrs.shp", [SQUARE], crs=None)
    with pytest.raises(InputError, match=r"nocrs\.shp has no CRS"):
        load_boundary(path, UTM)
    assert load_boundary(path, UTM, crs=UTM).area == pytest.approx(120_000.0)


def test_no_polygon(tmp_path):
    path = _save(tmp_path, "line.gpkg", [LineString([(0, 0), (10, 10)])])
    with pytest.raises(InputError, match=r"line\.gpkg: no polygon .*LineString"):
        load_boundary(path, UTM)


def test_zero_area(tmp_path):
    flat = Polygon([(0, 0), (10, 0), (20, 0)])
    path = _save(tmp_path, "flat.gpkg", [flat])
    with pytest.raises(InputError, match=r"flat\.gpkg: no polygon"):
        load_boundary(path, UTM)


def test_field_mask_counts_cell_centres():
    grid = GridSpec.from_bounds(UTM, (0, 0, 100, 100), 10)
    tri = Polygon([(0, 0), (100, 0), (0, 97)])  # no cell centre lies on the hypotenuse
    mask = field_mask(grid, tri)
    x, y = grid.cell_centres()
    np.testing.assert_array_equal(mask, x / 100 + y / 97 < 1)
    assert mask[-1, 0] and not mask[0, -1]  # row 0 is the northern edge


def test_grid_for_boundary_area_matches_polygon():
    grid = grid_for_boundary(SQUARE, UTM, 5.0)
    assert grid.n_inside * grid.cell_area_ha == pytest.approx(12.0)
    disc = Point(0, 0).buffer(200, quad_segs=64)
    g2 = grid_for_boundary(disc, UTM, 2.0)
    assert g2.n_inside * g2.cell_area_ha == pytest.approx(disc.area / 10_000, rel=0.01)


def test_grid_for_tiny_field_refused():
    with pytest.raises(InputError, match="choose a smaller grid.cell_size_m"):
        grid_for_boundary(box(1, 1, 3, 3), UTM, 10.0)


def test_samples_inside_with_buffer():
    coords = np.array([[338200.0, 4440150.0], [338400.0, 4440150.0], [338405.0, 4440150.0],
                       [338420.0, 4440150.0]])
    table = SampleTable(coords, {"ph": np.full(4, 6.0)}, np.array(list("abcd")), UTM, "s.csv",
                        None, np.arange(2, 6), np.zeros((4, 2)))
    np.testing.assert_array_equal(samples_inside(table, SQUARE), [True, True, False, False])
    np.testing.assert_array_equal(samples_inside(table, SQUARE, 10.0), [True, True, True, False])
