"""The per-field configuration: one frozen dataclass per TOML section.

Each section's dataclass lives beside the numerics it steers (``[kriging]`` in
:mod:`pmap.geostats.interpolate`, ``[rates]`` in :mod:`pmap.prescribe.rates`, ...); this
module only gathers them, reads TOML into them and documents them.  Every field carries
``metadata`` with its unit, meaning and source, from which
:func:`configuration_reference` writes ``docs/configuration.md``.
"""

from __future__ import annotations

import dataclasses
import difflib
import sys
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pmap._checks import check_number, check_whole
from pmap.errors import ConfigError, InputError
from pmap.geostats.interpolate import KrigingSettings
from pmap.io.crs import normalise_crs
from pmap.io.samples import SampleColumns
from pmap.prescribe.clustering import ClusterParams
from pmap.prescribe.rates import RateRule
from pmap.prescribe.zones import ZoneParams
from pmap.soil.availability import PartitionParams
from pmap.soil.calibration import CalibrationSettings
from pmap.soil.conversions import SoilTestEquivalent
from pmap.soil.environment import PsrParams
from pmap.soil.fixation import FixationParams
from pmap.soil.lime import LimeParams

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = ["FieldInfo", "GridSettings", "OutputSettings", "FieldConfig", "load_config", "read_toml",
           "configuration_reference"]


_RECORD = "common practice, no source"


@dataclass(frozen=True)
class FieldInfo:
    """Names and dates shown on maps and in the summary."""

    name: str = field(default="field", metadata={
        "unit": "", "doc": "field name used in titles and the summary", "source": _RECORD})
    farm: str = field(default="", metadata={
        "unit": "", "doc": "farm or client name", "source": _RECORD})
    sampling_date: str = field(default="", metadata={
        "unit": "YYYY-MM-DD", "doc": "date the samples were taken", "source": _RECORD})
    sampling_depth_cm: str = field(default="0-15", metadata={
        "unit": "cm", "doc": "sampling depth interval, for the record", "source": _RECORD})
    boundary_feature: str = field(default="", metadata={
        "unit": "", "doc": "the one feature of a boundary file holding several fields to use: "
        "its name (see field.name_attribute), ATTR=VALUE, or '#N' for the N-th feature; empty = all "
        "features, merged, with a warning (the CLI's --field)", "source": _RECORD})
    name_attribute: str = field(default="", metadata={
        "unit": "", "doc": "attribute naming the boundary features; empty = the first of "
        "field, field_name, fieldname, name, id (any case)", "source": _RECORD})


@dataclass(frozen=True)
class GridSettings:
    """The output grid and the run's coordinate reference system."""

    cell_size_m: float = field(
        default=5.0,
        metadata={"unit": "m", "doc": "edge length of an output cell, 1-100 m: sample "
                  "positions (GPS) are good to a few metres and samples lie tens of metres "
                  "apart, so cells under 1 m add memory but no detail; cells over 100 m leave "
                  "a field a handful of cells", "source": "common practice, no source"},
    )
    crs: str | None = field(
        default=None,
        metadata={
            "unit": "",
            "doc": "CRS of x/y sample columns (and of a boundary file without one), e.g. "
            "EPSG:32616; a geographic CRS (EPSG:4326) reads x/y as longitude/latitude. It is "
            "also the run's CRS if projected in metres and within grid.max_scale_error over "
            "the field, else the run uses the field's UTM zone (with a note). Unset: samples "
            "must be lat/lon or carry a CRS, and the run uses the field's UTM zone",
            "source": "common practice, no source",
        },
    )
    sample_buffer_m: float = field(
        default=10.0,
        metadata={"unit": "m", "doc": "samples up to this far outside the boundary are kept "
                  "(GPS error)", "source": "common practice, no source"},
    )
    max_cells: int = field(
        default=10_000_000,
        metadata={"unit": "cells", "doc": "largest grid (columns x rows over the field's "
                  "extent) a run may build; checked before the grid is allocated. pmap budgets "
                  "512 bytes per cell plus 336 MiB and the kriging blocks (measured on the demo), so the "
                  "default is about 5 GiB: a 1,000 ha extent at 1 m cells. Raise it on a machine with "
                  "more memory", "source": "common practice, no source"},
    )
    max_scale_error: float = field(
        default=0.005,
        metadata={"unit": "fraction", "doc": "largest departure from 1 of the linear scale "
                  "(meridional, parallel, and square root of areal) of grid.crs over the "
                  "field for it to be the run's CRS; otherwise grid.crs only says how to read "
                  "coordinates and the run works in the field's UTM zone. UTM's scale is "
                  "0.9996 on the central meridian and about 1.001 at a zone's edge; Web "
                  "Mercator's is 1.31 at 40 degrees latitude. At most 0.005: a larger "
                  "distortion misstates areas by more than the 1 % area check allows",
                  "source": "Snyder 1987, Map Projections - A Working Manual, USGS PP 1395"},
    )

    def __post_init__(self) -> None:
        check_number("grid.cell_size_m", self.cell_size_m, ge=1, le=100)
        check_whole("grid.max_cells", self.max_cells, ge=1)
        check_number("grid.max_scale_error", self.max_scale_error, ge=0.001, le=0.005)
        check_number("grid.sample_buffer_m", self.sample_buffer_m, ge=0, finite=True)
        if self.crs is not None:
            try:
                normalise_crs(self.crs)
            except InputError as exc:
                raise ConfigError(f"grid.crs: {exc}") from exc


@dataclass(frozen=True)
class OutputSettings:
    """What the prescription files are written as (the CLI's --vector-crs sets one key)."""

    vector_crs: str = field(
        default="working",
        metadata={"unit": "", "doc": "CRS of the GeoPackage and Shapefile "
                  "outputs: \"working\" (the run's projected CRS, as the GeoTIFFs) or a CRS such "
                  "as EPSG:4326 (longitude/latitude, which many in-cab displays expect). The "
                  "GeoJSON is always WGS 84 (RFC 7946)", "source": "RFC 7946 for GeoJSON; "
                  "common practice, no source"},
    )
    taskdata: bool = field(
        default=True,
        metadata={"unit": "", "doc": "write ISO 11783-10 task data (TASKDATA/TASKDATA.XML and "
                  "its grid file) for task controllers", "source": "ISO 11783-10"},
    )

    maps: str = field(
        default="all",
        metadata={"unit": "", "doc": "which review pictures to draw: \"all\" (every layer's "
                  "map, the variograms, the overview and diagnostics sheets and the HTML "
                  "report), \"overview\" (the overview sheet and the report only) or \"none\" "
                  "(no pictures and no report; GeoTIFFs, polygons and summary.json as always). "
                  "The CLI's --maps sets it", "source": "common practice, no source"},
    )
    paper: str = field(
        default="a4",
        metadata={"unit": "", "doc": "paper of the overview and diagnostics sheets: \"a4\" "
                  "(297 x 210 mm landscape) or \"letter\" (11 x 8.5 in landscape)",
                  "source": "ISO 216 (A4); ANSI/ASME Y14.1 (Letter)"},
    )

    def __post_init__(self) -> None:
        if self.maps not in ("all", "overview", "none"):
            raise ConfigError(f"output.maps must be \"all\", \"overview\" or \"none\", got "
                              f"{self.maps!r}")
        if self.paper not in ("a4", "letter"):
            raise ConfigError(f"output.paper must be \"a4\" or \"letter\", got {self.paper!r}")
        if self.vector_crs != "working":
            try:
                normalise_crs(self.vector_crs)
            except InputError as exc:
                raise ConfigError(f"output.vector_crs: {exc}") from exc


@dataclass(frozen=True)
class FieldConfig:
    """Everything that steers one field's run; each attribute is one TOML section."""

    field: FieldInfo = dataclasses.field(default_factory=FieldInfo)
    grid: GridSettings = dataclasses.field(default_factory=GridSettings)
    samples: SampleColumns = dataclasses.field(default_factory=SampleColumns)
    kriging: KrigingSettings = dataclasses.field(default_factory=KrigingSettings)
    soil: PartitionParams = dataclasses.field(default_factory=PartitionParams)
    fixation: FixationParams = dataclasses.field(default_factory=FixationParams)
    soil_test_equivalent: SoilTestEquivalent = dataclasses.field(default_factory=SoilTestEquivalent)
    calibration: CalibrationSettings = dataclasses.field(default_factory=CalibrationSettings)
    lime: LimeParams = dataclasses.field(default_factory=LimeParams)
    environment: PsrParams = dataclasses.field(default_factory=PsrParams)
    rates: RateRule = dataclasses.field(default_factory=RateRule)
    zones: ZoneParams = dataclasses.field(default_factory=ZoneParams)
    clusters: ClusterParams = dataclasses.field(default_factory=ClusterParams)
    output: OutputSettings = dataclasses.field(default_factory=OutputSettings)

    def replace(self, section: str, **changes: Any) -> FieldConfig:
        """A copy with some keys of one section changed (``cfg.replace("grid", crs="EPSG:32616")``)."""
        current = getattr(self, section)
        return dataclasses.replace(self, **{section: dataclasses.replace(current, **changes)})

    def as_dict(self) -> dict[str, dict[str, Any]]:
        """The whole configuration as plain JSON-able values."""
        return {f.name: _section_as_dict(getattr(self, f.name)) for f in dataclasses.fields(self)}


def _section_as_dict(obj: Any) -> dict[str, Any]:
    out = {}
    for f in dataclasses.fields(obj):
        value = getattr(obj, f.name)
        out[f.name] = list(value) if isinstance(value, tuple) else value
    return out


def load_config(path: str | Path | None = None) -> FieldConfig:
    """Read a field configuration from a TOML file; ``None`` gives the defaults.

    The file is UTF-8 (TOML's encoding); a UTF-8 byte-order mark, as some editors write, is
    skipped, and a file with a UTF-16 byte-order mark ("Unicode" in some editors) is
    decoded as UTF-16.

    Raises
    ------
    ConfigError
        The file is missing, unreadable, not UTF-8/UTF-16 text or not TOML, a section or key
        is unknown, or a value has the wrong type or is out of range.  The message names the
        file and the key.
    """
    if path is None:
        return FieldConfig()
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"config file not found: {path}")
    data = read_toml(path)
    return config_from_dict(_with_calibration_file(data, path), source=str(path))


def read_toml(path: str | Path) -> dict[str, Any]:
    """A TOML file as a dict, without checking its sections or keys.

    UTF-8 (a byte-order mark is skipped) or UTF-16 with its byte-order mark.

    Raises
    ------
    ConfigError
        The file is unreadable, not UTF-8/UTF-16 text or not TOML; the message names it.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config file ({exc.strerror or exc})") from exc
    codec = "utf-16" if raw.startswith((b"\xff\xfe", b"\xfe\xff")) else "utf-8-sig"
    try:
        text = raw.decode(codec)
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"{path}: not {'UTF-16' if codec == 'utf-16' else 'UTF-8'} text (byte {exc.start} "
            f"is 0x{raw[exc.start]:02x}): save the file as UTF-8"
        ) from exc
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from exc


#: Sections a calibration file (``calibration.file``) contributes to a config.
_CALIBRATION_SECTIONS = ("soil", "soil_test_equivalent", "calibration")


def _with_calibration_file(data: dict[str, Any], path: Path) -> dict[str, Any]:
    """``data`` with the sections of its ``calibration.file`` underneath its own keys."""
    name = data.get("calibration", {}).get("file") if isinstance(data.get("calibration"),
                                                                  dict) else None
    if not name:
        return data
    if not isinstance(name, str):
        raise ConfigError(f"{path}: calibration.file must be a string, got {name!r}")
    params_path = (path.parent / name) if not Path(name).is_absolute() else Path(name)
    if not params_path.is_file():
        raise ConfigError(f"{path}: calibration.file {name!r} not found (looked for "
                          f"{params_path}); write it with pmap calibrate")
    try:
        params = tomllib.loads(params_path.read_text(encoding="utf-8-sig"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"{params_path}: cannot read the calibration file ({exc})") from exc
    unknown = sorted(set(params) - set(_CALIBRATION_SECTIONS))
    if unknown:
        raise ConfigError(f"{params_path}: a calibration file holds only "
                          f"[{'], ['.join(_CALIBRATION_SECTIONS)}], found [{unknown[0]}]")
    if params.get("calibration", {}).get("file"):
        raise ConfigError(f"{params_path}: a calibration file cannot name another one")
    merged = dict(data)
    for section in _CALIBRATION_SECTIONS:
        if section in params:
            merged[section] = {**params[section], **data.get(section, {})}
    merged["calibration"] = {**merged["calibration"], "file": str(params_path)}
    return merged


def config_from_dict(data: dict[str, Any], source: str = "config") -> FieldConfig:
    """Build a :class:`FieldConfig` from nested dicts as read from TOML."""
    sections = {f.name: f for f in dataclasses.fields(FieldConfig)}
    built: dict[str, Any] = {}
    for name, values in data.items():
        if name not in sections:
            raise ConfigError(f"{source}: unknown section [{name}]{_did_you_mean(name, sections)}")
        if not isinstance(values, dict):
            raise ConfigError(f"{source}: [{name}] must be a table of keys, got {values!r}")
        cls = _section_class(sections[name])
        built[name] = _build_section(cls, name, values, source)
    return FieldConfig(**built)


def _section_class(f: dataclasses.Field) -> type:
    return f.default_factory  # type: ignore[return-value]


def _build_section(cls: type, section: str, values: dict[str, Any], source: str) -> Any:
    hints = typing.get_type_hints(cls)
    known = {f.name for f in dataclasses.fields(cls)}
    kwargs = {}
    for key, value in values.items():
        if key not in known:
            raise ConfigError(f"{source}: unknown key {section}.{key}{_did_you_mean(key, known)}")
        kwargs[key] = _coerce(value, hints[key], f"{section}.{key}", source)
    try:
        return cls(**kwargs)
    except ConfigError as exc:
        raise ConfigError(f"{source}: {exc}") from exc
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"{source}: [{section}] {exc}") from exc


def _coerce(value: Any, hint: Any, key: str, source: str) -> Any:
    """Check a TOML value against a field's type hint, converting lists to tuples."""
    origin = typing.get_origin(hint)
    args = typing.get_args(hint)
    if origin in (typing.Union, types.UnionType):
        if value is None and type(None) in args:
            return None
        errors = []
        for arg in args:
            if arg is type(None):
                continue
            try:
                return _coerce(value, arg, key, source)
            except ConfigError as exc:
                errors.append(str(exc))
        raise ConfigError(errors[0] if errors else f"{source}: {key} has an unsupported value {value!r}")
    if origin is tuple:
        if not isinstance(value, (list, tuple)):
            raise ConfigError(f"{source}: {key} must be a list, got {value!r}")
        item = args[0] if args else Any
        return tuple(_coerce(v, item, key, source) for v in value)
    if origin is dict:
        if not isinstance(value, dict):
            raise ConfigError(f"{source}: {key} must be a table, got {value!r}")
        return dict(value)
    if hint is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{source}: {key} must be a number, got {value!r}")
        return float(value)
    if hint is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{source}: {key} must be a whole number, got {value!r}")
        return value
    if hint is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{source}: {key} must be true or false, got {value!r}")
        return value
    if hint is str:
        if not isinstance(value, str):
            raise ConfigError(f"{source}: {key} must be a string, got {value!r}")
        return value
    return value


def _did_you_mean(name: str, options: typing.Iterable[str]) -> str:
    close = difflib.get_close_matches(name, list(options), n=1)
    return f" (did you mean '{close[0]}'?)" if close else f"; known: {', '.join(sorted(options))}"


_TYPE_NAMES = {float: "number", int: "integer", str: "string", bool: "true/false"}


def _type_name(hint: Any) -> str:
    """A reader's name for a field's type hint ("number", "list of string", ...)."""
    origin, args = typing.get_origin(hint), typing.get_args(hint)
    if origin in (typing.Union, types.UnionType):
        names = [_type_name(a) for a in args if a is not type(None)]
        optional = " (optional)" if type(None) in args else ""
        return " or ".join(names) + optional
    if origin is tuple:
        return f"list of {_type_name(args[0])}" if args else "list"
    if origin is dict:
        return "table"
    return _TYPE_NAMES.get(hint, str(hint).replace("typing.", ""))


def configuration_reference() -> str:
    """Markdown reference of every section and key, with unit, default and source."""
    lines = [
        "# Configuration reference",
        "",
        "A field's run is steered by a TOML file (`pmap run ... --config FIELD.toml`). Every key is",
        "optional; a missing key takes the default below. Unknown sections or keys are errors.",
        "This page is generated from the code by `python -m pmap.config` and checked by a test.",
        "",
    ]
    for sect in dataclasses.fields(FieldConfig):
        cls = _section_class(sect)
        doc = (cls.__doc__ or "").strip().splitlines()[0].replace("``", "`")
        lines += [f"## [{sect.name}]", "", doc, "", "| key | type | default | unit | meaning | source |",
                  "| --- | --- | --- | --- | --- | --- |"]
        hints = typing.get_type_hints(cls)
        defaults = cls()
        for f in dataclasses.fields(cls):
            meta = f.metadata
            default = getattr(defaults, f.name)
            shown = "unset" if default is None else repr(list(default) if isinstance(default, tuple) else default)
            row = [f"`{f.name}`", _type_name(hints[f.name]), f"`{shown}`", meta.get("unit", ""),
                   meta.get("doc", ""), meta.get("source", "")]
            lines.append("| " + " | ".join(str(c).replace("|", "/") for c in row) + " |")
        lines.append("")
    return "\n".join(lines)


if __name__ == "__main__":  # pragma: no cover
    sys.stdout.write(configuration_reference() + "\n")
