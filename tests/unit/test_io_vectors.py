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
    US_FIELDS,
    ZONE_FIELDS,
    patch_labels,
    shapefile_parts,
    write_geojson,
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
    assert back["mean_deficiency_probability"].isna().all()
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
    assert {SHAPEFILE_FIELDS[k] for k in ZONE_FIELDS} <= set(back.columns)
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


def _records(patches):
    """Per-polygon records as the prescription gives them (SI units), plus a foreign key."""
    return [{"zone_id": k + 1, "class_id": c, "class_label": {1: "low", 2: "medium", 3: "high"}[c],
             "role": "build-up", "basis": "measured soil test", "area_ha": 99.0,
             "mean_stp_mg_kg": 10.0 + c, "mean_rule_stp_mg_kg": 11.0 + c,
             "mean_deficiency_probability": 0.9 / c, "p2o5_kg_ha": 100.0, "product": "MAP 11-52-0",
             "product_kg_ha": 100.0 / 0.52, "n_kg_ha": 100.0 / 0.52 * 0.11, "n_cells": 7}
            for k, (_, c) in enumerate(patches)]


def test_records_with_field_farm_date_and_us_units():
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    gdf = zone_frame(patches, _records(patches), UTM, field="North 40", farm="Hillside",
                     date="2026-04-02", units="us", out_of_field_kg_ha=0.0)
    assert list(gdf.columns[:-1]) == list(ZONE_FIELDS) + list(US_FIELDS)
    assert "mean_rule_stp_mg_kg" not in gdf.columns and "n_cells" not in gdf.columns
    assert set(gdf["field"]) == {"North 40"} and set(gdf["farm"]) == {"Hillside"}
    assert set(gdf["date"]) == {"2026-04-02"} and set(gdf["basis"]) == {"measured soil test"}
    assert (gdf["out_rate_kg_ha"] == 0.0).all() and (gdf["out_rate_lb_acre"] == 0.0).all()
    # area from the geometry, not the record's 99 ha
    np.testing.assert_allclose(gdf["area_ha"], gdf.area / 10_000.0)
    # Source: International Yard and Pound Agreement (1959): yard = 0.9144 m and
    # pound = 0.45359237 kg exactly; an acre is 4,840 square yards (about 2.4710538 acre/ha,
    # 100 kg/ha = 89.2179 lb/acre).
    acre_m2 = 4840 * 0.9144**2
    np.testing.assert_allclose(gdf["area_acre"], gdf.area / acre_m2, rtol=1e-12)
    np.testing.assert_allclose(gdf["area_acre"] / gdf["area_ha"], 2.4710538, rtol=1e-7)
    np.testing.assert_allclose(gdf["p2o5_lb_acre"], 100.0 * acre_m2 / 1e4 / 0.45359237)
    np.testing.assert_allclose(gdf["p2o5_lb_acre"], 89.2179, rtol=1e-5)
    np.testing.assert_allclose(gdf["product_total_lb"], gdf["product_total_kg"] / 0.45359237)
    metric = zone_frame(patches, _records(patches), UTM)
    assert not set(US_FIELDS) & set(metric.columns)
    assert metric["field"].isna().all() and metric["date"].isna().all()


def test_record_order_and_values_are_checked():
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    rows = _records(patches)
    with pytest.raises(ValueError, match="polygon order"):
        zone_frame(patches, rows[::-1], UTM)
    renumbered = zone_frame(patches, [dict(r, zone_id=10 + k) for k, r in enumerate(rows)], UTM,
                            zone_ids=[10, 11, 12, 13])
    assert renumbered["zone_id"].tolist() == [10, 11, 12, 13]
    with pytest.raises(ValueError, match="ISO date"):
        zone_frame(patches, rows, UTM, date="02/04/2026")
    with pytest.raises(ValueError, match="0-1"):
        zone_frame(patches, [dict(r, mean_deficiency_probability=45.0) for r in rows], UTM)
    with pytest.raises(ValueError, match="units"):
        zone_frame(patches, rows, UTM, units="imperial")


def test_shapefile_names_are_short_unique_and_cover_every_field():
    # Source: dBASE III field descriptor, field name at most 10 characters (11 bytes, NUL-ended)
    assert set(SHAPEFILE_FIELDS) == set(ZONE_FIELDS) | set(US_FIELDS)
    names = list(SHAPEFILE_FIELDS.values())
    assert all(len(n) <= 10 and n.isascii() for n in names) and len(set(names)) == len(names)


def test_vector_crs_working_or_wgs84(tmp_path):
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    gdf = zone_frame(patches, _records(patches), UTM, field="North 40", units="us")
    shp = write_shapefile(tmp_path / "ll" / "z.shp", gdf, crs="EPSG:4326")
    back = gpd.read_file(shp)
    assert back.crs.to_epsg() == 4326 and abs(back.total_bounds[0] + 87.0) < 3  # UTM 16N
    # Source: shapely/pyproj invariant - reprojecting back preserves area within 1e-6
    np.testing.assert_allclose(back.to_crs(UTM).area, gdf.area, rtol=1e-6)
    assert back["FIELD"].tolist() == ["North 40"] * 4 and "P2O5_LBAC" in back.columns
    kept = gpd.read_file(write_shapefile(tmp_path / "utm" / "z.shp", gdf, crs="working"))
    assert kept.crs.to_epsg() == 32616
    gj = gpd.read_file(write_geojson(tmp_path / "z.geojson", gdf))
    assert gj.crs.to_epsg() == 4326
    gj_utm = gpd.read_file(write_geojson(tmp_path / "z_utm.geojson", gdf, crs="working"))
    assert gj_utm.crs.to_epsg() == 32616
    gpkg = gpd.read_file(write_geopackage(tmp_path / "z.gpkg", gdf, crs="EPSG:4326"))
    assert gpkg.crs.to_epsg() == 4326


def test_out_of_field_rate_is_a_column_and_the_layer_description(tmp_path):
    grid, zones = _zones()
    patches = zone_polygons(zones, grid)
    gdf = zone_frame(patches, _records(patches), UTM, out_of_field_kg_ha=12.5)
    path = write_geopackage(tmp_path / "z.gpkg", gdf)
    with sqlite3.connect(path) as con:
        (text,) = con.execute("SELECT description FROM gpkg_contents").fetchone()
    # Source: OGC GeoPackage 1.3 (OGC 12-128r18), gpkg_contents.description column
    assert "12.5 kg/ha" in text and "basis" in text
    back = gpd.read_file(path)
    assert (back["out_rate_kg_ha"] == 12.5).all()
    with pytest.raises(ValueError, match="out_of_field"):
        zone_frame(patches, None, UTM, out_of_field_kg_ha=-1.0)
