"""Zone polygons from class rasters, and GeoPackage / Shapefile / GeoJSON output."""

from __future__ import annotations

import json
import sqlite3
from datetime import datetime, timedelta, timezone

import geopandas as gpd
import numpy as np
import pytest
import shapely

from pmap.grid import GridSpec
from pmap.io.vectors import (
    SHAPEFILE_FIELDS,
    ZONE_FIELDS,
    patch_labels,
    shapefile_parts,
    write_geojson_wgs84,
    write_geopackage,
    write_shapefile,
    write_zone_polygons,
    zone_frame,
    zone_polygons,
)

UTM = "EPSG:32616"


def _zones():
    grid = GridSpec.from_bounds(UTM, (338000, 4440000, 338100, 4440080), 10.0)  # 10 x 8 cells
    zones = np.ones(grid.shape, np.uint8)
    zones[:, 5:] = 2
    zones[2:4, 1:3] = 3  # an island of class 3 inside class 1
    zones[6:, 8:] = 3  # a second, separate patch of class 3
    mask = np.ones(grid.shape, bool)
    mask[0, 0] = False
    return grid.with_mask(mask), zones


def test_patch_areas_sum_to_class_areas():
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    assert [c for _, c in patches] == [1, 2, 3, 3]
    for cid in (1, 2, 3):
        area = sum(g.area for g, c in patches if c == cid)
        cells = int(((zones == cid) & grid.mask).sum())
        assert area == pytest.approx(cells * grid.cell_size**2)
    union = shapely.union_all([g for g, _ in patches])
    assert union.area == pytest.approx(grid.n_inside * 100.0)
    island = patches[0][0]
    assert len(island.interiors) == 1  # class 1 surrounds the class 3 island


def test_patch_labels_match_polygons():
    grid, zones = _zones()
    labels = patch_labels(zones, grid)
    patches = zone_polygons(zones, grid)
    assert labels.max() == len(patches) and labels[0, 0] == 0
    for k, (geom, cid) in enumerate(patches, start=1):
        assert (labels == k).sum() * 100.0 == pytest.approx(geom.area)
        assert set(np.unique(zones[labels == k])) == {cid}


def test_geopackage_layer_fields_and_totals(tmp_path):
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    rows = [{"class_label": {1: "low", 2: "medium", 3: "high"}[c], "mean_stp_mg_kg": 10.0 + c,
             "p2o5_kg_ha": 80.0 - 20 * c, "product": "MAP 11-52-0",
             "product_kg_ha": (80.0 - 20 * c) / 0.52} for _, c in patches]
    path = write_zone_polygons(tmp_path / "rate_zones.gpkg", patches, rows, UTM)
    back = gpd.read_file(path, layer="rate_zones")
    assert list(back.columns[: len(ZONE_FIELDS)]) == list(ZONE_FIELDS)
    assert back.crs.to_epsg() == 32616
    assert back["zone_id"].tolist() == [1, 2, 3, 4]
    np.testing.assert_allclose(back["area_ha"].sum(), grid.n_inside * grid.cell_area_ha)
    np.testing.assert_allclose(back["product_total_kg"], back["product_kg_ha"] * back["area_ha"])
    assert back["mean_available_p_mg_kg"].isna().all()
    assert not list(tmp_path.glob(".*"))


def test_attributes_per_class_or_callable():
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    per_class = zone_frame(patches, {1: {"class_label": "low"}, 3: {"class_label": "high"}}, UTM)
    labels_out = per_class["class_label"].tolist()
    assert labels_out[0] == "low" and labels_out[2:] == ["high", "high"]
    assert per_class["class_label"].isna()[1]
    labels = patch_labels(zones, grid)
    values = np.arange(zones.size, dtype=float).reshape(zones.shape)
    by_mask = zone_frame(patches, lambda zid, cid: {"mean_stp_mg_kg": float(values[labels == zid].mean())}, UTM)
    assert by_mask["mean_stp_mg_kg"][1] == pytest.approx(values[labels == 2].mean())
    with pytest.raises(ValueError, match="attribute rows"):
        zone_frame(patches, [{}], UTM)


def test_shapefile_short_names_and_geojson_wgs84(tmp_path):
    grid, zones = _zones()
    gdf = zone_frame(zone_polygons(zones, grid), None, UTM)
    shp = write_shapefile(tmp_path / "rate_zones.shp", gdf)
    back = gpd.read_file(shp)
    assert set(SHAPEFILE_FIELDS.values()) <= set(back.columns)
    assert all(len(c) <= 10 for c in back.columns)
    assert shp.with_suffix(".prj").exists()
    gj = write_geojson_wgs84(tmp_path / "rate_zones.geojson", gdf)
    ll = gpd.read_file(gj)
    assert ll.crs.to_epsg() == 4326
    np.testing.assert_allclose(ll.to_crs(UTM).area.sum(), gdf.area.sum(), rtol=1e-6)


def test_shapefile_parts_by_stem_and_suffix_not_glob(tmp_path):
    names = ["North [2026].shp", "North [2026].shx", "North [2026].DBF", "North [2026].Prj",
             "North [2026].cpg", "North [2026].shp.xml",
             "North [2026].csv",   # same stem, not a Shapefile part
             "North 2.dbf",        # what the glob pattern "North [2026].*" would match
             "North [2026]b.dbf",  # a longer stem
             "north [2026].prj"]   # another stem on a case-sensitive file system
    for name in names:
        (tmp_path / name).write_bytes(name.encode())
    (tmp_path / "North [2026].qix").mkdir()  # a directory is not a part
    found = [p.name for p in shapefile_parts(tmp_path / "North [2026].shp")]
    assert found == sorted(["North [2026].shp", "North [2026].shx", "North [2026].DBF",
                            "North [2026].Prj", "North [2026].cpg", "North [2026].shp.xml"])


def _frame():
    grid, zones = _zones()
    return zone_frame(zone_polygons(zones, grid), {1: {"class_label": "low"}}, UTM)


def test_vector_files_hold_the_given_timestamp_not_the_clock(tmp_path):
    gdf = _frame()
    stamp = datetime(2026, 10, 14, 6, 30, 5, 250_000, tzinfo=timezone(timedelta(hours=2)))
    gpkg = write_geopackage(tmp_path / "rate_zones.gpkg", gdf, timestamp=stamp)
    with sqlite3.connect(gpkg) as con:
        (last_change,) = con.execute("SELECT last_change FROM gpkg_contents").fetchone()
    # Source: OGC GeoPackage Encoding Standard (OGC 12-128), gpkg_contents.last_change is an
    # ISO 8601 UTC timestamp "YYYY-MM-DDTHH:MM:SS.SSSZ"
    assert last_change == "2026-10-14T04:30:05.250Z"
    shp = write_shapefile(tmp_path / "shp" / "rate_zones.shp", gdf, timestamp=stamp)
    # Source: dBASE III file header (bytes 1-3: year - 1900, month, day of the last update)
    assert shp.with_suffix(".dbf").read_bytes()[1:4] == bytes([126, 10, 14])
    write_shapefile(tmp_path / "default" / "rate_zones.shp", gdf)
    assert (tmp_path / "default" / "rate_zones.dbf").read_bytes()[1:4] == bytes([70, 1, 1])
    gj = write_geojson_wgs84(tmp_path / "rate_zones.geojson", gdf)
    # Source: GDAL GeoJSON driver docs (the layer name is written as the "name" member)
    assert json.loads(gj.read_text())["name"] == "rate_zones"
    with pytest.raises(ValueError, match="timezone-aware"):
        write_geopackage(tmp_path / "naive.gpkg", gdf, timestamp=datetime(2026, 1, 1))
    import pyogrio

    assert pyogrio.get_gdal_config_option("OGR_CURRENT_DATE") is None  # restored


def test_same_frame_gives_the_same_bytes(tmp_path):
    gdf = _frame()
    for run in ("a", "b"):
        write_geopackage(tmp_path / run / "rate_zones.gpkg", gdf)
        write_geojson_wgs84(tmp_path / run / "rate_zones.geojson", gdf)
        write_shapefile(tmp_path / run / "shp" / "rate_zones.shp", gdf)
    files_a = sorted(p.relative_to(tmp_path / "a") for p in (tmp_path / "a").rglob("*") if p.is_file())
    files_b = sorted(p.relative_to(tmp_path / "b") for p in (tmp_path / "b").rglob("*") if p.is_file())
    assert files_a == files_b and len(files_a) == 7  # gpkg, geojson, shp/shx/dbf/prj/cpg
    for rel in files_a:
        assert (tmp_path / "a" / rel).read_bytes() == (tmp_path / "b" / rel).read_bytes(), rel
