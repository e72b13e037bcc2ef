"""What a batch holds and what it would do: discovery, config layering, hashes, decisions.

A batch is read from either

- a **folder** with one sub-folder per field, each holding a samples file (``samples.csv``,
  ``.txt``, ``.tsv``, ``.geojson``, ``.json``, ``.gpkg`` or ``.shp``), a boundary file
  (``boundary.geojson``, ``.json``, ``.gpkg`` or ``.shp``) and optionally ``field.toml``;
  the field is named by its folder; or
- a **table**, CSV or TOML, with one row (``[[fields]]`` entry) per field: ``name``,
  ``samples``, ``boundary``, optional ``config`` (the field's own TOML) and ``split_by``,
  and per-field overrides as ``section.key`` columns (TOML: ``section.key = value`` or a
  ``[fields.section]`` table).  Relative paths are resolved against the table's folder.

``batch.toml`` at the top of the folder (or beside the table) holds defaults for every
field, plus a ``[batch]`` section (``split_by``).  Each field's configuration is layered
key by key (``section.key``), lowest first: ``batch.toml``; ``field.name`` = the field's
batch name; the field's own TOML (``field.toml`` / the ``config`` column); the table's
override columns; the command line (``--maps``).  A boundary file holding several fields
is expanded, with ``split_by = "<attribute>"``, into one field per feature named by that
attribute (the feature's name then also wins over the field's own ``field.name``).

For every field the plan decides what a run would do by comparing its previous output's
``manifest.json`` with the SHA-256 of the current inputs, the resolved configuration and
the pmap version: ``new``, ``changed`` (saying what changed), ``done`` (skipped) or
``invalid`` (the field cannot run; the reason is recorded as its error).  Planning reads
and hashes only; it writes nothing into the output directory (:func:`stage_inputs` writes
the generated configs and split boundaries before a real run).
"""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import json
import logging
import math
import os
import shutil
import sys
import tempfile
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, time
from pathlib import Path
from typing import Any

from pmap._version import __version__
from pmap.config import read_toml
from pmap.errors import ConfigError, InputError, PmapError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = [
    "BATCH_TOML",
    "FIELD_TOML",
    "STATE_DIR",
    "SUMMARY_FILES",
    "ACTIONS",
    "FieldEntry",
    "PlannedField",
    "BatchPlan",
    "discover_fields",
    "plan_batch",
    "stage_inputs",
    "safe_name",
    "toml_text",
]

log = logging.getLogger(__name__)

#: Defaults for every field of a batch: at the top of the folder or beside the table.
BATCH_TOML = "batch.toml"
#: A field folder's own configuration.
FIELD_TOML = "field.toml"
#: The batch's own state under the output directory: generated configs, split boundaries,
#: logs.  Hidden, so it never collides with a field's output folder.
STATE_DIR = ".batch"
#: Files the batch writes at the top of the output directory.
SUMMARY_FILES = ("batch_summary.csv", "batch_summary.gpkg", "index.html")
#: What the plan can decide for a field.
ACTIONS = ("new", "changed", "done", "invalid")

_SAMPLES_SUFFIXES = (".csv", ".txt", ".tsv", ".geojson", ".json", ".gpkg", ".shp")
_BOUNDARY_SUFFIXES = (".geojson", ".json", ".gpkg", ".shp")
_TABLE_KEYS = ("name", "samples", "boundary", "config", "split_by")
_BATCH_KEYS = ("split_by",)
_INPUT_KINDS = ("samples", "boundary", "config")


# ---------------------------------------------------------------------------------------
# Records


@dataclass(frozen=True)
class FieldEntry:
    """One field (or one boundary file to split) as discovered, before its config is resolved.

    Attributes
    ----------
    name : str
        The batch name: the folder name or the table's ``name`` ("" for a table row that is
        split into features).
    origin : str
        Where the entry came from, for messages ("folder North", "fields.csv row 3").
    samples, boundary : Path or None
        The input files (None when not found; ``problem`` then says why).
    config_files : tuple of Path
        The field's own TOML (``field.toml`` or the table's ``config``), if any.
    overrides : dict
        Per-field overrides from the table, ``{section: {key: value}}``.
    split_by : str
        Attribute naming the features of a boundary file to expand into fields ("" = none).
    problem : str or None
        Why the entry cannot run, found during discovery.
    table : str
        The table's file name, for a table's entry ("" for a folder).
    """

    name: str
    origin: str
    samples: Path | None
    boundary: Path | None
    config_files: tuple[Path, ...] = ()
    overrides: dict[str, dict[str, Any]] = field(default_factory=dict, hash=False)
    split_by: str = ""
    problem: str | None = None
    table: str = ""


@dataclass
class PlannedField:
    """One field of the batch and what a run would do with it.

    ``task()`` is the plain dict handed to :func:`pmap.batch.runner.run_task`.
    """

    name: str
    slug: str
    origin: str
    action: str
    reasons: tuple[str, ...]
    out_dir: Path
    log_path: Path
    samples: Path | None = None
    boundary: Path | None = None
    config_path: Path | None = None
    config_text: str | None = None
    config: Any = None  # the resolved FieldConfig
    error_type: str | None = None
    error: str | None = None
    #: For a field split from a boundary file: ``(staged file, digest)`` to install at
    #: ``boundary`` before the run, or None when the cached copy is current.
    boundary_install: tuple[Path, str] | None = None
    split_from: Path | None = None

    @property
    def runs(self) -> bool:
        """True when a real batch would run this field."""
        return self.action in ("new", "changed")

    def task(self) -> dict[str, Any]:
        """The field as a plain JSON-able task for :func:`pmap.batch.runner.run_task`."""
        return {
            "name": self.name,
            "slug": self.slug,
            "origin": self.origin,
            "action": self.action,
            "reasons": list(self.reasons),
            "samples": str(self.samples) if self.samples else None,
            "boundary": str(self.boundary) if self.boundary else None,
            "config": str(self.config_path) if self.config_path else None,
            "out_dir": str(self.out_dir),
            "log": str(self.log_path),
            "overwrite": self.action == "changed",
        }

    def describe(self) -> str:
        """One line for ``--dry-run``: name, action and why."""
        word = {"done": "done", "invalid": "error"}.get(self.action, self.action)
        why = "; ".join(self.reasons) if self.action != "invalid" else (
            f"{self.error_type}: {self.error}")
        suffix = " (skipped)" if self.action == "done" else ""
        return f"{self.name}: {word}{suffix}: {why}"


@dataclass
class BatchPlan:
    """Every field of a batch with its decision.

    Attributes
    ----------
    source : Path
        The folder or table the batch was read from.
    out_dir : Path
        The batch's output directory.
    fields : list of PlannedField
        In discovery order (folders sorted by name; tables in row order).
    defaults : tuple of Path
        The files the batch-wide defaults came from (``batch.toml``), lowest first.
    """

    source: Path
    out_dir: Path
    fields: list[PlannedField]
    defaults: tuple[Path, ...] = ()
    _staging: Any = dataclasses.field(default=None, repr=False)

    def counts(self) -> dict[str, int]:
        """Number of fields per action (every action of :data:`ACTIONS` present)."""
        out = {a: 0 for a in ACTIONS}
        for f in self.fields:
            out[f.action] += 1
        return out

    def describe(self) -> list[str]:
        """The dry-run listing: one line per field, then a tally."""
        lines = [f.describe() for f in self.fields]
        c = self.counts()
        lines.append(f"{len(self.fields)} field(s): {c['new']} new, {c['changed']} changed, "
                     f"{c['done']} done (would be skipped), {c['invalid']} with errors")
        return lines

    def close(self) -> None:
        """Remove the temporary folder of split boundaries and config checks."""
        if self._staging is not None:
            self._staging.cleanup()
            self._staging = None


# ---------------------------------------------------------------------------------------
# Small helpers


def safe_name(name: str) -> str:
    """The file-system-safe folder name of a field (:func:`pmap.io.boundary.feature_slugs`)."""
    from pmap.io.boundary import feature_slugs

    return feature_slugs([name])[0]


def _sha256(path: Path) -> str:
    from pmap.io.manifest import sha256_file

    return sha256_file(path)


def _input_hashes(path: Path) -> dict[str, str]:
    """``{file name: sha256}`` of an input as the run copies it (a Shapefile with sidecars)."""
    from pmap.io.vectors import shapefile_parts

    parts = shapefile_parts(path) if path.suffix.lower() == ".shp" else [path]
    return {p.name: _sha256(p) for p in parts}


def _config_sections() -> tuple[str, ...]:
    from pmap.config import FieldConfig

    return tuple(f.name for f in dataclasses.fields(FieldConfig))


def _pop_batch_section(data: dict[str, Any], source: str) -> dict[str, Any]:
    """Remove and check the ``[batch]`` section of a TOML (batch.toml or a field's TOML)."""
    section = data.pop("batch", {})
    if not isinstance(section, dict):
        raise ConfigError(f"{source}: [batch] must be a table of keys, got {section!r}")
    unknown = sorted(set(section) - set(_BATCH_KEYS))
    if unknown:
        raise ConfigError(f"{source}: unknown key batch.{unknown[0]}; [batch] knows only "
                          f"{', '.join(_BATCH_KEYS)}")
    split_by = section.get("split_by", None)
    if split_by is not None and not isinstance(split_by, str):
        raise ConfigError(f"{source}: batch.split_by must be a string (an attribute name), got "
                          f"{split_by!r}")
    return section


def _absolutise(data: dict[str, Any], base: Path) -> dict[str, Any]:
    """``data`` with its path-valued keys made absolute against ``base`` (the file's folder).

    ``calibration.file`` and the values of ``kriging.covariates`` name files; in a layered
    configuration they are read relative to the TOML (or table) that sets them.
    """
    out = {k: dict(v) if isinstance(v, dict) else v for k, v in data.items()}

    def fix(value: Any) -> Any:
        if isinstance(value, str) and value and not os.path.isabs(value):
            return os.path.normpath(os.path.join(base, value))
        return value

    if isinstance(out.get("calibration"), dict) and "file" in out["calibration"]:
        out["calibration"]["file"] = fix(out["calibration"]["file"])
    kriging = out.get("kriging")
    if isinstance(kriging, dict) and isinstance(kriging.get("covariates"), dict):
        kriging["covariates"] = {k: fix(v) for k, v in kriging["covariates"].items()}
    return out


def _layer(layers: Iterable[Mapping[str, Any]]) -> dict[str, dict[str, Any]]:
    """Merge configuration layers key by key (``section.key``); later layers win."""
    merged: dict[str, dict[str, Any]] = {}
    for data in layers:
        for section, values in data.items():
            if not isinstance(values, dict):
                merged[section] = values  # config_from_dict names the error
                continue
            target = merged.setdefault(section, {})
            if not isinstance(target, dict):
                merged[section] = target = {}
            target.update(values)
    return merged


# ---------------------------------------------------------------------------------------
# TOML writing (the generated, layered configuration of each field)


def _toml_string(text: str) -> str:
    out = ['"']
    for ch in text:
        code = ord(ch)
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ch == "\r":
            out.append("\\r")
        elif code < 0x20 or code == 0x7F:
            out.append(f"\\u{code:04x}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def _toml_key(key: str) -> str:
    bare = key and all(c.isascii() and (c.isalnum() or c in "-_") for c in key)
    return key if bare else _toml_string(key)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, (datetime, date, time)):
        return value.isoformat()
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(str(k))} = {_toml_value(v)}"
                               for k, v in value.items()) + "}"
    raise ConfigError(f"cannot write {value!r} ({type(value).__name__}) to TOML")


def toml_text(data: Mapping[str, Mapping[str, Any]], header: Sequence[str] = ()) -> str:
    """``{section: {key: value}}`` as TOML text, sections and keys in the order given.

    Raises ``ConfigError`` for a value TOML cannot hold; the text is checked to read back
    to ``data``.
    """
    lines = [f"# {h}" for h in header]
    for section, values in data.items():
        if not isinstance(values, Mapping):
            raise ConfigError(f"[{section}] must be a table of keys, got {values!r}")
        lines += ["", f"[{_toml_key(section)}]"]
        lines += [f"{_toml_key(str(k))} = {_toml_value(v)}" for k, v in values.items()]
    text = "\n".join(lines).lstrip("\n") + "\n"
    back = tomllib.loads(text)
    if _plain(back) != _plain({s: dict(v) for s, v in data.items()}):
        raise ConfigError("the layered configuration does not survive writing as TOML; "
                          "please report this")
    return text


def _ordered(merged: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """Sections in FieldConfig order and keys sorted, so equal layers give equal text."""
    order = {name: i for i, name in enumerate(_config_sections())}
    return {s: (dict(sorted(v.items())) if isinstance(v, dict) else v)
            for s, v in sorted(merged.items(), key=lambda kv: (order.get(kv[0], 99), kv[0]))}


def _plain(obj: Any) -> Any:
    """JSON-comparable form: tuples as lists, non-finite floats as None (as the manifest)."""
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, (datetime, date, time)):
        return obj.isoformat()
    return obj


# ---------------------------------------------------------------------------------------
# Discovery


def _one_file(folder: Path, stem: str, suffixes: Sequence[str]) -> tuple[Path | None, str | None]:
    found = sorted(p for p in folder.iterdir()
                   if p.is_file() and p.stem.lower() == stem and p.suffix.lower() in suffixes)
    if not found:
        return None, (f"no {stem} file in {folder} (looked for {stem}"
                      f"{'/'.join(suffixes)})")
    if len(found) > 1:
        return None, (f"several {stem} files in {folder}: "
                      f"{', '.join(p.name for p in found)}; keep one")
    return found[0], None


def _looks_like_field(folder: Path) -> bool:
    names = {p.name.lower() for p in folder.iterdir() if p.is_file()}
    stems = {Path(n).stem for n in names}
    return "samples" in stems or "boundary" in stems or FIELD_TOML in names


def _discover_folder(root: Path, out_dir: Path) -> list[FieldEntry]:
    entries = []
    skip = {out_dir.resolve()}
    for sub in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        if sub.resolve() in skip:
            continue
        if not _looks_like_field(sub):
            log.info("%s: no samples, boundary or field.toml file; not a field folder", sub)
            continue
        samples, p1 = _one_file(sub, "samples", _SAMPLES_SUFFIXES)
        boundary, p2 = _one_file(sub, "boundary", _BOUNDARY_SUFFIXES)
        toml = sub / FIELD_TOML
        entries.append(FieldEntry(
            name=sub.name, origin=f"folder {sub.name}", samples=samples, boundary=boundary,
            config_files=(toml,) if toml.is_file() else (), problem=p1 or p2))
    if not entries:
        raise InputError(f"{root}: no field folders found (a field folder holds samples.* and "
                         "boundary.*, optionally field.toml); or pass a CSV/TOML table of fields")
    return entries


def _cell_value(text: str) -> Any:
    """A table cell as a value: a TOML literal (number, true/false, list) or else the text."""
    try:
        value = tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text
    return text if isinstance(value, (datetime, date, time)) else value


def _table_entry(values: Mapping[str, Any], overrides: dict[str, dict[str, Any]],
                 table: Path, origin: str) -> FieldEntry:
    def path(key: str) -> Path | None:
        raw = values.get(key)
        if raw in (None, ""):
            return None
        if not isinstance(raw, str):
            raise ConfigError(f"{origin}: {key} must be a path, got {raw!r}")
        return Path(os.path.normpath(base / raw))

    base = table.parent
    name = str(values.get("name") or "").strip()
    split_by = str(values.get("split_by") or "").strip()
    samples, boundary, config = path("samples"), path("boundary"), path("config")
    problem = None
    if not name and not split_by:
        raise ConfigError(f"{origin}: no name; every field needs one (or a split_by attribute "
                          "naming the features of its boundary file)")
    if name and split_by:
        raise ConfigError(f"{origin}: give either name or split_by: a split boundary file's "
                          f"fields are named by their {split_by!r} attribute")
    for key, p in (("samples", samples), ("boundary", boundary)):
        if p is None:
            problem = problem or f"{origin}: no {key} file given"
        elif not p.is_file():
            problem = problem or f"{key} file not found: {p}"
    if config is not None and not config.is_file():
        problem = problem or f"config file not found: {config}"
    return FieldEntry(name=name, origin=origin, samples=samples, boundary=boundary,
                      config_files=(config,) if config is not None else (),
                      overrides={s: _absolutise({s: v}, base)[s] for s, v in overrides.items()},
                      split_by=split_by, problem=problem, table=table.name)


def _discover_csv(table: Path) -> list[FieldEntry]:
    try:
        text = table.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{table}: cannot read the table of fields ({exc})") from exc
    reader = csv.DictReader(text.splitlines())
    columns = [c.strip() for c in (reader.fieldnames or [])]
    sections = _config_sections()
    for col in columns:
        if col in _TABLE_KEYS:
            continue
        section, dot, key = col.partition(".")
        if not dot or not key or section not in sections:
            raise ConfigError(
                f"{table}: unknown column {col!r}: the columns are {', '.join(_TABLE_KEYS)} and "
                "per-field overrides named section.key (e.g. grid.cell_size_m)")
    for need in ("samples", "boundary"):
        if need not in columns:
            raise ConfigError(f"{table}: no {need!r} column (columns: {', '.join(columns)})")
    entries = []
    for i, row in enumerate(reader, start=2):
        cells = {(k or "").strip(): (v or "").strip() for k, v in row.items() if k is not None}
        if not any(cells.values()):
            continue
        overrides: dict[str, dict[str, Any]] = {}
        for col, cell in cells.items():
            if col in _TABLE_KEYS or not cell:
                continue
            section, _, key = col.partition(".")
            overrides.setdefault(section, {})[key] = _cell_value(cell)
        entries.append(_table_entry(cells, overrides, table, f"{table.name} row {i}"))
    return entries


def _discover_toml(table: Path, data: dict[str, Any]) -> list[FieldEntry]:
    rows = data.get("fields")
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise ConfigError(f"{table}: no [[fields]] entries (one per field, with name, samples, "
                          "boundary)")
    sections = _config_sections()
    entries = []
    for i, row in enumerate(rows, start=1):
        origin = f"{table.name} [[fields]] #{i}"
        overrides = {}
        for key, value in row.items():
            if key in _TABLE_KEYS:
                continue
            if key in sections and isinstance(value, dict):
                overrides[key] = value
                continue
            raise ConfigError(f"{origin}: unknown key {key!r}: an entry holds "
                              f"{', '.join(_TABLE_KEYS)} and per-field [section] overrides")
        entries.append(_table_entry(row, overrides, table, origin))
    return entries


def discover_fields(source: str | Path, out_dir: str | Path
                    ) -> tuple[list[FieldEntry], dict[str, Any], tuple[Path, ...]]:
    """The entries of a batch folder or table, its defaults and the defaults' file.

    Returns
    -------
    entries : list of FieldEntry
    defaults : dict
        The batch-wide layer (``batch.toml`` and a TOML table's own sections), with the
        ``[batch]`` section under the key ``"batch"``.
    defaults_paths : tuple of Path
        The files the defaults came from, lowest first.

    Raises
    ------
    InputError
        ``source`` does not exist, is no folder, CSV or TOML, or holds no field.
    ConfigError
        ``batch.toml`` or the table is malformed.
    """
    source = Path(source)
    out_dir = Path(out_dir)
    if not source.exists():
        raise InputError(f"batch source not found: {source} (a folder of field folders, or a "
                         "CSV/TOML table of fields)")
    base = source if source.is_dir() else source.parent
    table_data = (read_toml(source) if source.is_file() and source.suffix.lower() == ".toml"
                  else None)
    beside = base / BATCH_TOML
    layers, names = [], []
    if beside.is_file() and beside.resolve() != source.resolve():
        layers.append(read_toml(beside))
        names.append(beside)
    if table_data is not None:
        own = {k: v for k, v in table_data.items() if k != "fields"}
        if own:  # a TOML table may hold defaults itself, above batch.toml's
            layers.append(own)
            names.append(source)
    defaults = _layer(layers)
    batch_section = _pop_batch_section(defaults, " + ".join(str(n) for n in names) or str(source))
    defaults = _absolutise(defaults, base)
    if source.is_dir():
        entries = _discover_folder(source, out_dir)
    elif source.suffix.lower() == ".csv":
        entries = _discover_csv(source)
    elif table_data is not None:
        entries = _discover_toml(source, table_data)
    else:
        raise InputError(f"{source}: a batch is a folder of field folders or a table of fields "
                         f"(.csv or .toml), not {source.suffix or 'a file without suffix'}")
    return entries, {**defaults, "batch": batch_section}, tuple(names)


# ---------------------------------------------------------------------------------------
# Planning


class _PlanError(Exception):
    """A field that cannot run: carries the error type name and message."""

    def __init__(self, exc: BaseException | str, kind: str | None = None):
        message = " ".join(str(exc).split())
        super().__init__(message)
        self.kind = kind or (type(exc).__name__ if isinstance(exc, BaseException) else "InputError")


def _relative(path: Path, base: Path) -> str:
    try:
        return path.resolve().relative_to(base.resolve()).as_posix()
    except ValueError:
        return path.as_posix()


def _resolve_config(merged: dict[str, dict[str, Any]], name: str, layers: Sequence[str],
                    scratch: Path, slug: str) -> tuple[str, Any]:
    """The generated TOML text of a field and its FieldConfig (read by pmap.load_config)."""
    from pmap.config import load_config

    header = [f"pmap batch: the configuration of field {name!r}, layered key by key from "
              "(lowest first):", *[f"  {layer}" for layer in layers],
              "Generated: edit those files, not this one."]
    text = toml_text(_ordered(merged), header)
    path = scratch / f"{slug}.toml"
    path.write_text(text, encoding="utf-8")
    try:
        config = load_config(path)
    except ConfigError as exc:
        where = f"the configuration of field {name!r} (layered from {', '.join(layers)})"
        raise ConfigError(str(exc).replace(str(path), where)) from None
    return text, config


def _config_diff(old: Mapping[str, Any], new: Mapping[str, Any]) -> list[str]:
    changed = []
    for section in sorted(set(old) | set(new)):
        a, b = old.get(section), new.get(section)
        if isinstance(a, dict) and isinstance(b, dict):
            for key in sorted(set(a) | set(b)):
                if a.get(key) != b.get(key):
                    changed.append(f"{section}.{key} ({a.get(key)!r} -> {b.get(key)!r})")
        elif a != b:
            changed.append(f"[{section}]")
    return changed


def _decide(out_dir: Path, config: Any, hashes: Mapping[str, Mapping[str, str]]
            ) -> tuple[str, tuple[str, ...]]:
    """``new``, ``changed`` or ``done`` for one field, with the reasons."""
    from pmap.io.manifest import read_manifest
    from pmap.io.publish import verify_output

    if not out_dir.exists() or (out_dir.is_dir() and not any(out_dir.iterdir())):
        return "new", ("no previous output",)
    if not out_dir.is_dir():
        return "changed", (f"{out_dir} is a file, not an output folder; pmap will not "
                           "replace it: move it away",)
    try:
        manifest = read_manifest(out_dir)
    except PmapError as exc:
        manifest = None
        log.debug("%s", exc)
    if manifest is None:
        return "changed", (f"{out_dir} exists without a pmap manifest.json; pmap will not "
                           "replace it: move it away or remove it",)
    check = verify_output(out_dir)
    missing = [rel for rel in manifest["files"] if not (out_dir / rel).is_file()]
    if not check.replaceable:
        shown = (check.changed + check.unknown)[:5]
        return "changed", ("the previous output was modified since pmap wrote it ("
                           f"{', '.join(shown)}); pmap will not replace it: move it away",)
    reasons = []
    if missing:
        reasons.append(f"the previous output is incomplete ({', '.join(missing[:5])} missing)")
    if manifest.get("pmap_version") != __version__:
        reasons.append(f"pmap version {manifest.get('pmap_version')} -> {__version__}")
    diff = _config_diff(manifest.get("config") or {}, _plain(config.as_dict()))
    if diff:
        reasons.append("configuration changed: " + ", ".join(diff[:6])
                       + (f" and {len(diff) - 6} more" if len(diff) > 6 else ""))
    recorded = manifest.get("inputs") or {}
    for kind in _INPUT_KINDS:
        files = (recorded.get(kind) or {}).get("files") or []
        before = {Path(r.get("path", "")).name: r.get("sha256") for r in files}
        now = dict(hashes.get(kind, {}))
        if before != now:
            names = sorted({n for n in set(before) | set(now) if before.get(n) != now.get(n)})
            reasons.append(f"{kind} changed ({', '.join(names)})")
    if reasons:
        return "changed", tuple(reasons)
    return "done", ("the previous output matches the current inputs, configuration and "
                    "pmap version",)


def _feature_digest(feature: Any) -> str:
    import shapely

    blob = json.dumps({"crs": feature.crs, "wkb": shapely.to_wkb(feature.geometry, hex=True),
                       "attributes": feature.attributes}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()


def _split(entry: FieldEntry, crs: str | None, scratch: Path, cache: Path
           ) -> list[tuple[str, Path, tuple[Path, str] | None]]:
    """Expand a boundary file into ``(feature name, boundary path, install)`` per feature.

    The path is the cached per-feature file under ``cache``; ``install`` is ``(staged file,
    digest)`` when the cache does not hold the current feature yet (None when it does).
    """
    from pmap.io.boundary import boundary_features, split_boundary

    assert entry.boundary is not None
    features = boundary_features(entry.boundary, crs, name_attribute=entry.split_by)
    if not features:
        raise InputError(f"{entry.boundary}: no polygon feature to split by {entry.split_by!r}")
    names = [f.name for f in features]
    twice = sorted({n for n in names if names.count(n) > 1})
    if twice:
        raise InputError(f"{entry.boundary}: several features have {entry.split_by} = "
                         f"{twice[0]!r}; the attribute must name each field once")
    staged_dir = Path(tempfile.mkdtemp(prefix="split-", dir=scratch))
    staged = split_boundary(entry.boundary, staged_dir, crs, name_attribute=entry.split_by)
    out = []
    for feature, path in staged:
        slug = safe_name(feature.name)
        target = cache / f"{slug}{path.suffix}"
        digest = _feature_digest(feature)
        sidecar = cache / f"{slug}.json"
        try:
            current = json.loads(sidecar.read_text(encoding="utf-8")).get("digest")
        except (OSError, ValueError, AttributeError):
            current = None
        fresh = current == digest and target.is_file()
        out.append((feature.name, target, None if fresh else (path, digest)))
    return out


def plan_batch(source: str | Path, out_dir: str | Path, *, maps: str | None = None) -> BatchPlan:
    """Discover the fields of a batch and decide, per field, what a run would do.

    Parameters
    ----------
    source : path
        A folder of field folders, or a CSV/TOML table of fields (see the module docs).
    out_dir : path
        The batch's output directory; each field writes ``out_dir/<safe name>/``.
    maps : {"all", "overview", "none"}, optional
        Sets ``output.maps`` of every field, above every file.

    Returns
    -------
    BatchPlan
        Call :meth:`BatchPlan.close` when done (the CLI and :func:`run_batch` do).

    Raises
    ------
    InputError, ConfigError
        Problems of the batch as a whole (source missing, ``batch.toml`` or the table
        malformed, two fields with the same output folder).  A problem of one field makes
        that field ``invalid`` instead.
    """
    if maps is not None and maps not in ("all", "overview", "none"):
        raise ConfigError(f"maps must be \"all\", \"overview\" or \"none\", got {maps!r}")
    source = Path(source)
    out_dir = Path(out_dir)
    entries, defaults, defaults_paths = discover_fields(source, out_dir)
    base = source if source.is_dir() else source.parent
    batch_split = defaults.pop("batch", {}).get("split_by") or ""
    state = out_dir / STATE_DIR
    staging = tempfile.TemporaryDirectory(prefix="pmap-batch-plan-")
    scratch = Path(staging.name)
    plan = BatchPlan(source=source, out_dir=out_dir, fields=[], defaults=defaults_paths,
                     _staging=staging)
    default_layer = [_relative(p, base) for p in defaults_paths]
    top = {"output": {"maps": maps}} if maps else {}
    try:
        for entry in entries:
            plan.fields.extend(_plan_entry(entry, defaults, default_layer, batch_split, top,
                                           base, out_dir, state, scratch))
        _check_names(plan.fields)
    except BaseException:
        plan.close()
        raise
    return plan


def _plan_entry(entry: FieldEntry, defaults: dict[str, Any], default_layer: list[str],
                batch_split: str, top: dict[str, Any], base: Path, out_dir: Path, state: Path,
                scratch: Path) -> list[PlannedField]:
    """The planned field(s) of one entry (several when its boundary file is split)."""
    label = entry.name or (entry.boundary.stem if entry.boundary else entry.origin)

    def invalid(name: str, exc: BaseException | str, kind: str | None = None) -> PlannedField:
        err = _PlanError(exc, kind)
        slug = safe_name(name)
        return PlannedField(name=name, slug=slug, origin=entry.origin, action="invalid",
                            reasons=(), out_dir=out_dir / slug,
                            log_path=state / "logs" / f"{slug}.log", samples=entry.samples,
                            boundary=entry.boundary, error_type=err.kind, error=str(err))

    try:
        own: list[dict[str, Any]] = []
        own_names: list[str] = []
        split_by = entry.split_by
        for path in entry.config_files:
            if not path.is_file():
                raise InputError(f"config file not found: {path}")
            data = read_toml(path)
            section = _pop_batch_section(data, str(path))
            split_by = split_by or section.get("split_by") or ""
            own.append(_absolutise(data, path.parent))
            own_names.append(_relative(path, base))
        split_by = split_by or batch_split
        if entry.problem:
            return [invalid(label, entry.problem, "InputError")]
        # no row numbers here: the text is hashed, and reordering a table changes nothing
        over_names = [f"the field's overrides in {entry.table}"] if entry.overrides else []
        top_names = ["--maps"] if top else []
        if not split_by:
            layers = [defaults, {"field": {"name": entry.name}}, *own, entry.overrides, top]
            names = default_layer + ["the field's batch name"] + own_names + over_names + top_names
            return [_plan_one(entry.name, entry, _layer(layers), names, entry.boundary, None,
                              out_dir, state, scratch)]
        entry = dataclasses.replace(entry, split_by=split_by)
        base_layers = _layer([defaults, *own, entry.overrides, top])
        crs = (base_layers.get("grid") or {}).get("crs")
        cache = state / "boundaries"
        planned = []
        for name, boundary, install in _split(entry, crs, scratch, cache):
            merged = _layer([base_layers, {"field": {"name": name}}])
            names = (default_layer + own_names + over_names + top_names
                     + [f"field.name = feature {entry.split_by} of {entry.boundary.name}"])
            planned.append(_plan_one(name, entry, merged, names, boundary, install, out_dir,
                                     state, scratch))
        return planned
    except Exception as exc:  # noqa: BLE001 - one field's problem must not stop the batch
        return [invalid(label, exc)]


def _plan_one(name: str, entry: FieldEntry, merged: dict[str, Any], layers: list[str],
              boundary: Path | None, install: tuple[Path, str] | None, out_dir: Path,
              state: Path, scratch: Path) -> PlannedField:
    slug = safe_name(name)
    field_out = out_dir / slug
    planned = PlannedField(name=name, slug=slug, origin=entry.origin, action="invalid",
                           reasons=(), out_dir=field_out, log_path=state / "logs" / f"{slug}.log",
                           samples=entry.samples, boundary=boundary,
                           config_path=state / "configs" / f"{slug}.toml",
                           boundary_install=install,
                           split_from=entry.boundary if entry.split_by else None)
    try:
        text, config = _resolve_config(merged, name, layers, scratch, slug)
        planned.config_text, planned.config = text, config
        assert entry.samples is not None and boundary is not None
        hashes = {"samples": _input_hashes(entry.samples),
                  "boundary": (_input_hashes(install[0]) if install is not None
                               else _input_hashes(boundary)),
                  "config": {planned.config_path.name: hashlib.sha256(
                      text.encode("utf-8")).hexdigest()}}
        if install is not None:  # the staged file is installed under the cache's name
            hashes["boundary"] = {boundary.name: next(iter(hashes["boundary"].values()))}
        planned.action, planned.reasons = _decide(field_out, config, hashes)
    except Exception as exc:  # noqa: BLE001 - one field's problem must not stop the batch
        err = _PlanError(exc)
        planned.action, planned.error_type, planned.error = "invalid", err.kind, str(err)
    return planned


def _check_names(fields: Sequence[PlannedField]) -> None:
    """Two fields may not share an output folder, nor take a summary file's name."""
    seen: dict[str, PlannedField] = {}
    reserved = {name.casefold() for name in SUMMARY_FILES}
    for f in fields:
        key = f.slug.casefold()
        if key in reserved:
            raise ConfigError(f"{f.origin}: field {f.name!r} would write {f.slug}/, which is the "
                              "name of a batch summary file; rename the field")
        if key in seen:
            other = seen[key]
            raise ConfigError(
                f"fields {other.name!r} ({other.origin}) and {f.name!r} ({f.origin}) would both "
                f"write {f.out_dir}; give them distinct names")
        seen[key] = f


def _write_atomic(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # as a plain open() would create it, not mkstemp's 0600
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def stage_inputs(field: PlannedField) -> None:
    """Write what a field's run reads from the batch's state folder.

    The generated configuration goes to ``<out>/.batch/configs/<name>.toml`` and a split
    feature to ``<out>/.batch/boundaries/<name>.<ext>`` (with a ``.json`` digest beside it),
    each atomically and only when its content changed.
    """
    assert field.config_path is not None and field.config_text is not None
    data = field.config_text.encode("utf-8")
    if not field.config_path.is_file() or field.config_path.read_bytes() != data:
        _write_atomic(field.config_path, data)
    if field.boundary_install is not None and field.boundary is not None:
        staged, digest = field.boundary_install
        tmp = field.boundary.with_name(f".{field.boundary.stem}.installing{field.boundary.suffix}")
        tmp.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(staged, tmp)
        os.replace(tmp, field.boundary)
        _write_atomic(field.boundary.with_suffix(".json"),
                      (json.dumps({"digest": digest}) + "\n").encode("utf-8"))
        field.boundary_install = None
