"""One soil property from samples to a kriged surface: the composite the pipeline calls.

:func:`interpolate` decides on a log transform, builds the empirical variogram, fits the
best bounded model, kriges the targets (lognormal ordinary kriging when logged) and
cross-validates, returning everything needed for maps and the summary.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pmap._checks import check_number, check_whole
from pmap.errors import ConfigError, InputError, InsufficientDataError, ModelFitError, PmapWarning
from pmap.geostats.crossval import CrossValidation, leave_one_out
from pmap.geostats.kriging import (
    KrigingResult,
    SingularSystemError,
    check_duplicates,
    lognormal_ordinary_kriging,
    ordinary_kriging,
)
from pmap.geostats.variogram import (
    _MAX_RANGE_FACTOR,
    MODELS,
    EmpiricalVariogram,
    VariogramModel,
    default_cutoff,
    empirical_variogram,
    fit_variograms,
)

__all__ = ["KrigingSettings", "Interpolation", "interpolate", "nugget_floor", "sample_skewness",
           "choose_log"]

_LOG_CHOICES = ("auto", "always", "never")
# Sample skewness above which "auto" kriges the logarithm.
_SKEW_LIMIT = 1.0


@dataclass(frozen=True)
class KrigingSettings:
    """Settings of the ``[kriging]`` configuration section."""

    models: tuple[str, ...] = field(
        default=MODELS,
        metadata={
            "unit": "",
            "doc": "variogram model families tried; the lowest weighted SSE (weights N_h/h^2) wins",
            "source": "gstat fit.variogram (Pebesma)",
        },
    )
    n_bins: int = field(
        default=15,
        metadata={"unit": "", "doc": "number of equal-width lag bins of the empirical variogram",
                  "source": "gstat variogram (Pebesma)"},
    )
    cutoff_fraction: float = field(
        default=1.0 / 3.0,
        metadata={"unit": "", "doc": "variogram cutoff as a fraction of the sample bounding-box diagonal",
                  "source": "gstat variogram (Pebesma)"},
    )
    log_transform: str = field(
        default="auto",
        metadata={
            "unit": "",
            "doc": "krige the logarithm: 'auto' (when all values > 0 and sample skewness > 1), "
            "'always' or 'never'",
            "source": "common practice, no source",
        },
    )
    min_samples: int = field(
        default=30,
        metadata={
            "unit": "samples",
            "doc": "fewest samples with values that kriging accepts (Webster & Oliver 1992 "
            "suggest ~100 for a reliable variogram, fewer than ~50 unreliable)",
            "source": "from memory, unverified",
        },
    )
    lab_error_sd_ph: float = field(
        default=0.1,
        metadata={
            "unit": "pH units",
            "doc": "standard deviation of the lab's pH measurement; its square is the least "
            "nugget a pH variogram may take (grid samples rarely see the nugget themselves)",
            "source": "from memory, unverified",
        },
    )
    lab_error_cv: float = field(
        default=0.05,
        metadata={
            "unit": "fraction",
            "doc": "relative measurement error of the other properties (P, CaCO3, clay, ...); "
            "the nugget is at least (lab_error_cv x sample mean)^2, or log(1 + cv^2) in log space",
            "source": "from memory, unverified",
        },
    )
    chunk_size: int = field(
        default=20000,
        metadata={"unit": "cells", "doc": "grid cells solved per block; bounds memory",
                  "source": "common practice, no source"},
    )

    def __post_init__(self) -> None:
        if isinstance(self.models, list):
            object.__setattr__(self, "models", tuple(self.models))
        if isinstance(self.models, str):
            raise ConfigError(f"kriging.models must be a list of model names, got {self.models!r}")
        if not self.models:
            raise ConfigError("kriging.models must name at least one model")
        unknown = [m for m in self.models if m not in MODELS]
        if unknown:
            raise ConfigError(f"kriging.models: unknown model(s) {unknown}; choose from {list(MODELS)}")
        if len(set(self.models)) != len(self.models):
            raise ConfigError(f"kriging.models lists a model twice: {list(self.models)}")
        check_whole("kriging.n_bins", self.n_bins, ge=3)
        check_number("kriging.cutoff_fraction", self.cutoff_fraction, gt=0, le=1)
        if self.log_transform not in _LOG_CHOICES:
            raise ConfigError(
                f"kriging.log_transform must be one of {list(_LOG_CHOICES)}, got {self.log_transform!r}"
            )
        check_whole("kriging.min_samples", self.min_samples, ge=5)
        for key in ("lab_error_sd_ph", "lab_error_cv"):
            check_number(f"kriging.{key}", getattr(self, key), ge=0, lt=1)
        check_whole("kriging.chunk_size", self.chunk_size, ge=1)


def nugget_floor(name: str, values: np.ndarray, log: bool, settings: KrigingSettings) -> float:
    """Least nugget (units of the kriged variable squared) allowed by the lab's precision.

    pH uses ``lab_error_sd_ph``; other properties a relative error
    ``lab_error_cv`` of the sample mean, or ``log(1 + cv^2)`` when the logarithm is kriged.
    """
    if name == "ph":
        return float(settings.lab_error_sd_ph) ** 2
    cv = float(settings.lab_error_cv)
    if log:
        return float(np.log1p(cv**2))
    return float((cv * np.mean(values)) ** 2)


@dataclass(frozen=True)
class Interpolation:
    """Everything :func:`interpolate` produced for one soil property.

    Attributes
    ----------
    name : str
        Property name (e.g. ``"ph"``, ``"total_p"``).
    log : bool
        Whether the logarithm was kriged (lognormal ordinary kriging).
    empirical : EmpiricalVariogram
        Empirical variogram of the kriged variable (of ``log(values)`` when ``log``).
    model : VariogramModel
        The variogram model used.
    candidates : dict
        Weighted SSE of every model family fitted.
    result : KrigingResult
        Estimates and variances at the targets, in the property's units.
    cv : CrossValidation
        Leave-one-out figures in the property's units.
    """

    name: str
    log: bool
    empirical: EmpiricalVariogram
    model: VariogramModel
    candidates: dict[str, float]
    result: KrigingResult
    cv: CrossValidation

    def as_dict(self) -> dict[str, Any]:
        """Summary without the target arrays (JSON-able)."""
        return {
            "name": self.name,
            "log": bool(self.log),
            "model": self.model.as_dict(),
            "candidates": {k: float(v) for k, v in self.candidates.items()},
            "variogram": self.empirical.as_dict(),
            "cv": self.cv.as_dict(),
        }


def sample_skewness(values: np.ndarray) -> float:
    """Moment coefficient of skewness ``m3 / m2^1.5`` (biased, population form)."""
    values = np.asarray(values, dtype=float)
    dev = values - values.mean()
    m2 = np.mean(dev**2)
    if m2 == 0:
        return 0.0
    return float(np.mean(dev**3) / m2**1.5)


def choose_log(values: np.ndarray, rule: str = "auto") -> bool:
    """Whether to krige ``log(values)`` under ``rule`` ("auto", "always", "never").

    "auto" logs when every value is > 0 and the sample skewness exceeds 1.
    """
    values = np.asarray(values, dtype=float)
    if rule == "never":
        return False
    if rule == "always":
        if np.any(~(values > 0)):
            raise InputError(
                "kriging.log_transform = 'always' needs every value > 0; "
                f"found {int(np.sum(~(values > 0)))} value(s) <= 0 (use 'auto' or 'never')"
            )
        return True
    if rule == "auto":
        return bool(np.all(values > 0) and sample_skewness(values) > _SKEW_LIMIT)
    raise ConfigError(f"kriging.log_transform must be one of {list(_LOG_CHOICES)}, got {rule!r}")


def interpolate(
    name: str,
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    settings: KrigingSettings = KrigingSettings(),  # noqa: B008 - frozen, immutable default
) -> Interpolation:
    """Krige one property at ``targets`` with a fitted variogram and cross-validation.

    Parameters
    ----------
    name : str
        Property name, used in messages.
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m (projected CRS).
    values : numpy.ndarray, shape (n,)
        Sample values in the property's unit; NaN marks a sample without a value and is
        left out.
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    settings : KrigingSettings
        The ``[kriging]`` section.

    Returns
    -------
    Interpolation

    Raises
    ------
    InsufficientDataError
        Fewer than ``settings.min_samples`` samples with values.
    ModelFitError
        Duplicate coordinates, no fittable variogram, or every fitted model gives a
        singular kriging system.

    Notes
    -----
    The models are tried in order of weighted SSE; a model whose kriging system is
    numerically singular is skipped with a :class:`~pmap.errors.PmapWarning`.
    """
    coords = np.asarray(coords, dtype=float)
    values = np.asarray(values, dtype=float)
    if coords.ndim != 2 or coords.shape[1] != 2 or values.shape != (coords.shape[0],):
        raise ValueError(f"{name}: coords must be (n, 2) and values (n,), got {coords.shape}, {values.shape}")
    has_value = np.isfinite(values)
    coords, values = coords[has_value], values[has_value]
    n = values.size
    if n < settings.min_samples:
        raise InsufficientDataError(
            f"{name}: {n} samples with values; kriging needs at least {settings.min_samples} "
            "(set kriging.min_samples to change)"
        )
    try:
        check_duplicates(coords)
    except ModelFitError as exc:
        raise ModelFitError(f"{name}: {exc}") from exc
    log = choose_log(values, settings.log_transform)
    kriged = np.log(values) if log else values
    cutoff = default_cutoff(coords, settings.cutoff_fraction)
    emp = empirical_variogram(coords, kriged, cutoff=cutoff, n_bins=settings.n_bins)
    try:
        floor = nugget_floor(name, values, log, settings)
        models, candidates = fit_variograms(emp, settings.models, min_nugget=floor)
    except ModelFitError as exc:
        raise ModelFitError(f"{name}: {exc}") from exc
    krige = lognormal_ordinary_kriging if log else ordinary_kriging
    for model in models:
        try:
            result = krige(coords, values, targets, model, chunk_size=settings.chunk_size)
            cv = leave_one_out(coords, values, model, log=log)
        except SingularSystemError as exc:
            warnings.warn(f"{name}: skipping the {model.kind} variogram: {exc}", PmapWarning, stacklevel=2)
            continue
        if model.range >= 0.999 * _MAX_RANGE_FACTOR * emp.cutoff:
            warnings.warn(
                f"{name}: the fitted {model.kind} range reached its upper bound "
                f"({model.range:.0f} m, {_MAX_RANGE_FACTOR:g} x the cutoff): the variogram keeps "
                "rising within the cutoff, as a trend across the field does; the map is still "
                "an interpolation of the samples, but read its variance with care",
                PmapWarning,
                stacklevel=2,
            )
        return Interpolation(name, log, emp, model, candidates, result, cv)
    raise ModelFitError(f"{name}: every fitted variogram model gives a singular kriging system")
