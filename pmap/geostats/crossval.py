"""Leave-one-out cross-validation of an ordinary kriging model.

Each sample is predicted from all the others with the same variogram (no refit).  The
n leave-one-out systems are not solved one by one: with ``B`` the inverse of the full
variogram-form kriging matrix ``A`` (see :mod:`pmap.geostats.kriging`), the system
without sample ``i`` has the solution ``-B[-i, i] / B[i, i]`` (Dubrule 1983), which
gives at once

* prediction ``z_i - alpha_i / B[i, i]`` with ``alpha = B [z; 0]``,
* kriging variance ``-1 / B[i, i]`` (the diagonal of ``A`` is ``gamma(0) = 0``),
* Lagrange term ``-B[n, i] / B[i, i]``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.linalg import lu_solve

from pmap.errors import ModelFitError
from pmap.geostats.kriging import (
    _factorise,
    _unit_sill,
    check_duplicates,
    clip_to_limits,
    lognormal_back_transform,
)
from pmap.geostats.variogram import VariogramModel, _check_points

__all__ = ["CrossValidation", "leave_one_out", "loo_kriging"]


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
    coords: np.ndarray, values: np.ndarray, model: VariogramModel
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Leave-one-out ordinary kriging of every sample from the others.

    Returns
    -------
    estimate, variance, lagrange : numpy.ndarray, shape (n,)
        Prediction of each sample from the other ``n - 1``, its kriging variance (squared
        value units, >= 0) and the Lagrange term of its system.
    """
    coords, values = _check_points(coords, values)
    n = coords.shape[0]
    if n < 3:
        raise ModelFitError(f"leave-one-out cross-validation needs at least 3 samples, got {n}")
    check_duplicates(coords)
    unit_model, scale = _unit_sill(model)
    lu, piv = _factorise(coords, unit_model)
    inverse = lu_solve((lu, piv), np.eye(n + 1), check_finite=False)
    diag = np.diag(inverse)[:n]
    alpha = inverse[:n, :n] @ values
    estimate = values - alpha / diag
    variance = np.maximum(-scale / diag, 0.0)
    lagrange = -scale * inverse[n, :n] / diag
    return estimate, variance, lagrange


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
        y_est, y_var, mu = loo_kriging(coords, y, model)
        estimate, variance = lognormal_back_transform(y_est, y_var, mu)
        standardized = _standardize(y_est - y, y_var)
    else:
        estimate, variance, _ = loo_kriging(coords, values, model)
        standardized = _standardize(estimate - values, variance)
    if limits is not None:
        estimate = clip_to_limits(estimate, limits)[0]
    return _figures(estimate - values, variance, standardized)
