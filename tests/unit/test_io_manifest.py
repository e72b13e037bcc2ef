"""manifest.json: checksums of every file of an output directory."""

from __future__ import annotations

import hashlib
import json

import pytest

from pmap.errors import OutputError
from pmap.io.manifest import (
    MANIFEST_NAME,
    file_record,
    read_manifest,
    sha256_file,
    tree_records,
    write_manifest,
)


def test_sha256_of_known_messages(tmp_path):
    path = tmp_path / "abc.txt"
    path.write_bytes(b"abc")
    # Source: NIST FIPS 180-2, appendix B.1 (SHA-256 of "abc")
    assert sha256_file(path) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = tmp_path / "big.bin"
    data = bytes(range(256)) * 9000  # larger than one read chunk
    big.write_bytes(data)
    # Source: Python hashlib
    assert file_record(big) == {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)}


def test_manifest_lists_every_other_file(tmp_path):
    (tmp_path / "rasters").mkdir()
    (tmp_path / "rasters" / "ph.tif").write_bytes(b"tif")
    (tmp_path / "inputs" / "boundary").mkdir(parents=True)
    (tmp_path / "inputs" / "boundary" / "North [2026].shp").write_bytes(b"shp")
    (tmp_path / "summary.json").write_text("{}")
    written = write_manifest(tmp_path, {"pmap_version": "9.9", "warnings": ["w"]})
    assert list(written) == ["manifest_version", "pmap_version", "warnings", "files"]
    assert list(written["files"]) == ["inputs/boundary/North [2026].shp", "rasters/ph.tif",
                                      "summary.json"]
    assert written["files"]["rasters/ph.tif"] == {
        "sha256": hashlib.sha256(b"tif").hexdigest(), "bytes": 3}
    on_disk = json.loads((tmp_path / MANIFEST_NAME).read_text(encoding="utf-8"))
    assert on_disk == written == read_manifest(tmp_path)
    # Written again, the manifest still leaves itself out and no temporary file remains.
    again = write_manifest(tmp_path, {"pmap_version": "9.9", "warnings": ["w"]})
    assert again == written
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "inputs", MANIFEST_NAME, "rasters", "summary.json"]
    assert MANIFEST_NAME not in tree_records(tmp_path)


def test_manifest_refuses_reserved_members(tmp_path):
    with pytest.raises(ValueError, match="files"):
        write_manifest(tmp_path, {"files": {}})


def test_read_manifest_missing_or_not_a_manifest(tmp_path):
    assert read_manifest(tmp_path) is None
    (tmp_path / MANIFEST_NAME).write_text("{not json")
    with pytest.raises(OutputError, match="not valid JSON"):
        read_manifest(tmp_path)
    (tmp_path / MANIFEST_NAME).write_text(json.dumps({"files": {"a.tif": {"sha256": "x"}}}))
    with pytest.raises(OutputError, match="manifest.json: no \"files\" mapping"):
        read_manifest(tmp_path)
    (tmp_path / MANIFEST_NAME).write_text(json.dumps([1, 2]))
    with pytest.raises(OutputError, match="not a pmap manifest"):
        read_manifest(tmp_path)


def test_json_safe_makes_numpy_values_plain_and_nan_null():
    # Source: RFC 8259 (JSON has no NaN or Infinity; pmap writes them as null)
    import json
    from pathlib import Path

    import numpy as np

    from pmap.outputs import json_safe

    got = json_safe({"a": np.float32(1.5), "b": np.nan, "c": (np.int64(3), np.bool_(True)),
                     "d": np.array([1.0, np.inf]), "e": Path("x/y.tif"), 7: "k"})
    assert got == {"a": 1.5, "b": None, "c": [3, True], "d": [1.0, None], "e": "x/y.tif",
                   "7": "k"}
    json.dumps(got, allow_nan=False)
