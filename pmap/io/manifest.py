"""The run manifest: ``manifest.json``, what a run read and wrote, with SHA-256 checksums.

The manifest sits at the top of an output directory.  Its ``"files"`` member lists every
other file of the directory (relative POSIX paths, sorted) with its SHA-256 and size in
bytes, so a later run can tell a pmap output it may replace from one a person has edited,
and anyone can check that two runs wrote the same bytes.  Everything else in it (pmap
version, resolved configuration, input checksums, warnings) is what the writer passes as
``extra``.
"""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from pmap.errors import OutputError

__all__ = [
    "MANIFEST_NAME",
    "MANIFEST_VERSION",
    "sha256_file",
    "file_record",
    "tree_records",
    "write_manifest",
    "read_manifest",
]

#: File name of the manifest at the top of an output directory.
MANIFEST_NAME: str = "manifest.json"
#: Version of the manifest layout; raised when a member changes meaning.
MANIFEST_VERSION: int = 1

_CHUNK = 1 << 20  # bytes read at a time when hashing


def sha256_file(path: str | Path) -> str:
    """SHA-256 of a file's bytes, as 64 lower-case hex digits."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(_CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()


def file_record(path: str | Path) -> dict[str, Any]:
    """``{"sha256": <hex>, "bytes": <size in bytes>}`` of one file."""
    path = Path(path)
    return {"sha256": sha256_file(path), "bytes": path.stat().st_size}


def tree_records(directory: str | Path, *, exclude: tuple[str, ...] = (MANIFEST_NAME,)
                 ) -> dict[str, dict[str, Any]]:
    """:func:`file_record` of every file under ``directory``, keyed by relative POSIX path.

    Paths are sorted; ``exclude`` names top-level files to leave out (the manifest itself).
    Symbolic links are not followed.
    """
    directory = Path(directory)
    found = []
    for root, dirs, files in os.walk(directory):
        dirs.sort()
        for name in files:
            path = Path(root) / name
            rel = path.relative_to(directory).as_posix()
            if rel in exclude or path.is_symlink():
                continue
            found.append((rel, path))
    return {rel: file_record(path) for rel, path in sorted(found)}


def write_manifest(directory: str | Path, extra: Mapping[str, Any]) -> dict[str, Any]:
    """Write ``manifest.json`` into ``directory`` and return what it holds.

    Parameters
    ----------
    directory : path
        The output directory, complete except for the manifest.
    extra : mapping
        JSON-able members to record (pmap version, configuration, inputs, warnings, ...).
        ``"manifest_version"`` and ``"files"`` are set here and may not be given.

    Returns
    -------
    dict
        ``{"manifest_version": 1, **extra, "files": tree_records(directory)}``, as written
        (JSON, two-space indent, keys in the order given, newline at the end).
    """
    clash = {"manifest_version", "files"} & set(extra)
    if clash:
        raise ValueError(f"write_manifest sets {sorted(clash)} itself; leave them out of extra")
    directory = Path(directory)
    manifest = {"manifest_version": MANIFEST_VERSION, **extra, "files": tree_records(directory)}
    text = json.dumps(manifest, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    fd, tmp_name = tempfile.mkstemp(prefix=f".{MANIFEST_NAME}.", suffix=".tmp", dir=directory)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as handle:
            handle.write(text)
        os.replace(tmp_name, directory / MANIFEST_NAME)
    finally:
        if os.path.exists(tmp_name):
            os.unlink(tmp_name)
    return manifest


def read_manifest(directory: str | Path) -> dict[str, Any] | None:
    """The manifest of an output directory, or None when it has no ``manifest.json``.

    Raises
    ------
    OutputError
        ``manifest.json`` exists but is not a pmap manifest (not JSON, or no ``"files"``
        mapping of ``{"sha256": str, "bytes": int}`` records).
    """
    path = Path(directory) / MANIFEST_NAME
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except (OSError, UnicodeDecodeError) as exc:
        raise OutputError(f"{path}: cannot read the manifest ({exc}); check the file") from exc
    try:
        manifest = json.loads(text)
    except ValueError as exc:
        raise OutputError(f"{path}: not valid JSON ({exc}); it is not a pmap manifest") from exc
    files = manifest.get("files") if isinstance(manifest, dict) else None
    if not isinstance(files, dict) or not all(
        isinstance(rec, dict) and isinstance(rec.get("sha256"), str)
        and isinstance(rec.get("bytes"), int) for rec in files.values()
    ):
        raise OutputError(f"{path}: no \"files\" mapping of sha256/bytes records; "
                          "it is not a pmap manifest")
    return manifest
