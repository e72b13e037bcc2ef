"""Prescription numerics: soil-test classes, management zones and P2O5 rates.

Pure numerics on numpy arrays; see docs/rates-and-zones.md.
"""

from pmap.prescribe.rates import (
    CROP_REMOVAL_LB_P2O5_PER_BU,
    PRODUCT_P2O5_FRACTION,
    RateRule,
    buildup_maintenance_lb_acre,
    p2o5_rate_kg_ha,
    product_kg_ha,
    removal_lb_acre,
)
from pmap.prescribe.zones import (
    CLASS_LABELS,
    DEFAULT_CLASS_BREAKS,
    ZoneParams,
    classify,
    clean_speckles,
    zone_statistics,
)

__all__ = [
    "CROP_REMOVAL_LB_P2O5_PER_BU",
    "PRODUCT_P2O5_FRACTION",
    "RateRule",
    "buildup_maintenance_lb_acre",
    "p2o5_rate_kg_ha",
    "product_kg_ha",
    "removal_lb_acre",
    "CLASS_LABELS",
    "DEFAULT_CLASS_BREAKS",
    "ZoneParams",
    "classify",
    "clean_speckles",
    "zone_statistics",
]
