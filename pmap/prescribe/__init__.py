"""Prescription numerics: interpretation tables, zones, rates and the per-polygon prescription.

Pure numerics on numpy arrays; see docs/rates-and-zones.md.
"""

from pmap.prescribe.interpretation import InterpretationTable, interpretation_table
from pmap.prescribe.patches import clean_zones, min_width_cells
from pmap.prescribe.prescription import (
    Patch,
    class_table,
    deficiency_probability,
    field_totals,
    prescription_patches,
    rate_coverage,
    stp_quantile,
)
from pmap.prescribe.rates import (
    CROP_REMOVAL_LB_P2O5_PER_BU,
    PRODUCT_GRADES,
    PRODUCT_P2O5_FRACTION,
    RateRule,
    buildup_maintenance_lb_acre,
    nitrogen_kg_ha,
    p2o5_rate_kg_ha,
    product_cost,
    product_kg_ha,
    product_label,
    product_rates,
    removal_lb_acre,
    resolve_interpretation,
    resolve_rule,
    single_rate,
    to_display_units,
)
from pmap.prescribe.zones import (
    ZoneParams,
    classify,
    clean_speckles,
    enforce_min_width,
    label_patches,
    zone_statistics,
)

__all__ = [
    "InterpretationTable",
    "interpretation_table",
    "Patch",
    "rate_coverage",
    "clean_zones",
    "min_width_cells",
    "class_table",
    "deficiency_probability",
    "field_totals",
    "prescription_patches",
    "stp_quantile",
    "CROP_REMOVAL_LB_P2O5_PER_BU",
    "PRODUCT_GRADES",
    "PRODUCT_P2O5_FRACTION",
    "RateRule",
    "buildup_maintenance_lb_acre",
    "p2o5_rate_kg_ha",
    "product_kg_ha",
    "product_rates",
    "removal_lb_acre",
    "resolve_interpretation",
    "resolve_rule",
    "nitrogen_kg_ha",
    "product_cost",
    "product_label",
    "single_rate",
    "to_display_units",
    "ZoneParams",
    "classify",
    "clean_speckles",
    "enforce_min_width",
    "label_patches",
    "zone_statistics",
]
