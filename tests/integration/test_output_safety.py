"""Output safety end to end: concurrent runs, kills, user files, links and full disks.

Runs are real processes (``python -m pmap demo OUT``).  A previous pmap output is the
session's demo run copied byte for byte, so its manifest still vouches for every file.
"""

from __future__ import annotations

import dataclasses
import errno
import os
import shutil
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import pytest

from pmap.errors import OutputError
from pmap.io.publish import lock_path, open_transaction, verify_output


def pmap_cli(*args, wait=True):
    """Run the CLI; the runs here pass ``--maps none``: these tests are about the files' safety,
    and pictures only make a run slower."""
    env = dict(os.environ, MPLBACKEND="Agg")
    cmd = [sys.executable, "-m", "pmap", *map(str, args)]
    if not wait:
        return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                env=env)
    return subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=600)


def hidden(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if p.name.startswith("."))


def one_error(stderr: str) -> str:
    errors = [line for line in stderr.splitlines() if line.startswith("pmap: error:")]
    assert len(errors) == 1, stderr
    assert "Traceback" not in stderr, stderr
    return errors[0]


def wait_for(condition, proc, what: str, timeout: float = 120) -> None:
    deadline = time.monotonic() + timeout
    while not condition():
        if proc.poll() is not None:
            pytest.fail(f"the run ended before {what}: {proc.stderr.read()}")
        if time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"timed out waiting for {what}")
        time.sleep(0.05)


@pytest.fixture()
def old_output(demo_run, tmp_path):
    """A previous pmap output at tmp_path/out (a byte copy of the session's demo run)."""
    _, demo_out = demo_run
    out = tmp_path / "out"
    shutil.copytree(demo_out, out)
    assert verify_output(out).replaceable
    return out


def test_two_runs_into_one_directory_the_second_is_refused(tmp_path):
    out = tmp_path / "out"
    first = pmap_cli("demo", out, "--maps", "none", wait=False)
    wait_for(lambda: lock_path(out).exists(), first, "the first run took the lock")
    time.sleep(0.3)  # the lock file is made a moment before it is locked
    second = pmap_cli("demo", out, "--overwrite", "--maps", "none")
    assert second.returncode == 4, second.stderr
    assert "another pmap run" in one_error(second.stderr)
    stdout, stderr = first.communicate(timeout=600)
    assert first.returncode == 0, stderr
    assert verify_output(out).replaceable
    assert hidden(tmp_path) == [], "no staging folder or lock file is left"


def test_a_directory_that_appears_during_a_run_is_left_alone(tmp_path):
    out = tmp_path / "out"
    run = pmap_cli("demo", out, "--maps", "none", wait=False)
    wait_for(lambda: lock_path(out).exists(), run, "the run took the lock")
    out.mkdir()
    (out / "notes.txt").write_text("someone else's work")
    _, stderr = run.communicate(timeout=600)
    assert run.returncode == 4, stderr
    assert "appeared while pmap was running" in one_error(stderr)
    assert [p.name for p in out.iterdir()] == ["notes.txt"]
    assert (out / "notes.txt").read_text() == "someone else's work"
    assert hidden(tmp_path) == []


def test_user_files_beside_a_pmap_output_survive_overwrite(old_output, tmp_path):
    (old_output / "notes.txt").write_text("agronomist's notes")
    proc = pmap_cli("demo", old_output, "--overwrite", "--maps", "none")
    assert proc.returncode == 4, proc.stderr
    error = one_error(proc.stderr)
    assert "notes.txt (not written by pmap)" in error and "move those files out" in error
    check = verify_output(old_output)
    assert check.unknown == ["notes.txt"] and not check.changed, "the output was touched"
    # A folder that merely holds a copied summary.json is not a pmap output either.
    mine = tmp_path / "mine"
    mine.mkdir()
    shutil.copy2(old_output / "summary.json", mine / "summary.json")
    (mine / "notes.txt").write_text("mine")
    proc = pmap_cli("demo", mine, "--overwrite", "--maps", "none")
    assert proc.returncode == 4 and "no pmap manifest.json" in one_error(proc.stderr)
    assert sorted(p.name for p in mine.iterdir()) == ["notes.txt", "summary.json"]


def test_a_linked_output_directory_keeps_its_link(old_output, tmp_path):
    link = tmp_path / "latest"
    link.symlink_to(old_output)
    before = old_output.stat().st_ino
    proc = pmap_cli("-q", "demo", link, "--overwrite", "--maps", "none")
    assert proc.returncode == 0, proc.stderr
    assert link.is_symlink() and os.readlink(link) == str(old_output)
    assert old_output.stat().st_ino != before, "a new directory was published at the target"
    assert verify_output(old_output).replaceable and (old_output / "summary.json").exists()
    assert hidden(tmp_path) == []


def test_a_run_killed_while_writing_keeps_the_old_output_and_the_next_run_recovers(
        old_output, tmp_path):
    before = (old_output / "manifest.json").read_bytes()
    run = pmap_cli("demo", old_output, "--overwrite", wait=False)  # pictures: a long write

    def writing():
        return any(any(p.iterdir()) for p in tmp_path.glob(".out.partial-*"))

    wait_for(writing, run, "the run began writing")
    run.send_signal(signal.SIGKILL)
    run.communicate(timeout=60)
    assert verify_output(old_output).replaceable, "the old output is whole"
    assert (old_output / "manifest.json").read_bytes() == before
    assert any(name.startswith(".out.partial-") for name in hidden(tmp_path))
    again = pmap_cli("demo", old_output, "--overwrite", "--maps", "none")
    assert again.returncode == 0, again.stderr
    assert "removed 1 folder(s) left by interrupted runs" in again.stderr
    assert hidden(tmp_path) == []


# --- full disks ----------------------------------------------------------------------------


@pytest.fixture()
def small_disk(tmp_path):
    """Mount tmpfs file systems of a given size (skips where mounting is not allowed)."""
    mounted = []

    def mount(name: str, size_bytes: int) -> Path:
        point = tmp_path / name
        point.mkdir()
        proc = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_bytes}", "tmpfs",
                               str(point)], capture_output=True, text=True)
        if proc.returncode != 0:
            pytest.skip(f"cannot mount a small tmpfs here (needs root or CAP_SYS_ADMIN): "
                        f"{proc.stderr.strip()}")
        mounted.append(point)
        return point

    yield mount
    for point in mounted:
        subprocess.run(["umount", str(point)], check=False)


def test_a_full_disk_is_an_output_error_with_nothing_left(small_disk, demo_run):
    _, demo_out = demo_run
    disk = small_disk("small", 2 << 20)  # the demo writes about 4 MB
    proc = pmap_cli("demo", disk / "out", "--maps", "none")
    assert proc.returncode == 4, proc.stderr
    error = one_error(proc.stderr)
    assert "no space left on device" in error and str(disk / "out") in error
    assert list(disk.iterdir()) == [], "nothing is left on the full disk"

    size = sum(p.stat().st_size for p in demo_out.rglob("*") if p.is_file())
    disk = small_disk("full", size + (1 << 20))  # room for the old output and a bit
    shutil.copytree(demo_out, disk / "out")
    proc = pmap_cli("demo", disk / "out", "--overwrite", "--maps", "none")
    assert proc.returncode == 4, proc.stderr
    assert "no space left on device" in one_error(proc.stderr)
    assert verify_output(disk / "out").replaceable, "the old output is whole"
    assert [p.name for p in disk.iterdir()] == ["out"]


def _enospc(*args, **kwargs):
    raise OSError(errno.ENOSPC, "No space left on device")


def _writes_to(name: str, real):
    """``real``, failing with ENOSPC when the file it is given ends with ``name``."""
    def write(self, *args, **kwargs):
        if str(self).endswith(name):
            _enospc()
        return real(self, *args, **kwargs)
    return write


def _inject(monkeypatch, writer: str) -> None:
    import geopandas
    import matplotlib.figure
    import pyogrio
    import rasterio.shutil

    import pmap.io.manifest

    if writer == "geotiff":
        monkeypatch.setattr(rasterio.shutil, "copy", _enospc)
    elif writer == "geotiff-gdal":  # GDAL's own words, without an errno
        from rasterio._err import CPLE_AppDefinedError

        def gdal_fails(*args, **kwargs):
            raise CPLE_AppDefinedError(1, 1, "TIFFWriteDirectoryTagData:IO error writing tag data")

        monkeypatch.setattr(rasterio.shutil, "copy", gdal_fails)
        monkeypatch.setattr("pmap.io.publish._disk_is_full", lambda directory: True)
    elif writer == "png":
        monkeypatch.setattr(matplotlib.figure.Figure, "savefig", _enospc)
    elif writer in ("GPKG", "GeoJSON", "ESRI Shapefile"):
        real = pyogrio.write_dataframe

        def write_dataframe(df, path, *args, driver=None, **kwargs):
            if driver == writer:
                from pyogrio.errors import DataSourceError

                raise DataSourceError(f"{path}: No space left on device")
            return real(df, path, *args, driver=driver, **kwargs)

        monkeypatch.setattr(pyogrio, "write_dataframe", write_dataframe)
        assert geopandas  # geopandas' to_file(engine="pyogrio") calls pyogrio.write_dataframe
    elif writer == "copy":
        monkeypatch.setattr(shutil, "copyfile", _enospc)
    elif writer == "TASKDATA.XML":
        monkeypatch.setattr(Path, "write_bytes", _writes_to("TASKDATA.XML", Path.write_bytes))
    elif writer == "zones.csv":
        import pmap.io.tables

        real_tables_mkstemp = pmap.io.tables.tempfile.mkstemp

        def tables_mkstemp(*args, prefix=None, **kwargs):
            if prefix and prefix.endswith("_zones.csv."):
                _enospc()
            return real_tables_mkstemp(*args, prefix=prefix, **kwargs)

        monkeypatch.setattr(pmap.io.tables.tempfile, "mkstemp", tables_mkstemp)
    elif writer == "summary.json":
        monkeypatch.setattr(Path, "write_text", _writes_to("summary.json", Path.write_text))
    elif writer == "manifest.json":
        real_mkstemp = pmap.io.manifest.tempfile.mkstemp

        def mkstemp(*args, prefix=None, **kwargs):
            if prefix and prefix.startswith(".manifest.json"):
                _enospc()
            return real_mkstemp(*args, prefix=prefix, **kwargs)

        monkeypatch.setattr(pmap.io.manifest.tempfile, "mkstemp", mkstemp)


@pytest.fixture(scope="module")
def field_inputs(tmp_path_factory):
    """The demo's input files and their checked FieldInputs."""
    from pmap.config import load_config
    from pmap.demo import write_demo_inputs
    from pmap.pipeline import prepare_inputs

    paths = write_demo_inputs(tmp_path_factory.mktemp("inputs"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inputs = prepare_inputs(paths["samples"], paths["boundary"], load_config(paths["config"]))
    return paths, inputs


@pytest.mark.parametrize("writer", ["geotiff", "geotiff-gdal", "png", "GPKG", "GeoJSON",
                                    "ESRI Shapefile", "copy", "summary.json", "manifest.json",
                                    "TASKDATA.XML", "zones.csv"])
def test_no_space_in_any_writer_keeps_the_old_output(old_output, demo_run, field_inputs,
                                                     monkeypatch, writer):
    from pmap.outputs import write_outputs

    result, _ = demo_run
    paths, inputs = field_inputs
    # A copy (the session's result stays untouched) with fewer layers, to write faster.
    keep = ("ph", "ph_variance", "fixation_risk", "fixation_mechanism", "fixation_class",
            "zones", "p2o5_zone_rate", "product_zone_rate")
    result = dataclasses.replace(result, out_dir=old_output,
                                 layers={name: result.layers[name] for name in keep},
                                 interpolations={"ph": result.interpolations["ph"]})
    transaction = open_transaction(old_output, overwrite=True)
    _inject(monkeypatch, writer)
    with pytest.raises(OutputError) as info:
        write_outputs(result, inputs, samples_path=paths["samples"],
                      boundary_path=paths["boundary"], config_path=paths["config"],
                      transaction=transaction)
    monkeypatch.undo()
    message = str(info.value)
    assert "no space left on device" in message and str(old_output) in message, message
    assert verify_output(old_output).replaceable, "the old output is whole"
    assert hidden(old_output.parent) == [], "no staging folder or lock is left"
