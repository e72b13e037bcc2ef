"""The cautions shown with every prescription (README, CLI, summary.json, maps)."""

from __future__ import annotations

__all__ = ["CAUTIONS", "CAUTIONS_SHORT"]

CAUTIONS_SHORT = (
    "Model output for review, not an instruction: check rates against local regulations and "
    "nutrient-management rules and have them signed off by a licensed or certified agronomist."
)

CAUTIONS = (
    "CAUTION - these maps and rates are computed estimates for review by a qualified person. "
    "Kriged values carry the uncertainty shown in the standard-error maps and variance layers and "
    "are least reliable far from samples and near the boundary. The availability, fixation and lime "
    "layers come from a simplified soil model; unless the maps and the summary say it was "
    "calibrated to paired lab data, its defaults are starting values, not calibrations for your "
    "region. Phosphorus applied in excess of "
    "crop need can run off to surface water; applications near water, on frozen or saturated soil, "
    "or on soils already high in P may be restricted or prohibited. Lime and fertilizer rates must "
    "be checked against local regulations, nutrient-management plans and the recommendations of the "
    "local extension service, and signed off by a licensed or certified agronomist or crop adviser "
    "before any application. pmap's authors accept no liability for use of these outputs."
)
