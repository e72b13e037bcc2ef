"""Soil model: EPIC sorption, pH partition of total P, fixation risk, calibration, lime,
environmental P and conversions.

Pure numerics on numpy arrays; see docs/soil-model.md for the equations.
"""

from pmap.soil.availability import (
    PartitionParams,
    SoilPools,
    availability_curve,
    fit_partition,
    partition_total_p,
    peak_ph,
)
from pmap.soil.calibration import Calibration, CalibrationSettings, calibrate, calibrate_partition
from pmap.soil.conversions import (
    KG_HA_PER_LB_ACRE,
    P2O5_PER_P,
    P_PER_P2O5,
    SOIL_TEST_METHODS,
    SoilTestEquivalent,
)
from pmap.soil.environment import PsrParams, phosphorus_saturation_ratio
from pmap.soil.fixation import (
    MECHANISM_LABELS,
    RISK_CLASS_LABELS,
    FixationParams,
    FixationRisk,
    fixation_risk,
)
from pmap.soil.lime import LimeParams, lime_requirement_t_acre, lime_requirement_t_ha
from pmap.soil.model import SoilInputs, SoilModel, soil_model

__all__ = [
    "PartitionParams",
    "SoilPools",
    "availability_curve",
    "fit_partition",
    "partition_total_p",
    "peak_ph",
    "KG_HA_PER_LB_ACRE",
    "P2O5_PER_P",
    "P_PER_P2O5",
    "SOIL_TEST_METHODS",
    "SoilTestEquivalent",
    "MECHANISM_LABELS",
    "RISK_CLASS_LABELS",
    "FixationParams",
    "FixationRisk",
    "fixation_risk",
    "Calibration",
    "CalibrationSettings",
    "calibrate",
    "calibrate_partition",
    "PsrParams",
    "phosphorus_saturation_ratio",
    "LimeParams",
    "lime_requirement_t_acre",
    "lime_requirement_t_ha",
    "SoilInputs",
    "SoilModel",
    "soil_model",
]
