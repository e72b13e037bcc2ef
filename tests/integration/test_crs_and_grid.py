"""The working CRS and the grid size on the demo field: no silent change of areas, no
grid that eats the machine.

One test per problem: Web Mercator x/y with ``--crs EPSG:3857`` (the run works in UTM and
gives the demo's area and totals), a geographic ``--crs`` (x/y read as lon/lat), the area
check wired into the ingest, and grids refused before any kriging.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import time
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from pyproj import Transformer

import pmap.pipeline
from pmap.config import load_config
from pmap.demo import write_demo_inputs
from pmap.errors import ConfigError, InputError, PmapWarning
from pmap.grid import estimate_grid
from pmap.pipeline import prepare_inputs, run_field


def pmap_cli(*args):
    """Run the CLI; ``run`` gets ``--maps none`` (these tests are about CRSs and grids)."""
    env = dict(os.environ, MPLBACKEND="Agg")
    args = [str(a) for a in args]
    if "run" in args and "--maps" not in args:
        args += ["--maps", "none"]
    return subprocess.run([sys.executable, "-m", "pmap", *args], capture_output=True,
                          text=True, env=env, timeout=600)


def _one_error_line(proc) -> str:
    lines = [line for line in proc.stderr.splitlines() if line.startswith("pmap: error:")]
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    return lines[0]


@pytest.fixture()
def demo(tmp_path):
    """The demo inputs and their samples table."""
    paths = write_demo_inputs(tmp_path / "in")
    return paths, pd.read_csv(paths["samples"])


def _web_mercator_inputs(paths, table, tmp_path):
    """Samples as EPSG:3857 x/y columns and the boundary as a Shapefile without a CRS."""
    to_merc = Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True)
    x, y = to_merc.transform(table["longitude"].to_numpy(), table["latitude"].to_numpy())
    samples = tmp_path / "merc.csv"
    table.drop(columns=["latitude", "longitude"]).assign(x=x, y=y).to_csv(samples, index=False)
    outline = gpd.read_file(paths["boundary"]).to_crs("EPSG:3857").set_crs(None, allow_override=True)
    boundary = tmp_path / "merc_nocrs.shp"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        outline.to_file(boundary)
    assert not boundary.with_suffix(".prj").exists()
    return samples, boundary


def test_web_mercator_crs_works_in_utm_with_the_demo_area_and_totals(demo_run, demo, tmp_path):
    plain, _ = demo_run
    paths, table = demo
    samples, boundary = _web_mercator_inputs(paths, table, tmp_path)
    out = tmp_path / "out"
    proc = pmap_cli("run", samples, "--boundary", boundary, "--out", out, "--config",
                    paths["config"], "--crs", "EPSG:3857")
    assert proc.returncode == 0, proc.stderr
    # The user is told the CRS was only read, and why.
    assert re.search(r"grid\.crs EPSG:3857 distorts lengths .*scale error is 0\.30\d", proc.stderr)
    assert "the outputs are in EPSG:32616" in proc.stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["crs"] == plain.grid.crs == "EPSG:32616"
    # Web Mercator would have made the field 1/cos^2(40.1 deg) = 1.71 times larger
    # (Source: Snyder 1987, USGS PP 1395); in UTM it is the plain demo's area.
    assert summary["grid"]["area_ha"] == pytest.approx(plain.totals["area_ha"], rel=0.005)
    # The samples land on the same UTM points (to a micrometre), so the totals agree too.
    for key in ("area_ha", "p2o5_total_kg", "product_total_kg"):
        assert summary["totals"][key] == pytest.approx(plain.totals[key], rel=0.001), key
    notes = " ".join(summary["inputs"]["notes"])
    assert "working CRS EPSG:32616" in notes and "EPSG:3857" in notes and "geodesic" in notes


def test_geographic_crs_reads_xy_as_lonlat_and_the_run_works_in_utm(demo, tmp_path):
    paths, table = demo
    xy = tmp_path / "lonlat_xy.csv"
    table.rename(columns={"longitude": "x", "latitude": "y"}).to_csv(xy, index=False)
    config = load_config(paths["config"])
    plain = prepare_inputs(paths["samples"], paths["boundary"], config)
    for geographic in ("EPSG:4326", "EPSG:4269"):
        with warnings.catch_warnings():
            warnings.simplefilter("error", PmapWarning)  # not a surprise: no warning
            inputs = prepare_inputs(xy, paths["boundary"], config.replace("grid", crs=geographic))
        assert inputs.grid.crs == inputs.samples.crs == "EPSG:32616"
        assert inputs.crs_choice["requested"] == geographic
        assert inputs.crs_choice["used"] == "EPSG:32616"
        assert "geographic" in inputs.crs_choice["reason"]
        # NAD83 and WGS 84 agree to well under a metre here (PROJ's null transformation).
        np.testing.assert_allclose(inputs.samples.coords, plain.samples.coords, atol=2.0)
        assert inputs.grid.n_inside == plain.grid.n_inside


def test_area_check_records_both_areas_and_stops_a_distorting_crs(demo, monkeypatch):
    paths, _ = demo
    config = load_config(paths["config"])
    inputs = prepare_inputs(paths["samples"], paths["boundary"], config)
    areas = inputs.crs_choice["areas"]
    # The demo polygon is 1100 x 900 m less two corners: 93.28 ha in its UTM frame
    # (pmap.demo.boundary_coords); the ellipsoid differs by the areal scale there.
    assert areas["working_crs_ha"] == pytest.approx(93.28, abs=0.01)
    assert abs(areas["difference"]) < 0.001
    assert inputs.crs_choice["used"] == "EPSG:32616"
    assert any("geodesic" in note and "93.28" in note for note in inputs.notes)

    # If a distorting CRS ever became the working CRS, the area check stops the run.
    real = pmap.pipeline.choose_working_crs

    def mercator_choice(*args, **kwargs):
        _, record = real(*args, **kwargs)
        return "EPSG:3857", dict(record, used="EPSG:3857")

    monkeypatch.setattr(pmap.pipeline, "choose_working_crs", mercator_choice)
    with pytest.raises(InputError) as err:
        prepare_inputs(paths["samples"], paths["boundary"], config)
    message = str(err.value)
    assert "boundary.geojson" in message and "EPSG:3857" in message
    geodesic = areas["geodesic_ha"]
    assert f"{geodesic:,.2f} ha on the WGS 84 ellipsoid" in message
    mercator_ha = float(re.search(r"area is ([\d,.]+) ha in the working CRS", message)
                        .group(1).replace(",", ""))
    # Source: Snyder 1987, USGS PP 1395: Mercator areal scale sec^2(lat) at 40.12 N
    assert mercator_ha / geodesic == pytest.approx(1 / np.cos(np.radians(40.124)) ** 2, rel=0.002)


def test_tiny_cell_size_is_refused_at_once(demo, tmp_path):
    paths, _ = demo
    out = tmp_path / "out"
    start = time.perf_counter()
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out,
                    "--cell-size", 0.01)
    elapsed = time.perf_counter() - start
    assert proc.returncode == 2, proc.stderr
    line = _one_error_line(proc)
    assert "grid.cell_size_m must lie in [1, 100], got 0.01" in line
    assert not out.exists()
    assert elapsed < 60  # seconds; the interpreter's start-up, no grid


def test_grid_above_max_cells_is_refused_before_kriging(demo, tmp_path, monkeypatch):
    paths, _ = demo
    config = load_config(paths["config"]).replace("grid", cell_size_m=1.0, max_cells=500_000)

    def no_kriging(*args, **kwargs):
        raise AssertionError("kriging ran before the grid size was checked")

    monkeypatch.setattr(pmap.pipeline, "interpolate", no_kriging)
    out = tmp_path / "out"
    start = time.perf_counter()
    with pytest.raises(ConfigError) as err:
        run_field(paths["samples"], paths["boundary"], out, config)
    assert time.perf_counter() - start < 30  # seconds
    assert not out.exists()
    message = str(err.value)
    inputs = prepare_inputs(paths["samples"], paths["boundary"],
                            load_config(paths["config"]).replace("grid", cell_size_m=10.0))
    width, height, cells = estimate_grid(inputs.boundary.bounds, 1.0)
    assert 990_000 < cells < 1_000_000  # the demo's 1100 x 900 m extent at 1 m
    for word in ("grid.cell_size_m = 1 m", f"{width:,} x {height:,} = {cells:,} cells", "GiB",
                 "grid.max_cells = 500,000", "--cell-size"):
        assert word in message, (word, message)
    gib = float(re.search(r"about ([\d.]+) GiB", message).group(1))
    assert 0.6 < gib < 1.2  # pmap's budget for ~1 M cells; a 1 m demo run peaks at 0.84 GiB


def test_max_cells_from_the_config_file_on_the_command_line(demo, tmp_path):
    paths, _ = demo
    config = tmp_path / "small.toml"
    config.write_text(paths["config"].read_text().replace(
        "cell_size_m = 5.0", "cell_size_m = 5.0\nmax_cells = 10000"), encoding="utf-8")
    out = tmp_path / "out"
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out,
                    "--config", config, "--cell-size", 2)
    assert proc.returncode == 2, proc.stderr
    line = _one_error_line(proc)
    assert "grid.max_cells = 10,000" in line and "cells" in line and "GiB" in line
    # sqrt(1100 m * 900 m / 10,000) = 9.95 m, plus the outward snapping of the origin.
    suggested = float(re.search(r"at least ([\d.]+) m", line).group(1))
    assert 9.95 <= suggested <= 10.5
    assert not out.exists()
