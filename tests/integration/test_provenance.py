"""Provenance: the manifest, honest input copies, and byte-identical outputs for the same inputs."""

from __future__ import annotations

import hashlib
import json
import sqlite3
import struct
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio

from pmap.demo import DEMO_INPUTS_LABEL, write_demo_inputs


def _files(directory):
    return sorted(p.relative_to(directory).as_posix() for p in directory.rglob("*") if p.is_file())


@pytest.fixture(scope="module")
def two_runs(demo_run, tmp_path_factory):
    """The session's demo run and a second demo run into another directory."""
    from pmap.demo import run_demo

    first_result, first = demo_run
    second = tmp_path_factory.mktemp("demo-again") / "elsewhere"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        run_demo(second)
    return first_result, first, second


def test_two_runs_write_identical_bytes(two_runs):
    _result, first, second = two_runs
    names = _files(first)
    assert names == _files(second)
    assert len(names) > 60
    differ = [n for n in names if (first / n).read_bytes() != (second / n).read_bytes()]
    assert differ == []


def test_manifest_records_every_file_input_and_warning(two_runs):
    result, out, _ = two_runs
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert list(manifest["files"]) == [n for n in _files(out) if n != "manifest.json"]
    for rel, record in manifest["files"].items():
        data = (out / rel).read_bytes()
        # Source: Python hashlib
        assert record == {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}, rel
    assert manifest["pmap_version"] == result.summary["pmap_version"]
    assert manifest["config"] == result.config.as_dict()
    assert manifest["warnings"] == result.warnings
    assert any("caco3" in w for w in manifest["warnings"])  # the demo's clipping warning
    assert set(manifest["inputs"]) == {"samples", "boundary", "config"}
    for kind, name in (("samples", "samples.csv"), ("boundary", "boundary.geojson"),
                       ("config", "field.toml")):
        entry = manifest["inputs"][kind]
        assert entry["source"] == f"{DEMO_INPUTS_LABEL} {name}"
        (copy,) = entry["files"]
        assert copy["path"] == f"inputs/{kind}/{name}"
        assert {k: copy[k] for k in ("sha256", "bytes")} == manifest["files"][copy["path"]]
    assert manifest["format_timestamp_utc"] == "2026-10-14T00:00:00+00:00"  # the sampling date


def test_demo_inputs_in_the_records_exist_and_match_the_generator(two_runs, tmp_path):
    _result, out, _ = two_runs
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    fresh = write_demo_inputs(tmp_path)
    for kind, records in summary["inputs"]["copies"].items():
        (record,) = records
        copy = out / record["path"]
        assert copy.is_file(), record
        assert copy.read_bytes() == fresh[kind].read_bytes(), kind
        assert summary["inputs"][kind] == f"{DEMO_INPUTS_LABEL} {fresh[kind].name}"
    notes = summary["inputs"]["notes"]
    assert isinstance(notes, list) and all(isinstance(n, str) for n in notes)


def _png_text_keys(path):
    data = path.read_bytes()
    keys, pos = [], 8
    while pos < len(data):
        length, kind = struct.unpack(">I4s", data[pos:pos + 8])
        if kind in (b"tEXt", b"iTXt", b"zTXt"):
            keys.append(data[pos + 8:pos + 8 + length].split(b"\0", 1)[0].decode("latin-1"))
        if kind == b"tIME":
            keys.append("tIME")
        pos += 12 + length
    return keys


def test_no_clock_times_or_temporary_names_in_files(two_runs):
    _result, out, _ = two_runs
    summary_text = (out / "summary.json").read_text(encoding="utf-8")
    assert "created_utc" not in summary_text
    stem = "Harrow-Creek-Farm-invented-demo_Long-Meadow_2026-10-14"
    for name in ("summary.json", "manifest.json", f"{stem}_rate_zones.geojson",
                 f"{stem}_zones.csv", "TASKDATA/TASKDATA.XML"):
        text = (out / name).read_text(encoding="utf-8")
        assert "pmap-demo-" not in text and ".tmp" not in text, name
    geojson = json.loads((out / f"{stem}_rate_zones.geojson").read_text())
    assert geojson["name"] == f"{stem}_rate_zones"
    with sqlite3.connect(out / f"{stem}_rate_zones.gpkg") as con:
        (last_change,) = con.execute("SELECT last_change FROM gpkg_contents").fetchone()
    assert last_change == "2026-10-14T00:00:00.000Z"  # field.sampling_date of the demo
    # Source: dBASE III file header (bytes 1-3: year - 1900, month, day of the last update)
    assert (out / "shapefile" / f"{stem}_rate_zones.dbf").read_bytes()[1:4] == \
        bytes([126, 10, 14])
    # Source: PNG specification (W3C, 2nd ed.): text chunks tEXt/iTXt/zTXt, time chunk tIME
    assert _png_text_keys(out / "maps" / "ph.png") == []
    with rasterio.open(out / "rasters" / "ph.tif") as src:
        assert "TIFFTAG_DATETIME" not in src.tags()


def test_summary_figures_equal_the_written_rasters(two_runs):
    result, out, _ = two_runs
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert set(summary["properties"]) == set(result.interpolations)
    for name, entry in summary["properties"].items():
        for layer, keys in ((name, ("map_min", "map_mean", "map_max")),
                            (f"{name}_variance", ("mean_kriging_variance",))):
            # Source: rasterio (the GeoTIFF read back, nodata masked)
            with rasterio.open(out / "rasters" / f"{layer}.tif") as src:
                data = src.read(1, masked=True).compressed().astype(np.float64)
            figures = {"map_min": data.min(), "map_mean": data.mean(), "map_max": data.max(),
                       "mean_kriging_variance": data.mean()}
            for key in keys:
                assert entry[key] == pytest.approx(figures[key], rel=1e-9, abs=1e-12), (name, key)
    # The demo's CaCO3 is kriged below 0 % beside the calcareous ground (the run warns) and
    # clipped to 0 in the raster: the summary gives the clipped minimum.
    assert any(w.startswith("caco3:") and "set to the limit" in w for w in result.warnings)
    assert summary["properties"]["caco3"]["map_min"] == 0.0


def test_inputs_sharing_a_name_with_brackets_are_all_copied(demo_run, tmp_path):
    """Samples and boundary both called "North [2026].shp", in two folders."""
    import pmap

    fresh = write_demo_inputs(tmp_path / "gen")
    table = pd.read_csv(fresh["samples"])
    points = gpd.GeoDataFrame(table.drop(columns=["latitude", "longitude"]),
                              geometry=gpd.points_from_xy(table.longitude, table.latitude),
                              crs="EPSG:4326")
    samples = tmp_path / "lab" / "North [2026].shp"
    boundary = tmp_path / "gis" / "North [2026].shp"
    samples.parent.mkdir()
    boundary.parent.mkdir()
    points.to_file(samples)
    gpd.read_file(fresh["boundary"]).to_file(boundary)
    boundary.with_suffix(".prj").rename(boundary.with_suffix(".PRJ"))
    (boundary.parent / "North [2026].csv").write_text("not a sidecar\n")
    (boundary.parent / "North 2.dbf").write_text("what a glob of the name would match\n")
    config = pmap.load_config(fresh["config"]).replace("grid", cell_size_m=25.0).replace(
        "output", maps="none")
    out = tmp_path / "out"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pmap.run_field(samples, boundary, out, config)

    stem = "North [2026]"
    expected = {
        "samples": sorted(f"{stem}{s}" for s in (".shp", ".shx", ".dbf", ".prj", ".cpg")),
        "boundary": sorted(f"{stem}{s}" for s in (".shp", ".shx", ".dbf", ".PRJ", ".cpg")),
    }
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    assert sorted(p.name for p in (out / "inputs").iterdir()) == ["boundary", "samples"]
    assert summary["inputs"]["config"] is None and "config" not in manifest["inputs"]
    for kind, source in (("samples", samples), ("boundary", boundary)):
        assert sorted(p.name for p in (out / "inputs" / kind).iterdir()) == expected[kind]
        records = summary["inputs"]["copies"][kind]
        assert records == manifest["inputs"][kind]["files"]
        assert manifest["inputs"][kind]["source"] == str(source)
        assert [r["path"] for r in records] == [f"inputs/{kind}/{n}" for n in expected[kind]]
        for record in records:
            original = (source.parent / record["path"].rsplit("/", 1)[1]).read_bytes()
            assert record["sha256"] == hashlib.sha256(original).hexdigest()
            assert record["bytes"] == len(original)
