"""Fixation risk of newly applied P: index, dominant mechanism and risk class.

The index is ``1 - PSP_new``, the expected fraction of fresh fertilizer P that becomes
unavailable.  Two models of ``PSP_new`` sit behind one interface (``[fixation] model``):

* ``"published"`` (default): the EPIC equations of Jones et al. (1984) for the soil's group,
  as published.  Calcareous cells (CaCO3 >= ``calcareous_min_caco3_pct``) take the
  calcareous equation; otherwise the slightly weathered equation (from the lab's soil-test
  P, or the model's available P), the moderately weathered one at the cell's pH and base
  saturation, or the highly weathered one from clay.  The slightly and highly weathered
  equations carry no pH term, so below the peak their PSP falls with pmap's acid arm.
  Above the availability peak a
  non-calcareous cell's PSP falls with pmap's alkaline arm, scaled by the calcium supply:
  the one thing the published equations leave out.
* ``"curve"``: ``PSP_top * B(pH)``, the group's EPIC PSP at the best pH times the
  normalised availability curve of :mod:`pmap.soil.availability`, capped by the calcareous
  PSP where CaCO3 > 0 (pmap's first model, kept for comparison).

The mechanism compares the Fe/Al weight (acid arm strength) with the Ca weight (alkaline
arm strength times the calcium supply from CaCO3 and Ca); where both stay below
``neutral_strength`` the ground is near-neutral with low fixation; occlusion wins where
the soil is highly weathered and its occluded share exceeds both.  See docs/soil-model.md.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_choice, check_number
from pmap.errors import ConfigError
from pmap.soil.availability import (
    PartitionParams,
    _arms,
    _optional,
    arm_strengths,
    availability_curve,
    calcium_supply,
    occluded_fraction,
    peak_ph,
    weathering_codes,
)
from pmap.soil.sorption import (
    psp_calcareous,
    psp_highly_weathered,
    psp_moderately_weathered,
    psp_slightly_weathered,
)

__all__ = [
    "MECHANISM_LABELS",
    "RISK_CLASS_LABELS",
    "FIXATION_MODELS",
    "FixationParams",
    "FixationRisk",
    "psp_new_p",
    "fixation_risk",
]

#: Dominant fixation mechanism codes (0 = no data).
MECHANISM_LABELS: dict[int, str] = {
    1: "acid Fe/Al phosphates",
    2: "alkaline Ca phosphates",
    3: "occluded in weathered oxides",
    4: "near-neutral: weak Fe/Al and Ca fixation",
}
#: The models of fresh-P sorption behind :func:`psp_new_p`.
FIXATION_MODELS: tuple[str, ...] = ("published", "curve")
#: Risk class codes (0 = no data).
RISK_CLASS_LABELS: dict[int, str] = {1: "low", 2: "moderate", 3: "high"}

_DEFAULT_PARTITION = PartitionParams()


@dataclass(frozen=True)
class FixationParams:
    """Parameters of the fixation-risk map (config section ``[fixation]``)."""

    class_breaks: tuple[float, float] = field(
        default=(0.65, 0.80),
        metadata={
            "unit": "fraction",
            "doc": "index values at which risk goes from low to moderate and moderate to high",
            "source": "from memory, unverified",
        },
    )
    model: str = field(
        default="published",
        metadata={
            "unit": "",
            "doc": "fresh-P sorption model: published (EPIC group equations as published) or "
            "curve (group PSP at the best pH times the availability curve)",
            "source": "Jones et al. (1984), SSSAJ 48:800-805 (published)",
        },
    )
    calcareous_min_caco3_pct: float = field(
        default=1.0,
        metadata={
            "unit": "%",
            "doc": "CaCO3 from which a cell counts as calcareous (EPIC calcareous equation)",
            "source": "from memory, unverified",
        },
    )
    neutral_strength: float = field(
        default=0.25,
        metadata={
            "unit": "fraction",
            "doc": "Fe/Al and Ca weights below which a cell's mechanism is near-neutral, low "
            "fixation (0.25 puts the band at about pH 5.7-7.3 without CaCO3)",
            "source": "New England Vegetable Management Guide (reduced below pH 5.5, above 7.3)",
        },
    )
    occlusion_dominance: float = field(
        default=1.0,
        metadata={
            "unit": "ratio",
            "doc": "occlusion is the mechanism where occluded share >= this x the stronger arm "
            "(highly weathered soils only)",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        breaks = tuple(self.class_breaks)
        if len(breaks) != 2:
            raise ConfigError(f"fixation.class_breaks needs 2 values, got {len(breaks)}")
        low, high = breaks
        if not 0.0 < low < high < 1.0:
            raise ConfigError(
                f"fixation.class_breaks must satisfy 0 < low < high < 1, got {breaks}"
            )
        object.__setattr__(self, "class_breaks", (float(low), float(high)))
        check_number("fixation.occlusion_dominance", self.occlusion_dominance, gt=0)
        check_choice("fixation.model", self.model, FIXATION_MODELS)
        check_number("fixation.calcareous_min_caco3_pct", self.calcareous_min_caco3_pct, ge=0,
                     finite=True)
        check_number("fixation.neutral_strength", self.neutral_strength, gt=0, le=1)


@dataclass(frozen=True)
class FixationRisk:
    """Fixation risk per cell.

    Attributes
    ----------
    index : numpy.ndarray of float
        Expected fraction of newly applied P that becomes unavailable, ``1 - PSP_new``
        (0-1; NaN where pH is NaN).
    mechanism : numpy.ndarray of uint8
        Dominant mechanism, codes of :data:`MECHANISM_LABELS` (0 = no data).
    risk_class : numpy.ndarray of uint8
        1 low, 2 moderate, 3 high (0 = no data).
    """

    index: np.ndarray
    mechanism: np.ndarray
    risk_class: np.ndarray


def _group_psp(
    ph: np.ndarray,
    codes: np.ndarray,
    partition: PartitionParams,
    clay_pct: ArrayLike | None,
    base_saturation_pct: ArrayLike | None,
    labile_p_mg_kg: ArrayLike | None,
    at_ph: np.ndarray,
) -> np.ndarray:
    """EPIC PSP of each cell's weathering group, the moderate one evaluated at ``at_ph``."""
    shape = ph.shape
    bs = _optional(base_saturation_pct, partition.default_base_saturation_pct, shape)
    psp = psp_moderately_weathered(bs, at_ph)
    clay = _optional(clay_pct, partition.default_clay_pct, shape)
    clay = np.where(clay > 0, clay, partition.default_clay_pct)
    psp = np.where(codes == 3, psp_highly_weathered(clay), psp)
    if labile_p_mg_kg is not None:
        labile = np.broadcast_to(np.asarray(labile_p_mg_kg, dtype=float), shape)
        slight = psp_slightly_weathered(labile)
        psp = np.where((codes == 1) & np.isfinite(labile), slight, psp)
    return psp


def _calcareous(caco3_pct: ArrayLike | None, shape: tuple[int, ...], threshold: float
                ) -> tuple[np.ndarray, np.ndarray]:
    if caco3_pct is None:
        return np.zeros(shape, dtype=bool), np.zeros(shape)
    caco3 = np.nan_to_num(np.broadcast_to(np.asarray(caco3_pct, dtype=float), shape), nan=0.0)
    return (caco3 > 0) & (caco3 >= threshold), caco3


def psp_new_p(
    ph: ArrayLike,
    partition: PartitionParams = _DEFAULT_PARTITION,
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
    labile_p_mg_kg: ArrayLike | None = None,
    weathering_code: ArrayLike | None = None,
    ca_mg_kg: ArrayLike | None = None,
    params: FixationParams | None = None,
) -> np.ndarray:
    """Fraction of newly applied P expected to stay labile, ``PSP_new`` (fraction).

    Parameters
    ----------
    ph : array_like
        Soil pH in water (pH units).
    partition : PartitionParams
        Availability curve, weathering class and defaults for absent inputs.
    caco3_pct, clay_pct, base_saturation_pct : array_like, optional
        CaCO3 (%), clay (%), base saturation (%); NaN cells use the defaults.
    labile_p_mg_kg : array_like, optional
        Labile P (mg/kg) for the slightly weathered equation: the lab's soil-test P where
        it exists, else the model's available P; without it that group uses the
        moderately weathered equation.
    weathering_code : array_like, optional
        Per-cell weathering class (1 slight, 2 moderate, 3 high); elsewhere ``partition``.
    ca_mg_kg : array_like, optional
        Exchangeable (Mehlich-3) Ca (mg/kg): with CaCO3, the calcium supply that scales the
        alkaline fall of PSP above the peak on non-calcareous ground.
    params : FixationParams, optional
        The model choice and the calcareous threshold (default :class:`FixationParams`).

    Returns
    -------
    numpy.ndarray
        PSP_new (fraction; NaN where pH is NaN).
    """
    params = params or FixationParams()
    ph = np.asarray(ph, dtype=float)
    shape = ph.shape
    codes = weathering_codes(weathering_code, partition, shape)
    top = peak_ph(partition)
    if params.model == "curve":
        curve = availability_curve(ph, partition, caco3_pct=caco3_pct)
        psp = _group_psp(ph, codes, partition, clay_pct, base_saturation_pct, labile_p_mg_kg,
                         np.full(shape, top)) * curve
        if caco3_pct is not None:
            calc, caco3 = _calcareous(caco3_pct, shape, 0.0)
            psp = np.where(calc, np.minimum(psp, psp_calcareous(caco3)), psp)
        return np.where(np.isnan(ph), np.nan, psp)
    psp = _group_psp(ph, codes, partition, clay_pct, base_saturation_pct, labile_p_mg_kg,
                     np.minimum(ph, top))
    acid, alkaline = _arms(ph, partition, None)
    acid_top, alkaline_top = _arms(np.asarray(top), partition, None)
    # The slightly (where labile P is known) and highly weathered equations carry no pH
    # term; where the slight group falls back to the moderate equation, pH is already in it.
    ph_free = (codes == 3)
    if labile_p_mg_kg is not None:
        labile = np.broadcast_to(np.asarray(labile_p_mg_kg, dtype=float), shape)
        ph_free = ph_free | ((codes == 1) & np.isfinite(labile))
    no_ph_term = ph_free & (ph < top)
    psp = np.where(no_ph_term, psp * acid / acid_top, psp)
    supply = calcium_supply(partition, caco3_pct=caco3_pct, ca_mg_kg=ca_mg_kg, shape=shape)
    drop = (1.0 - alkaline / alkaline_top) * supply
    psp = np.where(ph > top, psp * (1.0 - drop), psp)
    calc, caco3 = _calcareous(caco3_pct, shape, params.calcareous_min_caco3_pct)
    psp = np.where(calc, psp_calcareous(caco3), psp)
    return np.where(np.isnan(ph), np.nan, psp)


def fixation_risk(
    ph: ArrayLike,
    params: FixationParams = FixationParams(),
    partition: PartitionParams = _DEFAULT_PARTITION,
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
    labile_p_mg_kg: ArrayLike | None = None,
    ca_mg_kg: ArrayLike | None = None,
    weathering_code: ArrayLike | None = None,
) -> FixationRisk:
    """Fixation-risk index, dominant mechanism and risk class of newly applied P.

    Parameters
    ----------
    ph : array_like
        Soil pH in water (pH units), any shape.
    params : FixationParams
        Model choice, class breaks, neutral band and the occlusion-dominance ratio.
    partition : PartitionParams
        The soil model's parameters (curve, weathering class, calcium supply, defaults).
    caco3_pct, clay_pct, base_saturation_pct, labile_p_mg_kg, weathering_code : array_like, optional
        As in :func:`psp_new_p`.
    ca_mg_kg : array_like, optional
        Exchangeable (Mehlich-3) Ca (mg/kg), for the calcium supply of the Ca mechanism.

    Returns
    -------
    FixationRisk
        Index in [0, 1] (NaN where pH is NaN), mechanism and class codes (0 there).
    """
    ph = np.asarray(ph, dtype=float)
    index = 1.0 - psp_new_p(
        ph,
        partition,
        caco3_pct=caco3_pct,
        clay_pct=clay_pct,
        base_saturation_pct=base_saturation_pct,
        labile_p_mg_kg=labile_p_mg_kg,
        weathering_code=weathering_code,
        ca_mg_kg=ca_mg_kg,
        params=params,
    )
    index = np.clip(index, 0.0, 1.0)
    valid = ~np.isnan(index)

    acid, alkaline = arm_strengths(ph, partition, caco3_pct=caco3_pct)
    alkaline = alkaline * calcium_supply(partition, caco3_pct=caco3_pct, ca_mg_kg=ca_mg_kg,
                                         shape=ph.shape)
    mechanism = np.where(acid >= alkaline, 1, 2).astype(np.uint8)
    mechanism = np.where(np.maximum(acid, alkaline) < params.neutral_strength,
                         np.uint8(4), mechanism)
    codes = weathering_codes(weathering_code, partition, ph.shape)
    if (codes == 3).any():
        occluded = occluded_fraction(partition, clay_pct=clay_pct, weathering_code=codes,
                                     shape=ph.shape)
        dominant = (codes == 3) & (
            occluded >= params.occlusion_dominance * np.maximum(acid, alkaline))
        mechanism = np.where(dominant, np.uint8(3), mechanism)
    mechanism = np.where(valid, mechanism, 0).astype(np.uint8)

    low, high = params.class_breaks
    risk_class = (1 + (index >= low) + (index >= high)).astype(np.uint8)
    risk_class = np.where(valid, risk_class, 0).astype(np.uint8)
    return FixationRisk(index=index, mechanism=mechanism, risk_class=risk_class)
