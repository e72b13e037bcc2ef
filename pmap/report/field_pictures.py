"""The review pictures of one field's run: what each map shows, and the sheets.

:func:`draw_field_pictures` decides, for every layer of a :class:`~pmap.pipeline.FieldResult`,
how its map is drawn (colour range, class breaks, legend, zone outlines, rate table,
footnote) and draws it with :mod:`pmap.report.maps`; then the variograms, the calibration,
one diagnostics page per kriged property (:mod:`pmap.report.sheets`) and the one-page
overview.  ``output.maps`` chooses how much: ``"all"``, ``"overview"`` or ``"none"``.

Rules the pictures keep:

- discrete things get discrete legends: zone rates, classes and mechanisms;
- an index or a probability is drawn on a fixed 0-1 scale with its class breaks marked, so
  two fields compare at a glance;
- uncertainty is shown as the kriging standard error in the property's unit (the
  variance stays in the GeoTIFF);
- every map derived from the soil model says whether the model was calibrated, and every
  map that carries advice (P or lime) carries the basis of the rates and the caution.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pmap.cautions import CAUTIONS, CAUTIONS_SHORT
from pmap.layers import (
    LIME_LAYERS,
    MODEL_LAYERS,
    PRESCRIPTION_LAYERS,
    PROBABILITY_LAYERS,
    layer_info,
)
from pmap.prescribe.prescription import BASIS_MEASURED

if TYPE_CHECKING:
    from pmap.results import FieldInputs, FieldResult

__all__ = ["METHOD_NAMES", "OVERVIEW_PNG", "OVERVIEW_PDF", "DIAGNOSTICS_PDF",
           "draw_field_pictures", "picture_layers", "model_basis", "rates_basis", "map_kwargs",
           "zone_class_labels"]

log = logging.getLogger(__name__)

#: File names of the sheets inside a run directory.
OVERVIEW_PNG = "overview.png"
OVERVIEW_PDF = "overview.pdf"
DIAGNOSTICS_PDF = "diagnostics.pdf"

#: Soil-test method keys in words, for legends and tables.
METHOD_NAMES: dict[str, str] = {
    "mehlich3_icp": "Mehlich-3 (ICP)",
    "mehlich3_colorimetric": "Mehlich-3 (colorimetric)",
    "bray1": "Bray-1",
    "olsen": "Olsen",
}

#: Layers whose maps are drawn by distinct value (a prescription has few rates).
_DISCRETE_RATE_LAYERS = ("p2o5_zone_rate", "product_zone_rate")
#: Most candidate rows printed under a variogram plot (all are in summary.json).
_TABLE_ROWS = 12


def _subtitle(result: FieldResult, *extra: str) -> str:
    """Farm, sampling date and any extra words, joined for a subtitle."""
    field = result.config.field
    parts = (field.farm, f"sampled {field.sampling_date}" if field.sampling_date else "", *extra)
    return " | ".join(s for s in parts if s)


def method_name(method: str | None) -> str:
    """A soil-test method key in words (unknown keys as given)."""
    if not method:
        return "method not stated"
    return METHOD_NAMES.get(str(method), str(method))


# --------------------------------------------------------------------------- basis texts


def model_basis(result: FieldResult) -> str:
    """One sentence: is the soil model behind the model layers calibrated, and to what."""
    cal = (result.soil or {}).get("calibration") or {}
    status = cal.get("status")
    if status == "calibrated":
        return f"Soil model: calibrated ({cal.get('source', 'calibration file')})."
    if status == "refused":
        return ("Soil model: DEFAULT parameters, not calibrated to this field (calibration "
                f"refused: {cal.get('reason', 'see summary.json')}).")
    return "Soil model: DEFAULT parameters, not calibrated to this field's lab results."


def rates_basis(result: FieldResult) -> str:
    """What the rates rest on, the class table, and any flat-rate or risk-rule notice."""
    basis = result.prescription["basis"]
    interp = result.interpretation
    text = (f"Rates rest on: {basis.upper()} ({result.stp_source['description']}); classes: "
            f"{interp.region} {method_name(interp.method)}, critical "
            f"{interp.critical_ppm:g}, limit {interp.limit_ppm:g} mg/kg.")
    if result.prescription.get("single_rate_notice"):
        text += " " + result.prescription["single_rate_notice"] + "."
    if result.stp_source.get("risk_aware_rule"):
        text += " " + result.stp_source["risk_aware_rule"] + "."
    return text


def _footnote(name: str, result: FieldResult) -> str:
    """The small print of one layer's map: its basis and, where it advises, the caution."""
    base = name[: -len("_std_error")] if name.endswith("_std_error") else name
    parts = []
    if name in PRESCRIPTION_LAYERS:
        parts.append(rates_basis(result))
        if result.prescription["basis"] != BASIS_MEASURED:
            parts.append(model_basis(result))
    elif base in MODEL_LAYERS:
        parts.append(model_basis(result))
    elif name in LIME_LAYERS:
        lime = (result.soil or {}).get("lime") or {}
        if lime:
            parts.append(f"Lime to pH {lime.get('target_ph', float('nan')):g} by the "
                         f"{lime.get('method', '')} method.")
    if (name in PRESCRIPTION_LAYERS or base in MODEL_LAYERS or name in LIME_LAYERS
            or name == "liming_available_p_gain"):
        parts.append(CAUTIONS_SHORT)
    return " ".join(parts)


# --------------------------------------------------------------------------- legends


def zone_class_labels(result: FieldResult) -> dict[int, str] | None:
    """Zone class id -> label with its soil-test range in mg/kg, when zones are the
    interpretation table's classes; None when they are not (e.g. clusters)."""
    interp = result.interpretation
    labels = tuple(result.prescription["zone_labels"])
    if labels != tuple(interp.labels):
        return None
    edges = [None, *interp.breaks, None]
    out = {}
    for k, label in enumerate(labels):
        lo, hi = edges[k], edges[k + 1]
        if lo is None:
            span = f"< {hi:g}"
        elif hi is None:
            span = f">= {lo:g}"
        else:
            span = f"{lo:g}-{hi:g}"
        out[k + 1] = f"{label}: {span} mg/kg"
    return out


def _discrete_rates(array: np.ndarray, unit: str) -> tuple[np.ndarray, dict[int, str]]:
    """Code a zone-rate raster by its distinct rates, for a legend with one entry per rate."""
    values = np.asarray(array, dtype=float)
    rates = sorted({round(float(v), 6) for v in values[np.isfinite(values)]})
    codes = np.zeros(values.shape, dtype=np.uint8)
    for k, rate in enumerate(rates[:250], start=1):
        codes[np.isclose(values, rate)] = k
    return codes, {k: f"{rate:g} {unit}" for k, rate in enumerate(rates[:250], start=1)}


def _zone_outlines(result: FieldResult) -> list[tuple[str, Any]]:
    return [(str(p.zone_id), result.polygons[p.zone_id]) for p in result.patches
            if p.zone_id in result.polygons]


def rate_table(result: FieldResult) -> tuple[list[str], list[list[str]]]:
    """Header and rows of the rate polygons: zone, class, area, P2O5 rate, product rate."""
    product = result.prescription.get("product") or "product"
    header = ["zone", "class", "area (ha)", "P2O5 (kg/ha)", f"{product} (kg/ha)"]
    rows = [[str(p.zone_id), p.class_label, f"{p.area_ha:.2f}", f"{p.p2o5_kg_ha:.4g}",
             f"{p.product_kg_ha:.4g}"] for p in result.patches]
    return header, rows


def map_kwargs(name: str, array: np.ndarray, result: FieldResult) -> dict[str, Any]:
    """How one layer's map is drawn: the keywords of :func:`pmap.report.maps.layer_figure`
    (without the grid, samples, boundary and subtitle)."""
    config = result.config
    info = layer_info(name, tuple(result.prescription["zone_labels"]),
                      config.lime.zone_breaks_t_ha)
    interp = result.interpretation
    method = method_name(interp.method)
    kw: dict[str, Any] = {"title": f"{config.field.name}: {info.title}", "unit": info.unit,
                          "classes": info.classes, "colours": info.colours, "cmap": info.cmap}
    if name == "lime_zones":
        kw["legend_title"] = "lime rate (t/ha)"
    if name in _DISCRETE_RATE_LAYERS:
        shown, classes = _discrete_rates(array, info.unit)
        kw.update(array=shown, classes=classes, colours=None,
                  legend_title="P2O5 rate" if name == "p2o5_zone_rate" else
                  f"{result.prescription.get('product') or 'product'} rate",
                  zone_outlines=_zone_outlines(result), table=rate_table(result))
    if name == "zones":
        ranged = zone_class_labels(result)
        classes = dict(kw["classes"])
        if ranged is not None:
            classes.update(ranged)
        kw.update(classes=classes, zone_outlines=_zone_outlines(result),
                  legend_title=f"soil-test P class, {method}, {interp.region}")
    if name in ("stp", "stp_equivalent"):
        kw.update(unit=f"mg/kg, {method}", class_breaks=list(interp.breaks))
    if name in PROBABILITY_LAYERS:
        kw.update(vmin=0.0, vmax=1.0)
    if name == "fixation_risk":
        kw.update(vmin=0.0, vmax=1.0, class_breaks=list(config.fixation.class_breaks))
    if name == "p_saturation_ratio":
        env = config.environment
        finite = np.asarray(array, dtype=float)
        top = float(np.nanmax(finite)) if np.isfinite(finite).any() else 0.0
        kw.update(vmin=0.0, vmax=max(2.0 * env.high_psr, top),
                  class_breaks=[env.watch_psr, env.high_psr])
    if name.endswith("_std_error") or name in ("available_p_sd", "lime_rate"):
        kw.update(vmin=0.0)
    kw.setdefault("array", array)
    kw["footnote"] = _footnote(name, result)
    return kw


# --------------------------------------------------------------------------- variograms


def _model_text(interp: Any) -> str:
    """One line describing a fitted variogram and its cross-validation, for plots."""
    m, cv = interp.model, interp.cv
    shape = f", shape {m.shape:.2f}" if m.shape is not None else ""
    aniso = (f", anisotropy {m.ratio:.2f} at {m.angle:.0f} deg" if m.anisotropic else "")
    hood = interp.neighbourhood
    where = (f", {hood.neighbours} nearest samples" if hood is not None and hood.kind == "local"
             else "")
    return (f"{'log ' if interp.log else ''}{m.kind}: nugget {m.nugget:.3g}, partial sill "
            f"{m.psill:.3g}, range {m.range:.0f} m{shape}{aniso}{where}"
            f" | n = {cv.n}, LOO RMSE {cv.rmse:.3g}, MSDR {cv.msdr:.2f}")


def _candidate_table(interp: Any) -> list[str]:
    """Rows of every candidate's figures for the variogram plot, best RMSE first."""
    rows = [c for c in interp.candidates if c.cv is not None]
    if len(interp.candidates) < 2:
        return []
    rows.sort(key=lambda c: c.cv.rmse)
    lines = [f"chosen: {interp.selection}",
             f"  {'candidate':<58} {'LOO RMSE':>9} {'MSDR':>6}"]
    for c in rows[:_TABLE_ROWS]:
        mark = "*" if (c.model == interp.model and c.log == interp.log) else " "
        lines.append(f"{mark} {c.label:<58} {c.cv.rmse:>9.4g} {c.cv.msdr:>6.2f}")
    skipped = [c for c in interp.candidates if c.skipped]
    more = len(rows) - _TABLE_ROWS
    if more > 0 or skipped:
        lines.append(f"  ({max(more, 0)} more and {len(skipped)} skipped: see summary.json)")
    return lines


def _property_title(name: str) -> str:
    return layer_info(name).title.replace(" (kriged)", "")


# --------------------------------------------------------------------------- drawing


def picture_layers(result: FieldResult) -> dict[str, np.ndarray]:
    """The layers that get a map, in run order: each ``<property>_variance`` replaced by
    ``<property>_std_error``, its square root (property units)."""
    out: dict[str, np.ndarray] = {}
    for name, array in result.layers.items():
        if name.endswith("_variance"):
            variance = np.asarray(array, dtype=float)
            out[f"{name[: -len('_variance')]}_std_error"] = np.sqrt(np.clip(variance, 0.0, None))
        else:
            out[name] = array
    return out


@contextmanager
def _timed(timings: dict[str, float], key: str) -> Iterator[None]:
    """Record the seconds the block takes under ``key``."""
    start = time.perf_counter()
    yield
    timings[key] = time.perf_counter() - start


def draw_field_pictures(result: FieldResult, inputs: FieldInputs, root: Path) -> tuple[
        dict[str, str], dict[str, float]]:
    """Draw the review pictures of one field into ``root`` (a run's staging directory).

    ``result.config.output.maps`` chooses what: ``"all"`` draws ``maps/<layer>.png`` for
    every layer (``maps/<property>_std_error.png`` for a kriging variance), the
    variograms, the calibration, ``diagnostics/diagnostics_<property>.png`` with
    ``diagnostics.pdf``, and ``overview.png`` with ``overview.pdf``; ``"overview"`` only
    the two overview files; ``"none"`` nothing.

    Returns
    -------
    outputs : dict of str to str
        Relative path -> description of every file written.
    timings : dict of str to float
        Relative path -> seconds spent drawing and writing it.
    """
    from pmap.report import maps, sheets

    mode = result.config.output.maps
    outputs: dict[str, str] = {}
    timings: dict[str, float] = {}
    if mode == "none":
        return outputs, timings
    config = result.config
    grid = result.grid
    samples_xy = inputs.samples.coords
    common = {"samples_xy": samples_xy, "boundary": inputs.boundary,
              "subtitle": _subtitle(result)}
    if mode == "all":
        (root / "maps").mkdir(parents=True, exist_ok=True)
        layers = picture_layers(result)
        for name, array in layers.items():
            kw = map_kwargs(name, array, result)
            shown = kw.pop("array")
            rel = f"maps/{name}.png"
            with _timed(timings, rel):
                maps.plot_layer(root / rel, shown, grid, **common, **kw)
            outputs[rel] = f"review map of {kw['title'].split(': ', 1)[-1]}"
        for name, interp in result.interpolations.items():
            emp = interp.empirical
            rel = f"maps/variogram_{name}.png"
            with _timed(timings, rel):
                maps.plot_variogram(
                    root / rel, emp.lag, emp.gamma, emp.count, interp.model,
                    title=f"{config.field.name}: variogram of "
                    + ("log " if interp.log else "") + _property_title(name),
                    unit=("log units" if interp.log else layer_info(name).unit),
                    subtitle=_model_text(interp),
                    candidates=[(c.label, c.model) if c.log == interp.log else (c.label, None)
                                for c in interp.candidates
                                if not (c.model == interp.model and c.log == interp.log)],
                    table=_candidate_table(interp))
            outputs[rel] = f"empirical and fitted variogram of {name}, every candidate's figures"
        method_label = method_name(inputs.samples.stp_method)
        if result.calibration is not None:
            from pmap.report.calibration_plot import plot_calibration

            rel = "maps/calibration.png"
            with _timed(timings, rel):
                plot_calibration(result.calibration, root / rel, method_label=method_label,
                                 title=f"{config.field.name}: soil model calibrated to the "
                                 "lab's soil-test P")
            outputs[rel] = "soil model against the lab's soil-test P"
        props = _diagnostics(result, layers)
        if props:
            with _timed(timings, DIAGNOSTICS_PDF):
                written = sheets.write_diagnostics(
                    root / DIAGNOSTICS_PDF, root / "diagnostics", properties=props, grid=grid,
                    boundary=inputs.boundary, title=config.field.name,
                    calibration=result.calibration, paper=config.output.paper,
                    calibration_method_label=method_label)
            for path in written[:-1]:
                outputs[f"diagnostics/{path.name}"] = (
                    f"diagnostics of {path.stem[len('diagnostics_'):]}: variogram, "
                    "cross-validation, standard-error map, histogram, every candidate's figures")
            outputs[DIAGNOSTICS_PDF] = ("the diagnostics pages in one PDF"
                                        + (", with the calibration page"
                                           if result.calibration is not None else ""))
    with _timed(timings, OVERVIEW_PNG):
        sheets.write_overview(root / OVERVIEW_PNG, root / OVERVIEW_PDF,
                              **overview_content(result, inputs))
    outputs[OVERVIEW_PNG] = ("one-page overview: rate map with its table, soil-test P, pH, "
                             "fixation risk, totals, basis and cautions")
    outputs[OVERVIEW_PDF] = f"the overview as a one-page {config.output.paper.upper()} PDF"
    for rel, seconds in timings.items():
        log.debug("%s: drew %s in %.2f s", config.field.name, rel, seconds)
    return outputs, timings


def _diagnostics(result: FieldResult, layers: dict[str, np.ndarray]) -> list[Any]:
    """One diagnostics page's content per kriged property (constant properties have none);
    ``layers`` as :func:`picture_layers` gives them (with the standard errors)."""
    from pmap.report.sheets import PropertyDiagnostics

    pages = []
    for name, interp in result.interpolations.items():
        values, coords = interp.sample_values, interp.sample_coords
        if (interp.kind != "kriged" or values is None or coords is None
                or len(values) != len(interp.cv.errors)):
            continue
        pages.append(PropertyDiagnostics(
            name=name, title=_property_title(name), unit=layer_info(name).unit,
            lags=interp.empirical.lag, gamma=interp.empirical.gamma,
            counts=interp.empirical.count, model=interp.model, log=interp.log,
            observed=np.asarray(values, dtype=float),
            predicted=np.asarray(values, dtype=float) + np.asarray(interp.cv.errors),
            samples_xy=np.asarray(coords, dtype=float),
            standard_error=layers[f"{name}_std_error"],
            figures_lines=_candidate_table(interp) or [_model_text(interp)],
            summary_lines=[_model_text(interp)]))
    return pages


def totals_lines(result: FieldResult) -> list[str]:
    """The field totals in words: area, P2O5, product, cost when priced, lime when mapped."""
    t = result.totals
    lines = [f"Area: {t['area_ha']:.2f} ha"
             + (f" ({t['area_without_rate_ha']:.2f} ha not sampled, no rate)"
                if t.get("area_without_rate_ha") else ""),
             f"P2O5: {t['p2o5_total_kg']:,.0f} kg (mean {t['mean_p2o5_kg_ha']:.0f} kg/ha)",
             f"Product: {t['product_total_kg']:,.0f} kg {t.get('product', '')}".rstrip()]
    if t.get("product_cost") is not None:
        lines.append(f"Cost: {t['product_cost']:,.0f} {t.get('currency', '')}".rstrip())
    lime = (result.soil or {}).get("lime") or {}
    if lime.get("total_t") is not None:
        lines.append(f"Lime to pH {lime['target_ph']:g}: {lime['total_t']:,.1f} t "
                     f"({lime.get('area_below_target_ha', 0):.2f} ha below target)")
    return lines


def overview_content(result: FieldResult, inputs: FieldInputs) -> dict[str, Any]:
    """The keywords of :func:`pmap.report.sheets.overview_figure` for one field."""
    from pmap.report.sheets import MapPanel

    config = result.config
    panels = []
    rate_kw = map_kwargs("p2o5_zone_rate", result.layers["p2o5_zone_rate"], result)
    panels.append(MapPanel(rate_kw["array"], "P2O5 rate by zone (prescription)", rate_kw["unit"],
                           classes=rate_kw["classes"], colours=rate_kw["colours"],
                           zone_outlines=rate_kw["zone_outlines"],
                           legend_title=rate_kw["legend_title"]))
    stp_name = "stp" if "stp" in result.layers else "stp_equivalent"
    if stp_name in result.layers:
        kw = map_kwargs(stp_name, result.layers[stp_name], result)
        title = ("Soil-test P (kriged)" if stp_name == "stp"
                 else "Soil-test P equivalent (model estimate)")
        panels.append(MapPanel(kw["array"], title, kw["unit"], cmap=kw["cmap"],
                               class_breaks=kw.get("class_breaks")))
    if "ph" in result.layers:
        kw = map_kwargs("ph", result.layers["ph"], result)
        panels.append(MapPanel(kw["array"], "Soil pH (kriged)", kw["unit"], cmap=kw["cmap"]))
    if "fixation_risk" in result.layers:
        kw = map_kwargs("fixation_risk", result.layers["fixation_risk"], result)
        panels.append(MapPanel(kw["array"], "Fixation risk of applied P", kw["unit"],
                               cmap=kw["cmap"], vmin=0.0, vmax=1.0,
                               class_breaks=kw["class_breaks"]))
    basis = rates_basis(result) + " " + model_basis(result)
    subtitle = _subtitle(result, result.prescription.get("product") or "")
    return {"grid": result.grid, "boundary": inputs.boundary,
            "samples_xy": inputs.samples.coords,
            "title": f"{config.field.name}: P prescription overview", "subtitle": subtitle,
            "panels": panels, "table": rate_table(result), "totals_lines": totals_lines(result),
            "basis": basis, "cautions": CAUTIONS, "paper": config.output.paper}
