"""The output directory as a transaction (pmap.io.publish) on small invented outputs.

Concurrency and kills use real processes: a small script that opens a transaction and
stops at a chosen step, where the test holds it or kills it with SIGKILL.
"""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import threading
import time
import warnings
from pathlib import Path

import pytest

import pmap.io.publish as pub
from pmap.errors import OutputError, OutputExistsError, PmapError, PmapWarning
from pmap.io.manifest import write_manifest
from pmap.io.publish import open_transaction, output_transaction, verify_output


def make_output(directory: Path, files: dict[str, str] | None = None) -> Path:
    """An invented pmap output: the files and a manifest.json that vouches for them."""
    files = files or {"summary.json": '{"pmap_version": "test"}\n', "rasters/ph.tif": "tif"}
    for rel, text in files.items():
        (directory / rel).parent.mkdir(parents=True, exist_ok=True)
        (directory / rel).write_text(text)
    write_manifest(directory, {"pmap_version": "test"})
    return directory


def hidden(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir() if p.name.startswith("."))


def publish_new(out: Path, overwrite: bool = False, text: str = "new") -> None:
    with output_transaction(out, overwrite) as staging:
        (staging / "summary.json").write_text(text)


# --- fresh directories, refusals and the manifest -----------------------------------------


def test_a_new_output_appears_only_when_published_and_leaves_nothing_hidden(tmp_path):
    out = tmp_path / "a" / "b" / "out"  # parents are made
    transaction = open_transaction(out)
    assert pub.lock_path(out).exists(), "the lock is taken by the check"
    (transaction.staging / "summary.json").write_text("{}")
    assert transaction.staging.parent == out.parent and not out.exists()
    transaction.publish()
    assert (out / "summary.json").read_text() == "{}"
    assert verify_output(out).replaceable, "publish writes a manifest when the writer did not"
    assert hidden(out.parent) == [], "no staging folder or lock file is left"
    assert not transaction.open


def test_an_aborted_run_leaves_no_output_no_new_parents_and_no_lock(tmp_path):
    out = tmp_path / "a" / "b" / "out"
    transaction = open_transaction(out)
    (transaction.staging / "x").write_text("half")
    transaction.abort()
    assert not (tmp_path / "a").exists(), "parents made for the output are removed again"
    assert hidden(tmp_path) == []


def test_non_empty_directory_needs_overwrite(tmp_path):
    out = make_output(tmp_path / "out")
    with pytest.raises(OutputExistsError, match="--overwrite"):
        open_transaction(out)
    assert hidden(tmp_path) == []
    publish_new(out, overwrite=True)
    assert sorted(p.name for p in out.iterdir()) == ["manifest.json", "summary.json"]


def test_an_empty_directory_is_used_without_overwrite(tmp_path):
    out = tmp_path / "out"
    (out / "sub").mkdir(parents=True)  # empty folders hold nothing
    publish_new(out)
    assert (out / "summary.json").read_text() == "new"


def test_user_files_beside_a_pmap_output_block_overwrite_and_are_named(tmp_path):
    out = make_output(tmp_path / "out")
    (out / "notes.txt").write_text("my notes")
    (out / "summary.json").write_text("edited by hand")
    for i in range(6):
        (out / f"extra{i}.csv").write_text("x")
    with pytest.raises(OutputExistsError) as info:
        open_transaction(out, overwrite=True)
    message = str(info.value)
    assert "summary.json (changed since pmap wrote it)" in message
    assert "8 file(s)" in message and "and 3 more" in message, message
    assert "move those files out" in message
    assert (out / "notes.txt").read_text() == "my notes"
    assert (out / "rasters" / "ph.tif").exists()


def test_a_directory_without_manifest_is_refused_with_its_files(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "summary.json").write_text('{"pmap_version": "0.1.0"}')  # a copied summary
    (out / "notes.txt").write_text("mine")
    with pytest.raises(OutputExistsError, match="no pmap manifest.json") as info:
        open_transaction(out, overwrite=True)
    assert "notes.txt (not written by pmap)" in str(info.value)
    assert (out / "notes.txt").read_text() == "mine"


def test_verify_output_finds_links_and_bad_manifests(tmp_path):
    out = make_output(tmp_path / "out")
    assert verify_output(out).replaceable
    (out / "link").symlink_to(tmp_path)
    assert verify_output(out).unknown == ["link"]
    (out / "link").unlink()
    (out / "rasters" / "ph.tif").write_text("tiX")  # same size, other bytes
    assert verify_output(out).changed == ["rasters/ph.tif"]
    (out / "manifest.json").write_text("not json")
    check = verify_output(out)
    assert not check.manifest and "manifest.json" in check.unknown


def test_a_file_written_after_the_manifest_is_refused_as_a_bug(tmp_path):
    out = tmp_path / "out"
    transaction = open_transaction(out)
    make_output(transaction.staging)
    (transaction.staging / "late.txt").write_text("after the manifest")
    with pytest.raises(OutputError, match="after its manifest"):
        transaction.publish()
    assert not out.exists() and hidden(tmp_path) == []


def test_bad_paths_fail_before_the_lock(tmp_path):
    data = tmp_path / "in"
    data.mkdir()
    (data / "samples.csv").write_text("x")
    with pytest.raises(OutputExistsError, match="holds the input"):
        open_transaction(tmp_path, True, [data / "samples.csv"])
    with pytest.raises(OutputExistsError, match="not a directory"):
        open_transaction(data / "samples.csv")
    with pytest.raises(OutputError, match="not a writable directory"):
        open_transaction(data / "samples.csv" / "out")
    assert hidden(data) == []


# --- a directory that changes while the run works ------------------------------------------


def test_a_directory_that_appears_during_the_run_is_never_replaced(tmp_path):
    out = tmp_path / "out"
    transaction = open_transaction(out, overwrite=True)
    (transaction.staging / "summary.json").write_text("new")
    out.mkdir()
    (out / "theirs.txt").write_text("someone else's")
    with pytest.raises(OutputExistsError, match="appeared while pmap was running"):
        transaction.publish()
    assert [p.name for p in out.iterdir()] == ["theirs.txt"]
    assert hidden(tmp_path) == []


def test_an_old_output_that_gains_a_file_during_the_run_is_kept(tmp_path):
    out = make_output(tmp_path / "out")
    transaction = open_transaction(out, overwrite=True)
    (transaction.staging / "summary.json").write_text("new")
    (out / "notes.txt").write_text("written during the run")
    with pytest.raises(OutputExistsError, match="changed while pmap was running"):
        transaction.publish()
    assert (out / "notes.txt").exists() and (out / "rasters" / "ph.tif").exists()
    assert hidden(tmp_path) == []


def test_a_file_slipped_in_just_before_the_swap_is_swapped_back(tmp_path, monkeypatch):
    out = make_output(tmp_path / "out")
    real = pub._exchange

    def late_writer(a, b):
        (out / "notes.txt").write_text("just in time")
        return real(a, b)

    monkeypatch.setattr(pub, "_exchange", late_writer)
    with pytest.raises(OutputExistsError, match="changed while pmap was publishing"):
        publish_new(out, overwrite=True)
    assert (out / "notes.txt").read_text() == "just in time"
    assert (out / "rasters" / "ph.tif").read_text() == "tif"
    assert hidden(tmp_path) == []


@pytest.mark.parametrize("exchange", [True, False], ids=["renameat2", "portable"])
def test_replacing_and_appearing_with_and_without_renameat2(tmp_path, monkeypatch, exchange):
    if not exchange:
        monkeypatch.setattr(pub, "_renameat2", None)
    elif pub._renameat2 is None:
        pytest.skip("this system has no renameat2")
    out = make_output(tmp_path / "out")
    publish_new(out, overwrite=True, text="second")
    assert (out / "summary.json").read_text() == "second"
    assert not (out / "rasters").exists(), "the old output was replaced as a whole"
    assert hidden(tmp_path) == []
    fresh = tmp_path / "fresh"
    transaction = open_transaction(fresh)
    (transaction.staging / "summary.json").write_text("new")
    fresh.mkdir()
    (fresh / "theirs.txt").write_text("x")
    with pytest.raises(OutputExistsError):
        transaction.publish()
    assert [p.name for p in fresh.iterdir()] == ["theirs.txt"]


def test_rename_noreplace_never_replaces(tmp_path):
    src, dst = tmp_path / "src", tmp_path / "dst"
    src.mkdir()
    dst.mkdir()
    (dst / "keep").write_text("x")
    with pytest.raises(OSError) as info:
        pub._rename_noreplace(src, dst)
    assert info.value.errno in (errno.EEXIST, errno.ENOTEMPTY)
    assert (dst / "keep").exists() and src.exists()


# --- symbolic links ------------------------------------------------------------------------


def test_a_symlinked_output_is_published_into_its_target_and_the_link_kept(tmp_path):
    real = make_output(tmp_path / "disk" / "real")
    link = tmp_path / "link"
    link.symlink_to(real)
    transaction = open_transaction(link, overwrite=True)
    assert transaction.staging.parent == real.parent, "staged beside the link's target"
    (transaction.staging / "summary.json").write_text("new")
    transaction.publish()
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert (real / "summary.json").read_text() == "new"
    assert hidden(tmp_path / "disk") == [] and hidden(tmp_path) == []
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "disk" / "later")
    publish_new(dangling)
    assert dangling.is_symlink() and (tmp_path / "disk" / "later" / "summary.json").exists()


# --- the lock ------------------------------------------------------------------------------

SCRIPT = r"""
import os, sys, time
from pathlib import Path
import pmap.io.publish as pub
from pmap.io.manifest import write_manifest

out, phase, ready = Path(sys.argv[1]), sys.argv[2], Path(sys.argv[3])

def stop_here():
    ready.write_text(str(os.getpid()))
    time.sleep(600)

if phase == "between-renames":  # no exchange: die after moving the old output aside
    pub._renameat2 = None
    real_rename = os.rename
    def rename(src, dst):
        real_rename(src, dst)
        if ".old-" in os.fspath(dst):
            stop_here()
    pub.os.rename = rename
if phase == "after-exchange":
    real_exchange = pub._exchange
    def exchange(a, b):
        done = real_exchange(a, b)
        stop_here()
        return done
    pub._exchange = exchange
transaction = pub.open_transaction(out, overwrite=True)
(transaction.staging / "summary.json").write_text("new output")
if phase in ("hold", "writing"):
    stop_here()
write_manifest(transaction.staging, {"pmap_version": "test"})
transaction.publish()
"""


def start(tmp_path: Path, out: Path, phase: str) -> tuple[subprocess.Popen, int]:
    script = tmp_path / "run_script.py"
    script.write_text(SCRIPT)
    ready = tmp_path / f"ready-{phase}"
    proc = subprocess.Popen([sys.executable, str(script), str(out), phase, str(ready)],
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while not ready.exists():
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"the script did not reach {phase}: {proc.stderr.read()}")
        time.sleep(0.05)
    return proc, int(ready.read_text())


def kill(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=30)
    proc.stderr.close()


def test_a_second_process_is_refused_while_the_first_holds_the_lock(tmp_path):
    out = tmp_path / "out"
    proc, pid = start(tmp_path, out, "hold")
    try:
        with pytest.raises(OutputExistsError, match=f"another pmap run \\(pid {pid}\\) holds"):
            open_transaction(out, overwrite=True)
    finally:
        kill(proc)
    # The kernel dropped the dead process's lock; its staging folder is cleaned up.
    with pytest.warns(PmapWarning, match=r"removed 1 folder\(s\) left by interrupted runs"):
        transaction = open_transaction(out)
    transaction.close()
    assert hidden(tmp_path) == []


def test_kill_while_writing_keeps_the_old_output(tmp_path):
    out = make_output(tmp_path / "out")
    proc, _ = start(tmp_path, out, "writing")
    kill(proc)
    assert verify_output(out).replaceable, "the old output is whole"
    with pytest.warns(PmapWarning, match="left by interrupted runs"):
        publish_new(out, overwrite=True)
    assert hidden(tmp_path) == []


def test_kill_right_after_the_exchange_leaves_the_new_output(tmp_path):
    if pub._renameat2 is None:
        pytest.skip("this system has no renameat2")
    out = make_output(tmp_path / "out")
    proc, _ = start(tmp_path, out, "after-exchange")
    kill(proc)
    assert (out / "summary.json").read_text() == "new output"
    with pytest.warns(PmapWarning, match="left by interrupted runs"):
        open_transaction(out, overwrite=True).close()
    assert hidden(tmp_path) == []
    assert (out / "summary.json").read_text() == "new output"


def test_kill_between_the_two_renames_restores_the_old_output(tmp_path):
    out = make_output(tmp_path / "out")
    proc, _ = start(tmp_path, out, "between-renames")
    kill(proc)
    assert not out.exists(), "the old output sits under a hidden name"
    assert any(".old-" in name for name in hidden(tmp_path))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with pytest.raises(OutputExistsError, match="--overwrite"):
            open_transaction(out)  # restored first, then refused as any old output is
    messages = " ".join(str(w.message) for w in caught)
    assert "restored the previous output" in messages and "interrupted runs" in messages
    assert verify_output(out).replaceable and (out / "rasters" / "ph.tif").exists()
    assert hidden(tmp_path) == []


def test_recovery_leaves_other_hidden_names_alone(tmp_path):
    out = make_output(tmp_path / "out")
    stale = tmp_path / ".out.partial-0123abcd"
    stale.mkdir()
    (tmp_path / ".out.partial-notours").mkdir()
    (tmp_path / ".out.notes").write_text("a user's hidden file")
    (tmp_path / ".other.partial-0123abcd").mkdir()
    with pytest.warns(PmapWarning, match=r"\.out\.partial-0123abcd"):
        open_transaction(out, overwrite=True).close()
    assert not stale.exists()
    assert hidden(tmp_path) == [".other.partial-0123abcd", ".out.notes", ".out.partial-notours"]


def test_a_leftover_old_output_with_user_files_is_kept(tmp_path):
    make_output(tmp_path / "out")
    old = make_output(tmp_path / ".out.old-0123abcd")
    (old / "notes.txt").write_text("mine")
    with pytest.warns(PmapWarning, match=r"kept \.out\.old-0123abcd"):
        open_transaction(tmp_path / "out", overwrite=True).close()
    assert (old / "notes.txt").read_text() == "mine"


def test_an_abandoned_transaction_of_the_same_thread_is_reclaimed(tmp_path):
    out = tmp_path / "out"
    first = open_transaction(out)  # a run that failed between the check and the publish
    staged = first.staging
    second = open_transaction(out)
    assert not first.open and second.open
    assert not staged.exists(), "the abandoned run's staging folder went with it"
    second.close()
    third = open_transaction(out)
    del third  # dropped without closing: the lock goes with it
    assert hidden(tmp_path) == []


def test_another_thread_holding_the_directory_is_respected(tmp_path):
    out = tmp_path / "out"
    held, done = threading.Event(), threading.Event()

    def run():
        transaction = open_transaction(out)
        held.set()
        done.wait(30)
        transaction.close()

    thread = threading.Thread(target=run)
    thread.start()
    try:
        held.wait(30)
        with pytest.raises(OutputExistsError, match="another thread"):
            open_transaction(out)
    finally:
        done.set()
        thread.join()
    open_transaction(out).close()


# --- write failures ------------------------------------------------------------------------


def _failing(exc: BaseException):
    def write(staging: Path) -> None:
        (staging / "rasters").mkdir()
        (staging / "rasters" / "ph.tif").write_text("part")
        raise exc
    return write


@pytest.mark.parametrize("exc, words", [
    (OSError(errno.ENOSPC, "No space left on device"), ["no space left on device"]),
    (OSError(errno.EDQUOT, "Disk quota exceeded"), ["no space left on device"]),
    (OSError(errno.ENOSPC, "E28"), ["no space left on device"]),  # the errno alone says it
    (OSError(errno.EDQUOT, "E122"), ["no space left on device"]),
    (PermissionError(errno.EACCES, "Permission denied"), ["permission denied"]),
], ids=["enospc", "edquot", "enospc-errno", "edquot-errno", "eacces"])
def test_a_failed_write_is_an_output_error_and_keeps_the_old_output(tmp_path, exc, words):
    out = make_output(tmp_path / "out")
    with pytest.raises(OutputError) as info:
        with output_transaction(out, overwrite=True) as staging:
            _failing(exc)(staging)
    for word in words:
        assert word in str(info.value).lower()
    assert str(out) in str(info.value)
    assert info.value.__cause__ is exc
    assert verify_output(out).replaceable and hidden(tmp_path) == []


def test_the_failed_file_is_named_by_its_final_name(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(OutputError, match=r"writing rasters/ph\.tif\)") as info:
        with output_transaction(out) as staging:
            tmp_name = staging / "rasters" / ".ph.tif.k2x9_q.tmp.tif"
            raise OSError(errno.ENOSPC, "No space left on device", str(tmp_name))
    assert "no space left on device" in str(info.value)


def test_library_errors_without_errno_probe_the_disk(tmp_path, monkeypatch):
    from pyogrio.errors import DataSourceError
    from rasterio.errors import RasterioIOError

    out = tmp_path / "out"
    gdal_error = DataSourceError("sqlite3_exec(CREATE TABLE gpkg_contents ...) failed")
    monkeypatch.setattr(pub, "_disk_is_full", lambda directory: True)
    with pytest.raises(OutputError, match="no space left on device"):
        with output_transaction(out) as staging:
            _failing(gdal_error)(staging)
    monkeypatch.setattr(pub, "_disk_is_full", lambda directory: False)
    with pytest.raises(OutputError, match="sqlite3_exec"):  # the real cause
        with output_transaction(out) as staging:
            _failing(gdal_error)(staging)
    with pytest.raises(OutputError, match="not recognized"):
        with output_transaction(out) as staging:
            _failing(RasterioIOError("'x.tif' not recognized as a supported file"))(staging)
    assert not out.exists() and hidden(tmp_path) == []


def test_the_disk_probe_sees_a_full_disk(tmp_path, monkeypatch):
    assert not pub._disk_is_full(tmp_path)  # this disk has 8 MiB to spare

    def full(fd, offset, length):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "posix_fallocate", full)
    assert pub._disk_is_full(tmp_path)
    assert list(tmp_path.iterdir()) == [], "the probe file is removed"


def test_errors_that_are_not_writes_pass_through(tmp_path):
    out = make_output(tmp_path / "out")
    for exc in (ValueError("a bug"), KeyboardInterrupt()):
        with pytest.raises(type(exc)):
            with output_transaction(out, overwrite=True) as staging:
                (staging / "x").write_text("x")
                raise exc
    assert verify_output(out).replaceable and hidden(tmp_path) == []


def test_output_errors_have_their_own_exit_code():
    from pmap.cli import _run_safely
    from pmap.errors import exit_code_of

    assert issubclass(OutputExistsError, OutputError)
    assert issubclass(OutputExistsError, FileExistsError) and issubclass(OutputError, OSError)
    assert exit_code_of(OutputError("x")) == exit_code_of(OutputExistsError("x")) == 4
    assert exit_code_of(RuntimeError("x")) == 1, "1 is a crash's code"

    def no_space():
        raise OutputError("cannot write the outputs to out: no space left on device")

    with pytest.raises(SystemExit) as info:
        _run_safely(no_space)
    assert info.value.code == 4
    assert isinstance(OutputError("x"), PmapError)


def test_gdal_on_a_really_full_disk_says_no_space(tmp_path):
    import numpy as np
    from affine import Affine

    from pmap.grid import GridSpec
    from pmap.io import rasters

    disk = tmp_path / "disk"
    disk.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(disk)],
                             capture_output=True, text=True)
    if mounted.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here (needs root or CAP_SYS_ADMIN): "
                    f"{mounted.stderr.strip()}")
    try:
        fd = os.open(disk / "filler", os.O_WRONLY | os.O_CREAT)
        try:  # fill the disk to the last block
            with pytest.raises(OSError):
                while True:
                    os.write(fd, b"x" * 4096)
        finally:
            os.close(fd)
        assert pub._disk_is_full(disk)
        grid = GridSpec("EPSG:32616", Affine(5, 0, 500000, 0, -5, 4000000), 200, 200,
                        np.ones((200, 200), bool))
        with pytest.raises(OutputError, match="no space left on device") as info:
            with output_transaction(disk / "out") as staging:
                rasters.write_cog(staging / "ph.tif", np.random.default_rng(1).random((200, 200)),
                                  grid, description="pH", unit="pH units")
        assert type(info.value.__cause__).__name__.startswith("CPLE_"), "GDAL's own error"
        assert sorted(p.name for p in disk.iterdir()) == ["filler"]
    finally:
        subprocess.run(["umount", str(disk)], check=False)
