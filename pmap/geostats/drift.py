"""Kriging with a drift: universal kriging, kriging with external drift, regression kriging.

The mean of the variable is a linear combination of ``q = p + 1`` known functions, the
constant and the ``p`` columns of a drift design (coordinates for a regional trend,
covariates such as distance to a river for an external drift).  With ``C`` the (n, n)
covariance matrix of the samples, ``F`` the (n, q) drift design at the samples, ``c0``
and ``f0`` the covariances and drift values at a target, the system in covariance form is::

    [ C   F ] [ w  ]   [ c0 ]
    [ F'  0 ] [ nu ] = [ f0 ]

It is solved by block elimination, factorising once: ``C = L L'`` (Cholesky) and the QR
factorisation ``L^-1 F = Q R``, so that the Schur complement ``F' C^-1 F = R' R`` is the
small (q, q) Gram matrix of the drift.  Then

* ``beta = (F' C^-1 F)^-1 F' C^-1 z`` is the generalised least-squares (GLS) drift
  coefficient vector and ``f0' beta`` the trend at the target;
* the estimate is ``z* = f0' beta + c0' C^-1 (z - F beta)``: the GLS trend plus the simple
  kriging of the GLS residuals;
* the kriging variance is ``C(0) - c0' C^-1 c0 + r' (F' C^-1 F)^-1 r`` with
  ``r = f0 - F' C^-1 c0``.

Targets are processed in chunks of ``chunk_size`` (memory about ``n * chunk_size``
floats); the per-target work is one triangular solve with the Cholesky factor.  The
covariances are divided by the sill before solving (weights and trend unchanged, the
variance scaled back).  Covariate columns are centred and scaled internally, which leaves
the estimate, variance and trend unchanged (the drift space is the same) and keeps the
Schur complement well conditioned in any unit.

Regression kriging in pmap is kriging with the regression covariates as external drift,
with the variogram fitted to the ordinary-least-squares residuals of the regression
(:func:`regression_residuals`).  Regression kriging with a GLS trend estimate is the
same predictor as kriging with external drift (Hengl, Heuvelink & Rossiter 2007, About
regression-kriging: from equations to case studies, Computers & Geosciences 33:1301-1315);
the trend returned here is that GLS trend.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import LinAlgError, cholesky, solve_triangular
from scipy.linalg.lapack import dpocon
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError
from pmap.geostats.kriging import (
    _RCOND_SINGULAR,
    _unit_sill,
    check_duplicates,
    unit_cholesky,
)
from pmap.geostats.variogram import VariogramModel

__all__ = [
    "DriftKrigingResult",
    "universal_kriging",
    "linear_drift",
    "regression_residuals",
    "universal_leave_one_out",
    "universal_k_fold",
]

# Smallest / largest singular value of the standardised drift design below which the
# drift columns count as collinear.
_DRIFT_RCOND = 1e-10
# A covariate whose standard deviation over the samples is below this fraction of its
# largest magnitude is constant there, i.e. a copy of the intercept.
_CONSTANT_COLUMN = 1e-12


@dataclass(frozen=True)
class DriftKrigingResult:
    """Kriging-with-drift output at the target points.

    Attributes
    ----------
    estimate : numpy.ndarray, shape (m,)
        Kriged value, in the units of the sample values.
    variance : numpy.ndarray, shape (m,)
        Kriging (estimation) variance, squared value units, >= 0; it includes the
        uncertainty of the estimated drift coefficients.
    trend : numpy.ndarray, shape (m,)
        GLS estimate of the drift (the mean) at each target, value units; ``estimate -
        trend`` is the kriged residual.
    coefficients : numpy.ndarray, shape (p + 1,)
        GLS drift coefficients: the intercept, then one per drift column, in value units
        per unit of that column.
    """

    estimate: np.ndarray
    variance: np.ndarray
    trend: np.ndarray
    coefficients: np.ndarray


def _points(xy: np.ndarray, name: str) -> np.ndarray:
    xy = np.asarray(xy, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"{name} must have shape (n, 2), got {xy.shape}")
    if not np.all(np.isfinite(xy)):
        raise ValueError(f"{name} must be finite (no NaN or inf)")
    return xy


def _vector(values: np.ndarray, n: int, name: str) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    if values.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got {values.shape}")
    if not np.all(np.isfinite(values)):
        raise ValueError(f"{name} must be finite (no NaN or inf)")
    return values


def _design(columns: np.ndarray, n: int, name: str) -> np.ndarray:
    """Drift columns as an (n, p) float array; a 1-D array of length n is one column."""
    columns = np.asarray(columns, dtype=float)
    if columns.ndim == 1 and columns.shape[0] == n:
        columns = columns[:, None]
    if columns.ndim != 2 or columns.shape[0] != n:
        raise ValueError(f"{name} must have shape ({n}, p), got {columns.shape}")
    if not np.all(np.isfinite(columns)):
        raise ValueError(f"{name} must be finite (no NaN or inf)")
    return columns


def _standardise(columns: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Intercept plus centred, unit-variance columns; raise if the design is collinear.

    Returns the (n, p + 1) design, and the column means and standard deviations (p,).
    """
    n, p = columns.shape
    mean = columns.mean(axis=0)
    sd = columns.std(axis=0)
    for k in range(p):
        if not sd[k] > _CONSTANT_COLUMN * np.max(np.abs(columns[:, k])):
            raise ModelFitError(
                f"drift column {k} is constant over the samples ({columns[0, k]:g}); it "
                "duplicates the intercept: drop it"
            )
    design = np.empty((n, p + 1))
    design[:, 0] = 1.0
    design[:, 1:] = (columns - mean) / sd
    if p:
        _, s, vt = np.linalg.svd(design, full_matrices=False)
        if not s[-1] > _DRIFT_RCOND * s[0]:
            loading = np.abs(vt[-1])
            heavy = loading > 0.1 * loading.max()
            involved = [int(k) - 1 for k in np.nonzero(heavy[1:])[0] + 1]
            with_intercept = " and the intercept" if heavy[0] else ""
            raise ModelFitError(
                f"the drift design is singular: drift columns {involved}{with_intercept} are "
                f"collinear over the samples (reciprocal condition number {s[-1] / s[0]:.1e}); "
                "drop or combine the redundant covariates"
            )
    return design, mean, sd


def _original_units(beta: np.ndarray, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    """Coefficients of the standardised design converted to the user's column units."""
    slopes = beta[1:] / sd
    return np.concatenate([[beta[0] - float(np.sum(slopes * mean))], slopes])


def _unit_cholesky(
    xs: np.ndarray, model: VariogramModel, stacklevel: int
) -> tuple[VariogramModel, float, np.ndarray]:
    """The model at unit sill, the sill it was divided by and the Cholesky factor of ``C``.

    ``xs`` are the sample coordinates already mapped by ``model.isotropic_coords``; the
    factor and its checks are :func:`pmap.geostats.kriging.unit_cholesky`'s.
    """
    unit, scale = _unit_sill(model)
    chol, _ = unit_cholesky(xs, unit, stacklevel=stacklevel + 1)
    return unit, float(scale), chol


def linear_drift(
    xy: np.ndarray, origin: np.ndarray | None = None, scale: float | None = None
) -> np.ndarray:
    """Centred and scaled coordinates, the drift columns of a regional linear trend.

    Parameters
    ----------
    xy : numpy.ndarray, shape (m, 2)
        Coordinates, m.
    origin : array-like of 2 floats, optional
        Point subtracted from ``xy``, m.  Default: the mean of ``xy``.
    scale : float, optional
        Divisor, m, > 0.  Default: the root-mean-square distance of ``xy`` from ``origin``.

    Returns
    -------
    numpy.ndarray, shape (m, 2)
        ``(xy - origin) / scale``, dimensionless.  Pass the same ``origin`` and ``scale``
        for the samples and the targets (e.g. those of the samples).
    """
    xy = _points(xy, "xy")
    if origin is None:
        if xy.shape[0] == 0:
            raise ValueError("origin is needed when xy is empty")
        origin_arr = xy.mean(axis=0)
    else:
        origin_arr = np.asarray(origin, dtype=float)
        if origin_arr.shape != (2,) or not np.all(np.isfinite(origin_arr)):
            raise ValueError(f"origin must be 2 finite numbers, got {origin}")
    shifted = xy - origin_arr
    if scale is None:
        scale = float(np.sqrt(np.mean(np.sum(shifted**2, axis=1)))) if xy.size else 0.0
        if not scale > 0:
            raise ValueError("the points coincide: pass scale explicitly")
    if not (np.isfinite(scale) and scale > 0):
        raise ValueError(f"scale must be a positive finite distance in m, got {scale}")
    return shifted / float(scale)


def regression_residuals(
    values: np.ndarray, covariates: np.ndarray
) -> tuple[np.ndarray, np.ndarray, float]:
    """Ordinary least squares of ``values`` on an intercept and ``covariates``.

    Fit the residual variogram of regression kriging to the residuals returned here, then
    krige with :func:`universal_kriging` using the same covariates as drift.

    Parameters
    ----------
    values : numpy.ndarray, shape (n,)
        Sample values (any unit).
    covariates : numpy.ndarray, shape (n, p)
        Covariates at the samples (p may be 0; a 1-D array is one covariate).

    Returns
    -------
    coefficients : numpy.ndarray, shape (p + 1,)
        Intercept, then one slope per covariate (value units per covariate unit).
    residuals : numpy.ndarray, shape (n,)
        ``values`` minus the fitted values, value units.
    r2 : float
        Coefficient of determination; NaN when ``values`` are all equal.

    Raises
    ------
    ModelFitError
        Fewer than ``p + 2`` samples, or collinear covariates.
    """
    values = np.asarray(values, dtype=float)
    if values.ndim != 1:
        raise ValueError(f"values must have shape (n,), got {values.shape}")
    n = values.shape[0]
    values = _vector(values, n, "values")
    columns = _design(covariates, n, "covariates")
    q = columns.shape[1] + 1
    if n < q + 1:
        raise ModelFitError(
            f"a regression on an intercept and {q - 1} covariates needs at least {q + 1} "
            f"samples, got {n}"
        )
    design, mean, sd = _standardise(columns)
    beta = np.linalg.lstsq(design, values, rcond=None)[0]
    residuals = values - design @ beta
    ss_tot = float(np.sum((values - values.mean()) ** 2))
    r2 = 1.0 - float(np.sum(residuals**2)) / ss_tot if ss_tot > 0 else float("nan")
    return _original_units(beta, mean, sd), residuals, r2


def universal_kriging(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model: VariogramModel,
    *,
    drift_samples: np.ndarray,
    drift_targets: np.ndarray,
    chunk_size: int = 20000,
) -> DriftKrigingResult:
    """Global kriging with a drift: the constant plus the columns of the drift design.

    With coordinate columns (e.g. from :func:`linear_drift`) this is universal kriging,
    with covariates kriging with external drift; with ``p = 0`` it is ordinary kriging.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; no two alike.
    values : numpy.ndarray, shape (n,)
        Sample values (any unit).
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    model : VariogramModel
        Variogram of the residuals from the drift (e.g. fitted to the OLS residuals of
        :func:`regression_residuals`); anisotropy is honoured.
    drift_samples : numpy.ndarray, shape (n, p)
        Drift columns at the samples, any units (a 1-D array is one column).
    drift_targets : numpy.ndarray, shape (m, p)
        The same columns at the targets.
    chunk_size : int
        Targets solved per block; memory grows with ``n * chunk_size``.

    Returns
    -------
    DriftKrigingResult
        A target that coincides with a sample gets that sample's value and variance 0 (its
        trend stays the GLS trend).  Variances are clipped at 0 (round-off).

    Raises
    ------
    ValueError
        Non-finite inputs or wrong shapes.
    ModelFitError
        Fewer than ``p + 2`` samples, duplicate sample coordinates, a drift column
        constant over the samples or collinear drift columns, or a numerically singular
        covariance matrix (:class:`~pmap.geostats.kriging.SingularSystemError`).
    """
    coords = _points(coords, "coords")
    targets = _points(targets, "targets")
    n, m = coords.shape[0], targets.shape[0]
    values = _vector(values, n, "values")
    fs = _design(drift_samples, n, "drift_samples")
    ft = _design(drift_targets, m, "drift_targets")
    if ft.shape[1] != fs.shape[1]:
        raise ValueError(
            f"drift_samples has {fs.shape[1]} columns but drift_targets {ft.shape[1]}"
        )
    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise ValueError(f"chunk_size must be a whole number >= 1, got {chunk_size}")
    q = fs.shape[1] + 1
    if n < q + 1:
        raise ModelFitError(
            f"kriging with {q} drift terms (the constant and {q - 1} columns) needs at "
            f"least {q + 1} samples, got {n}"
        )
    check_duplicates(coords)
    design, mean, sd = _standardise(fs)
    design_t = np.empty((m, q))
    design_t[:, 0] = 1.0
    design_t[:, 1:] = (ft - mean) / sd

    xs = model.isotropic_coords(coords)
    xt = model.isotropic_coords(targets)
    unit, scale, chol = _unit_cholesky(xs, model, stacklevel=3)
    sill = unit.sill
    g = solve_triangular(chol, design, lower=True, check_finite=False)
    y = solve_triangular(chol, values, lower=True, check_finite=False)
    qmat, r = np.linalg.qr(g)
    diag = np.abs(np.diag(r))
    if not diag.min() > _DRIFT_RCOND * diag.max():
        raise ModelFitError(
            "the drift design is singular once weighted by the covariance: the drift "
            "columns cannot be told apart at these samples; drop redundant covariates"
        )
    beta = solve_triangular(r, qmat.T @ y, lower=False, check_finite=False)
    alpha = solve_triangular(chol, y - g @ beta, lower=True, trans="T", check_finite=False)

    estimate = np.empty(m)
    variance = np.empty(m)
    trend = design_t @ beta
    chunk = int(chunk_size)
    for s in range(0, m, chunk):
        e = min(s + chunk, m)
        d = cdist(xs, xt[s:e])
        c0 = unit(d)
        np.subtract(sill, c0, out=c0)
        est = trend[s:e] + alpha @ c0
        v = solve_triangular(chol, c0, lower=True, check_finite=False)
        resid = design_t[s:e].T - g.T @ v
        u = solve_triangular(r, resid, lower=False, trans="T", check_finite=False)
        var = scale * (sill - np.einsum("ij,ij->j", v, v) + np.einsum("ij,ij->j", u, u))
        if not d.min() > 0:
            hit_sample, hit_target = np.nonzero(d == 0.0)
            est[hit_target] = values[hit_sample]
            var[hit_target] = 0.0
        estimate[s:e] = est
        variance[s:e] = np.maximum(var, 0.0)
    return DriftKrigingResult(estimate, variance, trend, _original_units(beta, mean, sd))


def _bordered_inverse_factor(
    coords: np.ndarray, values: np.ndarray, model: VariogramModel, drift_samples: np.ndarray,
    n_out: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, float]:
    """Factor of the top-left block ``B`` of the inverse bordered matrix, at unit sill.

    ``B = C^-1 - C^-1 F (F' C^-1 F)^-1 F' C^-1 = H' H`` with ``H = Q_perp' L^-1``, where
    ``C = L L'`` and ``Q_perp`` spans the orthogonal complement of ``L^-1 F``.  ``n_out`` is
    the largest number of samples held out at once (for the sample-count check).

    Returns the validated ``values``, ``H`` ((n - q, n)), ``B z`` (n,), ``diag(C^-1)`` (n,)
    and the sill the covariances were divided by.
    """
    coords = _points(coords, "coords")
    n = coords.shape[0]
    values = _vector(values, n, "values")
    fs = _design(drift_samples, n, "drift_samples")
    q = fs.shape[1] + 1
    if n - n_out < q + 1:
        raise ModelFitError(
            f"cross-validation with {q} drift terms (the constant and {q - 1} columns) needs "
            f"at least {q + 1} samples left after holding out {n_out}, got {n - n_out}"
        )
    check_duplicates(coords)
    design, _, _ = _standardise(fs)
    _, scale, chol = _unit_cholesky(model.isotropic_coords(coords), model, stacklevel=4)
    linv = solve_triangular(chol, np.eye(n), lower=True, check_finite=False)
    del chol
    qfull, r = np.linalg.qr(linv @ design, mode="complete")
    diag = np.abs(np.diag(r))
    if not diag.min() > _DRIFT_RCOND * diag.max():
        raise ModelFitError(
            "the drift design is singular once weighted by the covariance: the drift "
            "columns cannot be told apart at these samples; drop redundant covariates"
        )
    h = qfull[:, q:].T @ linv
    cinv_diag = np.einsum("ij,ij->j", linv, linv)
    del linv, qfull
    bz = h.T @ (h @ values)
    return values, h, bz, cinv_diag, scale


def universal_leave_one_out(
    coords: np.ndarray, values: np.ndarray, model: VariogramModel, drift_samples: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Leave-one-out kriging with a drift, every sample at once.

    Each sample is predicted by :func:`universal_kriging` from all the others, with the
    same drift columns and variogram (not refitted).  With ``B`` the top-left (n, n) block
    of the inverse of the bordered matrix ``K = [[C, F], [F', 0]]``, ``F = [1, drift]``,
    the error is ``z_i - z*_i = (B z)_i / B_ii`` and the kriging variance ``1 / B_ii``
    (Dubrule 1983, Cross validation of kriging in a unique neighborhood, Mathematical
    Geology 15:687-699).  ``B`` is formed as ``H' H`` from the Cholesky factor of ``C`` and
    the QR factorisation of the whitened drift; cost O(n^3), memory about ``3 n^2`` floats.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; no two alike.
    values : numpy.ndarray, shape (n,)
        Sample values (any unit).
    model : VariogramModel
        Variogram of the residuals from the drift; anisotropy is honoured.
    drift_samples : numpy.ndarray, shape (n, p)
        Drift columns at the samples, any units (a 1-D array is one column; p may be 0,
        which gives ordinary kriging).

    Returns
    -------
    estimate : numpy.ndarray, shape (n,)
        Prediction of each sample from the others, value units.
    variance : numpy.ndarray, shape (n,)
        Its kriging variance, squared value units, > 0.

    Raises
    ------
    ValueError
        Non-finite inputs or wrong shapes.
    ModelFitError
        Fewer than ``p + 3`` samples, duplicate coordinates, constant or collinear drift
        columns, a numerically singular covariance matrix, or a sample whose removal
        leaves the drift undetermined (e.g. the only non-zero value of a covariate).
    """
    values, h, bz, cinv_diag, scale = _bordered_inverse_factor(
        coords, values, model, drift_samples, 1
    )
    b_diag = np.einsum("ij,ij->j", h, h)
    bad = np.nonzero(~(b_diag > _DRIFT_RCOND * cinv_diag))[0]
    if bad.size:
        raise ModelFitError(
            f"without sample(s) {bad[:10].tolist()} the drift cannot be estimated from the "
            "others (a covariate then no longer varies independently): drop that covariate"
        )
    return values - bz / b_diag, scale / b_diag


def universal_k_fold(
    coords: np.ndarray,
    values: np.ndarray,
    model: VariogramModel,
    drift_samples: np.ndarray,
    folds: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """K-fold kriging with a drift: each fold predicted from the samples of the others.

    Same model and drift columns for every fold (not refitted).  With ``B`` as in
    :func:`universal_leave_one_out` and ``S`` the samples of one fold, the predictions are
    ``z_S - (B_SS)^-1 (B z)_S`` and the error covariance ``(B_SS)^-1`` (the block form of
    Dubrule's identity), whose diagonal is returned.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; no two alike.
    values : numpy.ndarray, shape (n,)
        Sample values (any unit).
    model : VariogramModel
        Variogram of the residuals from the drift; anisotropy is honoured.
    drift_samples : numpy.ndarray, shape (n, p)
        Drift columns at the samples, any units (a 1-D array is one column).
    folds : numpy.ndarray of int, shape (n,)
        Fold label of each sample; samples sharing a label are held out together.

    Returns
    -------
    estimate : numpy.ndarray, shape (n,)
        Prediction of each sample from the samples outside its fold, value units.
    variance : numpy.ndarray, shape (n,)
        Its kriging variance, squared value units, > 0.

    Raises
    ------
    ValueError
        Non-finite inputs, wrong shapes or non-integer fold labels.
    ModelFitError
        A fold leaving fewer than ``p + 2`` samples, duplicate coordinates, constant or
        collinear drift columns, a numerically singular covariance matrix, or a fold whose
        removal leaves the drift undetermined.
    """
    coords = _points(coords, "coords")
    n = coords.shape[0]
    folds = np.asarray(folds)
    if folds.shape != (n,) or folds.dtype.kind not in "iu":
        raise ValueError(
            f"folds must be integer labels of shape ({n},), got {folds.dtype} {folds.shape}"
        )
    labels, inverse, counts = np.unique(folds, return_inverse=True, return_counts=True)
    values, h, bz, _, scale = _bordered_inverse_factor(
        coords, values, model, drift_samples, int(counts.max())
    )
    estimate = np.empty(n)
    variance = np.empty(n)
    for k, label in enumerate(labels):
        idx = np.nonzero(inverse == k)[0]
        hs = h[:, idx]
        bss = hs.T @ hs
        try:
            chol = cholesky(bss, lower=True, check_finite=False)
            rcond, info = dpocon(chol, np.linalg.norm(bss, 1), uplo="L")
        except LinAlgError:
            rcond, info = 0.0, 0
        if info != 0 or not rcond >= _RCOND_SINGULAR:
            raise ModelFitError(
                f"without fold {label} ({idx.size} samples) the kriging system of the other "
                f"samples is singular (reciprocal condition number {rcond:.1e}): the drift "
                "cannot be estimated from them; assign the folds differently or drop a "
                "covariate"
            )
        inv_chol = solve_triangular(chol, np.eye(idx.size), lower=True, check_finite=False)
        estimate[idx] = values[idx] - inv_chol.T @ (inv_chol @ bz[idx])
        variance[idx] = scale * np.einsum("ij,ij->j", inv_chol, inv_chol)
    return estimate, variance
