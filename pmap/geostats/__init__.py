"""Geostatistics: variograms, model fitting, ordinary kriging, cross-validation, checks.

Pure numerics on numpy arrays (coordinates in metres of a projected CRS).  See
``docs/geostatistics.md`` for the formulas and conventions.
"""

from __future__ import annotations

from pmap.geostats.anisotropy import (
    anisotropy_from_directional,
    directional_variograms,
    fit_anisotropic_variogram,
)
from pmap.geostats.crossval import CrossValidation, leave_one_out, loo_kriging
from pmap.geostats.diagnostics import (
    TrendTest,
    close_pairs,
    first_bin_weight_share,
    is_pure_nugget,
    linear_trend,
    neighbour_correlation,
    neighbour_spacing,
    range_at_bound,
)
from pmap.geostats.interpolate import (
    LOGARITHMIC,
    Interpolation,
    KrigingSettings,
    choose_log,
    interpolate,
    krige_at,
    nugget_floor,
    sample_skewness,
)
from pmap.geostats.kriging import (
    KrigingResult,
    SingularSystemError,
    check_duplicates,
    clip_to_limits,
    kriging_matrix,
    lognormal_back_transform,
    lognormal_ordinary_kriging,
    ordinary_kriging,
)
from pmap.geostats.outliers import Outlier, flag_outliers, modified_z
from pmap.geostats.simulation import (
    NormalScore,
    realisation_probability,
    realisation_quantile,
    sequential_gaussian_simulation,
    simulate_normal_scores,
)
from pmap.geostats.variogram import (
    CONSTANT,
    ESTIMATORS,
    MAX_RANGE_FACTOR,
    MODELS,
    EmpiricalVariogram,
    VariogramModel,
    default_cutoff,
    empirical_variogram,
    fit_best_variogram,
    fit_variogram,
    fit_variograms,
    weighted_sse,
)

__all__ = [
    "MODELS",
    "CONSTANT",
    "EmpiricalVariogram",
    "VariogramModel",
    "empirical_variogram",
    "default_cutoff",
    "fit_variogram",
    "fit_best_variogram",
    "fit_variograms",
    "weighted_sse",
    "KrigingResult",
    "SingularSystemError",
    "ordinary_kriging",
    "lognormal_ordinary_kriging",
    "lognormal_back_transform",
    "kriging_matrix",
    "check_duplicates",
    "clip_to_limits",
    "CrossValidation",
    "leave_one_out",
    "loo_kriging",
    "KrigingSettings",
    "Interpolation",
    "interpolate",
    "krige_at",
    "choose_log",
    "sample_skewness",
    "nugget_floor",
    "LOGARITHMIC",
    "Outlier",
    "modified_z",
    "flag_outliers",
    "TrendTest",
    "linear_trend",
    "close_pairs",
    "first_bin_weight_share",
    "is_pure_nugget",
    "range_at_bound",
    "neighbour_spacing",
    "neighbour_correlation",
    "MAX_RANGE_FACTOR",
    "ESTIMATORS",
    "directional_variograms",
    "anisotropy_from_directional",
    "fit_anisotropic_variogram",
    "NormalScore",
    "sequential_gaussian_simulation",
    "simulate_normal_scores",
    "realisation_probability",
    "realisation_quantile",
]
