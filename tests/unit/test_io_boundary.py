"""Field boundaries: reading, repair, reprojection, field masks and samples inside."""

from __future__ import annotations

import re
import warnings

import geopandas as gpd
import numpy as np
import pytest
import shapely
from pyproj import Transformer
from shapely.geometry import LineString, Point, Polygon, box

from pmap.errors import ConfigError, InputError
from pmap.grid import GridSpec, estimate_grid, estimate_memory_bytes
from pmap.io.boundary import (
    boundary_lonlat_centroid,
    check_field_area,
    field_lonlat_points,
    field_mask,
    geodesic_area_m2,
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


# ----------------------------------------------------------------- areas and grid size


def _to(geom, src, dst):
    tr = Transformer.from_crs(src, dst, always_xy=True)
    return shapely.transform(geom, lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1])))


def test_geodesic_area_is_the_planar_area_over_the_areal_scale():
    # Source: pyproj (PROJ get_factors areal scale; geographiclib polygon area): a small
    # square's UTM area is its ellipsoidal area times the projection's areal scale there.
    from pyproj import Proj

    lon, lat = _to(SQUARE.centroid, UTM, "EPSG:4326").coords[0]
    areal = Proj(UTM).get_factors(lon, lat).areal_scale
    assert geodesic_area_m2(SQUARE, UTM) == pytest.approx(SQUARE.area / areal, rel=2e-6)
    assert geodesic_area_m2(_to(SQUARE, UTM, "EPSG:4326"), "EPSG:4326") == pytest.approx(
        SQUARE.area / areal, rel=2e-6)


def test_geodesic_area_ignores_ring_orientation_and_subtracts_holes():
    outer = [(338000, 4440000), (338400, 4440000), (338400, 4440300), (338000, 4440300)]
    hole = [(338100, 4440100), (338200, 4440100), (338200, 4440200), (338100, 4440200)]
    ccw = geodesic_area_m2(Polygon(outer), UTM)
    assert geodesic_area_m2(Polygon(outer[::-1]), UTM) == pytest.approx(ccw, rel=1e-12)
    holed = Polygon(outer[::-1], [hole])  # clockwise shell, clockwise hole
    assert geodesic_area_m2(holed, UTM) == pytest.approx(ccw * 11 / 12, rel=1e-6)
    two = shapely.MultiPolygon([Polygon(outer), box(339000, 4440000, 339100, 4440100)])
    assert geodesic_area_m2(two, UTM) == pytest.approx(ccw * 13 / 12, rel=1e-5)


def test_field_area_check_passes_utm_and_refuses_web_mercator():
    geodesic = geodesic_area_m2(SQUARE, UTM)
    areas = check_field_area(SQUARE, UTM, geodesic, "b.geojson")
    assert areas["working_crs_ha"] == pytest.approx(12.0)
    assert areas["geodesic_ha"] == pytest.approx(geodesic / 10_000)
    assert abs(areas["difference"]) < 0.001
    mercator = _to(SQUARE, UTM, "EPSG:3857")
    # Source: Snyder 1987, USGS PP 1395: Mercator areal scale sec^2(lat), 1.71 at 40.1 N
    with pytest.raises(InputError) as err:
        check_field_area(mercator, "EPSG:3857", geodesic, "b.geojson")
    message = str(err.value)
    for word in ("b.geojson", "EPSG:3857", f"{mercator.area / 10_000:,.2f} ha",
                 f"{geodesic / 10_000:,.2f} ha", "+71", "1%", "grid.crs"):
        assert word in message, (word, message)


def test_field_area_check_tolerance_is_one_percent():
    geodesic = SQUARE.area
    check_field_area(SQUARE, UTM, geodesic / 1.0099)
    with pytest.raises(InputError, match=r"-1\.1%"):
        check_field_area(SQUARE, UTM, geodesic / 0.989)


def test_field_lonlat_points_are_centroid_then_corners(tmp_path):
    lon, lat = field_lonlat_points(SQUARE, UTM)
    assert (lon[0], lat[0]) == pytest.approx(boundary_lonlat_centroid(
        _save(tmp_path, "sq.gpkg", [SQUARE])), abs=1e-9)
    west, south, east, north = _to(SQUARE, UTM, "EPSG:4326").bounds
    np.testing.assert_allclose(lon[1:], [west, east, east, west])
    np.testing.assert_allclose(lat[1:], [south, south, north, north])


def test_grid_too_large_is_refused_before_allocation(monkeypatch):
    def no_allocation(*args, **kwargs):
        raise AssertionError("the grid was allocated before the size check")

    monkeypatch.setattr(GridSpec, "from_bounds", no_allocation)
    # 400 x 300 m at 1 m: 400 x 300 = 120,000 cells (the square's edges are on the metre).
    with pytest.raises(ConfigError) as err:
        grid_for_boundary(SQUARE, UTM, 1.0, max_cells=100_000, n_samples=50)
    message = str(err.value)
    expected_gib = estimate_memory_bytes(120_000, 50) / 2**30
    for word in ("grid.cell_size_m = 1 m", "400 x 300 = 120,000 cells", f"{expected_gib:,.1f} GiB",
                 "grid.max_cells = 100,000", "--cell-size"):
        assert word in message, (word, message)
    # The suggested cell size is the smallest (to 0.1 m) that fits: 1.1 m does not, since
    # the origin snaps outward (365 x 274 = 100,010 cells).
    suggested = float(re.search(r"at least ([0-9.]+) m", message).group(1))
    assert suggested == 1.2
    assert estimate_grid(SQUARE.bounds, suggested)[2] <= 100_000
    assert estimate_grid(SQUARE.bounds, suggested - 0.1)[2] > 100_000


def test_grid_within_max_cells_is_built():
    grid = grid_for_boundary(SQUARE, UTM, 1.0, max_cells=120_000)
    assert (grid.width, grid.height) == (400, 300)
