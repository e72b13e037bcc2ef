"""Fixation risk of newly applied P: index, dominant mechanism and risk class.

The index is ``1 - PSP_new``, the expected fraction of fresh fertilizer P that becomes
unavailable.  ``PSP_new(pH) = PSP_top * B(pH)``: the EPIC sorption coefficient of the soil at
its best pH (:mod:`pmap.soil.sorption`) times the normalised availability curve of
:mod:`pmap.soil.availability`; on calcareous soils (CaCO3 given and > 0) it is also capped
by the EPIC calcareous PSP.  The mechanism is the larger of the acid (Fe/Al) and alkaline
(Ca) arm strengths, or occlusion where the soil is highly weathered and its occluded share
exceeds both.  See docs/soil-model.md.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_number
from pmap.errors import ConfigError
from pmap.soil.availability import (
    PartitionParams,
    _optional,
    arm_strengths,
    availability_curve,
    occluded_fraction,
    peak_ph,
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
}
#: Risk class codes (0 = no data).
RISK_CLASS_LABELS: dict[int, str] = {1: "low", 2: "moderate", 3: "high"}

_DEFAULT_PARTITION = PartitionParams()


@dataclass(frozen=True)
class FixationParams:
    """Parameters of the fixation-risk map (config section ``[fixation]``)."""

    class_breaks: tuple[float, float] = field(
        default=(0.60, 0.75),
        metadata={
            "unit": "fraction",
            "doc": "index values at which risk goes from low to moderate and moderate to high",
            "source": "from memory, unverified",
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


def _top_psp(
    shape: tuple[int, ...],
    partition: PartitionParams,
    clay_pct: ArrayLike | None,
    base_saturation_pct: ArrayLike | None,
    labile_p_mg_kg: ArrayLike | None,
) -> np.ndarray:
    """EPIC PSP of the soil at the best pH, by weathering class (fraction)."""
    if partition.weathering == "high":
        clay = _optional(clay_pct, partition.default_clay_pct, shape)
        clay = np.where(clay > 0, clay, partition.default_clay_pct)
        return psp_highly_weathered(clay)
    bs = _optional(base_saturation_pct, partition.default_base_saturation_pct, shape)
    moderate = psp_moderately_weathered(bs, peak_ph(partition))
    if partition.weathering == "slight" and labile_p_mg_kg is not None:
        labile = np.broadcast_to(np.asarray(labile_p_mg_kg, dtype=float), shape)
        return np.where(np.isnan(labile), moderate, psp_slightly_weathered(labile))
    return moderate


def psp_new_p(
    ph: ArrayLike,
    partition: PartitionParams = _DEFAULT_PARTITION,
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
    labile_p_mg_kg: ArrayLike | None = None,
) -> np.ndarray:
    """Fraction of newly applied P expected to stay labile, ``PSP_new`` (fraction).

    ``PSP_new = PSP_top * B(pH)``, capped at ``psp_calcareous(CaCO3)`` where CaCO3 is given
    and > 0.  ``PSP_top`` is the EPIC PSP at :func:`~pmap.soil.availability.peak_ph`:
    moderately weathered equation at the base saturation (also for ``slight`` without
    ``labile_p_mg_kg``), slightly weathered equation from labile P, or highly weathered
    equation from clay.

    Parameters
    ----------
    ph : array_like
        Soil pH (pH units).
    partition : PartitionParams
        Availability curve, weathering class and defaults for absent inputs.
    caco3_pct, clay_pct, base_saturation_pct : array_like, optional
        CaCO3 (%), clay (%), base saturation (%); NaN cells use the defaults.
    labile_p_mg_kg : array_like, optional
        Labile P (mg/kg) for the slightly weathered equation.

    Returns
    -------
    numpy.ndarray
        PSP_new (fraction; NaN where pH is NaN).
    """
    ph = np.asarray(ph, dtype=float)
    curve = availability_curve(ph, partition, caco3_pct=caco3_pct)
    psp = _top_psp(ph.shape, partition, clay_pct, base_saturation_pct, labile_p_mg_kg) * curve
    if caco3_pct is not None:
        caco3 = np.broadcast_to(np.asarray(caco3_pct, dtype=float), ph.shape)
        calcareous = np.nan_to_num(caco3, nan=0.0) > 0
        psp = np.where(calcareous, np.minimum(psp, psp_calcareous(caco3)), psp)
    return psp


def fixation_risk(
    ph: ArrayLike,
    params: FixationParams = FixationParams(),
    partition: PartitionParams = _DEFAULT_PARTITION,
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
    labile_p_mg_kg: ArrayLike | None = None,
) -> FixationRisk:
    """Fixation-risk index, dominant mechanism and risk class of newly applied P.

    Parameters
    ----------
    ph : array_like
        Soil pH (pH units), any shape.
    params : FixationParams
        Class breaks and the occlusion-dominance ratio.
    partition : PartitionParams
        The soil model's parameters (curve, weathering class, defaults).
    caco3_pct, clay_pct, base_saturation_pct, labile_p_mg_kg : array_like, optional
        As in :func:`psp_new_p`.

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
    )
    index = np.clip(index, 0.0, 1.0)
    valid = ~np.isnan(index)

    acid, alkaline = arm_strengths(ph, partition, caco3_pct=caco3_pct)
    mechanism = np.where(acid >= alkaline, 1, 2).astype(np.uint8)
    if partition.weathering == "high":
        occluded = occluded_fraction(partition, clay_pct=clay_pct, shape=ph.shape)
        dominant = occluded >= params.occlusion_dominance * np.maximum(acid, alkaline)
        mechanism = np.where(dominant, np.uint8(3), mechanism)
    mechanism = np.where(valid, mechanism, 0).astype(np.uint8)

    low, high = params.class_breaks
    risk_class = (1 + (index >= low) + (index >= high)).astype(np.uint8)
    risk_class = np.where(valid, risk_class, 0).astype(np.uint8)
    return FixationRisk(index=index, mechanism=mechanism, risk_class=risk_class)
