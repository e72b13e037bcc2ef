"""The soil model in one call: P pools, fresh-P sorption and fixation risk on the same inputs.

:func:`soil_model` is what the pipeline, the calibration and the simulations call, so the
pools and the fixation map always see the same pH, the same weathering class per cell and
the same recent P additions.  Inputs that contradict each other (carbonate in an acid soil)
are reported, not silently used.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from pmap.soil.availability import PartitionParams, SoilPools, partition_total_p
from pmap.soil.conversions import P_PER_P2O5, kg_ha_to_mg_kg
from pmap.soil.fixation import FixationParams, FixationRisk, fixation_risk, psp_new_p

__all__ = ["SoilInputs", "SoilModel", "soil_model", "recent_p_mg_kg", "input_conflicts",
           "CARBONATE_MAX_PH"]

#: Free CaCO3 above this CaCO3 (%) in a soil below ``CARBONATE_MAX_PH`` is reported:
#: carbonate dissolves in acid soil, so one of the two values is probably wrong.
CARBONATE_CONFLICT_PCT: float = 1.0
#: pH below which free carbonate is not expected (pH units).
CARBONATE_MAX_PH: float = 6.5


@dataclass(frozen=True)
class SoilInputs:
    """Per-cell inputs of the soil model beyond pH and total P (arrays of one shape or None).

    Attributes
    ----------
    caco3_pct, clay_pct, om_pct, base_saturation_pct : numpy.ndarray or None
        CaCO3, clay, organic matter and base saturation (%).
    ca_mg_kg : numpy.ndarray or None
        Exchangeable (Mehlich-3) Ca (mg/kg).
    lab_stp_mg_kg : numpy.ndarray or None
        The lab's soil-test P (mg/kg), used as labile P by the slightly weathered equation.
    weathering_code : numpy.ndarray or None
        Weathering class per cell (1 slight, 2 moderate, 3 high; 0 or NaN: the field's).
    recent_p2o5_kg_ha : numpy.ndarray or float
        P2O5 applied since the last crop (kg P2O5/ha).
    depth_cm : float
        Thickness of the sampled layer (cm), for turning kg/ha into mg/kg.
    """

    caco3_pct: np.ndarray | None = None
    clay_pct: np.ndarray | None = None
    om_pct: np.ndarray | None = None
    base_saturation_pct: np.ndarray | None = None
    ca_mg_kg: np.ndarray | None = None
    lab_stp_mg_kg: np.ndarray | None = None
    weathering_code: np.ndarray | None = None
    recent_p2o5_kg_ha: np.ndarray | float = 0.0
    depth_cm: float = 15.0

    def subset(self, rows: np.ndarray) -> SoilInputs:
        """The inputs at ``rows`` (an index into 1-D arrays); scalars stay as they are."""
        def pick(x):
            return x[rows] if isinstance(x, np.ndarray) and x.ndim else x
        return SoilInputs(**{name: pick(getattr(self, name))
                             for name in self.__dataclass_fields__ if name != "depth_cm"},
                          depth_cm=self.depth_cm)


@dataclass(frozen=True)
class SoilModel:
    """The soil model's answer for each cell."""

    pools: SoilPools | None
    risk: FixationRisk
    fresh_labile_fraction: np.ndarray
    notes: tuple[str, ...] = field(default=())


def recent_p_mg_kg(p2o5_kg_ha: np.ndarray | float, depth_cm: float,
                   bulk_density_g_cm3: float) -> np.ndarray:
    """Elemental P (mg/kg of the sampled layer) in ``p2o5_kg_ha`` kg P2O5/ha."""
    return kg_ha_to_mg_kg(np.asarray(p2o5_kg_ha, dtype=float) * P_PER_P2O5,
                          bulk_density_g_cm3, depth_cm * 10.0)


def input_conflicts(ph: np.ndarray, inputs: SoilInputs) -> list[str]:
    """Messages on inputs that contradict each other (pH units, %)."""
    notes = []
    if inputs.caco3_pct is not None:
        bad = (np.asarray(inputs.caco3_pct) >= CARBONATE_CONFLICT_PCT) & (ph < CARBONATE_MAX_PH)
        if bad.any():
            notes.append(
                f"{int(bad.sum())} cells have CaCO3 >= {CARBONATE_CONFLICT_PCT:g} % at pH below "
                f"{CARBONATE_MAX_PH:g}: free carbonate does not persist in acid soil; check the "
                "CaCO3 and pH columns (the model treats those cells as calcareous)")
    return notes


def soil_model(
    ph: np.ndarray,
    total_p: np.ndarray | None,
    inputs: SoilInputs = SoilInputs(),
    partition: PartitionParams = PartitionParams(),  # noqa: B008 - frozen, immutable default
    fixation: FixationParams = FixationParams(),  # noqa: B008 - frozen, immutable default
) -> SoilModel:
    """Pools of total P, the labile share of fresh P and the fixation risk, cell by cell.

    Parameters
    ----------
    ph : numpy.ndarray
        Soil pH in water (pH units).
    total_p : numpy.ndarray or None
        Total P (mg/kg); None maps the fixation risk only.
    inputs : SoilInputs
        Everything else the model uses; absent inputs take the defaults in ``partition``.
    partition, fixation : PartitionParams, FixationParams
        Model parameters.

    Returns
    -------
    SoilModel
    """
    ph = np.asarray(ph, dtype=float)
    common = {"caco3_pct": inputs.caco3_pct, "clay_pct": inputs.clay_pct,
              "weathering_code": inputs.weathering_code, "ca_mg_kg": inputs.ca_mg_kg}
    labile_for_slight = inputs.lab_stp_mg_kg
    pools = None
    fresh = None
    added = recent_p_mg_kg(inputs.recent_p2o5_kg_ha, inputs.depth_cm,
                           partition.bulk_density_g_cm3)
    if total_p is not None:
        if labile_for_slight is None:  # the model's own labile P, without recent additions
            labile_for_slight = partition_total_p(ph, total_p, partition, om_pct=inputs.om_pct,
                                                  **common).available
        fresh = psp_new_p(ph, partition, base_saturation_pct=inputs.base_saturation_pct,
                          labile_p_mg_kg=labile_for_slight, params=fixation, **common)
        has_additions = bool(np.any(np.nan_to_num(added) > 0))
        pools = partition_total_p(
            ph, total_p, partition, om_pct=inputs.om_pct,
            recent_p_mg_kg=added if has_additions else None,
            fresh_labile_fraction=fresh if has_additions else None, **common)
    risk = fixation_risk(ph, fixation, partition, base_saturation_pct=inputs.base_saturation_pct,
                         labile_p_mg_kg=labile_for_slight, **common)
    if fresh is None:
        fresh = 1.0 - risk.index
    return SoilModel(pools=pools, risk=risk, fresh_labile_fraction=fresh,
                     notes=tuple(input_conflicts(ph, inputs)))
