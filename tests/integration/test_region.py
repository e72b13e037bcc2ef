"""pmap region: a grid computed in tiles gives the maps of the whole grid, on every backend.

The checks compare a tiled region with pmap's own untiled field run on the same inputs
(an invariant: kriging and the soil model are per cell), local processes and a Dask
cluster with this process, and a run stopped in the middle with a run left alone.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
import rasterio

from pmap.config import load_config
from pmap.demo import write_demo_inputs
from pmap.errors import ConfigError
from pmap.region import run_region
from pmap.region.compute import layer_names


@pytest.fixture(scope="module")
def demo_inputs(tmp_path_factory):
    return write_demo_inputs(tmp_path_factory.mktemp("region-demo"))


def _quiet_region(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return run_region(*args, **kwargs)


def _read(path: Path) -> tuple[np.ndarray, dict]:
    with rasterio.open(path) as src:
        return src.read(1), {"transform": src.transform, "crs": src.crs, "tags": src.tags(),
                             "nodata": src.nodata, "overviews": src.overviews(1),
                             "dtype": src.dtypes[0], "block": src.block_shapes[0]}


@pytest.fixture(scope="module")
def global_config(demo_inputs):
    """The demo's config with global kriging, as the field run chooses for 93 samples."""
    return load_config(demo_inputs["config"]).replace("kriging", method="global")


@pytest.fixture(scope="module")
def tiled_demo(demo_inputs, global_config, tmp_path_factory):
    """The demo field as a region of 64-cell tiles, computed in this process."""
    out = tmp_path_factory.mktemp("region") / "out"
    result = _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], out,
                           global_config, tile_cells=64, workers=1)
    return result, out


# common practice, no source: kriging and the soil model are computed cell by cell, so the
# tiles of a region must reproduce the field run's layers over the same grid.
def test_tiles_reproduce_the_field_run_cell_for_cell(tiled_demo, demo_run):
    result, out = tiled_demo
    field_result, field_out = demo_run
    names = layer_names(result.fits)
    assert {"ph", "ph_variance", "total_p", "stp", "available_p", "fe_al_p", "ca_p",
            "occluded_p", "organic_p", "fixation_risk", "fixation_class",
            "fixation_mechanism"} <= set(names)
    assert result.tiles > 6  # the 222 x 182 grid really was cut
    for name in names:
        tiled, meta = _read(out / "rasters" / f"{name}.tif")
        whole, whole_meta = _read(field_out / "rasters" / f"{name}.tif")
        assert meta["transform"] == whole_meta["transform"], name
        assert meta["crs"] == whole_meta["crs"], name
        np.testing.assert_array_equal(tiled, whole, err_msg=name)
    assert result.cells_inside == int(field_result.grid.mask.sum())


def test_region_summary_figures_are_those_of_the_written_layers(tiled_demo):
    result, out = tiled_demo
    summary = json.loads((out / "summary.json").read_text())
    assert summary["kind"] == "region"
    assert "licensed or certified agronomist" in summary["cautions"]
    cell_ha = summary["region"]["cell_size_m"] ** 2 / 10_000
    for name in ("ph", "available_p", "fixation_risk"):
        data, meta = _read(out / "rasters" / f"{name}.tif")
        values = data[data != meta["nodata"]].astype(float)
        figures = summary["layers"][name]
        assert figures["cells"] == values.size == result.cells_inside
        assert figures["mean"] == pytest.approx(values.mean(), rel=1e-6)
        assert figures["sd"] == pytest.approx(values.std(), rel=1e-4)
        assert figures["min"] == pytest.approx(values.min(), rel=1e-6)
        assert figures["max"] == pytest.approx(values.max(), rel=1e-6)
    classes, _ = _read(out / "rasters" / "fixation_class.tif")
    areas = summary["layers"]["fixation_class"]["area_ha"]
    for code, area in areas.items():
        assert area == pytest.approx((classes == int(code)).sum() * cell_ha)
    assert summary["region"]["area_ha"] == pytest.approx(result.cells_inside * cell_ha)


def test_region_rasters_are_tiled_with_overviews_and_provenance(tiled_demo):
    result, out = tiled_demo
    _, meta = _read(out / "rasters" / "available_p.tif")
    assert meta["dtype"] == "float32" and meta["nodata"] == -9999.0
    assert meta["block"] == (512, 512)
    assert "soil model" in meta["tags"]["METHOD"]
    assert meta["tags"]["CALIBRATION"].startswith("calibrated")  # the demo has lab pairs
    assert "agronomist" in meta["tags"]["CAUTION"]
    _, ph_meta = _read(out / "rasters" / "ph.tif")
    assert json.loads(ph_meta["tags"]["VARIOGRAM"])["kind"] == result.fits["ph"].model.kind
    _, cls = _read(out / "rasters" / "fixation_class.tif")
    assert cls["dtype"] == "uint8" and cls["nodata"] == 0 and "CLASS_3" in cls["tags"]
    manifest = json.loads((out / "manifest.json").read_text())
    listed = set(manifest["files"])
    assert {"summary.json", "rasters/ph.tif"} <= listed


def test_uncalibrated_soil_model_is_labelled_in_the_layers(demo_inputs, tmp_path):
    config = load_config(demo_inputs["config"]).replace("calibration", auto=False)
    result = _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out",
                           config, tile_cells=128, workers=1)
    _, meta = _read(tmp_path / "out" / "rasters" / "available_p.tif")
    assert meta["tags"]["CALIBRATION"].startswith("NOT CALIBRATED")
    assert result.summary["soil_model"]["calibration"]["status"] != "calibrated"


# common practice, no source: local (nearest-neighbour) kriging is also per cell; tiles cut
# the chunks the compiled kernel walks, which may change the last bits only.
def test_local_kriging_tiles_match_the_field_run(demo_inputs, tmp_path):
    from pmap import run_field

    config = (load_config(demo_inputs["config"]).replace("kriging", method="local", neighbours=12)
              .replace("output", maps="none"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        field = run_field(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "field",
                          config)
    region = _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "region",
                           config, tile_cells=48, workers=1)
    assert region.fits["ph"].neighbourhood.neighbours == 12
    for name in ("ph", "ph_variance", "stp", "total_p_variance", "available_p",
                 "fixation_risk"):
        tiled, _ = _read(tmp_path / "region" / "rasters" / f"{name}.tif")
        whole, _ = _read(tmp_path / "field" / "rasters" / f"{name}.tif")
        assert (tiled == -9999).sum() == (whole == -9999).sum() == (~field.grid.mask).sum()
        np.testing.assert_allclose(tiled, whole, rtol=2e-6, err_msg=name)


def test_local_processes_write_the_same_files_as_this_process(tiled_demo, demo_inputs,
                                                              global_config, tmp_path):
    _, out = tiled_demo
    pooled = _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out",
                           global_config, tile_cells=64, workers=2, max_pending=3)
    assert pooled.summary["run"]["backend"] == "2 local processes"
    for name in layer_names(pooled.fits):
        a = (out / "rasters" / f"{name}.tif").read_bytes()
        b = (tmp_path / "out" / "rasters" / f"{name}.tif").read_bytes()
        assert a == b, name


def _rounded(obj, digits: int = 9):
    if isinstance(obj, dict):
        return {k: _rounded(v, digits) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_rounded(v, digits) for v in obj]
    if isinstance(obj, float):
        return float(f"{obj:.{digits}g}")
    return obj


def test_dask_tiles_write_the_same_files_as_this_process(tiled_demo, demo_inputs, tmp_path,
                                                         global_config, dask_cluster):
    _, out = tiled_demo
    remote = _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out",
                           global_config, tile_cells=64,
                           scheduler=dask_cluster.scheduler_address)
    assert remote.summary["run"]["backend"].startswith("Dask (tcp://")
    for name in layer_names(remote.fits):
        a = (out / "rasters" / f"{name}.tif").read_bytes()
        b = (tmp_path / "out" / "rasters" / f"{name}.tif").read_bytes()
        assert a == b, name
    first = json.loads((out / "summary.json").read_text())
    second = json.loads((tmp_path / "out" / "summary.json").read_text())
    first.pop("run"), second.pop("run")
    # The rasters are float32; the figures are float64 sums, whose last bits follow the
    # BLAS threads of the process that kriged (one per worker, several here).
    assert _rounded(first) == _rounded(second)


def test_a_failing_tile_leaves_no_output(demo_inputs, tmp_path, monkeypatch):
    import pmap.region.run as region_run

    real = region_run.compute_tile
    calls = []

    def failing(model, tile):
        calls.append(tile.index)
        if len(calls) == 3:
            raise RuntimeError("disk of the worker went away")
        return real(model, tile)

    monkeypatch.setattr(region_run, "compute_tile", failing)
    out = tmp_path / "out"
    with pytest.raises(RuntimeError, match="went away"):
        _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], out,
                      demo_inputs["config"], tile_cells=64, workers=1)
    assert not out.exists()
    assert [p.name for p in tmp_path.iterdir()] == []  # no staging folder, no lock left


def test_drift_is_refused_before_any_work(demo_inputs, tmp_path):
    config = load_config(demo_inputs["config"]).replace("kriging", drift="linear")
    with pytest.raises(ConfigError, match="kriging.drift"):
        run_region(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out", config)
    assert not (tmp_path / "out").exists()


def test_killed_region_run_leaves_nothing_that_looks_complete(demo_inputs, tmp_path):
    out = tmp_path / "out"
    command = [sys.executable, "-m", "pmap", "-q", "region", str(demo_inputs["samples"]),
               "-b", str(demo_inputs["boundary"]), "-o", str(out), "-c",
               str(demo_inputs["config"]), "--tile", "32", "--workers", "1"]
    child = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    staged = None
    while time.monotonic() < deadline and child.poll() is None:
        staged = next((p for p in tmp_path.glob(".out.partial-*/rasters/ph.tif")), None)
        if staged is not None:
            break
        time.sleep(0.02)
    assert staged is not None, "the run never started writing tiles"
    time.sleep(0.3)  # some tiles written, not all
    child.send_signal(signal.SIGKILL)
    child.wait(30)
    assert not out.exists()  # only the hidden staging folder, which names itself partial
    again = subprocess.run(command, capture_output=True, text=True, timeout=300)
    assert again.returncode == 0, again.stderr
    assert (out / "manifest.json").exists()
    assert not list(tmp_path.glob(".out.partial-*"))
    data, meta = _read(out / "rasters" / "ph.tif")
    assert (data != meta["nodata"]).sum() > 30_000
    # kriging.method "auto" means neighbourhood kriging in a region, whatever the count
    summary = json.loads((out / "summary.json").read_text())
    assert summary["kriging"]["ph"]["neighbourhood"]["neighbours"] == 16


def test_cli_region_refuses_drift_with_exit_code_2(demo_inputs, tmp_path):
    from click.testing import CliRunner

    from pmap.cli import cli

    config = tmp_path / "drift.toml"
    config.write_text(Path(demo_inputs["config"]).read_text() + '\n[kriging]\ndrift = "linear"\n')
    result = CliRunner().invoke(cli, ["region", str(demo_inputs["samples"]), "-b",
                                      str(demo_inputs["boundary"]), "-o", str(tmp_path / "o"),
                                      "-c", str(config)])
    assert result.exit_code == 2
    assert "kriging.drift" in result.output
    assert not (tmp_path / "o").exists()


def test_a_dask_client_passed_in_is_used_and_left_open(tiled_demo, demo_inputs, global_config,
                                                       tmp_path, dask_cluster):
    import distributed

    _, out = tiled_demo
    with distributed.Client(dask_cluster.scheduler_address) as client:
        remote = _quiet_region(demo_inputs["samples"], demo_inputs["boundary"], tmp_path / "out",
                               global_config, tile_cells=64, scheduler=client)
        assert client.status == "running"  # pmap closes only the clients it opened
        assert client.submit(sum, [1, 2]).result() == 3
    assert remote.summary["run"]["backend"].startswith("Dask (tcp://")
    assert ((out / "rasters" / "stp.tif").read_bytes()
            == (tmp_path / "out" / "rasters" / "stp.tif").read_bytes())
