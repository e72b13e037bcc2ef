"""One field, end to end: the only module that knows the order of the stages.

ingest (pmap.io) -> kriging (pmap.geostats) -> soil model (pmap.soil) -> zones and
rates (pmap.prescribe) -> GeoTIFFs, polygons, maps and summary (pmap.io, pmap.report).

Outputs are written into a hidden sibling directory and renamed into place only when
every file is complete, so a failed run never leaves an output directory that looks
finished, and an existing one is replaced only after the new one is whole.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import re
import warnings
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
from pmap.prescribe import prescription as rx
from pmap.prescribe import rates as rate_rules
from pmap.prescribe.clustering import cluster_zones, zone_means, zone_rates
from pmap.prescribe.interpretation import InterpretationTable
from pmap.prescribe.patches import clean_zones, min_cells_for_area, min_width_cells
from pmap.prescribe.rates import RateRule, resolve_interpretation
from pmap.results import FieldInputs, FieldResult, IngestedField
from pmap.soil.availability import SoilPools
from pmap.soil.conversions import convert_soil_test
from pmap.soil.model import SoilInputs, recent_p_mg_kg, soil_model

__all__ = ["FieldInputs", "FieldResult", "IngestedField", "ingest_field", "prepare_inputs", "run_field", "run_each_feature",
           "krige_properties",
           "require_phosphorus", "driver_method", "rate_rule_for", "interpretation_for",
           "KRIGED_PROPERTIES", "PROPERTY_LIMITS", "soil_inputs_on_grid", "calibrate_in_run"]

log = logging.getLogger(__name__)

#: Sample properties pmap kriges when the samples hold them, in this order.
KRIGED_PROPERTIES: tuple[str, ...] = (
    "ph", "total_p", "stp", "caco3", "clay", "base_saturation", "om", "ca", "fe", "al",
    "buffer_ph",
)
#: Properties whose map the job cannot do without when present: if one cannot be mapped (too
#: few samples, no fittable variogram, bad values) the run stops with a message naming it.
#: Any other property that cannot be mapped is left out with a warning; a constant one is
#: mapped as that constant (pmap.geostats.interpolate).
_ESSENTIAL = ("ph", "total_p", "stp")


def ingest_field(
    samples_path: str | Path, boundary_path: str | Path, config: FieldConfig
) -> IngestedField:
    """Read, check and reproject the samples and the boundary into the run's working CRS."""
    user_crs = normalise_crs(config.grid.crs) if config.grid.crs else None
    outline, outline_crs = boundary_io.read_boundary(
        boundary_path, crs=user_crs, feature=config.field.boundary_feature or None,
        name_attribute=config.field.name_attribute or None)
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
    return IngestedField(samples, boundary, working_crs, n_read, dropped, notes, crs_choice)


def prepare_inputs(
    samples_path: str | Path, boundary_path: str | Path, config: FieldConfig
) -> FieldInputs:
    """Read, check and reproject the samples and the boundary; fix the run's grid."""
    field = ingest_field(samples_path, boundary_path, config)
    samples, boundary, working_crs = field.samples, field.boundary, field.crs
    grid = boundary_io.grid_for_boundary(
        boundary, working_crs, config.grid.cell_size_m, max_cells=config.grid.max_cells,
        n_samples=len(samples), chunk_size=config.kriging.chunk_size)
    return FieldInputs(samples, boundary, grid, field.n_read, field.dropped_outside, field.notes,
                       field.crs_choice)


def _covariates(samples: SampleTable, targets: np.ndarray, config: FieldConfig,
                grid: GridSpec | None) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """kriging.covariates read at the samples and at the targets (the grid's inside cells)."""
    if not config.kriging.covariates:
        return {}
    if grid is None:
        raise ConfigError("kriging.covariates needs the run's grid")
    from pmap.io.rasters import read_onto_grid, sample_at_points

    out = {}
    for name, path in config.kriging.covariates.items():
        at_samples = sample_at_points(path, samples.coords, grid.crs)
        missing = ~np.isfinite(at_samples)
        if missing.any():
            shown = ", ".join(str(i) for i in samples.ids[missing][:10])
            raise InputError(
                f"kriging.covariates.{name} ({path}): {int(missing.sum())} sample(s) lie outside "
                f"the raster or on its nodata ({shown}{', ...' if missing.sum() > 10 else ''}); "
                "use a raster that covers every sample, or remove the covariate")
        at_targets = (np.empty(0) if targets.shape[0] == 0
                      else read_onto_grid(path, grid)[grid.mask])
        out[name] = (at_samples, at_targets)
    return out


def krige_properties(
    samples: SampleTable, targets: np.ndarray, config: FieldConfig,
    names: tuple[str, ...] = KRIGED_PROPERTIES, grid: GridSpec | None = None,
) -> dict[str, Interpolation]:
    """Krige each of ``names`` that the samples hold at ``targets`` (m, shape (m, 2)).

    An essential property (pH, total P, soil-test P) that cannot be mapped stops the run;
    any other is left out with a warning.  ``targets`` may be empty: the variograms are
    then fitted and cross-validated only (``pmap check``).
    """
    results: dict[str, Interpolation] = {}
    covariates = _covariates(samples, targets, config, grid)
    for name in names:
        if name not in samples.values:
            continue
        values = samples.values[name]
        ok = np.isfinite(values)
        try:
            results[name] = interpolate(
                name, samples.coords[ok], values[ok], targets, config.kriging,
                ids=samples.ids[ok], rows=samples.rows[ok], limits=PROPERTY_LIMITS.get(name),
                covariates={c: (at_samples[ok], at_targets)
                            for c, (at_samples, at_targets) in covariates.items()},
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
    result = dataclasses.replace(
        result, warnings=[str(w.message) for w in caught if issubclass(w.category, PmapWarning)])
    summary, outputs = write_outputs(  # publishes under the lock taken by the check
        result, inputs, samples_path=Path(samples), boundary_path=Path(boundary),
        config_path=Path(config_path) if config_path else None, transaction=transaction)
    return dataclasses.replace(result, summary=summary, outputs=outputs)


def run_each_feature(
    samples: str | Path,
    boundary: str | Path,
    out_root: str | Path,
    config: FieldConfig | str | Path | None = None,
    *,
    overwrite: bool = False,
    config_path: str | Path | None = None,
) -> list[tuple[str, Path, FieldResult | PmapError]]:
    """Run every feature of a boundary file as its own field, into ``out_root/<name>/``.

    Each field is named by its feature (``field.name``), uses the samples inside it, and
    gets its own output directory (a safe slug of the name, unique per feature).  A field
    that fails is recorded with its error and the others go on.

    Returns
    -------
    list of (name, output directory, FieldResult or the PmapError it failed with)
    """
    if not isinstance(config, FieldConfig):
        config_path = config if config is not None else config_path
        config = load_config(config)
    user_crs = normalise_crs(config.grid.crs) if config.grid.crs else None
    features = boundary_io.boundary_features(boundary, user_crs,
                                             name_attribute=config.field.name_attribute or None)
    slugs = boundary_io.feature_slugs([f.name for f in features])
    results: list[tuple[str, Path, FieldResult | PmapError]] = []
    for feature, slug in zip(features, slugs, strict=True):
        out_dir = Path(out_root) / slug
        one = config.replace("field", name=feature.name, boundary_feature=feature.position)
        try:
            result: FieldResult | PmapError = run_field(
                samples, boundary, out_dir, one, overwrite=overwrite, config_path=config_path)
        except PmapError as exc:
            log.error("%s: %s", feature.name, exc)
            result = exc
        results.append((feature.name, out_dir, result))
    return results


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
    rule = rate_rules.resolve_rule(config.rates, method)
    if rule.soil_test_method != method and "olsen" in (method, rule.soil_test_method):
        raise ConfigError(
            f"rates.soil_test_method is {rule.soil_test_method} but the soil-test P is "
            f"{method}: pmap does not convert Olsen values for the rate rule (the published "
            "regression gives implausible values at common levels); leave "
            "rates.soil_test_method unset and give Olsen-based rates.critical_ppm and "
            "rates.maintenance_limit_ppm"
        )
    return rule


def interpretation_for(method: str, config: FieldConfig) -> InterpretationTable:
    """The interpretation table that gives both the zone classes and the rule's two levels.

    Checked before any kriging; raises ConfigError when the method has no published table
    and the config does not give the values (the message names the keys).
    """
    return resolve_interpretation(config.rates, method, config.zones.breaks, config.zones.labels)


def _compute(inputs: FieldInputs, config: FieldConfig, out_dir: Path) -> FieldResult:
    """Every stage between ingest and output: kriging, soil model, zones and rates."""
    grid = inputs.grid
    require_phosphorus(inputs.samples)
    method = driver_method(inputs.samples, config)
    rule = rate_rule_for(method, config)  # fail before kriging
    table = interpretation_for(method, config)
    kriged = krige_properties(inputs.samples, grid.inside_coords(), config, grid=grid)
    estimates = _physical_estimates(kriged)

    # Soil model on the kriged layers, calibrated to the lab's pairs where they exist.
    ph = estimates["ph"]
    partition, calibration, calibration_record = calibrate_in_run(inputs.samples, config, rule)
    soil_inputs = soil_inputs_on_grid(estimates, grid, config)
    model = soil_model(ph, estimates.get("total_p"), soil_inputs, partition, config.fixation)
    pools, risk = model.pools, model.risk
    for note in model.notes:
        warnings.warn(note, PmapWarning, stacklevel=2)

    # The soil-test P that drives zones and rates, its uncertainty, and the rule's method.
    stp, method, stp_source = _rate_driver(estimates, pools, inputs.samples.stp_method, config,
                                           calibration_record)
    basis = rx.BASIS_MEASURED if stp_source["source"] == "measured" else rx.BASIS_MODEL
    realisations = _simulations(inputs, kriged, grid, config)
    if "ph" in realisations:
        fixed_inputs = dataclasses.replace(
            soil_inputs, lab_stp_mg_kg=(soil_inputs.lab_stp_mg_kg if pools is None
                                        or soil_inputs.lab_stp_mg_kg is not None
                                        else pools.available))
        high = np.zeros(ph.shape)
        for ph_r in realisations["ph"]:
            high += soil_model(ph_r, None, fixed_inputs, partition,
                               config.fixation).risk.risk_class == 3
        realisations["fixation_high"] = high / len(realisations["ph"])
    deficiency, driver, risk_note = _deficiency(kriged.get("stp"), stp, method, rule,
                                                realisations.get("stp"))
    if "stp" in realisations:
        stp_source["probability_basis"] = realisations["note"]
    if risk_note:
        stp_source["risk_aware_rule"] = risk_note
    rule_stp = driver
    if rule.soil_test_method != method:
        rule_stp = convert_soil_test(driver, method, rule.soil_test_method)
        stp_source["rule_conversion"] = (
            f"rates.critical_ppm and rates.maintenance_limit_ppm refer to "
            f"{rule.soil_test_method}; {method} values were converted with "
            "pmap.soil.conversions.convert_soil_test (regional regressions, see docs)"
        )
        warnings.warn(stp_source["rule_conversion"], PmapWarning, stacklevel=2)

    # Cells too far from every sample get no rate.
    distance = rx.distance_to_samples(grid.inside_coords(), inputs.samples.coords)
    spacing = rx.sample_spacing_m(inputs.samples.coords)
    max_distance = (rule.max_distance_from_sample_m if rule.max_distance_from_sample_m
                    else rule.max_distance_spacings * spacing)
    covered = rx.rate_coverage(distance, max_distance)
    coverage = {
        "sample_spacing_m": spacing, "max_distance_from_sample_m": max_distance,
        "rule": ("rates.max_distance_from_sample_m" if rule.max_distance_from_sample_m
                 else f"{rule.max_distance_spacings:g} x the sample spacing"),
        "area_without_rate_ha": float((~covered).sum()) * grid.cell_area_ha,
    }
    if not covered.all():
        warnings.warn(
            f"{coverage['area_without_rate_ha']:.2f} ha of the field lie more than "
            f"{max_distance:.0f} m from every sample ({coverage['rule']}) and get no rate "
            f"(zone 'not sampled', {rule.out_of_field_rate_kg_ha:g} kg/ha of product): sample "
            "them or check the boundary file", PmapWarning, stacklevel=2)

    # Zones: the table's classes of the rule's soil test (or clusters of chosen layers),
    # cleaned to a boom's scale.
    covered2d = grid.fill(covered, outside=False).astype(bool)
    rule_stp2d = grid.fill(rule_stp)
    clusters = None
    class_labels, roles = table.labels, table.roles
    if config.clusters.method == "off":
        classes = grid.fill(table.classify(rule_stp), outside=0).astype(np.uint8)
    else:
        layers_for = {"stp": rule_stp2d, "ph": grid.fill(ph),
                      "fixation_risk": grid.fill(risk.index)}
        layers_for.update({name: grid.fill(estimates[name]) for name in estimates
                           if name not in ("stp", "ph")})
        if pools is not None:
            layers_for["available_p"] = grid.fill(pools.available)
        from pmap.io.rasters import read_onto_grid

        for name, path in config.clusters.rasters.items():
            layers_for[name] = read_onto_grid(path, grid)
        missing = [n for n in config.clusters.layers if n not in layers_for]
        if missing:
            raise ConfigError(f"clusters.layers: {', '.join(missing)} not mapped in this run "
                              f"(mapped: {', '.join(sorted(layers_for))})")
        clusters = cluster_zones(layers_for, grid.mask & covered2d, config.clusters)
        for note in clusters.notes:
            warnings.warn(note, PmapWarning, stacklevel=2)
        classes = clusters.zones.astype(np.uint8)
        class_labels = clusters.labels
    classes = clean_zones(
        classes, grid.mask & (classes > 0),
        min_width_cells=min_width_cells(config.zones.min_width_m, grid.cell_size),
        min_cells=min_cells_for_area(config.zones.min_mapping_unit_ha, grid.cell_area_ha))
    zones = np.where(covered2d, classes, np.where(grid.mask, rx.NOT_SAMPLED, 0)).astype(np.uint8)
    if clusters is not None:  # a cluster's role: the table's role at its mean soil test
        means = zone_means(classes, rule_stp2d, clusters.n_zones)
        roles = tuple(table.role_of(int(c)) if c > 0 else "none"
                      for c in table.classify(means))

    rate_cells = np.where(covered, rate_rules.p2o5_rate_kg_ha(rule_stp, rule), np.nan)
    grade = rate_rules.product_grade(rule)
    product = rate_rules.product_label(rule)
    patches, labels = rx.prescription_patches(
        zones, class_labels, cell_area_ha=grid.cell_area_ha, stp=grid.fill(stp),
        rule_stp=rule_stp2d,
        rate_fn=lambda s: rate_rules.p2o5_rate_kg_ha(s, rule),
        product_fn=lambda p: rate_rules.product_rates(p, rule), product=product, grade=grade,
        basis=basis, roles=roles,
        deficiency=grid.fill(deficiency) if deficiency is not None else None,
        no_rate_product_kg_ha=rule.out_of_field_rate_kg_ha,
    )
    if clusters is not None and config.clusters.rates_kg_ha:
        patches = _table_rates(patches, clusters, config, rule)

    # The kriging uncertainty carried through the soil model.
    model_layers, uncertainty = model_uncertainty(
        kriged, soil_inputs, partition, config, rule,
        calibrated_method=(calibration_record.get("method")
                           if calibration_record["status"] == "calibrated" else None),
        realisations=realisations)

    # Lime, the pH-correction payoff and environmental P, beside the P prescription.
    extra_layers, soil_record = _lime_and_environment(
        ph, estimates, pools, soil_inputs, partition, config, grid, patches, labels, rule,
        stp_method=method)
    patches = soil_record.pop("patches")
    polygons, patches, labels = _polygons_for(patches, labels, inputs.boundary, grid, config)
    soil_record["calibration"] = calibration_record
    soil_record["uncertainty"] = uncertainty
    soil_record["fixation_model"] = config.fixation.model
    soil_record["input_notes"] = list(model.notes)
    soil_record["ph_kind"] = "converted from salt pH" if any(
        "converted to water pH" in n for n in inputs.samples.notes) else "water"

    layers: dict[str, np.ndarray] = {}
    for name, interp in kriged.items():
        layers[name] = grid.fill(estimates[name])
        layers[f"{name}_variance"] = grid.fill(interp.result.variance)
    if pools is not None:
        layers["available_p"] = grid.fill(pools.available)
        layers["fe_al_p"] = grid.fill(pools.fe_al)
        layers["ca_p"] = grid.fill(pools.ca)
        layers["occluded_p"] = grid.fill(pools.occluded)
        layers["organic_p"] = grid.fill(pools.organic)
    if "stp" not in kriged:
        layers["stp_equivalent"] = grid.fill(stp)
    if deficiency is not None:
        layers["stp_deficiency_probability"] = grid.fill(deficiency)
    layers["fixation_risk"] = grid.fill(risk.index)
    layers["fixation_mechanism"] = grid.fill(risk.mechanism, outside=0).astype(np.uint8)
    layers["fixation_class"] = grid.fill(risk.risk_class, outside=0).astype(np.uint8)
    if "fixation_high" in realisations:
        layers["fixation_high_probability"] = grid.fill(realisations["fixation_high"])
    layers.update(extra_layers)
    layers.update({name: grid.fill(values) for name, values in model_layers.items()})
    zone_class = np.array([0] + [p.class_id for p in patches], dtype=np.uint8)
    layers["zones"] = zone_class[labels]
    layers["p2o5_rate"] = grid.fill(rate_cells)
    zone_rates = np.array([np.nan] + [p.p2o5_kg_ha for p in patches])
    layers["p2o5_zone_rate"] = zone_rates[labels]
    product_rates = np.array([np.nan] + [p.product_kg_ha for p in patches])
    layers["product_zone_rate"] = product_rates[labels]

    totals = rx.field_totals(patches)
    cost = rate_rules.product_cost(totals["product_total_kg"], rule)
    if cost is not None:
        totals["product_cost"] = cost
        totals["currency"] = rule.currency
    notice = rx.single_rate_notice(patches)
    if notice:
        warnings.warn(notice, PmapWarning, stacklevel=2)
    prescription = {
        "interpretation": table.as_dict(), "basis": basis, "single_rate_notice": notice,
        "coverage": coverage, "product": product, "product_grade_n_p2o5_k2o": list(grade),
        "out_of_field_rate_kg_ha": rule.out_of_field_rate_kg_ha,
        "zone_labels": list(class_labels),
        "zones_by": ("interpretation table classes" if clusters is None
                     else f"{clusters.method} clusters"),
        "clusters": clusters.as_dict() if clusters is not None else None,
        "deficiency_probability": (
            {"critical_ppm": rule.critical_ppm, "method": rule.soil_test_method,
             "space": "log" if kriged["stp"].log else "linear"}
            if deficiency is not None else
            {"note": "not computed: the soil-test P driving the rates is a model estimate "
                     "without a kriging variance"}),
    }
    return FieldResult(
        out_dir=out_dir, grid=grid, config=config, interpolations=kriged, layers=layers,
        class_table=rx.class_table(patches), patches=patches, polygons=polygons,
        patch_labels=labels, totals=totals, stp_source=stp_source, rule=rule,
        interpretation=table, prescription=prescription, summary={},
        soil=soil_record, calibration=calibration,
    )


def _table_rates(patches: list[rx.Patch], clusters: Any, config: FieldConfig,
                 rule: RateRule) -> list[rx.Patch]:
    """The user's per-zone rate table (``clusters.rates_kg_ha``) on every polygon of a zone."""
    table = zone_rates(clusters, config.clusters, lambda s: s, np.zeros(clusters.n_zones))
    out = []
    for patch in patches:
        if patch.class_id == rx.NOT_SAMPLED:
            out.append(patch)
            continue
        product, p2o5, nitrogen = rate_rules.product_rates(
            np.array([table[patch.class_id - 1]]), rule)
        out.append(dataclasses.replace(patch, p2o5_kg_ha=float(p2o5[0]),
                                       product_kg_ha=float(product[0]),
                                       n_kg_ha=float(nitrogen[0])))
    return out


#: Most realisation values held at once (realisations x cells) for probability maps.
MAX_SIMULATED_VALUES = 50_000_000


def property_seed(seed: int, stream: int) -> int:
    """The seed of one property's simulations: stream 0 keeps ``seed``; others get their own.

    Properties simulated with one seed would share the random path and the noise, so their
    realisations would be correlated although the kriging treats them as independent.
    """
    if stream == 0:
        return int(seed)
    return int(np.random.SeedSequence([int(seed), int(stream)]).generate_state(1)[0])


def _simulations(inputs: FieldInputs, kriged: dict[str, Interpolation], grid: GridSpec,
                 config: FieldConfig) -> dict[str, Any]:
    """Conditional simulations of pH, soil-test P and total P when kriging.probability = 'simulation'.

    Each property is simulated with the family its kriging chose, refitted to the normal
    scores of its samples; the realisations are in the property's units.
    """
    settings = config.kriging
    if settings.probability != "simulation":
        return {}
    from pmap.geostats.simulation import simulate_property

    targets = grid.inside_coords()
    if settings.realisations * targets.shape[0] > MAX_SIMULATED_VALUES:
        raise ConfigError(
            f"kriging.realisations = {settings.realisations} on {targets.shape[0]:,} cells would "
            f"hold more than {MAX_SIMULATED_VALUES:,} simulated values: lower "
            "kriging.realisations, coarsen grid.cell_size_m or use kriging.probability = "
            "'kriging'")
    out: dict[str, Any] = {}
    notes = []
    for stream, name in enumerate(("stp", "ph", "total_p")):
        interp = kriged.get(name)
        if interp is None or interp.kind != "kriged":
            continue
        values = inputs.samples.values[name]
        ok = np.isfinite(values)
        real, model = simulate_property(
            inputs.samples.coords[ok], values[ok], targets, interp.model.kind,
            n_realisations=settings.realisations, seed=property_seed(settings.seed, stream),
            neighbours=settings.neighbours, n_bins=settings.n_bins,
            cutoff_fraction=settings.cutoff_fraction,
            max_variogram_samples=settings.variogram_max_samples)
        out[name] = real
        notes.append(f"{name}: {settings.realisations} sequential Gaussian simulations (seed "
                     f"{property_seed(settings.seed, stream)}, {settings.neighbours} neighbours, normal-score "
                     f"{model.kind} variogram, range {model.range:.0f} m)")
    out["note"] = "; ".join(notes)
    return out


def _deficiency(
    interp: Interpolation | None, stp: np.ndarray, method: str, rule: RateRule,
    realisations: np.ndarray | None = None,
) -> tuple[np.ndarray | None, np.ndarray, str]:
    """Probability of deficiency per cell (lab method) and the soil test the rule is fed.

    The probability that soil-test P lies below the rule's critical level comes from the
    kriging distribution of the lab's soil test (log space when it was log-kriged), or,
    given ``realisations`` (n, cells) of it, from the share of them below the level; the
    critical level is expressed in the lab's method.  With the risk-aware option the rule
    is fed the soil test's quantile at the threshold instead of the estimate.
    """
    if interp is None:
        if rule.deficiency_probability_threshold is not None:
            raise ConfigError(
                "rates.deficiency_probability_threshold needs a kriged lab soil-test P; the "
                "rates here rest on a model estimate without a kriging variance: unset it")
        return None, stp, ""
    critical = rule.critical_ppm
    if rule.soil_test_method != method:
        critical = float(convert_soil_test(np.array([critical]), rule.soil_test_method,
                                           method)[0])
    q = rule.deficiency_probability_threshold
    if realisations is not None:
        from pmap.geostats.simulation import realisation_probability, realisation_quantile

        probability = realisation_probability(realisations, critical)
        quantile = None if q is None else realisation_quantile(realisations, q)
        where = f"{len(realisations)} conditional simulations"
    else:
        mean, variance = interp.kriged_moments()
        probability = rx.deficiency_probability(mean, variance, critical, log=interp.log)
        quantile = None if q is None else rx.stp_quantile(mean, variance, q, log=interp.log)
        where = "kriging distribution"
    if q is None:
        return probability, stp, ""
    note = (f"RISK-AWARE RULE: the rule is applied to the soil-test P that each cell falls "
            f"below with probability {q:g} ({where}), so a cell counts as below "
            f"critical when its probability of deficiency exceeds {q:g}")
    return probability, quantile, note


def _polygons_for(
    patches: list[rx.Patch], labels: np.ndarray, boundary: Any, grid: GridSpec,
    config: FieldConfig,
) -> tuple[dict[int, Any], list[rx.Patch], np.ndarray]:
    """The rate polygons tiling the boundary, and the records and labels that match them.

    Polygons cut below the minimum mapping unit join a neighbour and take its rate; the
    survivors are renumbered 1..n and their areas are the polygons' areas.
    """
    from pmap.io.vectors import coverage_polygons

    polys, merged = coverage_polygons(
        labels, [p.class_id for p in patches], grid, boundary,
        min_area_m2=config.zones.min_mapping_unit_ha * 10_000.0)

    def final(zid: int) -> int:
        while zid in merged:
            zid = merged[zid]
        return zid

    survivors = sorted(polys)
    new_id = {old: k + 1 for k, old in enumerate(survivors)}
    remap = np.zeros(len(patches) + 1, dtype=np.int32)
    for old in range(1, len(patches) + 1):
        remap[old] = new_id[final(old)]
    relabelled = remap[labels]
    n_cells = np.bincount(relabelled.ravel(), minlength=len(survivors) + 1)
    by_id = {p.zone_id: p for p in patches}
    records = [dataclasses.replace(by_id[old], zone_id=new_id[old],
                                   area_ha=polys[old].area / 10_000.0,
                                   n_cells=int(n_cells[new_id[old]]))
               for old in survivors]
    return {new_id[old]: polys[old] for old in survivors}, records, relabelled


#: Physical limits of kriged properties (their units), passed to interpolate(limits=...):
#: ordinary kriging can overshoot them near the edges of the data (e.g. CaCO3 below 0 %
#: beside calcareous patches), and the clipped estimate is the one every output uses.
PROPERTY_LIMITS: dict[str, tuple[float, float]] = {
    "ph": (0.0, 14.0), "total_p": (0.0, np.inf), "stp": (0.0, np.inf), "caco3": (0.0, 100.0),
    "clay": (0.0, 100.0), "base_saturation": (0.0, 100.0), "om": (0.0, 100.0),
    "ca": (0.0, np.inf), "fe": (0.0, np.inf), "al": (0.0, np.inf), "buffer_ph": (0.0, 14.0),
}


def layer_thickness_cm(depth: str) -> float:
    """Thickness (cm) of a sampling depth written ``"0-15"``, ``"5-20 cm"`` or ``"15"``.

    Raises
    ------
    ConfigError
        If the text is not one or two numbers with the second larger.
    """
    numbers = [float(x) for x in re.findall(r"\d+(?:\.\d+)?", depth)]
    if len(numbers) == 1 and numbers[0] > 0:
        return numbers[0]
    if len(numbers) == 2 and numbers[1] > numbers[0]:
        return numbers[1] - numbers[0]
    raise ConfigError(f"field.sampling_depth_cm must read like '0-15' (cm), got {depth!r}")


def soil_inputs_on_grid(estimates: dict[str, np.ndarray], grid: GridSpec,
                 config: FieldConfig) -> SoilInputs:
    """The soil model's per-cell inputs: kriged layers, soil-map and as-applied rasters."""
    from pmap.io.rasters import read_onto_grid

    soil = config.soil
    weathering = None
    if soil.weathering_raster:
        weathering = read_onto_grid(soil.weathering_raster, grid, resampling="nearest",
                                    min_coverage=0.0)[grid.mask]
    recent: np.ndarray | float = soil.recent_p2o5_kg_ha
    if soil.recent_p2o5_raster:
        applied = read_onto_grid(soil.recent_p2o5_raster, grid, resampling="nearest",
                                 min_coverage=0.0)[grid.mask]
        recent = np.where(np.isfinite(applied), applied, soil.recent_p2o5_kg_ha)
    depth = (layer_thickness_cm(config.field.sampling_depth_cm)
             if np.any(np.asarray(recent) > 0) else 15.0)
    return SoilInputs(
        caco3_pct=estimates.get("caco3"), clay_pct=estimates.get("clay"),
        om_pct=estimates.get("om"), base_saturation_pct=estimates.get("base_saturation"),
        ca_mg_kg=estimates.get("ca"), lab_stp_mg_kg=estimates.get("stp"),
        weathering_code=weathering, recent_p2o5_kg_ha=recent, depth_cm=depth)


def _physical_estimates(kriged: dict[str, Interpolation]) -> dict[str, np.ndarray]:
    """The kriged estimate per property, already clipped to ``PROPERTY_LIMITS`` by ``interpolate``."""
    return {name: interp.result.estimate for name, interp in kriged.items()}


def _rate_driver(
    estimates: dict[str, np.ndarray], pools: SoilPools | None, lab_method: str | None,
    config: FieldConfig, calibration_record: dict[str, Any],
) -> tuple[np.ndarray, str, dict[str, Any]]:
    """The soil-test P per cell that drives zones and rates, its method and its provenance.

    Rates from a model estimate need a calibrated model (a [calibration] file written by
    ``pmap calibrate``) or the user's consent (``rates.allow_uncalibrated_model``).
    """
    if "stp" in estimates:
        method = lab_method or config.rates.soil_test_method or "mehlich3_icp"
        return estimates["stp"], method, {
            "source": "measured", "method": method,
            "description": f"measured soil-test P ({method}), kriged",
        }
    if pools is None:  # guarded by require_phosphorus: total P or soil-test P is present
        raise InputError("no soil-test P and no total P: nothing to base rates on")
    calibrated = calibration_record["status"] == "calibrated"
    if not calibrated and not config.rates.allow_uncalibrated_model:
        raise ConfigError(
            "the samples hold no lab soil-test P, so zones and rates would come from the soil "
            "model's estimate of available P, and the model's parameters are its defaults, not "
            "calibrated to this region (on the demo field the defaults move the zone class on "
            "most of the field). Calibrate once per region with `pmap calibrate SAMPLES --out "
            "PARAMS.toml` on samples with total P and a lab soil-test P and pass --config "
            "PARAMS.toml, add a soil-test P column, or accept the uncalibrated estimate with "
            "rates.allow_uncalibrated_model = true")
    equivalent = config.soil_test_equivalent
    basis = ("calibrated parameters" + (f" ({calibration_record.get('source')})"
                                        if calibration_record.get("source") else "")
             if calibrated else "DEFAULT (uncalibrated) parameters, accepted by "
             "rates.allow_uncalibrated_model")
    description = (
        f"MODEL ESTIMATE: the samples hold no soil-test P; the model's available P ({basis}) "
        f"was converted to a {equivalent.method} equivalent (soil_test_equivalent: intercept "
        f"{equivalent.intercept}, slope {equivalent.slope}); confirm with a lab soil test"
    )
    warnings.warn(description, PmapWarning, stacklevel=3)
    return equivalent.to_soil_test(pools.available), equivalent.method, {
        "source": "model estimate", "method": equivalent.method, "description": description,
        "model_parameters": "calibrated" if calibrated else "default",
    }


def model_uncertainty(
    kriged: dict[str, Interpolation], soil_inputs: SoilInputs, partition: Any,
    config: FieldConfig, rule: RateRule, *, calibrated_method: str | None,
    realisations: dict[str, Any] | None = None,
) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Per-cell standard deviation of available P and its probability of deficiency.

    pH and total P are drawn jointly per cell (independently of each other) from their
    kriging distributions (normal, or lognormal where log-kriged; seeded by kriging.seed,
    kriging.realisations draws), or taken from the conditional simulations when
    kriging.probability = 'simulation'; each draw goes through the soil model.  The critical
    level is the rule's, in the units of the model's available P: the calibration's lab
    method when calibrated, else the soil-test equivalent's method.
    """
    tp, ph_interp = kriged.get("total_p"), kriged.get("ph")
    if tp is None or ph_interp is None:
        return {}, {"note": "not computed: needs kriged pH and total P"}
    n = config.kriging.realisations
    equivalent = config.soil_test_equivalent
    basis_method = calibrated_method or equivalent.method
    critical = rule.critical_ppm
    if rule.soil_test_method != basis_method:
        critical = float(convert_soil_test(np.array([critical]), rule.soil_test_method,
                                           basis_method)[0])
    sims = realisations or {}
    if "ph" in sims and "total_p" in sims:
        draws = zip(sims["ph"], sims["total_p"], strict=True)
        source = f"{len(sims['ph'])} conditional simulations of pH and total P"
        n = len(sims["ph"])
    else:
        rng = np.random.default_rng(config.kriging.seed)

        def one(interp: Interpolation) -> np.ndarray:
            mean, variance = interp.kriged_moments()
            z = mean + np.sqrt(np.maximum(variance, 0.0)) * rng.standard_normal(mean.shape)
            lo, hi = PROPERTY_LIMITS.get(interp.name, (-np.inf, np.inf))
            return np.clip(np.exp(z) if interp.log else z, lo, hi)

        draws = ((one(ph_interp), one(tp)) for _ in range(n))
        source = (f"{n} draws per cell from the kriging distributions of pH and total P "
                  f"(seed {config.kriging.seed}; pH and total P drawn independently)")
    total = total_sq = below = high = None
    for ph_r, tp_r in draws:
        drawn = soil_model(ph_r, tp_r, soil_inputs, partition, config.fixation)
        available = drawn.pools.available
        as_test = available if calibrated_method else equivalent.to_soil_test(available)
        if total is None:
            total, total_sq, below, high = (np.zeros(available.shape) for _ in range(4))
        total += available
        total_sq += available**2
        below += as_test < critical
        high += drawn.risk.risk_class == 3
    mean = total / n
    sd = np.sqrt(np.maximum(total_sq / n - mean**2, 0.0) * n / max(n - 1, 1))
    layers = {"available_p_sd": sd, "available_p_deficiency_probability": below / n}
    if "ph" not in sims:  # the simulations give their own figure otherwise
        layers["fixation_high_probability"] = high / n
    return (layers,
            {"source": source, "critical_ppm": critical, "method": basis_method,
             "mean_available_p_sd_mg_kg": float(np.nanmean(sd))})


def _lime_and_environment(
    ph: np.ndarray, estimates: dict[str, np.ndarray], pools: SoilPools | None,
    soil_inputs: SoilInputs, partition: Any, config: FieldConfig, grid: GridSpec,
    patches: list[rx.Patch], labels: np.ndarray, rule: RateRule, *, stp_method: str,
) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Lime rates and classes, the P gained by liming, the low-pH flag and the P saturation ratio.

    Returns the extra layers (2-D) and a record for the summary whose ``patches`` entry is
    the rate polygons after the optional P-saturation cap.
    """
    from pmap.soil import environment, lime

    layers: dict[str, np.ndarray] = {}
    record: dict[str, Any] = {}
    cell_ha = grid.cell_area_ha
    lp = config.lime
    low_ph = lime.p_rate_ph_flag(ph, lp)
    layers["low_ph_flag"] = grid.fill(low_ph.astype(np.uint8), outside=0).astype(np.uint8)
    record["low_ph"] = {"ph_floor": lp.ph_floor_for_p_rates,
                        "area_below_ha": round(float(low_ph.sum()) * cell_ha, 3)}
    if low_ph.any():
        warnings.warn(
            f"{low_ph.sum() * cell_ha:.2f} ha of the field have pH below "
            f"{lp.ph_floor_for_p_rates:g}: P applied there is largely fixed by Fe and Al; "
            "correct the pH (lime) before or with the P (the low_ph_flag layer shows where)",
            PmapWarning, stacklevel=3)
    if lp.method != "off":
        buffer = estimates.get("buffer_ph")
        need = lime.lime_requirement_t_ha(ph, buffer, lp)
        rate = lime.lime_rate_t_ha(need, lp)
        zones = lime.lime_zones(rate, np.isfinite(rate), lp)
        cover = lime.lime_coverage(ph, buffer, lp)
        layers["lime_rate"] = grid.fill(rate)
        layers["lime_zones"] = grid.fill(zones.codes, outside=0).astype(np.uint8)
        record["lime"] = {
            "method": lp.method, "target_ph": lp.target_ph,
            "area_below_target_ha": round(float(cover.below_target) * cell_ha, 3),
            "area_without_buffer_ph_ha": round(float(cover.below_target_without_buffer)
                                               * cell_ha, 3),
            "total_t": round(float(np.nansum(rate)) * cell_ha, 2),
            "classes": [{"class": c.class_code, "label": c.label, "rate_t_ha": c.rate_t_ha,
                         "rate_t_acre": c.rate_t_acre,
                         "area_ha": round(c.cells * cell_ha, 3)} for c in zones.table],
        }
        if cover.below_target_without_buffer:
            record["lime"]["note"] = (
                "no buffer pH in the samples: the lime requirement is not computed where pH "
                "is below the target (no guess is made); add a buffer pH column")
        if pools is not None:
            def available_at(target_ph: np.ndarray) -> np.ndarray:
                return soil_model(target_ph, estimates["total_p"], soil_inputs, partition,
                                  config.fixation).pools.available
            gain = lime.ph_correction_payoff(ph, lp.target_ph, available_at)
            layers["liming_available_p_gain"] = grid.fill(gain)
            record["lime"]["mean_available_p_gain_mg_kg"] = float(np.nanmean(gain))
    ep = config.environment
    if all(k in estimates for k in ("fe", "al", "stp")) and stp_method.startswith("mehlich3"):
        psr = environment.phosphorus_saturation_ratio(estimates["stp"], estimates["fe"],
                                                      estimates["al"])
        psr_class = environment.psr_class(psr, ep)
        layers["p_saturation_ratio"] = grid.fill(psr)
        layers["p_saturation_class"] = grid.fill(psr_class, outside=0).astype(np.uint8)
        record["p_saturation"] = {
            "watch_psr": ep.watch_psr, "high_psr": ep.high_psr,
            "area_ha": {label: round(float((psr_class == code).sum()) * cell_ha, 3)
                        for code, label in environment.PSR_CLASS_LABELS.items()},
            "rates_capped": ep.cap_rates,
        }
        if ep.cap_rates:
            psr2d = grid.fill(psr)
            capped = []
            for i, p in enumerate(patches):
                mean_psr = float(np.nanmean(psr2d[labels == p.zone_id])) if p.n_cells else np.nan
                if np.isfinite(mean_psr) and mean_psr >= ep.high_psr and \
                        p.p2o5_kg_ha > ep.capped_rate_kg_ha:
                    product, p2o5, nitrogen = (float(np.ravel(v)[0]) for v in
                                               rate_rules.product_rates(
                                                   np.array([ep.capped_rate_kg_ha]), rule))
                    patches[i] = dataclasses.replace(p, p2o5_kg_ha=p2o5, product_kg_ha=product,
                                                     n_kg_ha=nitrogen)
                    capped.append(p.zone_id)
            record["p_saturation"]["capped_zone_ids"] = capped
            if capped:
                warnings.warn(
                    f"{len(capped)} rate polygons with mean P saturation ratio >= "
                    f"{ep.high_psr:g} were capped at {ep.capped_rate_kg_ha:g} kg P2O5/ha "
                    "(environment.cap_rates)", PmapWarning, stacklevel=3)
    elif ep.cap_rates:
        raise ConfigError("environment.cap_rates needs Mehlich-3 P, Fe and Al in the samples "
                          "(the P saturation ratio is defined for Mehlich-3 only)")
    record["patches"] = list(patches)
    return layers, record


def _soil_inputs_at_samples(samples: SampleTable, config: FieldConfig) -> dict[str, Any]:
    """The soil map's weathering class and the recent P additions at each sample.

    The same rasters and field-wide values as :func:`soil_inputs_on_grid` gives the map, read at
    the sample points, so that calibration sees the model the run applies.  The labile
    share of fresh P is the EPIC PSP of new P at the starting parameters.
    """
    from pmap.io.rasters import sample_at_points

    soil = config.soil
    out: dict[str, Any] = {}
    if soil.weathering_raster:
        out["weathering_code"] = sample_at_points(soil.weathering_raster, samples.coords,
                                                  samples.crs)
    recent = np.full(len(samples.ids), float(soil.recent_p2o5_kg_ha))
    if soil.recent_p2o5_raster:
        applied = sample_at_points(soil.recent_p2o5_raster, samples.coords, samples.crs)
        recent = np.where(np.isfinite(applied), applied, soil.recent_p2o5_kg_ha)
    if np.any(recent > 0):
        values = samples.values
        inputs = SoilInputs(
            caco3_pct=values.get("caco3"), clay_pct=values.get("clay"), om_pct=values.get("om"),
            base_saturation_pct=values.get("base_saturation"), ca_mg_kg=values.get("ca"),
            lab_stp_mg_kg=values.get("stp"), weathering_code=out.get("weathering_code"),
            recent_p2o5_kg_ha=recent,
            depth_cm=layer_thickness_cm(config.field.sampling_depth_cm))
        model = soil_model(values["ph"], values.get("total_p"), inputs, soil, config.fixation)
        out["recent_p_mg_kg"] = recent_p_mg_kg(recent, inputs.depth_cm, soil.bulk_density_g_cm3)
        out["fresh_labile_fraction"] = model.fresh_labile_fraction
    return out


def calibrate_in_run(
    samples: SampleTable, config: FieldConfig, rule: RateRule | None = None,
) -> tuple[Any, Any, dict[str, Any]]:
    """The soil model's parameters for this run, calibrated to the samples' own lab pairs.

    When ``calibration.auto`` is on and the samples hold pH, total P and a lab soil-test P
    together, the partition is calibrated to them (starting from ``[soil]``); a refusal (too
    few pairs, nothing identifiable) keeps ``[soil]`` and says why.

    Returns
    -------
    partition : PartitionParams
    calibration : pmap.soil.calibration.Calibration or None
    record : dict
        ``status`` ("calibrated", "default" or "refused"), where the parameters come from,
        and the calibration's figures.
    """
    from pmap.soil.calibration import calibrate_partition

    settings = config.calibration
    record: dict[str, Any] = {"status": settings.status, "method": settings.method}
    if settings.status == "calibrated":
        record["source"] = f"config file, {settings.record.get('samples', 'pmap calibrate')}"
        record["record"] = dict(settings.record)
    values = samples.values
    if not (settings.auto and "stp" in values and "total_p" in values):
        record.setdefault("note", "no in-run calibration: the samples do not hold total P and a "
                          "lab soil-test P together" if settings.auto else
                          "in-run calibration switched off (calibration.auto = false)")
        return config.soil, None, record
    try:
        at_samples = _soil_inputs_at_samples(samples, config)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            cal = calibrate_partition(
                values["ph"], values["total_p"], values["stp"], config.soil,
                caco3_pct=values.get("caco3"), clay_pct=values.get("clay"),
                om_pct=values.get("om"), ca_mg_kg=values.get("ca"), **at_samples,
                k_folds=settings.k_folds, seed=settings.seed, min_pairs=settings.min_pairs,
                candidates=settings.fit)
    except PmapError as exc:
        message = (f"{samples.source}: the soil model was not calibrated to the lab's pairs "
                   f"({exc}); it runs with the [soil] parameters")
        warnings.warn(message, PmapWarning, stacklevel=3)
        return config.soil, None, {**record, "status": "refused", "reason": str(exc)}
    record = {**cal.as_dict(), "status": "calibrated", "fit": cal.method,
              "method": samples.stp_method,
              "source": f"this run, {cal.n_pairs} lab pairs of {Path(samples.source).name}"}
    if rule is not None:
        critical = rule.critical_ppm
        record["samples_below_critical"] = {
            "critical_ppm": critical, "lab": int((cal.observed < critical).sum()),
            "default_model": int((cal.default_predictions < critical).sum()),
            "calibrated_model": int((cal.predictions < critical).sum())}
    log.info("soil model calibrated to %d pairs: CV RMSE %.3g mg/kg (default %.3g)",
             cal.n_pairs, cal.cv_rmse, cal.default_rmse)
    return cal.params, cal, record
