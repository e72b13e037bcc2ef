"""Write a field's results: GeoTIFFs, rate-zone polygons, review maps and summary.json.

Everything is built in a hidden staging directory beside the target and moved into place
only when complete (see :func:`publish`); on any error the staging directory is removed
and an existing output directory is left as it was.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import uuid
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pmap._version import __version__
from pmap.cautions import CAUTIONS, CAUTIONS_SHORT
from pmap.errors import OutputError, OutputExistsError
from pmap.io import rasters, vectors
from pmap.prescribe.zones import CLASS_LABELS
from pmap.soil.fixation import MECHANISM_LABELS, RISK_CLASS_LABELS

if TYPE_CHECKING:
    from pmap.pipeline import FieldInputs, FieldResult

__all__ = ["LAYERS", "LayerInfo", "check_output_dir", "write_outputs", "publish", "staging_dir"]


@dataclass(frozen=True)
class LayerInfo:
    """How one output layer is described, coloured and labelled."""

    title: str
    unit: str
    cmap: str = "viridis"
    classes: dict[int, str] | None = None
    colours: dict[int, str] | None = None


# Colour-blind-safe categorical colours (Okabe & Ito 2008 palette), chosen per layer.
_ZONE_COLOURS = {1: "#D55E00", 2: "#E69F00", 3: "#009E73", 4: "#56B4E9", 5: "#0072B2"}
_MECHANISM_COLOURS = {1: "#D55E00", 2: "#0072B2", 3: "#CC79A7"}
_RISK_COLOURS = {1: "#F0E442", 2: "#E69F00", 3: "#882255"}

#: Every layer pmap can write: name -> LayerInfo.  Kriged properties get a ``_variance``.
LAYERS: dict[str, LayerInfo] = {
    "ph": LayerInfo("Soil pH (kriged)", "pH units", "cividis"),
    "total_p": LayerInfo("Total P (kriged)", "mg/kg"),
    "stp": LayerInfo("Soil-test P (kriged)", "mg/kg"),
    "caco3": LayerInfo("CaCO3 (kriged)", "%", "cividis"),
    "clay": LayerInfo("Clay (kriged)", "%", "cividis"),
    "base_saturation": LayerInfo("Base saturation (kriged)", "%", "cividis"),
    "om": LayerInfo("Organic matter (kriged)", "%", "cividis"),
    "available_p": LayerInfo("Plant-available P (model)", "mg/kg"),
    "fe_al_p": LayerInfo("Fe/Al-bound P (model)", "mg/kg", "magma"),
    "ca_p": LayerInfo("Ca-bound P (model)", "mg/kg", "magma"),
    "occluded_p": LayerInfo("Occluded P (model)", "mg/kg", "magma"),
    "stp_equivalent": LayerInfo("Soil-test P equivalent (MODEL ESTIMATE)", "mg/kg"),
    "fixation_risk": LayerInfo("Fixation risk of applied P", "index 0-1", "magma"),
    "fixation_mechanism": LayerInfo(
        "Fixation mechanism", "class", classes=MECHANISM_LABELS, colours=_MECHANISM_COLOURS),
    "fixation_class": LayerInfo(
        "Fixation risk class", "class", classes=RISK_CLASS_LABELS, colours=_RISK_COLOURS),
    "zones": LayerInfo(
        "Soil-test P zones", "class",
        classes={i + 1: label for i, label in enumerate(CLASS_LABELS)}, colours=_ZONE_COLOURS),
    "p2o5_rate": LayerInfo("P2O5 rate per cell", "kg P2O5/ha", "viridis"),
    "p2o5_zone_rate": LayerInfo("P2O5 rate by zone (prescription)", "kg P2O5/ha", "viridis"),
}


#: Layers that carry advice, so their maps carry the cautions.
_PRESCRIPTION_LAYERS = ("zones", "p2o5_rate", "p2o5_zone_rate", "stp_equivalent")


def layer_info(name: str, zone_labels: tuple[str, ...] | None = None) -> LayerInfo:
    """Description of a layer, including ``<property>_variance`` layers.

    ``zone_labels`` (from the ``[zones]`` section) name the zone classes when they differ
    from the default five.
    """
    if name == "zones" and zone_labels is not None and len(zone_labels) != len(CLASS_LABELS):
        classes = {i + 1: label for i, label in enumerate(zone_labels)}
        colours = {k: "#{:02x}{:02x}{:02x}".format(*rgba[:3])
                   for k, rgba in rasters.class_colours(list(classes)).items()}
        return LayerInfo(LAYERS["zones"].title, "class", classes=classes, colours=colours)
    if name == "zones" and zone_labels is not None:
        return LayerInfo(LAYERS["zones"].title, "class",
                         classes={i + 1: label for i, label in enumerate(zone_labels)},
                         colours=_ZONE_COLOURS)
    if name.endswith("_variance"):
        base = LAYERS[name[: -len("_variance")]]
        unit = "pH units^2" if base.unit == "pH units" else f"({base.unit})^2"
        return LayerInfo(base.title.replace("(kriged)", "kriging variance"), unit, "magma")
    return LAYERS[name]


def _model_text(interp: Any) -> str:
    """One line describing a fitted variogram and its cross-validation, for plots."""
    m, cv = interp.model, interp.cv
    return (f"{m.kind}: nugget {m.nugget:.3g}, partial sill {m.psill:.3g}, range {m.range:.0f} m"
            f" | n = {cv.n}, LOO RMSE {cv.rmse:.3g}, MSDR {cv.msdr:.2f}")


def _hex_to_rgba(colour: str) -> tuple[int, int, int, int]:
    colour = colour.lstrip("#")
    return (int(colour[0:2], 16), int(colour[2:4], 16), int(colour[4:6], 16), 255)


def staging_dir(out_dir: Path) -> Path:
    """A fresh hidden directory beside ``out_dir`` to build the outputs in."""
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = out_dir.parent / f".{out_dir.name}.partial-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    return tmp


def check_output_dir(out_dir: Path, overwrite: bool, inputs: list[Path]) -> None:
    """Refuse, before any work, an output directory pmap must not write or replace.

    A non-empty directory is replaced only with ``overwrite`` and only when it holds a
    previous pmap output (a ``summary.json`` written by pmap); a directory that holds one
    of the run's inputs is never replaced.

    Raises
    ------
    OutputExistsError
        The directory exists and may not be replaced.
    OutputError
        The directory cannot be created or written.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputExistsError(f"output path {out_dir} exists and is not a directory")
    target = out_dir.resolve()
    for path in inputs:
        if target == Path(path).resolve() or target in Path(path).resolve().parents:
            raise OutputExistsError(
                f"output directory {out_dir} holds the input {path}; write the outputs elsewhere"
            )
    if out_dir.is_dir() and any(out_dir.iterdir()):
        if not overwrite:
            raise OutputExistsError(
                f"output directory {out_dir} exists and is not empty; choose another directory "
                "or pass --overwrite (overwrite=True) to replace it"
            )
        if not _is_pmap_output(out_dir):
            raise OutputExistsError(
                f"output directory {out_dir} is not empty and holds no pmap summary.json; "
                "--overwrite replaces only a previous pmap output: choose another directory"
            )
    parent = target.parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir() or not os.access(parent, os.W_OK | os.X_OK):
        raise OutputError(f"cannot create the output directory {out_dir}: {parent} is not a "
                          "writable directory")


def _is_pmap_output(directory: Path) -> bool:
    try:
        summary = json.loads((directory / "summary.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(summary, dict) and "pmap_version" in summary


def publish(tmp: Path, out_dir: Path) -> None:
    """Move a completed staging directory into place, replacing ``out_dir`` last.

    If the final rename fails, the previous output is put back.
    """
    old = None
    if out_dir.exists():
        old = out_dir.parent / f".{out_dir.name}.old-{uuid.uuid4().hex[:8]}"
        os.replace(out_dir, old)
    try:
        os.replace(tmp, out_dir)
    except OSError:
        if old is not None:
            os.replace(old, out_dir)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _json_safe(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _json_safe(obj.tolist())
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _copy_input(src: Path, dest_dir: Path) -> str:
    """Copy an input file (with a shapefile's sidecar files) into ``dest_dir``."""
    dest_dir.mkdir(exist_ok=True)
    if src.suffix.lower() == ".shp":
        for sidecar in src.parent.glob(src.stem + ".*"):
            shutil.copy2(sidecar, dest_dir / sidecar.name)
    else:
        shutil.copy2(src, dest_dir / src.name)
    return f"inputs/{src.name}"


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
        tags["VARIOGRAM"] = json.dumps(_json_safe(interp.model.as_dict()))
        tags["N_SAMPLES"] = str(interp.cv.n)
    elif name in ("available_p", "fe_al_p", "ca_p", "occluded_p", "fixation_risk",
                  "fixation_mechanism", "fixation_class"):
        tags["METHOD"] = "pmap soil model v1 on kriged inputs (docs/soil-model.md)"
    elif name in ("zones", "p2o5_rate", "p2o5_zone_rate", "stp_equivalent"):
        tags["METHOD"] = f"pmap rates v1; soil-test P: {result.stp_source['description']}"
    return tags


def write_outputs(
    result: FieldResult,
    inputs: FieldInputs,
    *,
    samples_path: Path,
    boundary_path: Path,
    config_path: Path | None,
) -> None:
    """Write every output of ``result`` into ``result.out_dir`` atomically."""
    from pmap.report import maps

    out_dir = result.out_dir
    tmp = staging_dir(out_dir)
    try:
        outputs: dict[str, str] = {}
        grid = result.grid
        (tmp / "rasters").mkdir()
        (tmp / "maps").mkdir()
        samples_xy = inputs.samples.coords
        subtitle = " | ".join(
            s for s in (result.config.field.farm, f"sampled {result.config.field.sampling_date}"
                        if result.config.field.sampling_date else "") if s
        )
        for name, array in result.layers.items():
            info = layer_info(name, result.config.zones.labels)
            colormap = ({k: _hex_to_rgba(v) for k, v in info.colours.items()}
                        if info.colours else None)
            rasters.write_cog(
                tmp / "rasters" / f"{name}.tif", array, grid,
                description=info.title, unit=info.unit, tags=_provenance(result, name),
                class_labels=info.classes, colormap=colormap,
            )
            outputs[f"rasters/{name}.tif"] = f"{info.title} ({info.unit})"
            maps.plot_layer(
                tmp / "maps" / f"{name}.png", array, grid,
                title=f"{result.config.field.name}: {info.title}", unit=info.unit,
                subtitle=subtitle, samples_xy=samples_xy, boundary=inputs.boundary,
                classes=info.classes, colours=info.colours, cmap=info.cmap,
                footnote=CAUTIONS_SHORT if name in _PRESCRIPTION_LAYERS else "",
            )
            outputs[f"maps/{name}.png"] = f"review map of {info.title}"
        for name, interp in result.interpolations.items():
            emp = interp.empirical
            maps.plot_variogram(
                tmp / "maps" / f"variogram_{name}.png", emp.lag, emp.gamma, emp.count,
                interp.model, title=f"{result.config.field.name}: variogram of "
                + ("log " if interp.log else "") + layer_info(name).title.replace(" (kriged)", ""),
                unit=("log units" if interp.log else layer_info(name).unit),
                subtitle=_model_text(interp),
            )
            outputs[f"maps/variogram_{name}.png"] = f"empirical and fitted variogram of {name}"

        polygons = vectors.patch_polygons(
            result.patch_labels, [p["class_id"] for p in result.patches], grid)
        frame = vectors.zone_frame(polygons, result.patches, grid.crs)
        vectors.write_geopackage(tmp / "rate_zones.gpkg", frame)
        outputs["rate_zones.gpkg"] = "rate-zone polygons (layer rate_zones) with class, area, rate"
        vectors.write_geojson_wgs84(tmp / "rate_zones.geojson", frame)
        outputs["rate_zones.geojson"] = "the same polygons in WGS84 GeoJSON"
        vectors.write_shapefile(tmp / "shapefile" / "rate_zones.shp", frame)
        outputs["shapefile/rate_zones.shp"] = "the same polygons as a Shapefile (10-character field names)"

        copied = {
            "samples": _copy_input(samples_path, tmp / "inputs"),
            "boundary": _copy_input(boundary_path, tmp / "inputs"),
        }
        if config_path is not None:
            copied["config"] = _copy_input(config_path, tmp / "inputs")
        outputs["inputs/"] = "copies of the input files this run read"
        outputs["summary.json"] = "everything above in numbers, with the cautions"
        summary = _summary(result, inputs, samples_path, boundary_path, config_path, copied,
                           outputs)
        (tmp / "summary.json").write_text(
            json.dumps(_json_safe(summary), indent=2) + "\n", encoding="utf-8")
        result.summary = summary
        result.outputs = outputs
        publish(tmp, out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _summary(result, inputs, samples_path, boundary_path, config_path, copied, outputs):
    grid = result.grid
    t = grid.transform
    props = {}
    for name, interp in result.interpolations.items():
        entry = interp.as_dict()
        entry["unit"] = layer_info(name).unit
        entry["n_samples"] = interp.cv.n
        finite = interp.result.estimate
        entry["map_min"] = float(np.nanmin(finite))
        entry["map_mean"] = float(np.nanmean(finite))
        entry["map_max"] = float(np.nanmax(finite))
        entry["mean_kriging_variance"] = float(np.nanmean(interp.result.variance))
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
        for name in ("available_p", "fe_al_p", "ca_p", "occluded_p"):
            available[f"mean_{name}_mg_kg"] = float(np.nanmean(result.layers[name]))
    else:
        available["note"] = ("the samples hold no total P: available P and the P pools are not "
                             "mapped; fixation risk comes from pH alone")
    return {
        "pmap_version": __version__,
        "created_utc": datetime.now(timezone.utc).replace(microsecond=0).isoformat(),
        "field": {
            "name": result.config.field.name, "farm": result.config.field.farm,
            "sampling_date": result.config.field.sampling_date,
            "sampling_depth_cm": result.config.field.sampling_depth_cm,
        },
        "inputs": {
            "samples": str(samples_path), "boundary": str(boundary_path),
            "config": str(config_path) if config_path else None, "copies": copied,
            "n_samples_read": inputs.n_read, "n_samples_used": len(inputs.samples.ids),
            "samples_left_out_outside_boundary": list(inputs.dropped_outside),
            "soil_test_p_method": inputs.samples.stp_method,
        },
        "crs": grid.crs,
        "grid": {
            "cell_size_m": grid.cell_size, "width": grid.width, "height": grid.height,
            "transform": [t.a, t.b, t.c, t.d, t.e, t.f], "bounds": list(grid.bounds),
            "cells_inside": grid.n_inside, "area_ha": round(grid.n_inside * grid.cell_area_ha, 3),
        },
        "properties": props,
        "soil_model": available,
        "fixation": fixation,
        "soil_test_p_driving_rates": result.stp_source,
        "rate_rule": dataclasses.asdict(result.rule),
        "zones": result.zone_table,
        "totals": result.totals,
        "warnings": result.warnings,
        "outputs": outputs,
        "config": result.config.as_dict(),
        "cautions": CAUTIONS,
    }
