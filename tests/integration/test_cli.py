"""The command line: the demo, the user's own files, and every bad input the issue names.

Each bad input must give a non-zero exit, a one-line message naming the problem, and no
output directory (nor a staging directory) left behind.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from pmap.demo import write_demo_inputs

ROOT = Path(__file__).resolve().parents[2]


def pmap_cli(*args, cwd=None, maps="none"):
    """Run the CLI.  ``run`` and ``demo`` get ``--maps none`` unless ``maps`` says otherwise:
    most tests here are about inputs and files, and pictures only make a run slower."""
    env = dict(os.environ, MPLBACKEND="Agg")
    args = [str(a) for a in args]
    if maps is not None and {"run", "demo"} & set(args) and "--maps" not in args:
        args += ["--maps", maps]
    return subprocess.run([sys.executable, "-m", "pmap", *args], capture_output=True,
                          text=True, cwd=cwd, env=env, timeout=600)


@pytest.fixture()
def field(tmp_path):
    """The demo's inputs, to be spoiled one way or another by each test."""
    paths = write_demo_inputs(tmp_path / "in")
    return paths, pd.read_csv(paths["samples"])


def assert_clean_failure(proc, out: Path, *words, code=None):
    assert proc.returncode != 0, proc.stderr
    if code is not None:
        assert proc.returncode == code, proc.stderr
    errors = [line for line in proc.stderr.splitlines() if line.startswith("pmap: error:")]
    assert len(errors) == 1, proc.stderr
    for word in words:
        assert word.lower() in errors[0].lower(), (word, errors[0])
    assert "Traceback" not in proc.stderr
    assert not out.exists(), "output directory left behind"
    assert not list(out.parent.glob(f".{out.name}.*")), "staging directory left behind"


def test_version_tells_pmap_apart_from_procps():
    proc = pmap_cli("--version")
    assert proc.returncode == 0
    assert "soil phosphorus maps" in proc.stdout


def test_demo_refuses_a_non_empty_output_directory(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("precious")
    proc = pmap_cli("demo", out)
    assert proc.returncode == 4, proc.stderr
    assert "--overwrite" in proc.stderr
    assert [p.name for p in out.iterdir()] == ["keep.txt"]
    assert not list(tmp_path.glob(".out.*")), "staging directory left behind"


def test_run_on_own_files_and_refuse_to_overwrite(field, tmp_path):
    paths, _ = field
    out = tmp_path / "out"
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out,
                    "--config", paths["config"], "--cell-size", 10, maps=None)
    assert proc.returncode == 0, proc.stderr
    assert "CAUTION" in proc.stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["grid"]["cell_size_m"] == 10
    for name in ("report.html", "overview.png", "overview.pdf", "maps/p2o5_zone_rate.png"):
        assert (out / name).is_file() and name in summary["outputs"], name
    before = (out / "summary.json").read_bytes()

    again = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out)
    assert again.returncode == 4
    assert "--overwrite" in again.stderr
    assert (out / "summary.json").read_bytes() == before, "existing output was touched"

    forced = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out,
                      "--overwrite", "--maps", "overview")
    assert forced.returncode == 0, forced.stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["grid"]["cell_size_m"] == 5
    # --maps overview: the overview sheet and the report, no per-layer maps
    assert (out / "overview.pdf").is_file() and (out / "report.html").is_file()
    assert not (out / "maps").exists() and not (out / "diagnostics").exists()
    assert summary["config"]["output"]["maps"] == "overview"

    # A failing run with --overwrite leaves the previous complete output as it was.
    kept = (out / "summary.json").read_bytes()
    failed = pmap_cli("run", tmp_path / "missing.csv", "--boundary", paths["boundary"],
                      "--out", out, "--overwrite")
    assert failed.returncode == 3
    assert (out / "summary.json").read_bytes() == kept
    assert not list(tmp_path.glob(".out.*")), "staging directory left behind"


def test_projected_xy_needs_crs_then_works_with_it(field, tmp_path):
    from pyproj import Transformer

    paths, table = field
    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32616", always_xy=True)
    x, y = to_utm.transform(table["longitude"].to_numpy(), table["latitude"].to_numpy())
    xy = table.drop(columns=["latitude", "longitude"]).assign(easting=x, northing=y)
    xy_path = tmp_path / "xy.csv"
    xy.to_csv(xy_path, index=False)
    out = tmp_path / "out"
    proc = pmap_cli("run", xy_path, "--boundary", paths["boundary"], "--out", out)
    assert_clean_failure(proc, out, "xy.csv", "crs")
    ok = pmap_cli("run", xy_path, "--boundary", paths["boundary"], "--out", out,
                  "--crs", "EPSG:32616", "--cell-size", 20)
    assert ok.returncode == 0, ok.stderr


def _spoil(table, tmp_path, name, change):
    spoiled = change(table.copy())
    path = tmp_path / name
    spoiled.to_csv(path, index=False)
    return path


BAD_TABLES = {
    "no_ph": (lambda t: t.drop(columns=["ph"]), ["ph", "column"]),
    "non_numeric": (lambda t: t.assign(ph=t["ph"].astype(object).where(t.index != 4, "acid")),
                    ["ph", "row", "acid"]),
    "ph_out_of_range": (lambda t: t.assign(ph=t["ph"].where(t.index != 7, 12.5)),
                        ["ph", "12.5", "row"]),
    "negative_p": (lambda t: t.assign(total_p=t["total_p"].where(t.index != 3, -40.0)),
                   ["total_p", "negative", "row"]),
    "too_few": (lambda t: t.iloc[:12], ["12", "30"]),
}


@pytest.mark.parametrize("case", sorted(BAD_TABLES))
def test_bad_sample_tables(field, tmp_path, case):
    paths, table = field
    change, words = BAD_TABLES[case]
    bad = _spoil(table, tmp_path, f"{case}.csv", change)
    out = tmp_path / "out"
    proc = pmap_cli("run", bad, "--boundary", paths["boundary"], "--out", out)
    assert_clean_failure(proc, out, f"{case}.csv", *words, code=3)


def test_missing_samples_file(field, tmp_path):
    paths, _ = field
    out = tmp_path / "out"
    proc = pmap_cli("run", tmp_path / "nowhere.csv", "--boundary", paths["boundary"], "--out", out)
    assert_clean_failure(proc, out, "nowhere.csv", "not found")


def test_missing_boundary_file(field, tmp_path):
    paths, _ = field
    out = tmp_path / "out"
    proc = pmap_cli("run", paths["samples"], "--boundary", tmp_path / "nofield.geojson", "--out", out)
    assert_clean_failure(proc, out, "nofield.geojson", "not found")


def test_samples_entirely_outside_the_boundary(field, tmp_path):
    paths, table = field
    far = _spoil(table, tmp_path, "elsewhere.csv",
                 lambda t: t.assign(latitude=t["latitude"] + 0.2))
    out = tmp_path / "out"
    proc = pmap_cli("run", far, "--boundary", paths["boundary"], "--out", out)
    assert_clean_failure(proc, out, "elsewhere.csv", "boundary")


@pytest.mark.filterwarnings("ignore:.crs. was not provided")
def test_vector_samples_without_crs(field, tmp_path):
    import geopandas as gpd

    paths, table = field
    points = gpd.GeoDataFrame(
        table.drop(columns=["latitude", "longitude"]),
        geometry=gpd.points_from_xy(table["longitude"], table["latitude"]),
    )
    shp = tmp_path / "nocrs.shp"
    points.to_file(shp)
    assert not shp.with_suffix(".prj").exists()
    out = tmp_path / "out"
    proc = pmap_cli("run", shp, "--boundary", paths["boundary"], "--out", out)
    assert_clean_failure(proc, out, "nocrs.shp", "crs")


def test_bad_config_key(field, tmp_path):
    paths, _ = field
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[rates]\nyeild_goal = 180\n")
    out = tmp_path / "out"
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out,
                    "--config", cfg)
    assert_clean_failure(proc, out, "bad.toml", "yeild_goal", code=2)


def test_config_reference_is_current():
    from pmap.config import configuration_reference

    # The documentation is generated from the code; it must not drift.
    assert (ROOT / "docs" / "configuration.md").read_text() == configuration_reference() + "\n"


def test_overwrite_replaces_only_a_previous_pmap_output(field, tmp_path):
    paths, _ = field
    # A directory pmap did not write is never replaced, even with --overwrite.
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("precious")
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", foreign,
                    "--overwrite")
    assert proc.returncode == 4 and "no pmap manifest.json" in proc.stderr, proc.stderr
    assert (foreign / "notes.txt").read_text() == "precious"
    # Nor is a directory that holds the run's own inputs.
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"],
                    "--out", paths["samples"].parent, "--overwrite")
    assert proc.returncode == 4 and "holds the input" in proc.stderr, proc.stderr
    assert paths["samples"].is_file()


def test_an_unwritable_output_path_is_one_line_before_any_work(field, tmp_path):
    paths, _ = field
    out = paths["samples"] / "out"  # its parent is a file
    proc = pmap_cli("run", paths["samples"], "--boundary", paths["boundary"], "--out", out)
    assert proc.returncode == 4, proc.stderr  # the output-error code, not a crash's 1
    errors = [line for line in proc.stderr.splitlines() if line.startswith("pmap: error:")]
    assert len(errors) == 1 and "not a writable directory" in errors[0], proc.stderr
    assert "Traceback" not in proc.stderr and "kriged" not in proc.stderr


def test_quiet_prints_only_the_caution(field, tmp_path):
    paths, _ = field
    proc = pmap_cli("-q", "run", paths["samples"], "--boundary", paths["boundary"],
                    "--out", tmp_path / "out", "--cell-size", 25)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""
    assert [line.split(":")[0] for line in proc.stderr.splitlines()] == ["CAUTION"]
