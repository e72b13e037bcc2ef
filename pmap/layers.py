"""The catalogue of output layers: what each raster and map is called, its unit and colours.

One entry per layer a run can write (:data:`LAYERS`); :func:`layer_info` adds the
``<property>_variance`` and ``<property>_std_error`` layers of every kriged property and the
run's own zone classes.  The GeoTIFF writer and the map drawer read the same entries, so a
raster and its picture never disagree on a title or a unit.
"""

from __future__ import annotations

from dataclasses import dataclass

from pmap.io import rasters
from pmap.prescribe.prescription import NOT_SAMPLED
from pmap.soil.environment import PSR_CLASS_LABELS
from pmap.soil.fixation import MECHANISM_LABELS, RISK_CLASS_LABELS
from pmap.soil.lime import class_labels as lime_class_labels

__all__ = ["LAYERS", "LayerInfo", "layer_info", "hex_to_rgba", "LIME_COLOURS",
           "MODEL_LAYERS", "PRESCRIPTION_LAYERS", "LIME_LAYERS", "PROBABILITY_LAYERS"]


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
_THREE_ZONE_COLOURS = {1: "#D55E00", 2: "#009E73", 3: "#0072B2"}
_NOT_SAMPLED_COLOUR = "#BBBBBB"
_MECHANISM_COLOURS = {1: "#D55E00", 2: "#0072B2", 3: "#CC79A7", 4: "#009E73"}
_RISK_COLOURS = {1: "#F0E442", 2: "#E69F00", 3: "#882255"}
LIME_COLOURS = {1: "#DDDDDD", 2: "#56B4E9", 3: "#0072B2", 4: "#332288", 5: "#000000",
                 6: "#000000", 7: "#000000"}

#: Every layer pmap can write: name -> LayerInfo.  Kriged properties get a ``_variance``.
LAYERS: dict[str, LayerInfo] = {
    "ph": LayerInfo("Soil pH (kriged)", "pH units", "cividis"),
    "total_p": LayerInfo("Total P (kriged)", "mg/kg"),
    "stp": LayerInfo("Soil-test P (kriged)", "mg/kg"),
    "caco3": LayerInfo("CaCO3 (kriged)", "%", "cividis"),
    "clay": LayerInfo("Clay (kriged)", "%", "cividis"),
    "base_saturation": LayerInfo("Base saturation (kriged)", "%", "cividis"),
    "om": LayerInfo("Organic matter (kriged)", "%", "cividis"),
    "ca": LayerInfo("Ca, Mehlich-3 (kriged)", "mg/kg", "cividis"),
    "fe": LayerInfo("Fe, Mehlich-3 (kriged)", "mg/kg", "cividis"),
    "al": LayerInfo("Al, Mehlich-3 (kriged)", "mg/kg", "cividis"),
    "buffer_ph": LayerInfo("Buffer pH (kriged)", "pH units", "cividis"),
    "available_p": LayerInfo("Plant-available P (model)", "mg/kg"),
    "fe_al_p": LayerInfo("Fe/Al-bound P (model)", "mg/kg", "magma"),
    "ca_p": LayerInfo("Ca-bound P (model)", "mg/kg", "magma"),
    "occluded_p": LayerInfo("Occluded P (model)", "mg/kg", "magma"),
    "organic_p": LayerInfo("Organic P (model)", "mg/kg", "magma"),
    "available_p_sd": LayerInfo("Standard deviation of available P (model, from kriging)",
                                "mg/kg", "magma"),
    "available_p_deficiency_probability": LayerInfo(
        "Probability available P is below the critical level (model)", "probability 0-1",
        "cividis"),
    "stp_equivalent": LayerInfo("Soil-test P equivalent (MODEL ESTIMATE)", "mg/kg"),
    "fixation_risk": LayerInfo("Fixation risk of applied P", "index 0-1", "magma"),
    "fixation_mechanism": LayerInfo(
        "Fixation mechanism", "class", classes=MECHANISM_LABELS, colours=_MECHANISM_COLOURS),
    "fixation_class": LayerInfo(
        "Fixation risk class", "class", classes=RISK_CLASS_LABELS, colours=_RISK_COLOURS),
    "stp_deficiency_probability": LayerInfo(
        "Probability soil-test P is below the critical level", "probability 0-1", "cividis"),
    "fixation_high_probability": LayerInfo(
        "Probability of high fixation risk (model)", "probability 0-1",
        "cividis"),
    "low_ph_flag": LayerInfo("P rates on ground below the pH floor", "class",
                             classes={0: "pH at or above the floor", 1: "pH below the floor"},
                             colours={0: "#DDDDDD", 1: "#882255"}),
    "lime_rate": LayerInfo("Lime rate to the target pH", "t/ha", "cividis"),
    "lime_zones": LayerInfo("Lime-rate classes", "class"),
    "liming_available_p_gain": LayerInfo("Available P gained if pH reached the target (model)",
                                         "mg/kg", "viridis"),
    "p_saturation_ratio": LayerInfo("P saturation ratio, Mehlich-3 (molar)", "ratio",
                                    "magma"),
    "p_saturation_class": LayerInfo("P saturation class", "class", classes=PSR_CLASS_LABELS,
                                    colours=_RISK_COLOURS),
    "zones": LayerInfo("Soil-test P zones", "class"),
    "p2o5_rate": LayerInfo("P2O5 rate per cell", "kg P2O5/ha", "viridis"),
    "p2o5_zone_rate": LayerInfo("P2O5 rate by zone (prescription)", "kg P2O5/ha", "viridis"),
    "product_zone_rate": LayerInfo("Product rate by zone (prescription)", "kg product/ha",
                                   "viridis"),
}


#: Layers computed by the soil model (their basis is the calibrated or the default model).
MODEL_LAYERS: tuple[str, ...] = (
    "available_p", "fe_al_p", "ca_p", "occluded_p", "organic_p", "available_p_sd",
    "available_p_deficiency_probability", "fixation_risk", "fixation_mechanism",
    "fixation_class", "fixation_high_probability", "liming_available_p_gain")
#: Layers that carry P advice, so their maps carry the basis of the rates and the cautions.
PRESCRIPTION_LAYERS: tuple[str, ...] = (
    "zones", "p2o5_rate", "p2o5_zone_rate", "product_zone_rate", "stp_equivalent",
    "stp_deficiency_probability")
#: Layers that carry lime advice (cautions too).
LIME_LAYERS: tuple[str, ...] = ("lime_rate", "lime_zones", "low_ph_flag")
#: Probability layers: drawn on a fixed 0-1 scale.
PROBABILITY_LAYERS: tuple[str, ...] = (
    "stp_deficiency_probability", "available_p_deficiency_probability",
    "fixation_high_probability")


def layer_info(name: str, zone_labels: tuple[str, ...] | None = None,
               lime_breaks_t_ha: tuple[float, ...] | None = None) -> LayerInfo:
    """Description of a layer, including ``<property>_variance`` and ``_std_error`` layers.

    ``zone_labels`` name the zone classes (the run's interpretation table); the zone
    layer also holds code 255 for cells too far from every sample ("not sampled").
    ``lime_breaks_t_ha`` (``lime.zone_breaks_t_ha``) name the lime-rate classes.
    """
    if name == "zones":
        labels = tuple(zone_labels or ())
        classes = {i + 1: label for i, label in enumerate(labels)}
        if len(labels) == 3:
            colours = dict(_THREE_ZONE_COLOURS)
        elif len(labels) == 5:
            colours = dict(_ZONE_COLOURS)
        else:
            colours = {k: "#{:02x}{:02x}{:02x}".format(*rgba[:3])
                       for k, rgba in rasters.class_colours(list(classes)).items()}
        classes[NOT_SAMPLED] = "not sampled (no rate)"
        colours[NOT_SAMPLED] = _NOT_SAMPLED_COLOUR
        return LayerInfo(LAYERS["zones"].title, "class", classes=classes, colours=colours)
    if name == "lime_zones" and lime_breaks_t_ha is not None:
        labels = lime_class_labels(lime_breaks_t_ha)
        return LayerInfo(LAYERS[name].title, "class",
                         classes={i + 1: t for i, t in enumerate(labels)},
                         colours={i + 1: LIME_COLOURS.get(i + 1, "#000000")
                                  for i in range(len(labels))})
    if name.endswith("_variance"):
        base = LAYERS[name[: -len("_variance")]]
        unit = "pH units^2" if base.unit == "pH units" else f"({base.unit})^2"
        return LayerInfo(base.title.replace("(kriged)", "kriging variance"), unit, "magma")
    if name.endswith("_std_error"):
        base = LAYERS[name[: -len("_std_error")]]
        return LayerInfo(base.title.replace("(kriged)", "kriging standard error"), base.unit,
                         "magma")
    return LAYERS[name]


def hex_to_rgba(colour: str) -> tuple[int, int, int, int]:
    """``"#rrggbb"`` as an opaque RGBA tuple of 0-255 integers (a GeoTIFF colour map entry)."""
    colour = colour.lstrip("#")
    return (int(colour[0:2], 16), int(colour[2:4], 16), int(colour[4:6], 16), 255)


