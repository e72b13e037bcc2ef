"""Checks of a fitted variogram and its data that say when a kriged map is flat or misleading.

Pure functions on numpy arrays; :func:`pmap.geostats.interpolate.interpolate` turns their
results into warnings.  The thresholds are module constants, stated in every message and
in ``docs/geostatistics.md``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.spatial import cKDTree

from pmap.geostats.variogram import MAX_RANGE_FACTOR, EmpiricalVariogram, VariogramModel

__all__ = [
    "PURE_NUGGET_FRACTION",
    "TREND_R2",
    "TREND_ALPHA",
    "CLOSE_PAIR_FRACTION",
    "TrendTest",
    "is_pure_nugget",
    "neighbour_spacing",
    "neighbour_correlation",
    "range_at_bound",
    "linear_trend",
    "close_pairs",
    "first_bin_weight_share",
]

#: A fit whose partial sill is at most this fraction of its sill counts as pure nugget, and
#: a model whose correlation between neighbouring samples is at most this leaves no spatial
#: structure at the sampling spacing.  (Cambardella et al. 1994 call spatial dependence weak
#: from a nugget/sill ratio of 0.75; 0.95 is pmap's stricter "no structure left" line,
#: common practice, no source.)
PURE_NUGGET_FRACTION = 0.05
#: Share of the variance a linear trend in x, y must explain before pmap calls it a trend.
TREND_R2 = 0.75
#: Significance level of the F-test of that trend.
TREND_ALPHA = 0.01
#: Samples closer than this fraction of the lag-bin width count as near-coincident.
CLOSE_PAIR_FRACTION = 0.01


@dataclass(frozen=True)
class TrendTest:
    """Least-squares fit of ``z = b0 + b1 x + b2 y`` and its overall F-test.

    Attributes
    ----------
    r2 : float
        Share of the variance of ``z`` the plane explains (coefficient of determination).
    f : float
        F statistic with (2, n - 3) degrees of freedom.
    p_value : float
        Probability of an F at least this large if ``z`` had no linear trend.
    """

    r2: float
    f: float
    p_value: float


def is_pure_nugget(model: VariogramModel, fraction: float = PURE_NUGGET_FRACTION) -> bool:
    """Whether the partial sill is at most ``fraction`` of the sill (no spatial structure)."""
    return bool(model.psill <= fraction * model.sill)


def neighbour_spacing(coords: np.ndarray) -> float:
    """Median distance from each sample to its nearest neighbour, m (0 if fewer than 2)."""
    coords = np.asarray(coords, dtype=float)
    if coords.shape[0] < 2:
        return 0.0
    dist, _ = cKDTree(coords).query(coords, k=2)
    return float(np.median(dist[:, 1]))


def neighbour_correlation(model: VariogramModel, spacing: float) -> float:
    """Correlation ``C(h) / C(0)`` the model gives two samples ``spacing`` (m) apart.

    0 for a pure-nugget model or a range below the spacing (spherical), near 0 when the
    samples are too far apart to see the structure; 0 when the sill is 0.
    """
    if not model.sill > 0:
        return 0.0
    return float(model.covariance(float(spacing)) / model.sill)


def range_at_bound(model: VariogramModel, emp: EmpiricalVariogram) -> bool:
    """Whether the fitted practical range sits on its upper bound, ``MAX_RANGE_FACTOR`` cutoffs.

    The weighted fit then found no sill: the semivariance still rises at the cutoff.
    """
    return bool(model.range >= 0.999 * MAX_RANGE_FACTOR * emp.cutoff)


def linear_trend(coords: np.ndarray, values: np.ndarray) -> TrendTest:
    """Ordinary least squares of ``values`` on a plane in x, y (m) and the F-test of its fit.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; n >= 4.
    values : numpy.ndarray, shape (n,)
        Values (any unit).

    Returns
    -------
    TrendTest
        ``r2 = 1 - SS_res / SS_tot``, ``F = (r2 / 2) / ((1 - r2) / (n - 3))``; constant
        values give ``r2 = 0``, ``p = 1``; an exact plane ``r2 = 1``, ``p = 0``.
    """
    coords = np.asarray(coords, dtype=float)
    values = np.asarray(values, dtype=float)
    n = values.size
    if coords.shape != (n, 2):
        raise ValueError(f"coords must have shape ({n}, 2), got {coords.shape}")
    if n < 4:
        raise ValueError(f"a trend test needs at least 4 samples, got {n}")
    centred = coords - coords.mean(axis=0)
    design = np.column_stack([np.ones(n), centred])
    coef, *_ = np.linalg.lstsq(design, values, rcond=None)
    ss_tot = float(np.sum((values - values.mean()) ** 2))
    if not ss_tot > 0:
        return TrendTest(0.0, 0.0, 1.0)
    ss_res = float(np.sum((values - design @ coef) ** 2))
    r2 = min(max(1.0 - ss_res / ss_tot, 0.0), 1.0)
    if r2 >= 1.0 - 1e-12:
        return TrendTest(1.0, np.inf, 0.0)
    f = (r2 / 2.0) / ((1.0 - r2) / (n - 3))
    return TrendTest(r2, float(f), float(stats.f.sf(f, 2, n - 3)))


def close_pairs(coords: np.ndarray, distance: float) -> np.ndarray:
    """Index pairs ``(i, j)``, ``i < j``, of samples at most ``distance`` (m) apart.

    Returns
    -------
    numpy.ndarray of int, shape (k, 2)
        Sorted by ``i`` then ``j``.
    """
    coords = np.asarray(coords, dtype=float)
    if not distance >= 0:
        raise ValueError(f"distance must be >= 0 m, got {distance}")
    pairs = cKDTree(coords).query_pairs(r=float(distance), output_type="ndarray")
    if pairs.size == 0:
        return np.empty((0, 2), dtype=int)
    pairs = np.sort(pairs, axis=1)
    return pairs[np.lexsort((pairs[:, 1], pairs[:, 0]))]


def first_bin_weight_share(emp: EmpiricalVariogram) -> float:
    """Share of the total fitting weight (``N_h / h^2``) that the shortest lag bin carries."""
    use = emp.lag > 0
    if not use.any():
        return 0.0
    w = emp.count[use] / emp.lag[use] ** 2
    return float(w[0] / w.sum())
