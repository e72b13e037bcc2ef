"""Global ordinary kriging, plain and lognormal, solved once and applied in chunks.

The system is written in variogram form (as pykrige does)::

    [ G  1 ] [ w  ]   [ g0 ]
    [ 1' 0 ] [ mu ] = [ 1  ]

with ``G[i, j] = gamma(|x_i - x_j|)`` (zero diagonal), ``g0[i] = gamma(|x_i - x0|)``.
The estimate is ``w . z`` and the ordinary kriging variance ``w . g0 + mu``.  With this
sign convention ``mu`` equals minus the Lagrange multiplier of the covariance-form system
``C w + nu 1 = c0``.  The semivariances are divided by the sill before solving (weights
unchanged; ``mu`` and the variance scaled back), so the system is well scaled in any
unit.  The matrix is LU-factorised once per call and inverted from its factors; targets
are solved in chunks of ``chunk_size`` by one matrix product each, so memory stays at
about ``n * chunk_size`` floats.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy.linalg import LinAlgWarning, lu_factor, lu_solve
from scipy.linalg.lapack import dgecon
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError, PmapWarning
from pmap.geostats.variogram import VariogramModel, _check_points, _semivariance_into

__all__ = [
    "KrigingResult",
    "SingularSystemError",
    "ordinary_kriging",
    "lognormal_ordinary_kriging",
    "lognormal_back_transform",
    "lognormal_log_moments",
    "kriging_matrix",
    "check_duplicates",
    "clip_to_limits",
]

# Reciprocal condition number below which the kriging system counts as singular.
_RCOND_SINGULAR = 1e-13
# Reciprocal condition number below which results may lose digits: warn.
_RCOND_WARN = 1e-10


class SingularSystemError(ModelFitError):
    """The kriging matrix is numerically singular for this variogram model."""


@dataclass(frozen=True)
class KrigingResult:
    """Kriging output at the target points.

    Attributes
    ----------
    estimate : numpy.ndarray, shape (m,)
        Kriged value, in the units of the sample values.
    variance : numpy.ndarray, shape (m,)
        Kriging (estimation) variance, squared value units, >= 0.
    lagrange : numpy.ndarray, shape (m,)
        Lagrange term ``mu`` of the variogram-form system (see module docstring),
        squared units of the kriged variable (log units for lognormal kriging).
    """

    estimate: np.ndarray
    variance: np.ndarray
    lagrange: np.ndarray


def check_duplicates(coords: np.ndarray) -> None:
    """Raise :class:`~pmap.errors.ModelFitError` if two samples share coordinates."""
    coords = np.asarray(coords, dtype=float)
    counts = np.unique(coords, axis=0, return_counts=True)[1]
    dup = counts[counts > 1]
    if dup.size:
        raise ModelFitError(
            f"{int(dup.sum() - dup.size)} duplicate sample coordinates ({dup.size} locations "
            f"hold {int(dup.sum())} samples); the kriging system is singular. Average the "
            "values at identical coordinates before kriging."
        )


def clip_to_limits(
    estimate: np.ndarray, limits: tuple[float, float]
) -> tuple[np.ndarray, int]:
    """Clip kriged values to a property's physical range.

    Ordinary kriging weights may be negative, so an estimate can overshoot the range of
    the samples near extreme values (e.g. CaCO3 below 0 % beside a calcareous patch).

    Parameters
    ----------
    estimate : numpy.ndarray
        Kriged values, in the property's units.
    limits : (float, float)
        Lowest and highest physical value, same units (``-inf``/``inf`` for none).

    Returns
    -------
    clipped : numpy.ndarray
        A new array, ``estimate`` clipped to ``[lo, hi]``; NaN stays NaN.
    n_clipped : int
        Number of values that were outside the range.
    """
    lo, hi = (float(v) for v in limits)
    if not lo < hi:
        raise ValueError(f"limits must satisfy lo < hi, got {limits}")
    estimate = np.asarray(estimate, dtype=float)
    outside = int(np.count_nonzero((estimate < lo) | (estimate > hi)))
    return np.clip(estimate, lo, hi), outside


def kriging_matrix(coords: np.ndarray, model: VariogramModel) -> np.ndarray:
    """The (n+1, n+1) variogram-form ordinary kriging matrix (zero diagonal)."""
    coords = np.asarray(coords, dtype=float)
    n = coords.shape[0]
    a = np.ones((n + 1, n + 1))
    a[:n, :n] = model(cdist(coords, coords))
    np.fill_diagonal(a[:n, :n], 0.0)
    a[n, n] = 0.0
    return a


def _unit_sill(model: VariogramModel) -> tuple[VariogramModel, float]:
    """The model divided by its sill, and the sill: keeps the system well scaled in any unit.

    Scaling the semivariances by ``s`` leaves the weights unchanged and divides ``mu`` and
    the kriging variance by ``s``.
    """
    scale = model.sill if model.sill > 0 else 1.0
    return VariogramModel(model.kind, model.nugget / scale, model.psill / scale, model.range), scale


def _factorise(coords: np.ndarray, model: VariogramModel) -> tuple[np.ndarray, np.ndarray]:
    """LU factors of the kriging matrix of ``model`` (pass a unit-sill model)."""
    a = kriging_matrix(coords, model)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", LinAlgWarning)
        lu, piv = lu_factor(a, check_finite=False)
    rcond, info = dgecon(lu, np.linalg.norm(a, 1), norm="1")
    if info != 0 or not rcond >= _RCOND_SINGULAR:
        raise SingularSystemError(
            f"the kriging system is numerically singular with the {model.kind} model "
            f"(reciprocal condition number {rcond:.1e}); a gaussian model without nugget or "
            "samples very close together cause this: add a nugget, use another model, or "
            "average near-coincident samples"
        )
    if rcond < _RCOND_WARN:
        warnings.warn(
            f"kriging system is ill-conditioned (reciprocal condition number {rcond:.1e}); "
            "results may lose accuracy",
            PmapWarning,
            stacklevel=3,
        )
    return lu, piv


def _krige(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model: VariogramModel,
    chunk_size: int,
) -> KrigingResult:
    coords, values = _check_points(coords, values)
    targets = np.asarray(targets, dtype=float)
    if targets.ndim != 2 or targets.shape[1] != 2:
        raise ValueError(f"targets must have shape (m, 2), got {targets.shape}")
    if not np.all(np.isfinite(targets)):
        raise ValueError("targets must be finite (no NaN or inf)")
    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise ValueError(f"chunk_size must be a whole number >= 1, got {chunk_size}")
    if coords.shape[0] < 2:
        raise ModelFitError(f"ordinary kriging needs at least 2 samples, got {coords.shape[0]}")
    check_duplicates(coords)
    unit_model, scale = _unit_sill(model)
    lu, piv = _factorise(coords, unit_model)
    n, m = coords.shape[0], targets.shape[0]
    # Explicit inverse from the LU factors: one matrix product per chunk is several
    # times faster than a triangular solve with row pivoting on a wide right-hand side.
    inverse = lu_solve((lu, piv), np.eye(n + 1), check_finite=False)
    estimate = np.empty(m)
    variance = np.empty(m)
    lagrange = np.empty(m)
    chunk = int(chunk_size)
    for s in range(0, m, chunk):
        e = min(s + chunk, m)
        d = cdist(coords, targets[s:e])
        rhs = np.empty((n + 1, e - s))
        _semivariance_into(unit_model, d, rhs[:n])
        rhs[n] = 1.0
        sol = inverse @ rhs
        w, mu = sol[:n], sol[n]
        est = values @ w
        mu *= scale
        var = scale * np.einsum("ij,ij->j", w, rhs[:n]) + mu
        if not d.min() > 0:
            hit_sample, hit_target = np.nonzero(d == 0.0)
            est[hit_target] = values[hit_sample]
            var[hit_target] = 0.0
            mu[hit_target] = 0.0
        estimate[s:e] = est
        variance[s:e] = np.maximum(var, 0.0)
        lagrange[s:e] = mu
    return KrigingResult(estimate, variance, lagrange)


def ordinary_kriging(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model: VariogramModel,
    *,
    chunk_size: int = 20000,
) -> KrigingResult:
    """Global ordinary kriging of ``values`` at ``targets``.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; no two alike.
    values : numpy.ndarray, shape (n,)
        Sample values (any unit).
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    model : VariogramModel
        Variogram of ``values``.
    chunk_size : int
        Targets solved per block; memory grows with ``n * chunk_size``.

    Returns
    -------
    KrigingResult
        A target that coincides with a sample gets that sample's value and variance 0.
        Variances are clipped at 0 (round-off).

    Raises
    ------
    ValueError
        Non-finite coordinates, values or targets, or wrong shapes.
    ModelFitError
        Duplicate sample coordinates, or a numerically singular system
        (:class:`SingularSystemError`).
    """
    return _krige(coords, values, targets, model, chunk_size)


def lognormal_back_transform(
    log_estimate: np.ndarray, log_variance: np.ndarray, lagrange: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Lognormal ordinary kriging back-transform (Journel 1980).

    ``estimate = exp(y* + s2 / 2 - mu)`` and ``variance = estimate^2 (exp(s2) - 1)``,
    with ``y*``, ``s2`` the kriged log value and its kriging variance and ``mu`` the
    Lagrange term of the variogram-form system (module docstring).  The estimate is
    unbiased, ``E[Z*] = E[Z]``, for a stationary lognormal field.  The variance is that of
    a lognormal variable with log-variance ``s2`` and mean ``estimate``.
    """
    log_estimate = np.asarray(log_estimate, dtype=float)
    log_variance = np.asarray(log_variance, dtype=float)
    estimate = np.exp(log_estimate + 0.5 * log_variance - np.asarray(lagrange, dtype=float))
    variance = estimate**2 * np.expm1(log_variance)
    return estimate, np.maximum(variance, 0.0)


def lognormal_log_moments(
    estimate: np.ndarray, variance: np.ndarray, lagrange: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Invert :func:`lognormal_back_transform`: the log-space kriged value and variance.

    ``s2 = log(1 + variance / estimate^2)`` and ``y* = log(estimate) - s2 / 2 + mu``, so that
    ``lognormal_back_transform(y*, s2, mu)`` gives ``estimate, variance`` back.  These are the
    mean and variance of the Gaussian kriging distribution of ``log Z``, from which
    probabilities and quantiles of a lognormally kriged property follow.

    Parameters
    ----------
    estimate, variance : numpy.ndarray
        Back-transformed estimate (> 0) and variance (>= 0), value units.
    lagrange : numpy.ndarray
        Log-space Lagrange term ``mu`` (:attr:`KrigingResult.lagrange`).
    """
    estimate = np.asarray(estimate, dtype=float)
    variance = np.maximum(np.asarray(variance, dtype=float), 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_variance = np.log1p(variance / estimate**2)
        log_estimate = np.log(estimate) - 0.5 * log_variance + np.asarray(lagrange, dtype=float)
    return log_estimate, log_variance


def lognormal_ordinary_kriging(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model_log: VariogramModel,
    *,
    chunk_size: int = 20000,
) -> KrigingResult:
    """Ordinary kriging of ``log(values)`` with the lognormal back-transform.

    Parameters
    ----------
    coords, targets : numpy.ndarray, shapes (n, 2) and (m, 2)
        Sample and prediction coordinates, m.
    values : numpy.ndarray, shape (n,)
        Sample values, all > 0.
    model_log : VariogramModel
        Variogram fitted to ``log(values)``, squared log units.
    chunk_size : int
        Targets solved per block.

    Returns
    -------
    KrigingResult
        ``estimate = exp(y* + s2/2 - mu)`` in the units of ``values`` (Journel 1980),
        ``variance = estimate^2 * (exp(s2) - 1)`` in squared value units, and ``lagrange``
        the log-space ``mu``.  At a sample location the estimate is the sample value and the
        variance 0.
    """
    values = np.asarray(values, dtype=float)
    if np.any(~(values > 0)):
        raise ValueError("lognormal kriging needs all values > 0 (and finite)")
    log_result = _krige(coords, np.log(values), targets, model_log, chunk_size)
    estimate, variance = lognormal_back_transform(
        log_result.estimate, log_result.variance, log_result.lagrange
    )
    return KrigingResult(estimate, variance, log_result.lagrange)
