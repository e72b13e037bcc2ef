"""Ordinary kriging, plain and lognormal: global (one factorised system) or local.

Global kriging solves the covariance form::

    [ C  1 ] [ w  ]   [ c0 ]
    [ 1' 0 ] [ nu ] = [ 1  ]

with ``C[i, j] = C(|x_i - x_j|)`` (the sill on the diagonal) and ``c0[i] = C(|x_i - x0|)``.
With the Cholesky factor ``C = L L'``, ``u = C^-1 1``, ``s = 1' u``, the generalised-least-
squares mean ``m = u' z / s`` and ``g = C^-1 (z - m 1)``, every target needs

* the estimate ``m + g' c0``,
* the kriging variance ``sill - |L^-1 c0|^2 + (1 - u' c0)^2 / s``: one triangular solve, half
  the arithmetic of applying the inverse of the bordered matrix,
* the Lagrange term ``mu = -nu = (1 - u' c0) / s``, which is the multiplier of the
  variogram-form system ``[G 1; 1' 0] [w; mu] = [g0; 1]`` (``G = sill - C``) that the
  lognormal back-transform uses.

The factorisation, :class:`KrigingSystem`, is computed once per sample set and model and
serves both the map (:meth:`KrigingSystem.predict`) and cross-validation
(:meth:`KrigingSystem.leave_one_out`, :meth:`KrigingSystem.held_out`).  Covariances are divided
by the sill before solving (weights unchanged; variance and ``mu`` scaled back), so the
system is equally well scaled in any unit.  Targets are solved in blocks whose size is
bounded so that a block holds at most about 4 million floats: memory does not grow with
the grid beyond the output arrays.

With ``neighbours=k``, :func:`ordinary_kriging` kriges each target from its k nearest
samples instead (:mod:`pmap.geostats.neighbourhood`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy.linalg import cho_solve, solve_triangular
from scipy.linalg.lapack import dpocon, dpotrf
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError, PmapWarning
from pmap.geostats.variogram import VariogramModel, _check_points, _semivariance_into

__all__ = [
    "KrigingSystem",
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
# Floats per (samples x targets) block of the global solve: bounds memory at ~64 MiB.
_BLOCK_FLOATS = 4 * 2**20
#: Distance within which samples count as one and are averaged before a local solve, m.
MERGE_WITHIN_M = 1e-3


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
    xy = model.isotropic_coords(np.asarray(coords, dtype=float))
    n = xy.shape[0]
    a = np.ones((n + 1, n + 1))
    a[:n, :n] = model(cdist(xy, xy))
    np.fill_diagonal(a[:n, :n], 0.0)
    a[n, n] = 0.0
    return a


def _unit_sill(model: VariogramModel) -> tuple[VariogramModel, float]:
    """The model divided by its sill, and the sill: keeps the system well scaled in any unit.

    Scaling the semivariances by ``s`` leaves the weights unchanged and divides ``mu`` and
    the kriging variance by ``s``.
    """
    scale = model.sill if model.sill > 0 else 1.0
    return model.with_sill_scaled(1.0 / scale), scale


def _check_targets(targets: np.ndarray) -> np.ndarray:
    targets = np.asarray(targets, dtype=float)
    if targets.ndim != 2 or targets.shape[1] != 2:
        raise ValueError(f"targets must have shape (m, 2), got {targets.shape}")
    if not np.all(np.isfinite(targets)):
        raise ValueError("targets must be finite (no NaN or inf)")
    return targets


def _covariance_into(model: VariogramModel, d: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Unit-sill covariance ``1 - gamma(d)`` of ``model`` into ``out``."""
    _semivariance_into(model, d, out)
    np.subtract(model.sill, out, out=out)
    return out


# Row blocks of the triangular product L^-1 c0 (see _apply_lower).
_TRIANGLE_BLOCKS = 4


def _apply_lower(lower: np.ndarray, b: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``out = lower @ b`` for a lower-triangular ``lower``, by row blocks.

    Row block ``i`` needs only the first ``(i + 1)`` column blocks, so the product costs
    ``n^2 m (1 + 1/blocks)`` flops, in a few large matrix products that run at the BLAS
    dense rate (a triangular BLAS product, ``dtrmm``, does ``n^2 m`` at about a third of
    that rate here).
    """
    n = lower.shape[0]
    edges = np.linspace(0, n, min(_TRIANGLE_BLOCKS, n) + 1).astype(int)
    for a, e in zip(edges[:-1], edges[1:], strict=True):
        np.matmul(lower[a:e, :e], b[:e], out=out[a:e])
    return out


def _compiled_covariance(model: VariogramModel):
    """The compiled (numba) covariance block for ``model``, or None for the numpy path."""
    from pmap.geostats.neighbourhood import _use_numba, kernel_model_args

    if not _use_numba("auto", model.kind):
        return None
    from pmap.geostats import _local_numba as kernel

    args = kernel_model_args(model)

    def block(xy: np.ndarray, txy: np.ndarray, out: np.ndarray) -> None:
        kernel.covariance_block(xy, txy, *args, out)

    return block


def unit_cholesky(xy: np.ndarray, unit: VariogramModel, *, stacklevel: int = 2,
                  ) -> tuple[np.ndarray, float]:
    """Lower Cholesky factor of the covariance matrix of ``xy`` under a unit-sill model.

    ``xy`` are coordinates already mapped by ``unit.isotropic_coords``.  Returns the factor
    and its reciprocal condition number (LAPACK ``dpocon``).

    Raises
    ------
    SingularSystemError
        Reciprocal condition number below 1e-13.

    Warns
    -----
    PmapWarning
        Below 1e-10 (at ``stacklevel``): results may lose digits.
    """
    n = xy.shape[0]
    cov = _covariance_into(unit, cdist(xy, xy), np.empty((n, n)))
    np.fill_diagonal(cov, unit.sill)
    anorm = float(np.abs(cov).sum(axis=0).max())
    chol, info = dpotrf(cov, lower=1, clean=1, overwrite_a=1)
    rcond = 0.0
    if info == 0:
        rcond, info = dpocon(chol, anorm, uplo="L")
    if info != 0 or not rcond >= _RCOND_SINGULAR:
        raise SingularSystemError(
            f"the kriging system is numerically singular with the {unit.kind} model "
            f"(reciprocal condition number {rcond:.1e}); a gaussian model without nugget or "
            "samples very close together cause this: add a nugget, use another model, or "
            "average near-coincident samples"
        )
    if rcond < _RCOND_WARN:
        warnings.warn(
            f"kriging system is ill-conditioned (reciprocal condition number {rcond:.1e}); "
            "results may lose accuracy",
            PmapWarning,
            stacklevel=stacklevel,
        )
    return chol, float(rcond)


@dataclass(frozen=True)
class KrigingSystem:
    """The factorised global ordinary-kriging system of one sample set and variogram.

    Build it with :meth:`factorise`; it then kriges any targets and cross-validates
    without factorising again.  All arrays are in the unit-sill scaling; ``scale`` is the
    model's sill (squared value units).
    """

    xy: np.ndarray
    values: np.ndarray
    unit_model: VariogramModel
    scale: float
    chol: np.ndarray
    u: np.ndarray
    s: float
    mean: float
    g: np.ndarray
    rcond: float

    @classmethod
    def factorise(cls, coords: np.ndarray, values: np.ndarray,
                  model: VariogramModel) -> KrigingSystem:
        """Cholesky-factorise the covariance matrix of ``coords`` under ``model``.

        Raises
        ------
        ModelFitError
            Fewer than 2 samples or duplicate coordinates.
        SingularSystemError
            The matrix is numerically singular (reciprocal condition < 1e-13).
        """
        coords, values = _check_points(coords, values)
        n = coords.shape[0]
        if n < 2:
            raise ModelFitError(f"ordinary kriging needs at least 2 samples, got {n}")
        check_duplicates(coords)
        unit, scale = _unit_sill(model)
        xy = unit.isotropic_coords(coords)
        chol, rcond = unit_cholesky(xy, unit, stacklevel=4)
        factor = (chol, True)
        u = cho_solve(factor, np.ones(n), check_finite=False)
        s = float(u.sum())
        mean = float(u @ values / s)
        g = cho_solve(factor, values - mean, check_finite=False)
        return cls(xy, values, unit, float(scale), chol, u, s, mean, g, float(rcond))

    @property
    def n(self) -> int:
        """Number of samples."""
        return int(self.values.size)

    def predict(self, targets: np.ndarray, chunk_size: int = 20000) -> KrigingResult:
        """Krige ``targets`` (m, 2) in memory-bounded blocks of at most ``chunk_size``."""
        targets = _check_targets(targets)
        if int(chunk_size) != chunk_size or chunk_size < 1:
            raise ValueError(f"chunk_size must be a whole number >= 1, got {chunk_size}")
        txy = self.unit_model.isotropic_coords(targets)
        n, m = self.n, txy.shape[0]
        chunk = int(max(1, min(int(chunk_size), max(256, _BLOCK_FLOATS // n))))
        estimate = np.empty(m)
        variance = np.empty(m)
        lagrange = np.empty(m)
        buf = np.empty((n, min(chunk, m)))
        compiled = _compiled_covariance(self.unit_model)
        # Targets on a sample: found once (a KD-tree), given the sample's value below.
        dist, nearest = cKDTree(self.xy).query(txy, k=1)
        on_sample = dist == 0.0
        y = np.empty((n, min(chunk, m)))
        for s0 in range(0, m, chunk):
            s1 = min(s0 + chunk, m)
            c0 = buf[:, : s1 - s0]
            if compiled is not None:
                compiled(self.xy, np.ascontiguousarray(txy[s0:s1]), c0)
            else:
                _covariance_into(self.unit_model, cdist(self.xy, txy[s0:s1]), c0)
            _apply_lower(self._chol_inverse, c0, y[:, : s1 - s0])    # L^-1 c0
            q = np.einsum("ij,ij->j", y[:, : s1 - s0], y[:, : s1 - s0])
            t = self.u @ c0
            est = self.mean + self.g @ c0
            mu = (1.0 - t) / self.s
            var = self.unit_model.sill - q + (1.0 - t) * mu
            hit = on_sample[s0:s1]
            if hit.any():
                est[hit] = self.values[nearest[s0:s1][hit]]
                var[hit] = 0.0
                mu[hit] = 0.0
            estimate[s0:s1] = est
            variance[s0:s1] = np.maximum(var, 0.0) * self.scale
            lagrange[s0:s1] = mu * self.scale
        return KrigingResult(estimate, variance, lagrange)

    @cached_property
    def _chol_inverse(self) -> np.ndarray:
        """``L^-1``, lower triangular: applying it by matrix products is faster than a
        triangular solve on wide blocks (see :func:`_apply_lower`)."""
        return solve_triangular(self.chol, np.eye(self.n), lower=True, check_finite=False)

    def _inverse(self) -> np.ndarray:
        return cho_solve((self.chol, True), np.eye(self.n), check_finite=False)

    def leave_one_out(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Every sample kriged from all the others, from this factorisation (Dubrule 1983).

        With ``B`` the inverse of the bordered covariance matrix,
        ``B_ii = (C^-1)_ii - u_i^2 / s``; the prediction is ``z_i - g_i / B_ii``, its
        variance ``1 / B_ii`` and its variogram-form Lagrange term ``(u_i / s) / B_ii``.

        Returns
        -------
        estimate, variance, lagrange : numpy.ndarray, shape (n,)
        """
        if self.n < 3:
            raise ModelFitError(
                f"leave-one-out cross-validation needs at least 3 samples, got {self.n}")
        b = np.diag(self._inverse()) - self.u**2 / self.s
        estimate = self.values - self.g / b
        variance = np.maximum(self.scale / b, 0.0)
        lagrange = self.scale * (self.u / self.s) / b
        return estimate, variance, lagrange

    def held_out(self, folds: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Each fold's samples kriged from the samples of the other folds.

        ``folds`` (n,) holds a fold label per sample.  With ``B_SS`` the block of the
        bordered inverse for fold ``S``, the predictions are ``z_S - B_SS^-1 g_S``, their
        variances the diagonal of ``B_SS^-1`` and the Lagrange terms ``B_SS^-1 u_S / s``.
        """
        folds = np.asarray(folds)
        if folds.shape != (self.n,):
            raise ValueError(f"folds must have shape ({self.n},), got {folds.shape}")
        inverse = self._inverse()
        estimate = np.empty(self.n)
        variance = np.empty(self.n)
        lagrange = np.empty(self.n)
        for label in np.unique(folds):
            idx = np.flatnonzero(folds == label)
            if idx.size >= self.n:
                raise ModelFitError("a fold holds every sample; use at least 2 folds")
            b = inverse[np.ix_(idx, idx)] - np.outer(self.u[idx], self.u[idx]) / self.s
            b_inv = np.linalg.inv(b)
            estimate[idx] = self.values[idx] - b_inv @ self.g[idx]
            variance[idx] = np.maximum(np.diag(b_inv), 0.0) * self.scale
            lagrange[idx] = self.scale * (b_inv @ self.u[idx]) / self.s
        return estimate, variance, lagrange


def _krige(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model: VariogramModel,
    chunk_size: int,
    neighbours: int | None = None,
    radius: float | None = None,
) -> KrigingResult:
    coords, values = _check_points(coords, values)
    targets = _check_targets(targets)
    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise ValueError(f"chunk_size must be a whole number >= 1, got {chunk_size}")
    if coords.shape[0] < 2:
        raise ModelFitError(f"ordinary kriging needs at least 2 samples, got {coords.shape[0]}")
    if neighbours is None:
        if radius is not None:
            raise ValueError("radius needs neighbours: give the number of nearest samples too")
        return KrigingSystem.factorise(coords, values, model).predict(targets, chunk_size)
    from pmap.geostats.neighbourhood import local_ordinary_kriging, merge_close_samples

    coords, values, merged = merge_close_samples(coords, values, MERGE_WITHIN_M)
    if merged:
        warnings.warn(
            f"{merged} sample(s) lay within {MERGE_WITHIN_M * 1000:g} mm of another and were "
            "averaged with it before kriging (a local system with two such samples is singular)",
            PmapWarning,
            stacklevel=3,
        )
    est, var, mu, _ = local_ordinary_kriging(coords, values, targets, model, neighbours, radius)
    return KrigingResult(est, var, mu)


def ordinary_kriging(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model: VariogramModel,
    neighbours: int | None = None,
    radius: float | None = None,
    *,
    chunk_size: int = 20000,
) -> KrigingResult:
    """Ordinary kriging of ``values`` at ``targets``, global or from nearest neighbours.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; no two alike.
    values : numpy.ndarray, shape (n,)
        Sample values (any unit).
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    model : VariogramModel
        Variogram of ``values`` (anisotropic models are honoured).
    neighbours : int, optional
        Krige each target from its ``neighbours`` nearest samples (local kriging); samples
        within 1 mm of each other are averaged first, with a warning.  ``None``: global.
    radius : float, optional
        With ``neighbours``: only samples within ``radius`` m are used, and a target with
        none gets NaN (nodata), not a guess.
    chunk_size : int
        Most targets solved per block of the global solve (blocks are also capped at about
        4 million floats).

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
    return _krige(coords, values, targets, model, chunk_size, neighbours, radius)


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
    neighbours: int | None = None,
    radius: float | None = None,
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
    neighbours, radius : optional
        Local kriging, as in :func:`ordinary_kriging`.
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
    log_result = _krige(coords, np.log(values), targets, model_log, chunk_size, neighbours,
                        radius)
    estimate, variance = lognormal_back_transform(
        log_result.estimate, log_result.variance, log_result.lagrange
    )
    return KrigingResult(estimate, variance, log_result.lagrange)
