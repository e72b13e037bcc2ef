"""Write a field's results: GeoTIFFs, rate-zone polygons, review maps, summary.json, manifest.json.

Everything is built in a hidden staging directory beside the target and moved into place
only when complete (see :mod:`pmap.io.publish`); on any error the staging directory is removed
and an existing output directory is left as it was.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from datetime import date, datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pmap._version import __version__
from pmap.cautions import CAUTIONS, CAUTIONS_SHORT
from pmap.io import isoxml, rasters, tables, vectors
from pmap.io.manifest import file_record, write_manifest
from pmap.io.publish import OutputTransaction, open_transaction
from pmap.layers import (
    LAYERS,
    MODEL_LAYERS,
    PRESCRIPTION_LAYERS,
    LayerInfo,
    hex_to_rgba,
    layer_info,
)
from pmap.soil.fixation import MECHANISM_LABELS, RISK_CLASS_LABELS

if TYPE_CHECKING:
    from pmap.results import FieldInputs, FieldResult

__all__ = ["LAYERS", "LayerInfo", "check_output_dir", "write_outputs",
           "inputs_recorded_as", "output_timestamp", "json_safe"]


def check_output_dir(out_dir: Path, overwrite: bool, inputs: list[Path]) -> OutputTransaction:
    """Refuse, before any work, an output directory pmap must not write or replace.

    A non-empty directory is replaced only with ``overwrite`` and only when it is a
    previous pmap output whose ``manifest.json`` vouches for every file in it; a directory
    that holds one of the run's inputs is never replaced.  The directory is locked against
    other runs from here until the returned transaction is published or closed (dropping
    it closes it), and folders left by interrupted runs are recovered
    (:mod:`pmap.io.publish`).

    Returns
    -------
    OutputTransaction
        Pass it to :func:`write_outputs` (``transaction=``) to publish under the same lock.

    Raises
    ------
    OutputExistsError
        Another run holds the directory, or it exists and may not be replaced.
    OutputError
        The directory cannot be created or written.
    """
    return open_transaction(out_dir, overwrite, inputs)


def json_safe(obj: Any) -> Any:
    """``obj`` with numpy scalars and arrays, tuples and paths made plain JSON values (NaN -> None)."""
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return json_safe(obj.tolist())
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, Path):
        return str(obj)
    return obj


#: What the inputs are recorded as instead of their paths (see :func:`inputs_recorded_as`).
_INPUT_LABEL: ContextVar[str | None] = ContextVar("pmap_input_label", default=None)


@contextmanager
def inputs_recorded_as(label: str) -> Iterator[None]:
    """Within the block, record the run's inputs as ``label <file name>``, not their paths.

    For inputs that do not outlive the run, such as the demo's temporary files: summary.json
    and manifest.json then name ``label`` and the copies in the output's ``inputs/``,
    which do outlive it.
    """
    token = _INPUT_LABEL.set(label)
    try:
        yield
    finally:
        _INPUT_LABEL.reset(token)


def output_timestamp(config: Any) -> datetime:
    """The date written where an output format stores one (GeoPackage, Shapefile DBF header).

    Midnight UTC of the field's sampling date (``field.sampling_date``) when it is an ISO
    date between 1900 and 2155 (the DBF header's range), else
    :data:`pmap.io.vectors.DEFAULT_TIMESTAMP` (1970-01-01T00:00:00Z).  Never the wall
    clock, so the same inputs give the same bytes.
    """
    try:
        day = date.fromisoformat(str(config.field.sampling_date).strip())
    except ValueError:
        return vectors.DEFAULT_TIMESTAMP
    if not 1900 <= day.year <= 2155:
        return vectors.DEFAULT_TIMESTAMP
    return datetime(day.year, day.month, day.day, tzinfo=timezone.utc)


def _input_source(path: Path) -> str:
    """How an input is named in the records: its path as given, or the label and its name."""
    label = _INPUT_LABEL.get()
    return f"{label} {path.name}" if label else str(path)


def _copy_input(src: Path, dest_dir: Path, root: Path) -> list[dict[str, Any]]:
    """Copy one input (a Shapefile with its sidecars) into ``dest_dir``; what was copied.

    Returns
    -------
    list of dict
        One record per file copied: ``path`` (POSIX, relative to ``root``), ``sha256`` and
        ``bytes`` of the copy.
    """
    dest_dir.mkdir(parents=True, exist_ok=True)
    parts = vectors.shapefile_parts(src) if src.suffix.lower() == ".shp" else [src]
    records = []
    for part in parts:
        target = dest_dir / part.name
        shutil.copyfile(part, target)
        records.append({"path": target.relative_to(root).as_posix(), **file_record(target)})
    return records


def _provenance(result: FieldResult, name: str) -> dict[str, str]:
    tags = {
        "PMAP_VERSION": __version__,
        "PMAP_LAYER": name,
        "FIELD": result.config.field.name,
        "CAUTION": CAUTIONS_SHORT,
    }
    base = name[: -len("_variance")] if name.endswith("_variance") else name
    interp = result.interpolations.get(base)
    if interp is not None:
        tags["METHOD"] = ("lognormal ordinary kriging" if interp.log else "ordinary kriging")
        tags["VARIOGRAM"] = json.dumps(json_safe(interp.model.as_dict()))
        tags["N_SAMPLES"] = str(interp.cv.n)
    elif name in MODEL_LAYERS:
        tags["METHOD"] = (f"pmap soil model v2 on kriged inputs, fixation model "
                          f"{result.config.fixation.model} (docs/soil-model.md)")
    elif name in PRESCRIPTION_LAYERS:
        tags["METHOD"] = f"pmap rates v2; soil-test P: {result.stp_source['description']}"
        tags["BASIS"] = result.prescription["basis"]
        tags["INTERPRETATION"] = json.dumps(json_safe(result.interpretation.as_dict()))
    return tags


def write_outputs(
    result: FieldResult,
    inputs: FieldInputs,
    *,
    samples_path: Path,
    boundary_path: Path,
    config_path: Path | None,
    transaction: OutputTransaction | None = None,
) -> tuple[dict[str, Any], dict[str, str]]:
    """Write every output of ``result`` into ``result.out_dir`` atomically.

    ``transaction`` is the one :func:`check_output_dir` returned for the run; without it
    the directory is checked here (``overwrite`` false).  A failed write raises
    :class:`~pmap.errors.OutputError` and leaves no output (an old one stays as it was).
    ``result`` is only read.

    Returns
    -------
    summary : dict
        What ``summary.json`` holds (before JSON conversion).
    outputs : dict of str to str
        Relative path -> description of every output written.
    """
    from pmap.report.field_pictures import draw_field_pictures
    from pmap.report.html import REPORT_NAME, write_field_report

    out_dir = result.out_dir
    if transaction is None:
        transaction = check_output_dir(
            out_dir, False, [p for p in (samples_path, boundary_path, config_path) if p])
    try:
        tmp = transaction.staging
        outputs: dict[str, str] = {}
        grid = result.grid
        (tmp / "rasters").mkdir()
        for name, array in result.layers.items():
            info = layer_info(name, tuple(result.prescription["zone_labels"]),
                              result.config.lime.zone_breaks_t_ha)
            colormap = ({k: hex_to_rgba(v) for k, v in info.colours.items()}
                        if info.colours else None)
            rasters.write_cog(
                tmp / "rasters" / f"{name}.tif", array, grid,
                description=info.title, unit=info.unit, tags=_provenance(result, name),
                class_labels=info.classes, colormap=colormap,
            )
            outputs[f"rasters/{name}.tif"] = f"{info.title} ({info.unit})"
        pictures, _ = draw_field_pictures(result, inputs, tmp)
        outputs.update(pictures)

        stem = tables.output_stem(result.config.field.name, result.config.field.farm,
                                  result.config.field.sampling_date)
        rows = _polygon_rows(result)
        info = result.config.field
        frame = vectors.zone_frame(
            [(result.polygons[p.zone_id], p.class_id) for p in result.patches], rows, grid.crs,
            zone_ids=[p.zone_id for p in result.patches], field=info.name, farm=info.farm,
            date=info.sampling_date or None, units=result.rule.units,
            out_of_field_kg_ha=result.rule.out_of_field_rate_kg_ha)
        stamp = output_timestamp(result.config)
        vector_crs = (None if result.config.output.vector_crs == "working"
                      else result.config.output.vector_crs)
        crs_word = "the run's CRS" if vector_crs is None else vector_crs
        vectors.write_geopackage(tmp / f"{stem}_rate_zones.gpkg", frame, timestamp=stamp,
                                 crs=vector_crs)
        outputs[f"{stem}_rate_zones.gpkg"] = (
            f"rate-zone polygons (layer rate_zones, {crs_word}) with class, basis, area, rates")
        vectors.write_geojson(tmp / f"{stem}_rate_zones.geojson", frame, crs="EPSG:4326")
        outputs[f"{stem}_rate_zones.geojson"] = "the same polygons in WGS84 GeoJSON"
        vectors.write_shapefile(tmp / "shapefile" / f"{stem}_rate_zones.shp", frame,
                                timestamp=stamp, crs=vector_crs)
        outputs[f"shapefile/{stem}_rate_zones.shp"] = (
            f"the same polygons as a Shapefile ({crs_word}, 10-character field names)")
        lime_record = result.soil.get("lime", {}) if result.soil else {}
        if "lime_zones" in result.layers and lime_record.get("classes"):
            lime_frame = vectors.lime_zone_frame(
                vectors.zone_polygons(result.layers["lime_zones"], grid),
                {c["class"]: c for c in lime_record["classes"]}, grid.crs,
                target_ph=lime_record["target_ph"], field=info.name, farm=info.farm)
            vectors.write_geopackage(
                tmp / f"{stem}_lime_zones.gpkg", lime_frame, layer="lime_zones",
                timestamp=stamp, crs=vector_crs,
                description=(f"pmap lime zones: lime to pH {lime_record['target_ph']:g}, "
                             "lime_t_ha in t/ha, lime_t_ac in short tons per acre"))
            outputs[f"{stem}_lime_zones.gpkg"] = (
                f"lime-rate polygons (layer lime_zones, {crs_word}) with class, t/ha, t/acre, "
                "area and total, beside the P rate zones")
        tables.write_zone_table_csv(tmp / f"{stem}_zones.csv", rows, units=result.rule.units)
        outputs[f"{stem}_zones.csv"] = "one line per rate polygon: class, area, soil test, rates"
        if result.config.output.taskdata:
            isoxml.write_taskdata(
                tmp, rates_kg_ha=result.layers["product_zone_rate"], grid=grid,
                boundary=inputs.boundary,
                zones=[(result.polygons[p.zone_id], p.product_kg_ha) for p in result.patches],
                product_name=result.prescription["product"],
                field_name=result.config.field.name, farm=result.config.field.farm,
                out_of_field_kg_ha=result.rule.out_of_field_rate_kg_ha,
                basis=result.prescription["basis"])
            outputs["TASKDATA/TASKDATA.XML"] = (
                "ISO 11783-10 task data for a task controller: partfield, treatment zones and "
                "a WGS 84 grid (GRD00001.BIN) of product setpoints, DDI 6 in mg/m2")

        given = {"samples": samples_path, "boundary": boundary_path, "config": config_path}
        sources = {kind: _input_source(path) if path is not None else None
                   for kind, path in given.items()}
        copied = {kind: _copy_input(path, tmp / "inputs" / kind, tmp)
                  for kind, path in given.items() if path is not None}
        outputs["inputs/"] = ("copies of the input files this run read: inputs/samples/, "
                              "inputs/boundary/ (with a Shapefile's sidecars), inputs/config/")
        if result.config.output.maps != "none":
            outputs[REPORT_NAME] = ("the field report: one self-contained HTML page with the "
                                    "overview, every map, rates, diagnostics, parameters and "
                                    "cautions")
        outputs["summary.json"] = "everything above in numbers, with the cautions"
        outputs["manifest.json"] = ("pmap version, configuration, warnings, and the SHA-256 "
                                    "and size of every input read and every file written")
        summary = _summary(result, inputs, sources, copied, outputs)
        recorded = json_safe(summary)
        (tmp / "summary.json").write_text(json.dumps(recorded, indent=2) + "\n",
                                          encoding="utf-8")
        if REPORT_NAME in outputs:
            write_field_report(tmp, recorded)
        write_manifest(tmp, json_safe({
            "pmap_version": __version__,
            "field": result.config.field.name,
            "format_timestamp_utc": stamp.isoformat(),
            "config": result.config.as_dict(),
            "inputs": {kind: {"source": sources[kind], "files": records}
                       for kind, records in copied.items()},
            "warnings": list(result.warnings),
        }))
        transaction.publish()
    except BaseException as exc:
        transaction.fail(exc)  # removes the staging directory; a failed write -> OutputError
        raise
    return summary, outputs


def _rounded(obj: Any, decimals: int = 4) -> Any:
    """Floats rounded for the record (tables keep full precision in the API)."""
    if isinstance(obj, dict):
        return {k: _rounded(v, decimals) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_rounded(v, decimals) for v in obj]
    if isinstance(obj, float) and np.isfinite(obj):
        return round(obj, decimals)
    return obj


def _polygon_rows(result: Any) -> list[dict[str, Any]]:
    """Rows of the rate polygons: each record with its totals and the field, farm and date."""
    info = result.config.field
    return [{**patch.as_dict(), "field": info.name, "farm": info.farm,
             "date": info.sampling_date} for patch in result.patches]


def _as_written(array: np.ndarray, grid: Any) -> np.ndarray:
    """The finite values of a float layer inside the field as its GeoTIFF stores them (float32)."""
    values = np.asarray(array, dtype=np.float32)[grid.mask].astype(np.float64)
    return values[np.isfinite(values)]


def _summary(result, inputs, sources, copied, outputs):
    grid = result.grid
    t = grid.transform
    props = {}
    for name, interp in result.interpolations.items():
        entry = interp.as_dict()
        entry["unit"] = layer_info(name).unit
        entry["n_samples"] = interp.cv.n
        written = _as_written(result.layers[name], grid)  # clipped to physical limits
        variance = _as_written(result.layers[f"{name}_variance"], grid)
        entry["map_min"] = float(written.min()) if written.size else None
        entry["map_mean"] = float(written.mean()) if written.size else None
        entry["map_max"] = float(written.max()) if written.size else None
        entry["mean_kriging_variance"] = float(variance.mean()) if variance.size else None
        props[name] = entry
    mech = result.layers["fixation_mechanism"]
    risk_class = result.layers["fixation_class"]
    fixation = {
        "mean_index": float(np.nanmean(result.layers["fixation_risk"])),
        "mechanism_area_ha": {
            label: round(float((mech == code).sum()) * grid.cell_area_ha, 3)
            for code, label in MECHANISM_LABELS.items()
        },
        "class_area_ha": {
            label: round(float((risk_class == code).sum()) * grid.cell_area_ha, 3)
            for code, label in RISK_CLASS_LABELS.items()
        },
    }
    available: dict[str, Any] = {}
    if "available_p" in result.layers:
        for name in ("available_p", "fe_al_p", "ca_p", "occluded_p", "organic_p"):
            available[f"mean_{name}_mg_kg"] = float(np.nanmean(result.layers[name]))
    else:
        available["note"] = ("the samples hold no total P: available P and the P pools are not "
                             "mapped; fixation risk comes from pH alone")
    return {
        "pmap_version": __version__,
        "field": {
            "name": result.config.field.name, "farm": result.config.field.farm,
            "sampling_date": result.config.field.sampling_date,
            "sampling_depth_cm": result.config.field.sampling_depth_cm,
        },
        "inputs": {
            "samples": sources["samples"], "boundary": sources["boundary"],
            "config": sources["config"], "copies": copied,
            "notes": list(getattr(inputs, "notes", ())),
            "n_samples_read": inputs.n_read, "n_samples_used": len(inputs.samples.ids),
            "samples_left_out_outside_boundary": list(inputs.dropped_outside),
            "soil_test_p_method": inputs.samples.stp_method,
        },
        "crs": grid.crs,
        "working_crs": dict(getattr(inputs, "crs_choice", {})),
        "grid": {
            "cell_size_m": grid.cell_size, "width": grid.width, "height": grid.height,
            "transform": [t.a, t.b, t.c, t.d, t.e, t.f], "bounds": list(grid.bounds),
            "cells_inside": grid.n_inside, "area_ha": round(grid.n_inside * grid.cell_area_ha, 3),
        },
        "properties": props,
        "soil_model": {**available, **json_safe(result.soil)},
        "fixation": fixation,
        "soil_test_p_driving_rates": result.stp_source,
        "rate_rule": dataclasses.asdict(result.rule),
        "prescription": result.prescription,
        "zones": _rounded(result.class_table),
        "rate_polygons": _rounded(result.zone_table),
        "totals": _rounded(result.totals),
        "warnings": result.warnings,
        "outputs": outputs,
        "config": result.config.as_dict(),
        "cautions": CAUTIONS,
    }
