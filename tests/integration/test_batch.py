"""`pmap batch`: many fields, failures recorded, resume by manifest, local processes or Dask.

The fields are the invented demo field (write_demo_inputs) on coarse 40 m cells with no
pictures (batch.toml), so a field runs in a few seconds.  Every check here is on files and
records, never on how long something took.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from pmap.batch import run_batch
from pmap.batch.plan import plan_batch
from pmap.demo import write_demo_inputs
from pmap.io.manifest import read_manifest
from pmap.io.publish import verify_output

BATCH_TOML = '[grid]\ncell_size_m = 40\n\n[output]\nmaps = "none"\n'
WAIT_S = 300  # upper bound for a subprocess to reach a state; only a hang hits it


# ---------------------------------------------------------------------------------------
# Helpers


def make_field(root: Path, name: str, *, toml: str = '[field]\nfarm = "Invented Farm"\n'
               ) -> Path:
    """A field folder with the demo's samples and boundary and a small field.toml."""
    folder = root / name
    paths = write_demo_inputs(folder)
    paths["config"].write_text(toml, encoding="utf-8")  # not the demo's 5 m config
    return folder


def break_samples(folder: Path) -> None:
    (folder / "samples.csv").write_text("garbage,column\n1,2\n3,4\n", encoding="utf-8")


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def tree_state(root: Path) -> dict[str, tuple[int, int, str]]:
    """Every file under ``root``: (inode, mtime in ns, sha256), by relative path."""
    state = {}
    for path in sorted(root.rglob("*")):
        if path.is_file():
            st = path.stat()
            state[path.relative_to(root).as_posix()] = (st.st_ino, st.st_mtime_ns, sha(path))
    return state


def field_hashes(field_dir: Path) -> dict[str, str]:
    """sha256 of every file of a field's output, the manifest included."""
    return {p.relative_to(field_dir).as_posix(): sha(p)
            for p in sorted(field_dir.rglob("*")) if p.is_file()}


def read_rows(path: Path) -> dict[str, dict[str, str]]:
    with open(path, encoding="utf-8", newline="") as handle:
        return {row["name"]: row for row in csv.DictReader(handle)}


def by_name(result) -> dict[str, dict]:
    return {rec["name"]: rec for rec in result.records}


def assert_complete(field_dir: Path) -> None:
    """The output verifies against its manifest and holds every file the manifest lists."""
    check = verify_output(field_dir)
    assert check.replaceable, (field_dir, check)
    manifest = read_manifest(field_dir)
    missing = [rel for rel in manifest["files"] if not (field_dir / rel).is_file()]
    assert not missing, missing


def pmap_cli(*args, **kwargs) -> subprocess.CompletedProcess:
    env = dict(os.environ, MPLBACKEND="Agg")
    return subprocess.run([sys.executable, "-m", "pmap", *map(str, args)], capture_output=True,
                          text=True, env=env, timeout=WAIT_S, **kwargs)


def spawn_cli(*args, **kwargs) -> subprocess.Popen:
    env = dict(os.environ, MPLBACKEND="Agg")
    return subprocess.Popen([sys.executable, "-m", "pmap", *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                            **kwargs)


def wait_for(condition, proc: subprocess.Popen | None = None, what: str = "") -> None:
    """Poll until ``condition()``; fail if the process ends first or nothing happens."""
    deadline = time.monotonic() + WAIT_S
    while not condition():
        if proc is not None and proc.poll() is not None:
            out, err = proc.communicate()
            pytest.fail(f"the batch ended (rc {proc.returncode}) before {what}:\n{err}")
        if time.monotonic() > deadline:
            pytest.fail(f"nothing happened: {what}")
        time.sleep(0.05)


def started(out: Path, slug: str) -> bool:
    log = out / ".batch" / "logs" / f"{slug}.log"
    return log.is_file() and "run started" in log.read_text(encoding="utf-8")


def published(out: Path, slug: str) -> bool:
    return (out / slug / "manifest.json").is_file()


# ---------------------------------------------------------------------------------------
# A first batch shared by several tests: two good fields and a broken one


@pytest.fixture(scope="module")
def first_batch(tmp_path_factory):
    """North (with the overview sheet and report), South, and Broken (garbage samples)."""
    root = tmp_path_factory.mktemp("batch")
    fields = root / "fields"
    make_field(fields, "North", toml='[field]\nfarm = "Invented Farm"\n\n[output]\n'
               'maps = "overview"\n')
    make_field(fields, "South")
    break_samples(make_field(fields, "Broken"))
    (fields / "batch.toml").write_text(BATCH_TOML, encoding="utf-8")
    result = run_batch(fields, root / "out", workers=2)
    return root, result


def copy_batch(root: Path, dest: Path) -> tuple[Path, Path]:
    shutil.copytree(root / "fields", dest / "fields")
    shutil.copytree(root / "out", dest / "out")
    return dest / "fields", dest / "out"


# ---------------------------------------------------------------------------------------
# 1. failures are recorded, the others complete, the exit code says so


def test_api_batch_records_the_broken_field_and_completes_the_others(first_batch):
    root, result = first_batch
    out = root / "out"
    recs = by_name(result)
    assert result.exit_code == 1
    assert {n: r["status"] for n, r in recs.items()} == {
        "North": "done", "South": "done", "Broken": "failed"}
    assert recs["Broken"]["error_type"] == "InputError"
    assert "coordinate" in recs["Broken"]["error"]
    assert not (out / "Broken").exists()
    for name in ("North", "South"):
        assert_complete(out / name)
        assert read_manifest(out / name)["config"]["field"]["name"] == name

    rows = read_rows(out / "batch_summary.csv")
    assert rows["Broken"]["status"] == "failed" and "coordinate" in rows["Broken"]["error"]
    for name in ("North", "South"):
        row = rows[name]
        summary = json.loads((out / name / "summary.json").read_text())
        assert row["status"] == "done" and row["error"] == ""
        assert int(row["samples_used"]) == summary["inputs"]["n_samples_used"] > 0
        assert float(row["cv_rmse_ph"]) == pytest.approx(summary["properties"]["ph"]["cv"]["rmse"])
        assert float(row["p2o5_total_kg"]) == pytest.approx(summary["totals"]["p2o5_total_kg"])
        assert float(row["product_total_kg"]) > 0 and row["product"]
        assert float(row["mean_available_p_mg_kg"]) > 0
        zone_cols = [c for c in row if c.startswith("area_ha_")]
        assert zone_cols
        assert sum(float(row[c] or 0) for c in zone_cols) == pytest.approx(
            float(row["area_ha"]), rel=1e-3)
        assert row["output_dir"] == name

    # The field polygons: one per field, WGS 84, around the demo field (lon -89, lat 40).
    import geopandas as gpd

    gdf = gpd.read_file(out / "batch_summary.gpkg", layer="fields")
    assert gdf.crs.to_epsg() == 4326
    polygons = dict(zip(gdf["name"], gdf.geometry, strict=True))
    assert set(polygons) == {"North", "South", "Broken"}
    for geom in polygons.values():
        assert geom is not None and -89.1 < geom.centroid.x < -88.9
        assert 40.0 < geom.centroid.y < 40.2

    # The index links the report of the field drawn with maps = "overview" only.
    index = (out / "index.html").read_text(encoding="utf-8")
    assert 'href="North/report.html"' in index and (out / "North" / "report.html").is_file()
    assert "South/report.html" not in index and not (out / "South" / "report.html").exists()
    assert rows["North"]["report"] == "North/report.html"

    # Every log line names its field; the field's warnings are in its own log.
    north_log = (out / ".batch" / "logs" / "North.log").read_text(encoding="utf-8")
    lines = [line for line in north_log.splitlines() if line.strip()]
    assert lines and all("pmap[North]: " in line for line in lines)
    assert any(" WARNING pmap[North]: " in line for line in lines)
    batch_log = (out / ".batch" / "batch.log").read_text(encoding="utf-8")
    assert "ERROR pmap[Broken]: failed: InputError" in batch_log


def test_cli_batch_exit_code_and_messages_name_the_field(first_batch, tmp_path):
    root, _ = first_batch
    out = tmp_path / "cli_out"
    proc = pmap_cli("batch", root / "fields", "--out", out, "--workers", "2", "--maps", "none")
    assert proc.returncode == 1, proc.stderr
    assert "pmap[Broken]: failed: InputError" in proc.stderr
    assert "Broken: FAILED: InputError" in proc.stderr
    rows = read_rows(out / "batch_summary.csv")
    assert {n: r["status"] for n, r in rows.items()} == {
        "Broken": "failed", "North": "done", "South": "done"}
    assert (out / "index.html").is_file() and (out / "batch_summary.gpkg").is_file()
    # non-TTY progress: one plain line per finished field
    assert sum(line.startswith("pmap[") and " finished: " in line
               for line in proc.stderr.splitlines()) == 3


def test_cli_exit_codes_for_the_batch_as_a_whole(tmp_path):
    assert pmap_cli("batch", tmp_path / "missing", "--out", tmp_path / "o").returncode == 3
    (tmp_path / "f").mkdir()
    (tmp_path / "f" / "batch.toml").write_text("[grid]\ncell_sise_m = 40\n")
    make_field(tmp_path / "f", "A")
    proc = pmap_cli("batch", tmp_path / "f", "--out", tmp_path / "o")
    assert proc.returncode == 1 and "cell_sise_m" in proc.stderr  # the field cannot run
    both = pmap_cli("batch", tmp_path / "f", "--out", tmp_path / "o", "--scheduler", "tcp://x:1",
                    "--scheduler-file", tmp_path / "s.json")
    assert both.returncode == 2
    (tmp_path / "t.csv").write_text("name,samples,boundary\nNorth 1,a.csv,b.geojson\n"
                                    "north/1,a.csv,b.geojson\n")
    twice = pmap_cli("batch", tmp_path / "t.csv", "--out", tmp_path / "o2")
    assert twice.returncode == 2 and "give them distinct names" in twice.stderr
    assert not (tmp_path / "o2").exists()


# ---------------------------------------------------------------------------------------
# 2. resume: completed fields are skipped and untouched; a changed field reruns alone


def test_second_run_skips_done_fields_untouched_and_reruns_the_failed_one(first_batch,
                                                                          tmp_path):
    fields, out = copy_batch(first_batch[0], tmp_path)
    before = {name: tree_state(out / name) for name in ("North", "South")}
    shutil.copyfile(fields / "South" / "samples.csv", fields / "Broken" / "samples.csv")

    second = run_batch(fields, out, workers=2)
    assert second.exit_code == 0
    assert {n: r["status"] for n, r in by_name(second).items()} == {
        "North": "skipped", "South": "skipped", "Broken": "done"}
    for name in ("North", "South"):
        assert tree_state(out / name) == before[name]
    assert_complete(out / "Broken")
    rows = read_rows(out / "batch_summary.csv")
    assert rows["North"]["status"] == "skipped" and float(rows["North"]["p2o5_total_kg"]) > 0

    # One field's own toml changes: only that field runs again.
    untouched = {name: tree_state(out / name) for name in ("North", "Broken")}
    old_south = field_hashes(out / "South")
    (fields / "South" / "field.toml").write_text('[field]\nfarm = "Another Invented Farm"\n')
    third = run_batch(fields, out, workers=2)
    statuses = {n: r["status"] for n, r in by_name(third).items()}
    assert statuses == {"North": "skipped", "South": "done", "Broken": "skipped"}
    assert any("field.farm" in reason for reason in by_name(third)["South"]["reasons"])
    for name in ("North", "Broken"):
        assert tree_state(out / name) == untouched[name]
    assert field_hashes(out / "South") != old_south
    assert read_manifest(out / "South")["config"]["field"]["farm"] == "Another Invented Farm"
    assert_complete(out / "South")


def test_changed_samples_or_modified_output_are_not_done(first_batch, tmp_path):
    fields, out = copy_batch(first_batch[0], tmp_path)
    with open(fields / "North" / "samples.csv", "a", encoding="utf-8") as handle:
        handle.write("\n")
    (out / "South" / "notes.txt").write_text("a person's notes")
    plan = plan_batch(fields, out)
    try:
        decided = {f.name: f for f in plan.fields}
        assert decided["North"].action == "changed"
        assert any("samples changed (samples.csv)" in r for r in decided["North"].reasons)
        assert decided["South"].action == "changed"
        assert any("notes.txt" in r and "will not replace" in r
                   for r in decided["South"].reasons)
    finally:
        plan.close()


# ---------------------------------------------------------------------------------------
# 3. a Dask cluster runs the same task and writes the same bytes


def test_dask_cluster_gives_the_same_bytes_as_local_processes(tmp_path, dask_cluster):
    import distributed

    fields = tmp_path / "fields"
    make_field(fields, "Alpha", toml='[output]\nmaps = "overview"\n')
    make_field(fields, "Beta")
    (fields / "batch.toml").write_text(BATCH_TOML, encoding="utf-8")
    out = tmp_path / "run" / "out"
    # Same input paths and the same output path for both runs: summary.json records the
    # path of each input (the generated config lives under the output's .batch/).
    local = run_batch(fields, out, workers=2)
    assert local.exit_code == 0
    shutil.move(out, tmp_path / "local_out")
    remote = run_batch(fields, out, scheduler=dask_cluster.scheduler_address)
    assert remote.exit_code == 0
    assert {r["status"] for r in remote.records} == {"done"}

    with distributed.Client(dask_cluster.scheduler_address) as client:
        pids = set(client.run(os.getpid).values())
    assert {int(r["worker"].rsplit(":", 1)[1]) for r in remote.records} <= pids
    for name in ("Alpha", "Beta"):
        a, b = field_hashes(tmp_path / "local_out" / name), field_hashes(out / name)
        listed = set(read_manifest(out / name)["files"]) | {"manifest.json"}
        assert set(a) == set(b) == listed
        assert a == b, sorted(k for k in a if a[k] != b.get(k))
    assert any(k.endswith(".png") for k in field_hashes(out / "Alpha"))


# ---------------------------------------------------------------------------------------
# 4. killed mid-run: nothing looks complete that is not; a re-run finishes the job


def _three_fields(root: Path) -> Path:
    fields = root / "fields"
    for name in ("A", "B", "C"):
        make_field(fields, name)
    (fields / "batch.toml").write_text(BATCH_TOML, encoding="utf-8")
    return fields


def _check_no_false_complete(out: Path) -> list[str]:
    names = [p.name for p in out.iterdir() if p.is_dir() and not p.name.startswith(".")]
    for name in names:
        assert_complete(out / name)
    return names


@pytest.mark.parametrize("how", ["SIGTERM", "SIGKILL"])
def test_killed_batch_leaves_nothing_half_done_and_resumes(tmp_path, how):
    fields = _three_fields(tmp_path)
    out = tmp_path / "out"
    proc = spawn_cli("batch", fields, "--out", out, "--workers", "1",
                     start_new_session=(how == "SIGKILL"))
    try:
        wait_for(lambda: published(out, "A") and started(out, "B"), proc,
                 "field A published and field B started")
        if how == "SIGTERM":
            proc.send_signal(signal.SIGTERM)
            _, err = proc.communicate(timeout=WAIT_S)
            assert proc.returncode == 143, err
            assert "stopped by SIGTERM" in err
            # graceful: the interrupted field's transaction removed its staging folder
            assert not [p for p in out.iterdir() if ".partial-" in p.name]
            rows = read_rows(out / "batch_summary.csv")
            assert rows["A"]["status"] == "done"
            # B was interrupted where it ran (seconds of work left), C never started
            assert rows["B"]["status"] == rows["C"]["status"] == "cancelled"
            assert "interrupted while running" in rows["B"]["error"]
            assert not (out / "B").exists()
        else:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate(timeout=WAIT_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert "A" in _check_no_false_complete(out)
    a_before = tree_state(out / "A")

    again = pmap_cli("batch", fields, "--out", out, "--workers", "2")
    assert again.returncode == 0, again.stderr
    rows = read_rows(out / "batch_summary.csv")
    assert rows["A"]["status"] == "skipped"
    assert rows["B"]["status"] == rows["C"]["status"] == "done"
    assert tree_state(out / "A") == a_before
    assert sorted(_check_no_false_complete(out)) == ["A", "B", "C"]
    assert not [p for p in out.iterdir() if ".partial-" in p.name or ".old-" in p.name]


def test_a_worker_process_that_dies_is_replaced_and_its_field_retried(tmp_path):
    fields = tmp_path / "fields"
    for name in ("A", "B"):
        make_field(fields, name)
    (fields / "batch.toml").write_text(BATCH_TOML, encoding="utf-8")
    out = tmp_path / "out"
    proc = spawn_cli("batch", fields, "--out", out, "--workers", "1")
    log = out / ".batch" / "logs" / "A.log"
    try:
        wait_for(lambda: started(out, "A"), proc, "field A started")
        pid = int(re.search(r"run started in \S+:(\d+) ", log.read_text()).group(1))
        os.kill(pid, signal.SIGKILL)  # as the out-of-memory killer would
        _, err = proc.communicate(timeout=WAIT_S)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, err
    rows = read_rows(out / "batch_summary.csv")
    assert rows["A"]["status"] == rows["B"]["status"] == "done"
    assert int(rows["A"]["worker"].rsplit(":", 1)[1]) != pid
    assert "the worker process died while this field ran" in (
        out / ".batch" / "batch.log").read_text()
    assert sorted(_check_no_false_complete(out)) == ["A", "B"]


# ---------------------------------------------------------------------------------------
# 5. the dry run says new / changed / done and writes nothing


def test_dry_run_lists_new_changed_done_and_writes_nothing(first_batch, tmp_path):
    fields, out = copy_batch(first_batch[0], tmp_path)
    (fields / "South" / "field.toml").write_text('[field]\nfarm = "Changed Farm"\n')
    make_field(fields, "West")
    (fields / "NoBoundary").mkdir()
    shutil.copyfile(fields / "West" / "samples.csv", fields / "NoBoundary" / "samples.csv")
    before = tree_state(tmp_path)

    result = run_batch(fields, out, dry_run=True)
    actions = {f.name: f.action for f in result.plan.fields}
    assert actions == {"Broken": "new", "North": "done", "South": "changed", "West": "new",
                       "NoBoundary": "invalid"}
    lines = result.plan.describe()
    assert any(line.startswith("North: done (skipped)") for line in lines)
    assert any(line.startswith("South: changed: configuration changed: field.farm")
               and "Changed Farm" in line for line in lines)
    assert any(line.startswith("West: new: no previous output") for line in lines)
    assert any(line.startswith("NoBoundary: error: InputError: no boundary file")
               for line in lines)
    assert result.exit_code == 1  # a field cannot run

    proc = pmap_cli("batch", fields, "--out", out, "--dry-run")
    assert proc.returncode == 1
    assert "South: changed: configuration changed: field.farm" in proc.stdout
    assert "North: done (skipped)" in proc.stdout
    assert tree_state(tmp_path) == before

    fresh = tmp_path / "never"
    assert pmap_cli("batch", fields, "--out", fresh, "--dry-run").returncode == 1
    assert not fresh.exists()


# ---------------------------------------------------------------------------------------
# 6. one boundary file holding several fields, from a table


def test_a_multi_feature_boundary_expands_into_named_fields(tmp_path):
    import geopandas as gpd
    from shapely.geometry import box

    farm = tmp_path / "farm"
    paths = write_demo_inputs(farm)
    whole = gpd.read_file(paths["boundary"]).to_crs("EPSG:32616").geometry[0]
    x0, y0, x1, y1 = whole.bounds
    mid = (x0 + x1) / 2
    halves = [whole.intersection(box(x0 - 1, y0 - 1, mid, y1 + 1)),
              whole.intersection(box(mid, y0 - 1, x1 + 1, y1 + 1))]
    gpd.GeoDataFrame({"plot": ["West Half", "East Half"]}, geometry=halves,
                     crs="EPSG:32616").to_file(farm / "fields.gpkg", driver="GPKG")
    table = tmp_path / "fields.csv"
    table.write_text("samples,boundary,split_by,zones.min_mapping_unit_ha\n"
                     "farm/samples.csv,farm/fields.gpkg,plot,0.5\n", encoding="utf-8")
    (tmp_path / "batch.toml").write_text(BATCH_TOML, encoding="utf-8")
    out = tmp_path / "out"

    result = run_batch(table, out, workers=2)
    assert result.exit_code == 0, [(r["name"], r["error"]) for r in result.records]
    recs = by_name(result)
    assert set(recs) == {"West Half", "East Half"}
    n_read = {}
    for name, slug in (("West Half", "West-Half"), ("East Half", "East-Half")):
        assert recs[name]["out_dir"] == str(out / slug)
        assert_complete(out / slug)
        manifest = read_manifest(out / slug)
        assert manifest["config"]["field"]["name"] == name
        assert manifest["config"]["zones"]["min_mapping_unit_ha"] == 0.5  # the table's column
        assert manifest["config"]["grid"]["cell_size_m"] == 40.0  # batch.toml beside it
        summary = json.loads((out / slug / "summary.json").read_text())
        n_read[name] = summary["inputs"]["n_samples_used"]
        assert 0 < n_read[name] < summary["inputs"]["n_samples_read"]
        assert (out / ".batch" / "boundaries" / f"{slug}.geojson").is_file()
        log = (out / ".batch" / "logs" / f"{slug}.log").read_text(encoding="utf-8")
        assert f"WARNING pmap[{name}]: " in log and "outside the boundary" in log
    assert sum(n_read.values()) >= 93

    gdf = gpd.read_file(out / "batch_summary.gpkg", layer="fields").set_index("name")
    assert gdf.geometry["West Half"].centroid.x < gdf.geometry["East Half"].centroid.x

    # The split files are cached by content: a second run skips both fields.
    state = tree_state(out / "West-Half")
    again = run_batch(table, out, workers=2)
    assert {r["status"] for r in again.records} == {"skipped"}
    assert tree_state(out / "West-Half") == state


# ---------------------------------------------------------------------------------------
# 7. the layering order: batch.toml < batch name < field's toml < table columns < --maps


def test_config_layers_key_by_key_in_order(tmp_path):
    make_field(tmp_path / "in", "F1", toml='[grid]\ncell_size_m = 30\n\n[field]\nname = "Own"\n')
    make_field(tmp_path / "in", "F2", toml="")
    (tmp_path / "batch.toml").write_text(
        '[grid]\ncell_size_m = 40\nsample_buffer_m = 20\n\n[field]\nname = "Default"\n'
        'farm = "Batch Farm"\n\n[output]\nmaps = "all"\n')
    (tmp_path / "fields.csv").write_text(
        "name,samples,boundary,config,grid.cell_size_m\n"
        "one,in/F1/samples.csv,in/F1/boundary.geojson,in/F1/field.toml,25\n"
        "two,in/F2/samples.csv,in/F2/boundary.geojson,in/F1/field.toml,\n"
        "three,in/F2/samples.csv,in/F2/boundary.geojson,,\n")
    plan = plan_batch(tmp_path / "fields.csv", tmp_path / "out", maps="none")
    try:
        cfg = {f.name: f.config for f in plan.fields}
        assert [f.action for f in plan.fields] == ["new"] * 3
        assert cfg["one"].grid.cell_size_m == 25  # table column over the field's toml
        assert cfg["two"].grid.cell_size_m == 30  # the field's toml over batch.toml
        assert cfg["three"].grid.cell_size_m == 40  # batch.toml
        assert {c.grid.sample_buffer_m for c in cfg.values()} == {20}  # key by key
        assert cfg["one"].field.name == "Own"  # the field's own toml names it
        assert cfg["three"].field.name == "three"  # else the batch name, over batch.toml
        assert cfg["three"].field.farm == "Batch Farm"
        assert {c.output.maps for c in cfg.values()} == {"none"}  # --maps over every file
        assert [f.out_dir.name for f in plan.fields] == ["one", "two", "three"]
    finally:
        plan.close()


def test_a_toml_table_lists_fields_with_dotted_keys_subtables_and_its_own_defaults(tmp_path):
    make_field(tmp_path / "in", "F1", toml="")
    make_field(tmp_path / "in", "F2", toml="")
    (tmp_path / "batch.toml").write_text('[grid]\ncell_size_m = 40\n\n[rates]\ncrop = "wheat"\n')
    (tmp_path / "fields.toml").write_text(
        '[rates]\ncrop = "soybean"\n\n'
        '[[fields]]\nname = "North 40"\nsamples = "in/F1/samples.csv"\n'
        'boundary = "in/F1/boundary.geojson"\nrates.crop = "corn"\n\n'
        '[[fields]]\nname = "Creek Bottom"\nsamples = "in/F2/samples.csv"\n'
        'boundary = "in/F2/boundary.geojson"\n[fields.grid]\ncell_size_m = 30\n')
    plan = plan_batch(tmp_path / "fields.toml", tmp_path / "out", maps="none")
    try:
        cfg = {f.name: f.config for f in plan.fields}
        assert list(cfg) == ["North 40", "Creek Bottom"]
        assert cfg["North 40"].rates.crop == "corn"        # a dotted key of the row
        assert cfg["North 40"].grid.cell_size_m == 40      # batch.toml
        assert cfg["Creek Bottom"].grid.cell_size_m == 30  # the row's sub-table
        assert cfg["Creek Bottom"].rates.crop == "soybean"  # the table's own default section
        assert cfg["Creek Bottom"].field.name == "Creek Bottom"
        assert [f.samples.name for f in plan.fields] == ["samples.csv", "samples.csv"]
    finally:
        plan.close()


def test_a_dask_client_passed_in_runs_the_batch_and_is_left_open(tmp_path, dask_cluster):
    import distributed

    fields = tmp_path / "fields"
    make_field(fields, "Alpha")
    (fields / "batch.toml").write_text(BATCH_TOML, encoding="utf-8")
    with distributed.Client(dask_cluster.scheduler_address) as client:
        result = run_batch(fields, tmp_path / "out", scheduler=client)
        assert client.status == "running"
        assert client.submit(sum, [1, 2]).result() == 3
    assert result.exit_code == 0
    assert [r["status"] for r in result.records] == ["done"]
    assert_complete(tmp_path / "out" / "Alpha")
