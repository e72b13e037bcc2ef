"""One field, end to end: the only module that knows the order of the stages.

ingest (pmap.io) -> kriging (pmap.geostats) -> soil model (pmap.soil) -> zones and
rates (pmap.prescribe) -> GeoTIFFs, polygons, maps and summary (pmap.io, pmap.report).

Outputs are written into a hidden sibling directory and renamed into place only when
every file is complete, so a failed run never leaves an output directory that looks
finished, and an existing one is replaced only after the new one is whole.
"""

from __future__ import annotations

import contextlib
import logging
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pmap._warnings import collect_warnings, issue_warnings
from pmap.config import FieldConfig, load_config
from pmap.errors import ConfigError, InputError, PmapError, PmapWarning
from pmap.geostats.interpolate import Interpolation, interpolate
from pmap.grid import GridSpec
from pmap.io import boundary as boundary_io
from pmap.io.crs import choose_working_crs, normalise_crs, to_pyproj
from pmap.io.samples import SampleTable, duplicate_tolerance_m, load_samples
from pmap.outputs import check_output_dir, write_outputs
from pmap.prescribe import rates as rate_rules
from pmap.prescribe.rates import RateRule, resolve_rule
from pmap.prescribe.zones import label_patches, make_zones, patch_means, zone_statistics
from pmap.soil.availability import SoilPools, partition_total_p
from pmap.soil.conversions import convert_soil_test
from pmap.soil.fixation import FixationRisk, fixation_risk

__all__ = ["FieldInputs", "FieldResult", "prepare_inputs", "run_field", "krige_properties",
           "require_phosphorus", "driver_method", "rate_rule_for", "KRIGED_PROPERTIES"]

log = logging.getLogger(__name__)

#: Sample properties pmap kriges when the samples hold them, in this order.
KRIGED_PROPERTIES: tuple[str, ...] = (
    "ph", "total_p", "stp", "caco3", "clay", "base_saturation", "om",
)
#: Properties whose map the job cannot do without when present: if one cannot be mapped (too
#: few samples, no fittable variogram, bad values) the run stops with a message naming it.
#: Any other property that cannot be mapped is left out with a warning; a constant one is
#: mapped as that constant (pmap.geostats.interpolate).
_ESSENTIAL = ("ph", "total_p", "stp")


@dataclass(frozen=True)
class FieldInputs:
    """Checked inputs of one field, all in the run's projected CRS.

    ``notes`` are sentences for the record (how the working CRS was chosen, the field's
    area in it and on the ellipsoid, then the samples' own notes).  ``crs_choice`` is the
    working-CRS record of :func:`pmap.io.crs.choose_working_crs` (``requested``, ``used``,
    ``reason``, ``scale_error``, ``requested_scale_error``, ``max_scale_error``) plus
    ``areas`` from :func:`pmap.io.boundary.check_field_area` (``working_crs_ha``,
    ``geodesic_ha``, ``difference``).
    """

    samples: SampleTable
    boundary: Any  # shapely (Multi)Polygon in grid.crs
    grid: GridSpec
    n_read: int
    dropped_outside: tuple[str, ...]
    notes: tuple[str, ...] = ()
    crs_choice: dict[str, Any] = field(default_factory=dict)


@dataclass
class FieldResult:
    """What one field's run produced; arrays are 2-D on ``grid`` with NaN outside the field."""

    out_dir: Path
    grid: GridSpec
    config: FieldConfig
    interpolations: dict[str, Interpolation]
    layers: dict[str, np.ndarray]
    zone_table: list[dict[str, Any]]
    patches: list[dict[str, Any]]
    patch_labels: np.ndarray
    totals: dict[str, Any]
    stp_source: dict[str, Any]
    rule: RateRule
    summary: dict[str, Any] = field(repr=False)
    outputs: dict[str, str] = field(default_factory=dict, repr=False)
    warnings: list[str] = field(default_factory=list)


def prepare_inputs(
    samples_path: str | Path, boundary_path: str | Path, config: FieldConfig
) -> FieldInputs:
    """Read, check and reproject the samples and the boundary; fix the run's grid."""
    user_crs = normalise_crs(config.grid.crs) if config.grid.crs else None
    outline, outline_crs = boundary_io.read_boundary(boundary_path, crs=user_crs)
    # The user's CRS reads coordinates that carry none; it is the working CRS only if it
    # keeps lengths true over the field (measured), else the field's UTM zone is.
    lon, lat = boundary_io.field_lonlat_points(outline, outline_crs)
    working_crs, crs_choice = choose_working_crs(user_crs, lon, lat, config.grid.max_scale_error)
    if user_crs is not None and working_crs != user_crs and to_pyproj(user_crs).is_projected:
        warnings.warn(f"{crs_choice['reason']}; the outputs are in {working_crs}",
                      PmapWarning, stacklevel=2)
    boundary_name = Path(boundary_path).name
    boundary = boundary_io.project_boundary(outline, outline_crs, working_crs, boundary_name)
    areas = boundary_io.check_field_area(
        boundary, working_crs, boundary_io.geodesic_area_m2(outline, outline_crs), boundary_name)
    crs_choice["areas"] = areas
    notes = (
        f"working CRS {working_crs}: {crs_choice['reason']}",
        f"field area {areas['working_crs_ha']:.3f} ha in {working_crs}, "
        f"{areas['geodesic_ha']:.3f} ha geodesic on WGS 84 ({areas['difference']:+.3%})",
    )
    samples = load_samples(
        samples_path, config.samples, input_crs=user_crs, working_crs=working_crs,
        duplicate_tolerance_m=duplicate_tolerance_m(config.samples, config.grid.cell_size_m),
    )
    notes += tuple(getattr(samples, "notes", ()))
    n_read = len(samples.ids)
    inside = boundary_io.samples_inside(samples, boundary, buffer_m=config.grid.sample_buffer_m)
    if not inside.any():
        raise InputError(
            f"{samples_path}: none of the {n_read} samples lies inside the boundary in "
            f"{boundary_path}; check that both files describe the same field and that the "
            "coordinate columns (and any --crs) are right"
        )
    dropped = tuple(str(i) for i in samples.ids[~inside])
    if dropped:
        warnings.warn(
            f"{samples_path}: {len(dropped)} sample(s) more than {config.grid.sample_buffer_m:g} m "
            f"outside the boundary were left out: {', '.join(dropped[:10])}"
            + (" ..." if len(dropped) > 10 else ""),
            PmapWarning,
            stacklevel=2,
        )
        samples = samples.subset(inside)
    grid = boundary_io.grid_for_boundary(
        boundary, working_crs, config.grid.cell_size_m, max_cells=config.grid.max_cells,
        n_samples=len(samples), chunk_size=config.kriging.chunk_size)
    return FieldInputs(samples, boundary, grid, n_read, dropped, notes, crs_choice)


def krige_properties(
    samples: SampleTable, targets: np.ndarray, config: FieldConfig,
    names: tuple[str, ...] = KRIGED_PROPERTIES,
) -> dict[str, Interpolation]:
    """Krige each of ``names`` that the samples hold at ``targets`` (m, shape (m, 2)).

    An essential property (pH, total P, soil-test P) that cannot be mapped stops the run;
    any other is left out with a warning.  ``targets`` may be empty: the variograms are
    then fitted and cross-validated only (``pmap check``).
    """
    results: dict[str, Interpolation] = {}
    for name in names:
        if name not in samples.values:
            continue
        values = samples.values[name]
        ok = np.isfinite(values)
        try:
            results[name] = interpolate(
                name, samples.coords[ok], values[ok], targets, config.kriging,
                ids=samples.ids[ok], rows=samples.rows[ok], limits=_LIMITS.get(name),
            )
        except PmapError as exc:
            # Only the properties the prescription cannot do without stop the run; an
            # optional layer that cannot be mapped is left out with a warning.
            if name in _ESSENTIAL:
                raise type(exc)(
                    f"{samples.source}: {exc} ({name} is one of the properties the soil model "
                    "and the rates need, so the run stops)"
                ) from exc
            warnings.warn(f"{samples.source}: {name} not mapped: {exc}", PmapWarning, stacklevel=2)
        else:
            log.info("kriged %s from %d samples", name, int(ok.sum()))
    return results


def require_phosphorus(samples: SampleTable) -> None:
    """Stop when the samples hold neither total P nor a soil-test P: nothing to map rates on."""
    if "total_p" not in samples.values and "stp" not in samples.values:
        raise InputError(
            f"{samples.source}: neither a total P nor a soil-test P column was found; "
            "name one in the config (samples.total_p_column or samples.stp_column)"
        )


def run_field(
    samples: str | Path,
    boundary: str | Path,
    out_dir: str | Path,
    config: FieldConfig | str | Path | None = None,
    *,
    overwrite: bool = False,
    config_path: str | Path | None = None,
) -> FieldResult:
    """Turn one field's soil samples and boundary into maps, zones and a P2O5 prescription.

    Parameters
    ----------
    samples : path
        Lab results: CSV (lat/lon or projected x/y), GeoJSON, GeoPackage or Shapefile.
    boundary : path
        Field boundary polygon(s): GeoJSON, GeoPackage or Shapefile.
    out_dir : path
        Output directory; refused if it exists and is not empty, unless ``overwrite``.
    config : FieldConfig, path to a TOML file, or None for the defaults.
    overwrite : bool
        Replace a previous pmap output, only when its ``manifest.json`` lists every file in
        it unchanged, and only once the new one is complete.
    config_path : path, optional
        Where ``config`` was read from, for the record when a FieldConfig is passed.

    Returns
    -------
    FieldResult
    """
    if not isinstance(config, FieldConfig):
        config_path = config if config is not None else config_path
        config = load_config(config)
    out_dir = Path(out_dir)
    transaction = check_output_dir(out_dir, overwrite, [Path(samples), Path(boundary)]
                                   + ([Path(config_path)] if config_path else []))

    caught: list[warnings.WarningMessage] = []
    try:
        with collect_warnings() as caught:
            inputs = prepare_inputs(samples, boundary, config)
            result = _compute(inputs, config, out_dir)
    except BaseException:  # a failed stage's warnings often say why; its error still wins
        transaction.close()
        with contextlib.suppress(Warning):
            issue_warnings(caught)
        raise
    try:
        issue_warnings(caught)  # under the caller's filters: "error" stops here, before output
    except BaseException:
        transaction.close()
        raise
    result.warnings = [str(w.message) for w in caught if issubclass(w.category, PmapWarning)]

    write_outputs(result, inputs, samples_path=Path(samples), boundary_path=Path(boundary),
                  config_path=Path(config_path) if config_path else None,
                  transaction=transaction)  # publishes under the lock taken by the check
    return result


def driver_method(samples: SampleTable, config: FieldConfig) -> str:
    """Soil-test method of the values that will drive zones and rates.

    The lab's method when the samples hold a soil-test P, else the method of the model's
    soil-test equivalent (``[soil_test_equivalent]``).
    """
    if "stp" in samples.values:
        return samples.stp_method or config.rates.soil_test_method or "mehlich3_icp"
    return config.soil_test_equivalent.method


def rate_rule_for(method: str, config: FieldConfig) -> RateRule:
    """The rate rule for soil tests by ``method``, checked before any kriging.

    Raises
    ------
    ConfigError
        The rule has no published default for the method, or it asks for a conversion
        pmap refuses (to or from Olsen).
    """
    rule = resolve_rule(config.rates, method)
    if rule.soil_test_method != method and "olsen" in (method, rule.soil_test_method):
        raise ConfigError(
            f"rates.soil_test_method is {rule.soil_test_method} but the soil-test P is "
            f"{method}: pmap does not convert Olsen values for the rate rule (the published "
            "regression gives implausible values at common levels); leave "
            "rates.soil_test_method unset and give Olsen-based rates.critical_ppm and "
            "rates.maintenance_limit_ppm"
        )
    return rule


def _compute(inputs: FieldInputs, config: FieldConfig, out_dir: Path) -> FieldResult:
    """Every stage between ingest and output: kriging, soil model, zones and rates."""
    grid = inputs.grid
    require_phosphorus(inputs.samples)
    rule = rate_rule_for(driver_method(inputs.samples, config), config)  # fail before kriging
    kriged = krige_properties(inputs.samples, grid.inside_coords(), config)
    estimates = _physical_estimates(kriged)

    # Soil model on the kriged layers.
    soil_inputs = {"caco3_pct": estimates.get("caco3"), "clay_pct": estimates.get("clay"),
                   "base_saturation_pct": estimates.get("base_saturation")}
    ph = estimates["ph"]
    pools: SoilPools | None = None
    if "total_p" in estimates:
        pools = partition_total_p(ph, estimates["total_p"], config.soil, **soil_inputs)
    risk: FixationRisk = fixation_risk(
        ph, config.fixation, config.soil, **soil_inputs,
        labile_p_mg_kg=pools.available if pools is not None else None,
    )

    # The soil-test P that drives zones and rates, and the rule for its method.
    stp, method, stp_source = _rate_driver(estimates, pools, inputs.samples.stp_method, config)
    rule_stp = stp
    if rule.soil_test_method != method:
        rule_stp = convert_soil_test(stp, method, rule.soil_test_method)
        stp_source["rule_conversion"] = (
            f"rates.critical_ppm and rates.maintenance_limit_ppm refer to "
            f"{rule.soil_test_method}; {method} values were converted with "
            "pmap.soil.conversions.convert_soil_test (regional regressions, see docs)"
        )
        warnings.warn(stp_source["rule_conversion"], PmapWarning, stacklevel=2)

    # Zones and rates.
    stp2d = grid.fill(stp)
    zones = make_zones(stp2d, grid.mask, grid.cell_area_ha, config.zones, method)
    rate_cells = rate_rules.p2o5_rate_kg_ha(rule_stp, rule)

    layers: dict[str, np.ndarray] = {}
    for name, interp in kriged.items():
        layers[name] = grid.fill(estimates[name])
        layers[f"{name}_variance"] = grid.fill(interp.result.variance)
    if pools is not None:
        layers["available_p"] = grid.fill(pools.available)
        layers["fe_al_p"] = grid.fill(pools.fe_al)
        layers["ca_p"] = grid.fill(pools.ca)
        layers["occluded_p"] = grid.fill(pools.occluded)
    if "stp" not in kriged:
        layers["stp_equivalent"] = stp2d
    layers["fixation_risk"] = grid.fill(risk.index)
    layers["fixation_mechanism"] = grid.fill(risk.mechanism, outside=0).astype(np.uint8)
    layers["fixation_class"] = grid.fill(risk.risk_class, outside=0).astype(np.uint8)
    layers["zones"] = zones
    layers["p2o5_rate"] = grid.fill(rate_cells)

    avail2d = layers.get("available_p")
    patches, labels = _prescription_patches(zones, stp2d, grid.fill(rule_stp), avail2d, grid,
                                            config.zones.labels, rule)
    zone_rates = np.array([np.nan] + [p["p2o5_kg_ha"] for p in patches])
    layers["p2o5_zone_rate"] = zone_rates[labels]
    zone_table, totals = _zone_table(patches, zones, stp2d, avail2d, grid,
                                     config.zones.labels, rule)

    return FieldResult(
        out_dir=out_dir, grid=grid, config=config, interpolations=kriged, layers=layers,
        zone_table=zone_table, patches=patches, patch_labels=labels, totals=totals,
        stp_source=stp_source, rule=rule, summary={},
    )


#: Physical limits of kriged properties (their units), passed to interpolate(limits=...):
#: ordinary kriging can overshoot them near the edges of the data (e.g. CaCO3 below 0 %
#: beside calcareous patches), and the clipped estimate is the one every output uses.
_LIMITS: dict[str, tuple[float, float]] = {
    "ph": (0.0, 14.0), "total_p": (0.0, np.inf), "stp": (0.0, np.inf), "caco3": (0.0, 100.0),
    "clay": (0.0, 100.0), "base_saturation": (0.0, 100.0), "om": (0.0, 100.0),
}


def _physical_estimates(kriged: dict[str, Interpolation]) -> dict[str, np.ndarray]:
    """The kriged estimate per property, already clipped to ``_LIMITS`` by ``interpolate``."""
    return {name: interp.result.estimate for name, interp in kriged.items()}


def _rate_driver(
    estimates: dict[str, np.ndarray], pools: SoilPools | None, lab_method: str | None,
    config: FieldConfig,
) -> tuple[np.ndarray, str, dict[str, Any]]:
    """The soil-test P per cell that drives zones and rates, its method and its provenance."""
    if "stp" in estimates:
        method = lab_method or config.rates.soil_test_method or "mehlich3_icp"
        return estimates["stp"], method, {
            "source": "measured", "method": method,
            "description": f"measured soil-test P ({method}), kriged",
        }
    if pools is None:  # guarded by require_phosphorus: total P or soil-test P is present
        raise InputError("no soil-test P and no total P: nothing to base rates on")
    equivalent = config.soil_test_equivalent
    description = (
        f"MODEL ESTIMATE: the samples hold no soil-test P; the model's available P was "
        f"converted to a {equivalent.method} equivalent (soil_test_equivalent: intercept "
        f"{equivalent.intercept}, slope {equivalent.slope}); confirm with a lab soil test"
    )
    warnings.warn(description, PmapWarning, stacklevel=3)
    return equivalent.to_soil_test(pools.available), equivalent.method, {
        "source": "model estimate", "method": equivalent.method, "description": description,
    }


def _prescription_patches(
    zones: np.ndarray, stp2d: np.ndarray, rule_stp2d: np.ndarray, avail2d: np.ndarray | None,
    grid: GridSpec, class_labels: tuple[str, ...], rule: RateRule,
) -> tuple[list[dict[str, Any]], np.ndarray]:
    """One prescription record per connected zone patch: its area, mean soil test and rate.

    Patch k (``zone_id``) is patch k of :func:`pmap.prescribe.zones.label_patches`, the
    numbering the polygon writer uses too.  A patch's rate is the rule applied to its mean
    soil-test P.  Returns the records and the patch-label raster (0 outside).
    """
    labels, patch_class = label_patches(zones)
    counts = np.bincount(labels.ravel(), minlength=len(patch_class) + 1)[1:]
    mean_stp = patch_means(labels, stp2d)
    mean_avail = (patch_means(labels, avail2d) if avail2d is not None
                  else np.full(len(patch_class), np.nan))
    rates = rate_rules.p2o5_rate_kg_ha(patch_means(labels, rule_stp2d), rule)
    product_rates = rate_rules.product_kg_ha(rates, rule.product)
    patches = []
    for i, cls in enumerate(patch_class.tolist()):
        area = float(counts[i]) * grid.cell_area_ha
        patches.append({
            "zone_id": i + 1,
            "class_id": cls,
            "class_label": class_labels[cls - 1],
            "area_ha": area,
            "mean_stp_mg_kg": float(mean_stp[i]),
            "mean_available_p_mg_kg": float(mean_avail[i]),
            "p2o5_kg_ha": float(rates[i]),
            "product": rule.product,
            "product_kg_ha": float(product_rates[i]),
            "product_total_kg": float(product_rates[i]) * area,
        })
    return patches, labels


def _zone_table(
    patches: list[dict[str, Any]], zones: np.ndarray, stp2d: np.ndarray,
    avail2d: np.ndarray | None, grid: GridSpec, class_labels: tuple[str, ...], rule: RateRule,
) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """Per-class table and field totals from the prescription patches."""
    layers = {"stp": stp2d} if avail2d is None else {"stp": stp2d, "available_p": avail2d}
    table = []
    for row in zone_statistics(zones, layers, grid.cell_area_ha, class_labels):
        mine = [p for p in patches if p["class_id"] == row["class_id"]]
        p2o5_kg = sum(p["p2o5_kg_ha"] * p["area_ha"] for p in mine)
        table.append({
            "class_id": row["class_id"],
            "class_label": row["label"],
            "n_patches": len(mine),
            "area_ha": round(row["area_ha"], 3),
            "mean_stp_mg_kg": round(row["stp_mean"], 2),
            "mean_available_p_mg_kg": (round(row["available_p_mean"], 2)
                                       if avail2d is not None else None),
            "p2o5_kg_ha": round(p2o5_kg / row["area_ha"], 1),
            "p2o5_total_kg": round(p2o5_kg, 1),
            "product": rule.product,
            "product_total_kg": round(sum(p["product_total_kg"] for p in mine), 1),
        })
    area = grid.n_inside * grid.cell_area_ha
    p2o5_total = sum(r["p2o5_total_kg"] for r in table)
    totals = {
        "area_ha": round(area, 3),
        "p2o5_total_kg": round(p2o5_total, 1),
        "product": rule.product,
        "product_total_kg": round(sum(r["product_total_kg"] for r in table), 1),
        "mean_p2o5_kg_ha": round(p2o5_total / area, 1),
    }
    return table, totals
