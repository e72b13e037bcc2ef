"""Cross-validation of an ordinary kriging model: leave-one-out and k-fold.

Each sample (or each fold) is predicted from the others with the same variogram (no
refit).  Globally the n leave-one-out systems are not solved one by one: the factorised
system of all samples (:class:`~pmap.geostats.kriging.KrigingSystem`, the one that also
kriges the map) gives every prediction, variance and Lagrange term at once (Dubrule 1983);
a held-out fold uses the same identity with a block of the inverse.  With a neighbourhood
(``neighbours=k``) each sample is kriged from its k nearest other samples, as the map is.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from pmap.errors import ModelFitError
from pmap.geostats.kriging import (
    KrigingSystem,
    check_duplicates,
    clip_to_limits,
    lognormal_back_transform,
)
from pmap.geostats.variogram import VariogramModel, _check_points

__all__ = ["CrossValidation", "leave_one_out", "loo_kriging", "k_fold", "fold_labels",
           "figures_from_predictions"]


@dataclass(frozen=True)
class CrossValidation:
    """Leave-one-out figures, errors in the units of the sample values.

    Attributes
    ----------
    mean_error : float
        Mean of predicted - observed; near 0 for an unbiased model.
    rmse : float
        Root mean squared error, value units.
    msdr : float
        Mean squared deviation ratio, mean of ``error^2 / variance``; near 1 when the
        kriging variance describes the actual errors.
    n : int
        Number of samples.
    errors : numpy.ndarray, shape (n,)
        Predicted - observed per sample.
    variances : numpy.ndarray, shape (n,)
        Kriging variance of each prediction, squared value units.
    standardized : numpy.ndarray, shape (n,)
        ``(predicted - observed) / kriging standard deviation`` in the units actually
        kriged (of the logarithms for lognormal kriging), dimensionless; ~N(0, 1) when the
        variogram describes the data.  NaN where the variance is 0.
    """

    mean_error: float
    rmse: float
    msdr: float
    n: int
    errors: np.ndarray
    variances: np.ndarray
    standardized: np.ndarray

    def as_dict(self) -> dict[str, Any]:
        """The three figures and ``n`` as plain numbers (JSON-able)."""
        return {
            "mean_error": float(self.mean_error),
            "rmse": float(self.rmse),
            "msdr": float(self.msdr),
            "n": int(self.n),
        }


def loo_kriging(
    coords: np.ndarray, values: np.ndarray, model: VariogramModel,
    neighbours: int | None = None, radius: float | None = None, *,
    system: KrigingSystem | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Leave-one-out ordinary kriging of every sample from the others.

    Parameters
    ----------
    coords, values, model
        Samples (m) and the variogram of ``values``.
    neighbours, radius : optional
        Krige each sample from its ``neighbours`` nearest others (within ``radius`` m).
    system : KrigingSystem, optional
        The global system of these samples and this model, already factorised (e.g. for
        the map): reused instead of factorising again.

    Returns
    -------
    estimate, variance, lagrange : numpy.ndarray, shape (n,)
        Prediction of each sample from the others, its kriging variance (squared value
        units, >= 0) and the Lagrange term of its system.
    """
    coords, values = _check_points(coords, values)
    n = coords.shape[0]
    if n < 3:
        raise ModelFitError(f"leave-one-out cross-validation needs at least 3 samples, got {n}")
    check_duplicates(coords)
    if neighbours is not None:
        from pmap.geostats.neighbourhood import local_leave_one_out

        return local_leave_one_out(coords, values, model, neighbours, radius)
    if system is None:
        system = KrigingSystem.factorise(coords, values, model)
    return system.leave_one_out()


def fold_labels(n: int, folds: int, seed: int) -> np.ndarray:
    """Random fold label (0..folds-1) per sample, folds as equal as possible, seeded."""
    if int(folds) != folds or not 2 <= folds <= n:
        raise ValueError(f"folds must be a whole number in [2, {n}], got {folds}")
    labels = np.arange(n) % int(folds)
    return np.random.default_rng(seed).permutation(labels)


def _standardize(errors: np.ndarray, variances: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(variances > 0, errors / np.sqrt(variances), np.nan)


def _figures(errors: np.ndarray, variances: np.ndarray, standardized: np.ndarray) -> CrossValidation:
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = errors**2 / variances
    return CrossValidation(
        mean_error=float(np.mean(errors)),
        rmse=float(np.sqrt(np.mean(errors**2))),
        msdr=float(np.mean(ratio)),
        n=int(errors.size),
        errors=errors,
        variances=variances,
        standardized=standardized,
    )


def leave_one_out(
    coords: np.ndarray,
    values: np.ndarray,
    model: VariogramModel,
    *,
    log: bool = False,
    limits: tuple[float, float] | None = None,
    neighbours: int | None = None,
    radius: float | None = None,
    system: KrigingSystem | None = None,
) -> CrossValidation:
    """Leave-one-out cross-validation with a fixed variogram.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m.
    values : numpy.ndarray, shape (n,)
        Sample values, in their original units (all > 0 when ``log``).
    model : VariogramModel
        Variogram of ``values``, or of ``log(values)`` when ``log``.
    log : bool
        Krige ``log(values)`` and back-transform each prediction and variance with the
        lognormal formulas of :func:`~pmap.geostats.kriging.lognormal_back_transform`.
    limits : (float, float), optional
        Physical range of the property, in its units: predictions are clipped to it
        before the errors are taken, as the map's estimates are (see
        :func:`~pmap.geostats.kriging.clip_to_limits`).
    neighbours, radius, system
        As in :func:`loo_kriging` (``system`` factorised on the kriged values, the logs
        when ``log``).

    Returns
    -------
    CrossValidation
        Errors (predicted - observed) and variances in the original units; standardized
        errors in the units kriged (log units when ``log``), before any clipping.
    """
    values = np.asarray(values, dtype=float)
    if log:
        if np.any(~(values > 0)):
            raise ValueError("log cross-validation needs all values > 0 (and finite)")
        y = np.log(values)
        y_est, y_var, mu = loo_kriging(coords, y, model, neighbours, radius, system=system)
    else:
        y = values
        y_est, y_var, mu = loo_kriging(coords, values, model, neighbours, radius, system=system)
    return _from_predictions(values, y, y_est, y_var, mu, log, limits)


def _from_predictions(
    values: np.ndarray, y: np.ndarray, y_est: np.ndarray, y_var: np.ndarray, mu: np.ndarray,
    log: bool, limits: tuple[float, float] | None,
) -> CrossValidation:
    """Figures from predictions in the kriged units (``y``: values or their logs)."""
    keep = np.isfinite(y_est)
    values, y, y_est, y_var, mu = values[keep], y[keep], y_est[keep], y_var[keep], mu[keep]
    if log:
        estimate, variance = lognormal_back_transform(y_est, y_var, mu)
    else:
        estimate, variance = y_est, y_var
    standardized = _standardize(y_est - y, y_var)
    if limits is not None:
        estimate = clip_to_limits(estimate, limits)[0]
    return _figures(estimate - values, variance, standardized)


def figures_from_predictions(
    values: np.ndarray, estimate: np.ndarray, variance: np.ndarray,
    limits: tuple[float, float] | None = None,
) -> CrossValidation:
    """Cross-validation figures from held-out predictions on the values' own scale."""
    values = np.asarray(values, dtype=float)
    estimate = np.asarray(estimate, dtype=float)
    variance = np.asarray(variance, dtype=float)
    return _from_predictions(values, values, estimate, variance, np.zeros_like(values), False,
                             limits)


def k_fold(
    coords: np.ndarray,
    values: np.ndarray,
    model: VariogramModel,
    *,
    folds: int = 10,
    seed: int = 0,
    log: bool = False,
    limits: tuple[float, float] | None = None,
    neighbours: int | None = None,
    radius: float | None = None,
    system: KrigingSystem | None = None,
) -> CrossValidation:
    """k-fold cross-validation with a fixed variogram: each fold kriged from the others.

    Folds are random and as equal as possible (:func:`fold_labels`, seeded by ``seed``).
    Other parameters and the result are as in :func:`leave_one_out`; a sample with no other
    within ``radius`` is left out of the figures.
    """
    coords, values = _check_points(coords, values)
    n = values.size
    if n < 3:
        raise ModelFitError(f"k-fold cross-validation needs at least 3 samples, got {n}")
    if log and np.any(~(values > 0)):
        raise ValueError("log cross-validation needs all values > 0 (and finite)")
    labels = fold_labels(n, min(int(folds), n), seed)
    y = np.log(values) if log else values
    if neighbours is None:
        if system is None:
            check_duplicates(coords)
            system = KrigingSystem.factorise(coords, y, model)
        y_est, y_var, mu = system.held_out(labels)
    else:
        from pmap.geostats.neighbourhood import local_ordinary_kriging

        y_est, y_var, mu = np.empty(n), np.empty(n), np.empty(n)
        for label in range(int(labels.max()) + 1):
            out = labels == label
            e, v, m, _ = local_ordinary_kriging(coords[~out], y[~out], coords[out], model,
                                                neighbours, radius)
            y_est[out], y_var[out], mu[out] = e, v, m
    return _from_predictions(values, y, y_est, y_var, mu, log, limits)
