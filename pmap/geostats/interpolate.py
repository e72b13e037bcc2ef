"""One soil property from samples to a kriged surface: the composite the pipeline calls.

:func:`interpolate` decides on a log transform, builds the empirical variogram, fits the
best bounded model, kriges the targets (lognormal ordinary kriging when logged) and
cross-validates, returning everything needed for maps and the summary.  It then checks
the result and warns, naming the samples concerned, when the map is likely flat or
misleading: outliers (:mod:`pmap.geostats.outliers`), a pure-nugget fit, an MSDR outside
its band, a trend without a sill, near-coincident samples
(:mod:`pmap.geostats.diagnostics`).  A property whose samples are all equal is mapped as
that constant.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from pmap._checks import check_number, check_whole, require
from pmap.errors import ConfigError, InputError, InsufficientDataError, ModelFitError, PmapWarning
from pmap.geostats.anisotropy import fit_anisotropic_variogram
from pmap.geostats.crossval import (
    CrossValidation,
    figures_from_predictions,
    fold_labels,
    k_fold,
    leave_one_out,
)
from pmap.geostats.diagnostics import (
    CLOSE_PAIR_FRACTION,
    PURE_NUGGET_FRACTION,
    TREND_ALPHA,
    TREND_R2,
    close_pairs,
    first_bin_weight_share,
    is_pure_nugget,
    linear_trend,
    neighbour_correlation,
    neighbour_spacing,
    range_at_bound,
)
from pmap.geostats.drift import (
    linear_drift,
    regression_residuals,
    universal_k_fold,
    universal_kriging,
    universal_leave_one_out,
)
from pmap.geostats.kriging import (
    KrigingResult,
    KrigingSystem,
    SingularSystemError,
    check_duplicates,
    clip_to_limits,
    lognormal_back_transform,
    lognormal_log_moments,
    ordinary_kriging,
)
from pmap.geostats.outliers import DEFAULT_THRESHOLD, MAX_OUTLIER_FRACTION, Outlier, modified_z
from pmap.geostats.selection import (
    METHODS,
    SELECTION_RULES,
    Candidate,
    Neighbourhood,
    choose_candidate,
    choose_neighbourhood,
    variogram_subsample,
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
    fit_variogram,
    weighted_sse,
)

__all__ = ["KrigingSettings", "Interpolation", "interpolate", "krige_at",
           "nugget_floor", "sample_skewness", "choose_log", "LOGARITHMIC"]

_LOG_CHOICES = ("auto", "always", "never")
# Sample skewness above which "auto" kriges the logarithm.
_SKEW_LIMIT = 1.0
# Fewest samples for which a geometric anisotropy is fitted (four directions need pairs).
_MIN_ANISOTROPY_SAMPLES = 50
#: Properties that are logarithms already (pH = -log10 of the H+ activity, and a buffer pH):
#: never log-kriged.
LOGARITHMIC: tuple[str, ...] = ("ph", "buffer_ph")


@dataclass(frozen=True)
class KrigingSettings:
    """Settings of the ``[kriging]`` configuration section."""

    models: tuple[str, ...] = field(
        default=MODELS,
        metadata={
            "unit": "",
            "doc": "variogram model families tried (see kriging.selection for how one is chosen)",
            "source": "gstat fit.variogram (Pebesma); gstools (Mueller et al. 2022)",
        },
    )
    selection: str = field(
        default="cross-validation",
        metadata={
            "unit": "",
            "doc": "'cross-validation': every family, with the nugget fitted and held at the "
            "lab-error floor, on the values and (not for pH) their logarithms, is "
            "cross-validated by leave-one-out; the lowest RMSE wins, ties within "
            "kriging.rmse_tie go to the MSDR nearest 1. 'sse': log by skewness and the lowest "
            "weighted SSE against the empirical variogram",
            "source": "common practice, no source",
        },
    )
    rmse_tie: float = field(
        default=0.01,
        metadata={"unit": "fraction", "doc": "leave-one-out RMSEs within this relative margin "
                  "of the best count as tied (then the MSDR nearest 1 wins)",
                  "source": "common practice, no source"},
    )
    estimator: str = field(
        default="matheron",
        metadata={"unit": "", "doc": "empirical variogram estimator: 'matheron' or the robust "
                  "'cressie-hawkins'", "source": "Cressie & Hawkins 1980, Math. Geol. 12"},
    )
    anisotropy: str = field(
        default="auto",
        metadata={"unit": "", "doc": "'auto': fit a geometric anisotropy (ratio, angle) to the "
                  "chosen family and keep it only if it lowers the leave-one-out RMSE by "
                  "kriging.anisotropy_gain; 'never': isotropic only",
                  "source": "common practice, no source"},
    )
    anisotropy_gain: float = field(
        default=0.02,
        metadata={"unit": "fraction", "doc": "least relative drop of the leave-one-out RMSE "
                  "for which an anisotropic model replaces the isotropic one",
                  "source": "common practice, no source"},
    )
    method: str = field(
        default="auto",
        metadata={"unit": "", "doc": "'global' (one dense system of all samples), 'local' (each "
                  "cell from its kriging.neighbours nearest samples) or 'auto': global up to "
                  "kriging.global_max_samples, local beyond", "source": "common practice, no source"},
    )
    neighbours: int = field(
        default=16,
        metadata={"unit": "samples", "doc": "samples per cell in local kriging",
                  "source": "common practice, no source"},
    )
    search_radius_m: float = field(
        default=0.0,
        metadata={"unit": "m", "doc": "local kriging uses only samples within this distance; a "
                  "cell with none is nodata. 0: no limit", "source": "common practice, no source"},
    )
    global_max_samples: int = field(
        default=2000,
        metadata={"unit": "samples", "doc": "most samples kriged globally under method 'auto' "
                  "(2,000 samples: a dense system of about 100 MiB)",
                  "source": "common practice, no source"},
    )
    variogram_max_samples: int = field(
        default=5000,
        metadata={"unit": "samples", "doc": "with more samples, the empirical variogram is "
                  "computed from a random subsample of this size (seeded by kriging.seed)",
                  "source": "common practice, no source"},
    )
    k_folds: int = field(
        default=10,
        metadata={"unit": "folds", "doc": "folds of the k-fold cross-validation reported beside "
                  "leave-one-out (random, seeded by kriging.seed)",
                  "source": "common practice, no source"},
    )
    seed: int = field(
        default=0,
        metadata={"unit": "", "doc": "seed of the variogram subsample, the k-fold folds and the "
                  "simulations", "source": "common practice, no source"},
    )
    drift: str = field(
        default="none",
        metadata={"unit": "", "doc": "'linear': also try universal kriging with a linear drift in "
                  "x and y (each family refitted to the residuals of the plane); it is used only "
                  "when its leave-one-out RMSE wins. Needs global kriging",
                  "source": "common practice, no source"},
    )
    covariates: dict[str, str] = field(
        default_factory=dict,
        metadata={"unit": "", "doc": "covariate rasters (GeoTIFF) for regression kriging as name = "
                  "path, e.g. elevation = \"dem.tif\": each property is also kriged with them as "
                  "external drift (variogram fitted to the least-squares residuals) and that "
                  "candidate is used only when its leave-one-out RMSE wins. Needs global kriging",
                  "source": "Hengl, Heuvelink & Rossiter 2007, Comput. Geosci. 33"},
    )
    probability: str = field(
        default="kriging",
        metadata={"unit": "", "doc": "where probability maps (deficiency of soil-test P, high "
                  "fixation risk) come from: 'kriging' (the normal kriging distribution of each "
                  "cell) or 'simulation' (kriging.realisations conditional sequential Gaussian "
                  "simulations in normal scores, which also carry the joint uncertainty of pH "
                  "through the fixation model)", "source": "common practice, no source"},
    )
    realisations: int = field(
        default=100,
        metadata={"unit": "", "doc": "realisations simulated when kriging.probability = "
                  "'simulation'; probabilities are known to about 0.5 / sqrt(realisations)",
                  "source": "common practice, no source"},
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
            "'always' or 'never'; pH, a logarithm already, is never logged ('always' is "
            "ignored for it with a warning)",
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
    lab_error_sd_buffer_ph: float = field(
        default=0.03,
        metadata={
            "unit": "pH units",
            "doc": "standard deviation of the lab's buffer-pH reading; its square is the least "
            "nugget a buffer-pH variogram may take (a buffer pH spans about 1 pH unit, so the "
            "soil pH's error would swamp it)",
            "source": "from memory, unverified",
        },
    )
    lab_error_cv: float = field(
        default=0.05,
        metadata={
            "unit": "fraction",
            "doc": "relative measurement error of the other properties (P, CaCO3, clay, ...); "
            "the nugget is at least (lab_error_cv x sample mean)^2, or log(1 + cv^2) when the "
            "logarithm is kriged (every bound is in the units kriged)",
            "source": "from memory, unverified",
        },
    )
    chunk_size: int = field(
        default=20000,
        metadata={"unit": "cells", "doc": "grid cells solved per block; bounds memory",
                  "source": "common practice, no source"},
    )
    outlier_z: float = field(
        default=DEFAULT_THRESHOLD,
        metadata={
            "unit": "",
            "doc": "a sample is named as a likely outlier when the modified z-score "
            "0.6745 (x - median) / MAD of its value (of its logarithm when log-kriged) or of "
            "its leave-one-out standardized error exceeds this in absolute value",
            "source": "Iglewicz & Hoaglin 1993, How to Detect and Handle Outliers",
        },
    )
    drop_outliers: bool = field(
        default=False,
        metadata={
            "unit": "",
            "doc": "leave the named outliers out and refit (one round); false keeps them and "
            "only names them",
            "source": "common practice, no source",
        },
    )
    msdr_band: tuple[float, ...] = field(
        default=(0.5, 2.0),
        metadata={
            "unit": "",
            "doc": "[low, high]: warn when the leave-one-out mean squared deviation ratio "
            "(ideal 1) falls outside; the kriging variance then misstates the real errors",
            "source": "common practice, no source",
        },
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
        for key, choices in (("selection", SELECTION_RULES), ("estimator", ESTIMATORS),
                             ("anisotropy", ("auto", "never")), ("method", METHODS)):
            if getattr(self, key) not in choices:
                raise ConfigError(f"kriging.{key} must be one of {list(choices)}, got "
                                  f"{getattr(self, key)!r}")
        check_number("kriging.rmse_tie", self.rmse_tie, ge=0, lt=1)
        check_number("kriging.anisotropy_gain", self.anisotropy_gain, ge=0, lt=1)
        check_whole("kriging.neighbours", self.neighbours, ge=3)
        check_number("kriging.search_radius_m", self.search_radius_m, ge=0, finite=True)
        check_whole("kriging.global_max_samples", self.global_max_samples, ge=10)
        check_whole("kriging.variogram_max_samples", self.variogram_max_samples, ge=100)
        check_whole("kriging.k_folds", self.k_folds, ge=2)
        check_whole("kriging.seed", self.seed, ge=0)
        if self.drift not in ("none", "linear"):
            raise ConfigError(f"kriging.drift must be one of ['none', 'linear'], got {self.drift!r}")
        require(isinstance(self.covariates, Mapping), "kriging.covariates",
                "be a table of name = path", self.covariates)
        object.__setattr__(self, "covariates", dict(self.covariates))
        for cname, path in self.covariates.items():
            require(isinstance(path, str) and bool(path.strip()), f"kriging.covariates.{cname}",
                    "be the path of a GeoTIFF", path)
        if self.probability not in ("kriging", "simulation"):
            raise ConfigError("kriging.probability must be one of ['kriging', 'simulation'], "
                              f"got {self.probability!r}")
        check_whole("kriging.realisations", self.realisations, ge=10)
        check_whole("kriging.n_bins", self.n_bins, ge=3)
        check_number("kriging.cutoff_fraction", self.cutoff_fraction, gt=0, le=1)
        if self.log_transform not in _LOG_CHOICES:
            raise ConfigError(
                f"kriging.log_transform must be one of {list(_LOG_CHOICES)}, got {self.log_transform!r}"
            )
        check_whole("kriging.min_samples", self.min_samples, ge=5)
        for key in ("lab_error_sd_ph", "lab_error_sd_buffer_ph", "lab_error_cv"):
            check_number(f"kriging.{key}", getattr(self, key), ge=0, lt=1)
        check_whole("kriging.chunk_size", self.chunk_size, ge=1)
        check_number("kriging.outlier_z", self.outlier_z, gt=0, finite=True)
        require(isinstance(self.drop_outliers, bool), "kriging.drop_outliers", "be true or false",
                repr(self.drop_outliers))
        if isinstance(self.msdr_band, list):
            object.__setattr__(self, "msdr_band", tuple(self.msdr_band))
        band = self.msdr_band
        require(
            isinstance(band, tuple) and len(band) == 2
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in band)
            and 0 < band[0] < 1 < band[1] < np.inf,
            "kriging.msdr_band", "be [low, high] with 0 < low < 1 < high", list(band)
            if isinstance(band, tuple) else repr(band),
        )


def nugget_floor(name: str, values: np.ndarray, log: bool, settings: KrigingSettings) -> float:
    """Least nugget allowed by the lab's precision, in squared units of the kriged variable.

    pH and buffer pH use an absolute error (``lab_error_sd_ph``, ``lab_error_sd_buffer_ph``;
    pH units), the others a
    relative error ``lab_error_cv`` of the sample mean.  On the property's own scale the
    floor is the error variance, ``sd^2`` or ``(cv x mean)^2``; when the logarithm is kriged
    it is the variance of the log of a value with that relative error, ``log(1 + cv^2)``
    (``cv = sd / mean`` for pH), the lognormal relation between a relative error and a
    log-scale variance.  A floor in the wrong units can exceed the whole variance of the
    kriged variable and force a pure-nugget fit.

    Parameters
    ----------
    name : str
        Property name; ``"ph"`` selects ``lab_error_sd_ph``, ``"buffer_ph"``
        ``lab_error_sd_buffer_ph``.
    values : numpy.ndarray
        Sample values in the property's units (not logged).
    log : bool
        Whether ``log(values)`` is kriged.
    settings : KrigingSettings
        The ``[kriging]`` section.

    Returns
    -------
    float
        Squared property units, or squared log units when ``log``.
    """
    mean = float(np.mean(values))
    if name in LOGARITHMIC:
        sd = float(settings.lab_error_sd_buffer_ph if name == "buffer_ph"
                   else settings.lab_error_sd_ph)
        return float(np.log1p((sd / mean) ** 2)) if log else sd**2
    cv = float(settings.lab_error_cv)
    if log:
        return float(np.log1p(cv**2))
    return float((cv * mean) ** 2)


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
        The variogram model used; kind ``"constant"`` (zero variogram) for a property
        whose samples are all equal.
    candidates : tuple of Candidate
        Every variogram tried, with its weighted SSE and leave-one-out figures (empty for
        a constant); see :mod:`pmap.geostats.selection` for the rule.
    result : KrigingResult
        Estimates and variances at the targets, in the property's units.  The estimates
        are clipped to the physical ``limits`` given to :func:`interpolate`: they are the
        values the maps and the summary show.
    cv : CrossValidation
        Leave-one-out figures in the property's units.
    kind : str
        ``"kriged"``, or ``"constant"`` when every sample has the same value and the map
        is that value (variance 0, cross-validation errors 0, MSDR undefined).
    outliers : tuple of Outlier
        Samples named as likely outliers (see :mod:`pmap.geostats.outliers`).
    notes : tuple of str
        The warnings issued for this property, in order.
    neighbourhood : Neighbourhood
        Global or local kriging, and the rule that chose it.
    k_fold : CrossValidation
        k-fold figures (``kriging.k_folds`` random folds) of the chosen model.
    selection : str
        The rule that chose the model, in words.
    variogram_samples : int
        Samples the empirical variogram was computed from (a seeded subsample when more
        than ``kriging.variogram_max_samples``).
    sample_coords, sample_values : numpy.ndarray, shape (n, 2) and (n,)
        The samples kriged (m; property units), in the order of ``cv.errors``: the
        observed values of the cross-validation are ``sample_values`` and the predicted
        ones ``sample_values + cv.errors``.
    diagnostics : dict
        Figures behind the warnings: ``nugget_floor`` (squared kriged units),
        ``pure_nugget``, ``spacing_m`` (median nearest-neighbour distance, m),
        ``neighbour_correlation`` (model correlation at that distance), ``no_structure``
        (pure nugget or that correlation <= 0.05: the map is the field mean), ``msdr_in_band``, ``trend_r2``, ``trend_p``, ``close_pairs``,
        ``clipped_cells``, ``n_dropped``, ``n_large_errors`` (samples flagged when too many
        were flagged to be outliers).
    """

    name: str
    log: bool
    empirical: EmpiricalVariogram
    model: VariogramModel
    candidates: tuple[Candidate, ...]
    result: KrigingResult
    cv: CrossValidation
    kind: str = "kriged"
    outliers: tuple[Outlier, ...] = ()
    notes: tuple[str, ...] = ()
    diagnostics: dict[str, Any] = field(default_factory=dict)
    neighbourhood: Neighbourhood | None = None
    k_fold: CrossValidation | None = None
    selection: str = ""
    variogram_samples: int = 0
    sample_coords: np.ndarray | None = field(default=None, compare=False, repr=False)
    sample_values: np.ndarray | None = field(default=None, compare=False, repr=False)

    def kriged_moments(self) -> tuple[np.ndarray, np.ndarray]:
        """Mean and variance of the kriging distribution in the space that was kriged.

        For lognormal kriging (``log``) these are the log-space kriged value and variance
        (:func:`pmap.geostats.kriging.lognormal_log_moments`); otherwise the estimate and the
        kriging variance in the property's units.  Probabilities and quantiles of the
        property at a target follow from a normal distribution with these moments.
        """
        if self.log:
            return lognormal_log_moments(self.result.estimate, self.result.variance,
                                         self.result.lagrange)
        return self.result.estimate, self.result.variance

    def as_dict(self) -> dict[str, Any]:
        """Summary without the target arrays (JSON-able)."""
        return {
            "name": self.name,
            "kind": self.kind,
            "log": bool(self.log),
            "model": self.model.as_dict(),
            "selection": self.selection,
            "candidates": [c.as_dict(chosen=c.model == self.model and c.log == self.log)
                           for c in self.candidates],
            "neighbourhood": (self.neighbourhood.as_dict() if self.neighbourhood is not None
                              else None),
            "variogram_samples": int(self.variogram_samples),
            "variogram": self.empirical.as_dict(),
            "cv": self.cv.as_dict(),
            "k_fold": self.k_fold.as_dict() if self.k_fold is not None else None,
            "outliers": [o.as_dict() for o in self.outliers],
            "notes": list(self.notes),
            "diagnostics": {k: (v if isinstance(v, (bool, int, str)) else float(v))
                            for k, v in self.diagnostics.items()},
        }


def sample_skewness(values: np.ndarray) -> float:
    """Moment coefficient of skewness ``m3 / m2^1.5`` (biased, population form)."""
    values = np.asarray(values, dtype=float)
    dev = values - values.mean()
    m2 = np.mean(dev**2)
    if m2 == 0:
        return 0.0
    return float(np.mean(dev**3) / m2**1.5)


def choose_log(values: np.ndarray, rule: str = "auto", *, name: str | None = None) -> bool:
    """Whether to krige ``log(values)`` under ``rule`` ("auto", "always", "never").

    "auto" logs when every value is > 0 and the sample skewness exceeds 1.  A property
    that is itself a logarithm (pH, ``name == "ph"``) is never logged, whatever the
    rule: its skewness says nothing about lognormality, and a log of pH squeezes its
    variance to a few thousandths.  :func:`interpolate` warns when "always" is ignored.
    """
    values = np.asarray(values, dtype=float)
    if rule not in _LOG_CHOICES:
        raise ConfigError(f"kriging.log_transform must be one of {list(_LOG_CHOICES)}, got {rule!r}")
    if rule == "never" or name in LOGARITHMIC:
        return False
    if rule == "always":
        if np.any(~(values > 0)):
            raise InputError(
                "kriging.log_transform = 'always' needs every value > 0; "
                f"found {int(np.sum(~(values > 0)))} value(s) <= 0 (use 'auto' or 'never')"
            )
        return True
    return bool(np.all(values > 0) and sample_skewness(values) > _SKEW_LIMIT)


@dataclass(frozen=True)
class _Fit:
    """One pass of variogram choice, kriging and cross-validation."""

    log: bool
    kriged: np.ndarray
    empirical: EmpiricalVariogram
    model: VariogramModel
    candidates: tuple[Candidate, ...]
    result: KrigingResult
    cv: CrossValidation
    k_fold: CrossValidation
    floor: float
    notes: tuple[str, ...]
    neighbourhood: Neighbourhood
    selection: str
    variogram_samples: int


def _transforms(name: str, values: np.ndarray, settings: KrigingSettings) -> tuple[bool, ...]:
    """The transforms to try: plain and/or log, under kriging.log_transform and selection."""
    if settings.selection == "sse" or settings.log_transform != "auto":
        return (choose_log(values, settings.log_transform, name=name),)
    if name in LOGARITHMIC or np.any(~(values > 0)):
        return (False,)
    return (False, True)


def _empirical(coords: np.ndarray, kriged: np.ndarray, settings: KrigingSettings,
               subsample: np.ndarray | None) -> EmpiricalVariogram:
    xy, z = (coords, kriged) if subsample is None else (coords[subsample], kriged[subsample])
    cutoff = default_cutoff(xy, settings.cutoff_fraction)
    return empirical_variogram(xy, z, cutoff=cutoff, n_bins=settings.n_bins,
                               estimator=settings.estimator)


@dataclass(frozen=True)
class _Drift:
    """Drift columns of universal / regression kriging at the samples and the targets."""

    label: str
    samples: np.ndarray
    targets: np.ndarray

    def subset(self, keep: np.ndarray) -> _Drift:
        return _Drift(self.label, self.samples[keep], self.targets)


def _drift_columns(coords: np.ndarray, targets: np.ndarray, settings: KrigingSettings,
                   covariates: Mapping[str, tuple[np.ndarray, np.ndarray]] | None,
                   ) -> _Drift | None:
    parts, names = [], []
    if settings.drift == "linear":
        origin = coords.mean(axis=0)
        scale = float(np.sqrt(np.mean(np.sum((coords - origin) ** 2, axis=1)))) or 1.0
        parts.append((linear_drift(coords, origin, scale), linear_drift(targets, origin, scale)))
        names.append("x, y")
    for cname, (at_samples, at_targets) in (covariates or {}).items():
        parts.append((np.asarray(at_samples, float)[:, None],
                      np.asarray(at_targets, float)[:, None]))
        names.append(cname)
    if not parts:
        return None
    return _Drift(" + ".join(names), np.hstack([p[0] for p in parts]),
                  np.hstack([p[1] for p in parts]))


def _fit(
    name: str, coords: np.ndarray, values: np.ndarray, targets: np.ndarray,
    settings: KrigingSettings, limits: tuple[float, float] | None,
    drift: _Drift | None = None,
) -> _Fit:
    n = values.size
    hood = choose_neighbourhood(
        n, method=settings.method, neighbours=settings.neighbours,
        radius=settings.search_radius_m or None, global_max_samples=settings.global_max_samples)
    k, radius = hood.neighbours, hood.radius
    subsample = variogram_subsample(n, settings.variogram_max_samples, settings.seed)
    n_vario = n if subsample is None else int(subsample.size)
    notes: list[str] = []
    candidates: list[Candidate] = []
    # Factorised systems kept for the map: only of candidates that can still be chosen
    # (within kriging.rmse_tie of the best RMSE so far), so memory holds few n x n factors.
    held: list[tuple[Candidate, KrigingSystem]] = []
    empiricals: dict[bool, EmpiricalVariogram] = {}
    floors: dict[bool, float] = {}
    reasons: list[str] = []
    by_cv = settings.selection == "cross-validation"

    def evaluate(log: bool, model: VariogramModel, nugget: str, wsse: float) -> Candidate:
        kriged = np.log(values) if log else values
        try:
            system = None if k is not None else KrigingSystem.factorise(coords, kriged, model)
            cv = leave_one_out(coords, values, model, log=log, limits=limits, neighbours=k,
                               radius=radius, system=system)
        except SingularSystemError as exc:
            return Candidate(log, model, nugget, wsse, None, skipped=str(exc))
        cand = Candidate(log, model, nugget, wsse, cv)
        if system is not None:
            held.append((cand, system))
            band = min(c.cv.rmse for c, _ in held) * (1.0 + settings.rmse_tie)
            held[:] = [(c, s) for c, s in held if c.cv.rmse <= band]
        return cand

    kinds = settings.models
    if k is not None and "matern" in kinds and len(kinds) > 1:
        kinds = tuple(m for m in kinds if m != "matern")
        notes.append(f"{name}: the matern family is not tried with local kriging (its Bessel "
                     "function has no compiled kernel and would take minutes on dense data); "
                     "the stable family spans the same range of shapes")
    for log in _transforms(name, values, settings):
        kriged = np.log(values) if log else values
        emp = _empirical(coords, kriged, settings, subsample)
        floor = nugget_floor(name, values, log, settings)
        empiricals[log], floors[log] = emp, floor
        fitted: list[Candidate] = []
        for kind in kinds:
            options = (("fitted", None), ("lab error", floor)) if by_cv else (("fitted", None),)
            free_nugget = np.inf
            for nugget, fixed in options:
                if fixed is not None and free_nugget <= fixed * (1.0 + 1e-6):
                    continue                     # the free fit already sits on the floor
                try:
                    model = fit_variogram(emp, kind, min_nugget=floor, max_nugget=fixed)
                except ModelFitError as exc:
                    reasons.append(f"{'log ' if log else ''}{kind}: {exc}")
                    continue
                if fixed is None:
                    free_nugget = model.nugget
                fitted.append(Candidate(log, model, nugget, weighted_sse(emp, model)))
        if by_cv:
            candidates.extend(evaluate(c.log, c.model, c.nugget, c.wsse) for c in fitted)
        else:
            fitted.sort(key=lambda c: c.wsse)
            candidates.extend(fitted)
    if not candidates:
        raise ModelFitError(f"{name}: no variogram model could be fitted ("
                            + "; ".join(reasons) + ")")

    if drift is not None and k is not None:
        notes.append(f"{name}: kriging with drift ({drift.label}) needs global kriging and was "
                     f"not tried ({hood.reason})")
    elif drift is not None and by_cv and False in floors:
        drift_cands, drift_emp = _drift_candidates(name, coords, values, drift, kinds, settings,
                                                   subsample, limits, reasons)
        candidates.extend(drift_cands)

    if by_cv:
        try:
            chosen = choose_candidate(candidates, settings.rmse_tie)
        except ValueError:
            raise ModelFitError(f"{name}: every fitted variogram model gives a singular kriging "
                                "system") from None
        rule = (f"lowest leave-one-out RMSE of {len(candidates)} candidates (ties within "
                f"{100 * settings.rmse_tie:g} % to the MSDR nearest 1)")
    else:
        chosen = None
        for cand in candidates:
            evaluated = evaluate(cand.log, cand.model, cand.nugget, cand.wsse)
            candidates[candidates.index(cand)] = evaluated
            if evaluated.skipped:
                notes.append(f"{name}: skipping the {cand.model.kind} variogram: {evaluated.skipped}")
                continue
            chosen = evaluated
            break
        if chosen is None:
            raise ModelFitError(f"{name}: every fitted variogram model gives a singular kriging "
                                "system")
        rule = "lowest weighted SSE against the empirical variogram (kriging.selection = 'sse')"
    for cand in candidates:
        if cand.skipped and by_cv:
            notes.append(f"{name}: the {cand.label} candidate was skipped: {cand.skipped}")

    if settings.anisotropy == "auto" and n >= _MIN_ANISOTROPY_SAMPLES and not chosen.drift:
        sub_xy = coords if subsample is None else coords[subsample]
        kriged = np.log(values) if chosen.log else values
        sub_z = kriged if subsample is None else kriged[subsample]
        emp = empiricals[chosen.log]
        try:
            aniso = fit_anisotropic_variogram(
                sub_xy, sub_z, chosen.model.kind, cutoff=emp.cutoff, n_bins=settings.n_bins,
                min_nugget=floors[chosen.log], estimator=settings.estimator)
        except ModelFitError as exc:
            notes_aniso = f"anisotropic fit failed: {exc}"
            aniso = None
        else:
            notes_aniso = ""
        if aniso is not None and aniso.anisotropic:
            cand = evaluate(chosen.log, aniso, chosen.nugget, weighted_sse(emp, aniso))
            candidates.append(cand)
            if (cand.cv is not None and not cand.skipped and chosen.cv is not None
                    and cand.cv.rmse <= chosen.cv.rmse * (1.0 - settings.anisotropy_gain)):
                chosen = cand
                rule += (f"; the geometric anisotropy lowered the RMSE by at least "
                         f"{100 * settings.anisotropy_gain:g} % and was kept")
        elif notes_aniso:
            notes.append(f"{name}: {notes_aniso}")

    log, model = chosen.log, chosen.model
    kriged = np.log(values) if log else values
    system = next((s for c, s in held if c is chosen), None)
    if chosen.drift and drift is not None:
        uk = universal_kriging(coords, values, targets, model, drift_samples=drift.samples,
                               drift_targets=drift.targets, chunk_size=settings.chunk_size)
        result = KrigingResult(uk.estimate, uk.variance, np.full(targets.shape[0], np.nan))
        labels = fold_labels(n, min(settings.k_folds, n), settings.seed)
        f_est, f_var = universal_k_fold(coords, values, model, drift.samples, labels)
        folds = figures_from_predictions(values, f_est, f_var, limits)
        rule += f"; kriging with drift ({drift.label}) won"
        assert chosen.cv is not None
        return _Fit(False, values, drift_emp, model, tuple(candidates), result, chosen.cv, folds, floors[False],
                    tuple(notes), hood, rule, n_vario)
    if k is None:
        if system is None:
            system = KrigingSystem.factorise(coords, kriged, model)
        raw = system.predict(targets, settings.chunk_size)
    else:
        raw = ordinary_kriging(coords, kriged, targets, model, k, radius,
                               chunk_size=settings.chunk_size)
    if log:
        estimate, variance = lognormal_back_transform(raw.estimate, raw.variance, raw.lagrange)
        result = KrigingResult(estimate, variance, raw.lagrange)
    else:
        result = raw
    folds = k_fold(coords, values, model, folds=min(settings.k_folds, n), seed=settings.seed,
                   log=log, limits=limits, neighbours=k, radius=radius, system=system)
    assert chosen.cv is not None
    return _Fit(log, kriged, empiricals[log], model, tuple(candidates), result, chosen.cv, folds,
                floors[log], tuple(notes), hood, rule, n_vario)


def _drift_candidates(
    name: str, coords: np.ndarray, values: np.ndarray, drift: _Drift, kinds: tuple[str, ...],
    settings: KrigingSettings, subsample: np.ndarray | None,
    limits: tuple[float, float] | None, reasons: list[str],
) -> tuple[list[Candidate], EmpiricalVariogram]:
    """Universal / regression kriging candidates: each family fitted to the OLS residuals.

    Returns the candidates and the empirical variogram of the residuals.
    """
    if not np.all(np.isfinite(drift.samples)):
        bad = int((~np.all(np.isfinite(drift.samples), axis=1)).sum())
        raise InputError(f"{name}: {bad} sample(s) have no value of the drift covariate(s) "
                         f"({drift.label}): they lie outside the raster or on its nodata; "
                         "extend the raster or remove it from kriging.covariates")
    _, residuals, _ = regression_residuals(values, drift.samples)
    emp = _empirical(coords, residuals, settings, subsample)
    floor = nugget_floor(name, values, False, settings)
    out: list[Candidate] = []
    for kind in kinds:
        try:
            model = fit_variogram(emp, kind, min_nugget=floor)
        except ModelFitError as exc:
            reasons.append(f"drift {kind}: {exc}")
            continue
        wsse = weighted_sse(emp, model)
        try:
            est, var = universal_leave_one_out(coords, values, model, drift.samples)
        except ModelFitError as exc:
            out.append(Candidate(False, model, "fitted", wsse, None, skipped=str(exc),
                                 drift=drift.label))
            continue
        out.append(Candidate(False, model, "fitted", wsse,
                             figures_from_predictions(values, est, var, limits),
                             drift=drift.label))
    return out, emp


def _find_outliers(
    fit: _Fit, values: np.ndarray, ids: np.ndarray, rows: np.ndarray | None, threshold: float,
) -> tuple[list[Outlier], np.ndarray]:
    """Samples whose leave-one-out error is improbable and that stand out robustly.

    A sample is named when its standardized leave-one-out error exceeds ``threshold``
    in absolute value (improbable under the fitted model) and its modified z-score
    exceeds ``threshold`` either on its value in the kriged units (kind ``"value"``) or
    among the standardized errors (kind ``"cross-validation"``).  The first condition
    keeps the extreme but spatially consistent values of a real hot spot or of a
    calcareous patch in a field mostly free of CaCO3 off the list.  Largest |z| first.
    """
    found: list[Outlier] = []
    flagged = np.zeros(values.size, dtype=bool)
    standardized = fit.cv.standardized
    if not np.all(np.isfinite(standardized)):
        return found, flagged
    with np.errstate(invalid="ignore"):
        improbable = np.abs(standardized) > threshold
        for kind, z in (("value", modified_z(fit.kriged)),
                        ("cross-validation", modified_z(standardized))):
            hit = improbable & (np.abs(z) > threshold)
            flagged |= hit
            for i in np.flatnonzero(hit):
                row = None if rows is None else int(rows[i])
                found.append(Outlier(str(ids[i]), row, float(values[i]), float(z[i]), kind))
    found.sort(key=lambda o: -abs(o.z))
    return found, flagged


def _too_many(flagged: np.ndarray) -> bool:
    """More samples flagged than outliers can be: more than one and > MAX_OUTLIER_FRACTION."""
    k = int(flagged.sum())
    return k > 1 and k > MAX_OUTLIER_FRACTION * flagged.size


def _mismatch_note(name: str, fit: _Fit, ids: np.ndarray, rows: np.ndarray | None,
                   flagged: np.ndarray, threshold: float) -> str:
    order = np.argsort(-np.abs(fit.cv.standardized))
    worst = [i for i in order if flagged[i]][:10]
    shown = ", ".join(
        f"{ids[i]}" + (f" (row {int(rows[i])})" if rows is not None else "")
        + f" {fit.cv.standardized[i]:+.1f}"
        for i in worst
    )
    k = int(flagged.sum())
    return (
        f"{name}: {k} of {flagged.size} samples ({100 * k / flagged.size:.0f} %, more than the "
        f"{100 * MAX_OUTLIER_FRACTION:g} % outliers can be) have leave-one-out errors beyond "
        f"{threshold:g} kriging standard deviations and stand out robustly: {shown}"
        + (f" and {k - 10} more" if k > 10 else "")
        + ". These are not single slips: the samples fall into groups or change abruptly "
        "(e.g. a sharp soil boundary), which one stationary variogram does not describe; the "
        "map smooths across such boundaries and its variance layer is unreliable there. "
        "None were dropped."
    )


def _outlier_note(name: str, found: list[Outlier], log: bool, threshold: float,
                  dropped: bool, kept_because: str = "") -> str:
    by_sample: dict[str, list[Outlier]] = {}
    for o in found:
        by_sample.setdefault(o.id, []).append(o)
    parts = []
    for sid, entries in list(by_sample.items())[:10]:
        first = entries[0]
        where = f" (row {first.row})" if first.row is not None else ""
        scores = ", ".join(
            f"z = {o.z:.1f} on its " + (("log value" if log else "value") if o.kind == "value"
                                        else "leave-one-out error")
            for o in entries
        )
        parts.append(f"{sid}{where} = {first.value:.6g}, {scores}")
    shown = "; ".join(parts) + (f"; and {len(by_sample) - 10} more" if len(by_sample) > 10 else "")
    head = (
        f"{name}: {len(by_sample)} sample(s) stand out as potential outliers (leave-one-out error "
        f"beyond {threshold:g} kriging standard deviations, and a modified z-score |z| > "
        f"{threshold:g} (Iglewicz & Hoaglin 1993) on the {'log ' if log else ''}value or among "
        f"the standardized errors): {shown}. "
    )
    if dropped:
        return head + ("They were left out and the variogram refitted without them "
                       "(kriging.drop_outliers = true): the map does not use them.")
    if kept_because:
        return head + f"They were kept: {kept_because}; check them for typing or unit slips."
    return head + ("They were kept: check them for typing or unit slips and correct the file, "
                   "or set kriging.drop_outliers = true to refit without them.")


def _constant(
    name: str, coords: np.ndarray, values: np.ndarray, targets: np.ndarray,
    settings: KrigingSettings, limits: tuple[float, float] | None,
) -> Interpolation:
    """The map of a property whose samples all hold the same value: that value."""
    level = float(values[0])
    cutoff = default_cutoff(coords, settings.cutoff_fraction)
    emp = empirical_variogram(coords, values, cutoff=cutoff, n_bins=settings.n_bins)
    m, n = targets.shape[0], values.size
    estimate = np.full(m, level)
    clipped = 0
    if limits is not None:
        estimate, clipped = clip_to_limits(estimate, limits)
    result = KrigingResult(estimate, np.zeros(m), np.zeros(m))
    zeros = np.zeros(n)
    cv = CrossValidation(0.0, 0.0, float("nan"), n, zeros, zeros.copy(), np.full(n, np.nan))
    note = (
        f"{name}: all {n} samples hold the same value, {level:g}: the property is mapped as "
        "that constant (kriging variance 0, leave-one-out errors 0, MSDR undefined); no "
        "variogram was fitted"
    )
    warnings.warn(note, PmapWarning, stacklevel=3)
    diagnostics = {"nugget_floor": 0.0, "pure_nugget": False, "spacing_m": neighbour_spacing(coords),
                   "neighbour_correlation": 1.0, "no_structure": False, "msdr_in_band": True,
                   "trend_r2": 0.0, "trend_p": 1.0, "close_pairs": 0, "clipped_cells": clipped,
                   "n_dropped": 0, "n_large_errors": 0}
    return Interpolation(name, False, emp, VariogramModel(CONSTANT, 0.0, 0.0, cutoff), (), result,
                         cv, kind="constant", notes=(note,), diagnostics=diagnostics,
                         sample_coords=coords, sample_values=values)


def interpolate(
    name: str,
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    settings: KrigingSettings = KrigingSettings(),  # noqa: B008 - frozen, immutable default
    *,
    ids: np.ndarray | None = None,
    rows: np.ndarray | None = None,
    limits: tuple[float, float] | None = None,
    covariates: Mapping[str, tuple[np.ndarray, np.ndarray]] | None = None,
) -> Interpolation:
    """Krige one property at ``targets`` with a fitted variogram and cross-validation.

    Parameters
    ----------
    name : str
        Property name, used in messages; ``"ph"`` is never log-kriged.
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m (projected CRS).
    values : numpy.ndarray, shape (n,)
        Sample values in the property's unit; NaN marks a sample without a value and is
        left out.
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    settings : KrigingSettings
        The ``[kriging]`` section.
    ids : numpy.ndarray of str, shape (n,), optional
        Sample identifiers, for messages; default the position in ``values``.
    rows : numpy.ndarray of int, shape (n,), optional
        Row of each sample in its file, for messages.
    limits : (float, float), optional
        Physical range of the property (its units): estimates, and leave-one-out
        predictions, are clipped to it, with a warning when that bites.
    covariates : mapping of str to (numpy.ndarray (n,), numpy.ndarray (m,)), optional
        Covariates for regression kriging: name -> (value at each sample, value at each
        target), used as external drift with ``settings.drift``'s linear drift (if any).

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

    Warns
    -----
    PmapWarning
        For each finding that makes the map flat or misleading, naming the samples
        concerned: likely outliers; a pure-nugget fit (the map is the field mean); an MSDR
        outside ``settings.msdr_band``; a linear trend with no sill within the cutoff;
        near-coincident samples that steer the fit; estimates clipped to ``limits``; a
        constant property; a model skipped as singular; ``log_transform = "always"``
        ignored for pH.  Each text is also kept in :attr:`Interpolation.notes`.

    Notes
    -----
    The models are tried in order of weighted SSE; a model whose kriging system is
    numerically singular is skipped.  Every variogram bound is in the units actually
    kriged (see :func:`nugget_floor`).  The thresholds of the checks are in
    :mod:`pmap.geostats.diagnostics` and ``docs/geostatistics.md``.
    """
    coords = np.asarray(coords, dtype=float)
    values = np.asarray(values, dtype=float)
    if coords.ndim != 2 or coords.shape[1] != 2 or values.shape != (coords.shape[0],):
        raise ValueError(f"{name}: coords must be (n, 2) and values (n,), got {coords.shape}, {values.shape}")
    ids = np.arange(values.size).astype(str) if ids is None else np.asarray(ids).astype(str)
    if ids.shape != values.shape or (rows is not None and np.shape(rows) != values.shape):
        raise ValueError(f"{name}: ids and rows must have the shape of values, {values.shape}")
    has_value = np.isfinite(values)
    drift = _drift_columns(coords, np.asarray(targets, dtype=float), settings, covariates)
    if drift is not None:
        drift = drift.subset(has_value)
    coords, values, ids = coords[has_value], values[has_value], ids[has_value]
    rows = None if rows is None else np.asarray(rows)[has_value]
    n = values.size
    if n < settings.min_samples:
        raise InsufficientDataError(
            f"{name}: {n} samples with values; kriging needs at least {settings.min_samples} "
            "(set kriging.min_samples to change)"
        )
    if np.ptp(values) == 0:
        return _constant(name, coords, values, targets, settings, limits)
    try:
        check_duplicates(coords)
    except ModelFitError as exc:
        raise ModelFitError(f"{name}: {exc}") from exc

    notes: list[str] = []
    if name in LOGARITHMIC and settings.log_transform == "always":
        notes.append(f"{name}: kriging.log_transform = 'always' is ignored for {name}: it is "
                     "already a logarithm and is kriged on its own scale")
    fit = _fit(name, coords, values, targets, settings, limits, drift)
    found, flagged = _find_outliers(fit, values, ids, rows, settings.outlier_z)
    n_dropped = 0
    n_mismatch = 0
    if _too_many(flagged):
        notes.append(_mismatch_note(name, fit, ids, rows, flagged, settings.outlier_z))
        n_mismatch = int(flagged.sum())
        found = []
    elif found and settings.drop_outliers:
        keep = ~flagged
        if keep.sum() < settings.min_samples or np.ptp(values[keep]) == 0:
            notes.append(_outlier_note(
                name, found, fit.log, settings.outlier_z, dropped=False,
                kept_because=f"without them {int(keep.sum())} samples would remain, fewer than "
                "kriging.min_samples or all equal"))
        else:
            dropped = [Outlier(o.id, o.row, o.value, o.z, o.kind, dropped=True) for o in found]
            notes.append(_outlier_note(name, dropped, fit.log, settings.outlier_z, dropped=True))
            coords, values, ids = coords[keep], values[keep], ids[keep]
            rows = None if rows is None else rows[keep]
            drift = None if drift is None else drift.subset(keep)
            n_dropped = int(flagged.sum())
            fit = _fit(name, coords, values, targets, settings, limits, drift)
            again, again_flagged = _find_outliers(fit, values, ids, rows, settings.outlier_z)
            if _too_many(again_flagged):
                notes.append(_mismatch_note(name, fit, ids, rows, again_flagged,
                                            settings.outlier_z))
                n_mismatch = int(again_flagged.sum())
                again = []
            elif again:
                notes.append(_outlier_note(
                    name, again, fit.log, settings.outlier_z, dropped=False,
                    kept_because="they stand out only after the refit, and one round is dropped"))
            found = dropped + again
    elif found:
        notes.append(_outlier_note(name, found, fit.log, settings.outlier_z, dropped=False))
    notes.extend(fit.notes)

    model, emp, cv = fit.model, fit.empirical, fit.cv
    kept = [o for o in found if not o.dropped]
    log_word = "log " if fit.log else ""
    sq_units = " (squared log units)" if fit.log else ""
    result = fit.result
    clipped = 0
    if limits is not None:
        clipped_estimate, clipped = clip_to_limits(result.estimate, limits)
        if clipped:
            notes.append(
                f"{name}: {clipped} cell(s) ({100 * clipped / result.estimate.size:.0f} % of the "
                f"targets) kriged outside {limits[0]:g}-{limits[1]:g} were set to the limit "
                "(ordinary kriging can overshoot near extreme samples)"
            )
        result = replace(result, estimate=clipped_estimate)

    pure = is_pure_nugget(model)
    spacing = neighbour_spacing(coords)
    rho = neighbour_correlation(model, spacing)
    if pure or rho <= PURE_NUGGET_FRACTION:
        level = float(np.median(result.estimate)) if result.estimate.size else float("nan")
        if pure:
            what = (f"is pure nugget (partial sill {model.psill:.3g} is "
                    f"{100 * model.psill / model.sill:.1f} % of the sill {model.sill:.3g}{sq_units}; "
                    f"pmap calls a fit pure nugget at {100 * PURE_NUGGET_FRACTION:g} % or less)")
        else:
            what = (f"leaves neighbouring samples uncorrelated (correlation {rho:.2f} at the "
                    f"median sample spacing of {spacing:.0f} m, practical range "
                    f"{model.range:.0f} m; pmap warns at {PURE_NUGGET_FRACTION:g} or less)")
        note = (
            f"{name}: the fitted {model.kind} variogram {what}: the samples show no spatial "
            f"structure at this spacing, so the map is the field mean, {level:.4g}, everywhere "
            "but right beside the samples"
        )
        variance = float(np.var(fit.kriged))
        if fit.floor >= 0.5 * variance:
            note += (f"; the least nugget set by the lab error ({fit.floor:.3g}) is "
                     f"{100 * fit.floor / variance:.0f} % of the variance of the {log_word}values "
                     "(see kriging.lab_error_sd_ph and kriging.lab_error_cv)")
        if kept:
            note += "; the outliers named above may cause this"
        notes.append(note)

    lo, hi = settings.msdr_band
    in_band = not np.isfinite(cv.msdr) or lo <= cv.msdr <= hi
    if not in_band:
        if cv.msdr > hi:
            meaning = (f"the actual errors are about {np.sqrt(cv.msdr):.2g} times larger than the "
                       "kriging standard deviation says, so the variance layer is too optimistic")
        else:
            meaning = (f"the actual errors are about {np.sqrt(cv.msdr):.2g} times the kriging "
                       "standard deviation, so the variance layer is too pessimistic")
        notes.append(
            f"{name}: the leave-one-out mean squared deviation ratio (MSDR) is {cv.msdr:.3g}, "
            f"outside kriging.msdr_band [{lo:g}, {hi:g}]: {meaning}; the estimates' own error is "
            f"the cross-validation RMSE, {cv.rmse:.3g}"
            + ("; the outliers named above may cause this" if kept else "")
        )

    trend = linear_trend(coords, fit.kriged)
    if trend.r2 >= TREND_R2 and trend.p_value < TREND_ALPHA and range_at_bound(model, emp):
        notes.append(
            f"{name}: a linear trend in x and y explains {100 * trend.r2:.0f} % of the variance "
            f"of the {log_word}values (F-test p = {trend.p_value:.1g}; pmap warns from "
            f"{100 * TREND_R2:g} % at p < {TREND_ALPHA:g}) and the variogram finds no sill: the "
            f"fitted {model.kind} range sits on its upper bound ({model.range:.0f} m, "
            f"{MAX_RANGE_FACTOR:g} x the cutoff of {emp.cutoff:.0f} m). Ordinary kriging then "
            "models the trend as correlation over a long range: the map follows the samples, "
            "but its variance layer is only approximate (pmap does not remove trends)"
        )

    tolerance = CLOSE_PAIR_FRACTION * emp.cutoff / settings.n_bins
    pairs = close_pairs(coords, tolerance)
    if pairs.size:
        dist = np.hypot(*(coords[pairs[:, 0]] - coords[pairs[:, 1]]).T)
        shown = ", ".join(
            f"{ids[i]}/{ids[j]} ({d:.2g} m, {values[i]:.4g} vs {values[j]:.4g})"
            for (i, j), d in zip(pairs[:10], dist[:10], strict=True)
        ) + (f" and {len(pairs) - 10} more" if len(pairs) > 10 else "")
        notes.append(
            f"{name}: {len(pairs)} pair(s) of samples lie within {tolerance:.2g} m of each other "
            f"({100 * CLOSE_PAIR_FRACTION:g} % of the lag-bin width): {shown}. With the fit's "
            f"weights N_h/h^2 the shortest lag bin (mean lag {emp.lag[0]:.2g} m) carries "
            f"{100 * first_bin_weight_share(emp):.0f} % of the weight, so such pairs set the "
            f"nugget: {model.nugget:.3g}{sq_units}, {100 * model.nugget / model.sill:.0f} % of "
            "the sill (the larger that share, the closer the map lies to the field mean). Merge "
            "re-samples of one place into one sample before kriging, or find out why they differ"
        )

    for note in notes:
        warnings.warn(note, PmapWarning, stacklevel=2)
    diagnostics = {
        "nugget_floor": fit.floor, "pure_nugget": pure, "spacing_m": spacing,
        "neighbour_correlation": rho, "no_structure": bool(pure or rho <= PURE_NUGGET_FRACTION),
        "msdr_in_band": bool(in_band),
        "trend_r2": trend.r2, "trend_p": trend.p_value, "close_pairs": int(len(pairs)),
        "clipped_cells": int(clipped), "n_dropped": n_dropped, "n_large_errors": n_mismatch,
    }
    return Interpolation(name, fit.log, emp, model, fit.candidates, result, cv, kind="kriged",
                         outliers=tuple(found), notes=tuple(notes), diagnostics=diagnostics,
                         neighbourhood=fit.neighbourhood, k_fold=fit.k_fold,
                         selection=fit.selection, variogram_samples=fit.variogram_samples,
                         sample_coords=coords, sample_values=values)


def krige_at(
    interp: Interpolation,
    targets: np.ndarray,
    *,
    limits: tuple[float, float] | None = None,
    chunk_size: int = 20_000,
    system: KrigingSystem | None = None,
) -> KrigingResult:
    """Krige more ``targets`` (m, shape (m, 2)) with what :func:`interpolate` chose.

    The same samples, variogram, transform and neighbourhood as ``interp``, so targets
    kriged in pieces (tiles of a region) get the values they would get all at once.
    Estimates are clipped to ``limits`` as :func:`interpolate` clips them.

    Parameters
    ----------
    interp : Interpolation
        A fit from :func:`interpolate` (with ``sample_coords`` and ``sample_values``).
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    limits : (float, float), optional
        Physical range of the property (its units).
    chunk_size : int
        Targets per block of global kriging.
    system : KrigingSystem, optional
        The factorised global system of ``interp`` (:meth:`KrigingSystem.factorise` of its
        samples, kriged values and model), to reuse across calls; built when needed.

    Returns
    -------
    KrigingResult
        Estimates and variances in the property's units (lognormal back-transform when
        ``interp.log``).

    Raises
    ------
    ValueError
        ``interp`` holds no samples, or its model was chosen with a drift (kriging with
        drift needs the drift at the targets, which this function does not take).
    """
    targets = np.asarray(targets, dtype=float).reshape(-1, 2)
    m = targets.shape[0]
    if interp.kind == "constant":
        level = float(interp.sample_values[0]) if interp.sample_values is not None else np.nan
        estimate = np.full(m, level)
        if limits is not None:
            estimate, _ = clip_to_limits(estimate, limits)
        return KrigingResult(estimate, np.zeros(m), np.zeros(m))
    if interp.sample_coords is None or interp.sample_values is None:
        raise ValueError(f"{interp.name}: the fit holds no samples to krige from")
    if "kriging with drift" in interp.selection:
        raise ValueError(f"{interp.name}: the model was chosen with a drift; krige_at kriges "
                         "without one")
    kriged = np.log(interp.sample_values) if interp.log else interp.sample_values
    hood = interp.neighbourhood
    if hood is None or hood.neighbours is None:
        if system is None:
            system = KrigingSystem.factorise(interp.sample_coords, kriged, interp.model)
        raw = system.predict(targets, chunk_size)
    else:
        raw = ordinary_kriging(interp.sample_coords, kriged, targets, interp.model,
                               hood.neighbours, hood.radius, chunk_size=chunk_size)
    if interp.log:
        estimate, variance = lognormal_back_transform(raw.estimate, raw.variance, raw.lagrange)
        result = KrigingResult(estimate, variance, raw.lagrange)
    else:
        result = raw
    if limits is not None:
        result = replace(result, estimate=clip_to_limits(result.estimate, limits)[0])
    return result
