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

from pmap.errors import ConfigError, InputError, OutputExistsError, PmapWarning
from pmap.grid import GridSpec, estimate_grid, estimate_memory_bytes
from pmap.io.boundary import (
    boundary_features,
    boundary_lonlat_centroid,
    check_field_area,
    feature_slugs,
    field_lonlat_points,
    field_mask,
    geodesic_area_m2,
    grid_for_boundary,
    load_boundary,
    read_boundary,
    samples_inside,
    select_boundary,
    split_boundary,
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
    with pytest.warns(PmapWarning, match="3 features merged into one field: f0, f1, f2"):
        geom = load_boundary(_save(tmp_path, "m.gpkg", parts), UTM)
    assert geom.geom_type == "MultiPolygon" and len(geom.geoms) == 2
    assert geom.area == pytest.approx(30_000.0)


THREE = [box(0, 0, 100, 100), box(300, 0, 400, 100), box(600, 0, 800, 100)]
THREE_NAMES = ["North 40", "Creek", "Home"]


def _fields(tmp_path, names=THREE_NAMES, parts=THREE, column="Field_Name", name="fields.gpkg",
            crs=UTM, **extra):
    path = tmp_path / name
    gpd.GeoDataFrame({column: names, **extra}, geometry=parts, crs=crs).to_file(path)
    return path


def _no_warning():
    cm = warnings.catch_warnings()
    cm.__enter__()
    warnings.simplefilter("error")
    return cm


def test_features_are_named_by_a_name_like_attribute_in_any_case(tmp_path):
    # common practice, no source: farm GIS exports name fields in a "Field_Name"-like column.
    path = _fields(tmp_path, farm_id=np.array([7, 8, 9], dtype=np.int64))
    feats = boundary_features(path)
    assert [(f.index, f.name, f.position) for f in feats] == [
        (0, "North 40", "#1"), (1, "Creek", "#2"), (2, "Home", "#3")]
    assert feats[1].attributes == {"Field_Name": "Creek", "farm_id": 8}
    assert type(feats[1].attributes["farm_id"]) is int
    assert all(f.crs == UTM and f.n_parts == 1 for f in feats)
    # Source: shapely (equals is topological equality of the written and read polygons).
    assert all(f.geometry.equals(g) for f, g in zip(feats, THREE, strict=True))
    by_farm = boundary_features(path, name_attribute="FARM_ID")
    assert [f.name for f in by_farm] == ["7", "8", "9"]
    with pytest.raises(InputError, match=r"no attribute 'crop'.*Field_Name, farm_id"):
        boundary_features(path, name_attribute="crop")


def test_unnamed_features_get_their_position_and_skipped_rows_still_count(tmp_path):
    parts = [LineString([(0, 0), (5, 5)]), box(0, 0, 10, 10), box(20, 0, 30, 10)]
    path = _fields(tmp_path, names=["track", "", None], parts=parts, column="NAME")
    feats = boundary_features(path)
    assert [(f.index, f.name) for f in feats] == [(1, "feature-2"), (2, "feature-3")]
    nameless = tmp_path / "plain.gpkg"
    gpd.GeoDataFrame({"crop": ["maize", "soy"]}, geometry=THREE[:2], crs=UTM).to_file(nameless)
    assert [f.name for f in boundary_features(nameless)] == ["feature-1", "feature-2"]


def test_one_feature_chosen_by_name_attribute_value_index_or_position(tmp_path):
    path = _fields(tmp_path, farm_id=[7, 8, 9])
    cm = _no_warning()
    try:
        chosen = {
            "name": read_boundary(path, feature="Creek")[0],
            "name, other case": read_boundary(path, feature="creek")[0],
            "attr=value": read_boundary(path, feature="farm_id=8")[0],
            "ATTR = value": read_boundary(path, feature="FIELD_NAME = Creek")[0],
            "0-based index": read_boundary(path, feature=1)[0],
            "#N, 1-based": read_boundary(path, feature="#2")[0],
        }
    finally:
        cm.__exit__(None, None, None)
    for how, geom in chosen.items():
        assert geom.equals(THREE[1]), how
    assert read_boundary(path, feature=0)[0].equals(THREE[0])
    assert read_boundary(path, feature="#3")[0].equals(THREE[2])
    assert read_boundary(path, feature=np.int64(2))[0].equals(THREE[2])
    sel = select_boundary(path, feature="Home")
    assert not sel.merged and [f.name for f in sel.features] == ["Home"]
    assert sel.note == "feature 'Home' (#3 of 3) of fields.gpkg, 1 polygon(s)"


def test_unknown_or_ambiguous_feature_lists_the_names_and_how_to_choose(tmp_path):
    path = _fields(tmp_path)
    listed = r"North 40 \(#1\), Creek \(#2\), Home \(#3\); choose one with --field NAME"
    with pytest.raises(InputError, match=r"fields\.gpkg: no feature 'Barn'; the file holds "
                       r"3: " + listed):
        read_boundary(path, feature="Barn")
    with pytest.raises(InputError, match=r"no feature '3' \(for the 3-th feature by position, "
                       r"use '#3'\)"):
        read_boundary(path, feature="3")
    for beyond in ("#4", "#0", 3, -1):
        with pytest.raises(InputError, match="no feature"):
            read_boundary(path, feature=beyond)
    twice = _fields(tmp_path, names=["Creek", "Creek", "Home"], name="twice.gpkg")
    with pytest.raises(InputError, match=r"2 features match 'Creek': Creek \(#1\), Creek \(#2\); "
                       r"choose one by position with --field '#N'"):
        read_boundary(twice, feature="Creek")
    assert read_boundary(twice, feature="#2")[0].equals(THREE[1])


def test_long_listings_stop_at_twenty_names(tmp_path):
    parts = [box(20 * i, 0, 20 * i + 10, 10) for i in range(25)]
    path = _fields(tmp_path, names=[f"P{i}" for i in range(25)], parts=parts)
    with pytest.raises(InputError, match=r"P19 \(#20\) and 5 more;") as err:
        read_boundary(path, feature="Barn")
    assert "P20" not in str(err.value)


def test_a_feature_named_like_a_number_is_chosen_by_name(tmp_path):
    path = _fields(tmp_path, names=["3", "1", "2"], column="id")
    assert read_boundary(path, feature="3")[0].equals(THREE[0])
    assert read_boundary(path, feature="#3")[0].equals(THREE[2])


@pytest.mark.parametrize("parts, relation", [
    (THREE, "do not touch"),
    ([box(0, 0, 100, 100), box(100, 0, 200, 100), box(600, 0, 800, 100)], "touch"),
    ([box(0, 0, 100, 100), box(50, 0, 200, 100), box(600, 0, 800, 100)], "overlap"),
])
def test_merging_several_features_warns_with_names_and_whether_they_touch(tmp_path, parts,
                                                                          relation):
    # Source: shapely (DE-9IM predicates: boxes sharing an edge intersect with zero area).
    path = _fields(tmp_path, parts=parts)
    with pytest.warns(PmapWarning) as caught:
        sel = select_boundary(path)
    assert len(caught) == 1
    assert str(caught[0].message) == (
        f"fields.gpkg: 3 features merged into one field: North 40, Creek, Home; they "
        f"{relation}; choose one with --field NAME (or '#N' for the N-th) or run each as "
        "its own field with --each-field")
    assert sel.merged and len(sel.features) == 3
    assert sel.geometry.area == pytest.approx(shapely.union_all(parts).area)


def test_one_feature_of_several_parts_is_not_a_merge(tmp_path, caplog):
    from shapely.geometry import MultiPolygon

    split = MultiPolygon([box(0, 0, 10, 10), box(20, 0, 30, 10)])
    path = _fields(tmp_path, names=["Split"], parts=[split])
    cm = _no_warning()
    try:
        with caplog.at_level("INFO", logger="pmap.io.boundary"):
            sel = select_boundary(path)
        single = select_boundary(_fields(tmp_path, names=["One"], parts=[SQUARE], name="1.gpkg"))
    finally:
        cm.__exit__(None, None, None)
    assert not sel.merged and sel.n_parts == 2 and sel.features[0].n_parts == 2
    assert sel.note == "feature 'Split' (#1 of 1) of fields.gpkg, 2 polygon(s)"
    assert "2 polygon(s)" in caplog.text
    assert not single.merged and single.n_parts == 1


def test_feature_slugs_are_safe_and_distinct():
    # common practice, no source: file names of letters, digits, '-', '.', '_' only.
    names = ["North 40", "North/40", "north 40", "", "Feld Ünter", "North-40", "con", "a" * 70]
    slugs = feature_slugs(names)
    assert slugs == ["North-40", "North-40-2", "north-40-3", "field", "Feld-Unter",
                     "North-40-4", "con-field", "a" * 60]
    # Source: Microsoft, "Naming Files, Paths, and Namespaces" (CON, NUL, COM1 ... reserved).
    assert feature_slugs(["NUL", "com1", "Lpt9.x"]) == ["NUL-field", "com1-field", "Lpt9-field.x"]
    assert all(re.fullmatch(r"[A-Za-z0-9._-]+", s) for s in slugs)
    assert len({s.casefold() for s in slugs}) == len(slugs)


def test_split_writes_one_file_per_feature_in_the_file_crs(tmp_path):
    path = _fields(tmp_path, names=["North 40", "North/40", "Home"], farm_id=[7, 8, 9])
    written = split_boundary(path, tmp_path / "each")
    assert [p.name for _, p in written] == ["North-40.geojson", "North-40-2.geojson",
                                           "Home.geojson"]
    for feat, file in written:
        geom, crs = read_boundary(file)
        assert crs == UTM and geom.equals(feat.geometry)
        assert gpd.read_file(file)["farm_id"].tolist() == [feat.attributes["farm_id"]]
    assert sorted(p.name for p in (tmp_path / "each").iterdir()) == sorted(
        p.name for _, p in written)
    with pytest.raises(OutputExistsError, match=r"North-40\.geojson exists"):
        split_boundary(path, tmp_path / "each")


def test_split_keeps_a_crs_without_epsg_code(tmp_path):
    # Source: RFC 7946, section 4 (GeoJSON coordinates are WGS 84; GDAL writes other CRSs
    # only as EPSG names), so a CRS without a code goes to a GeoPackage.
    local = "+proj=tmerc +lat_0=0 +lon_0=-87.3 +k=1 +x_0=500000 +y_0=0 +ellps=GRS80 +units=m"
    path = _fields(tmp_path, crs=local)
    written = split_boundary(path, tmp_path / "each")
    assert [p.suffix for _, p in written] == [".gpkg"] * 3
    from pyproj import CRS

    for feat, file in written:
        geom, crs = read_boundary(file)
        assert CRS.from_user_input(crs).equals(CRS.from_user_input(local))
        assert geom.equals(feat.geometry)


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
