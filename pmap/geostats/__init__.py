"""Geostatistics: empirical variograms, model fitting, ordinary kriging, cross-validation.

Pure numerics on numpy arrays (coordinates in metres of a projected CRS).  See
``docs/geostatistics.md`` for the formulas and conventions.
"""

from __future__ import annotations

from pmap.geostats.crossval import CrossValidation, leave_one_out, loo_kriging
from pmap.geostats.interpolate import (
    Interpolation,
    KrigingSettings,
    choose_log,
    interpolate,
    sample_skewness,
)
from pmap.geostats.kriging import (
    KrigingResult,
    SingularSystemError,
    check_duplicates,
    kriging_matrix,
    lognormal_back_transform,
    lognormal_ordinary_kriging,
    ordinary_kriging,
)
from pmap.geostats.variogram import (
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
    "CrossValidation",
    "leave_one_out",
    "loo_kriging",
    "KrigingSettings",
    "Interpolation",
    "interpolate",
    "choose_log",
    "sample_skewness",
]
