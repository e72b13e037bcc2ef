"""Directional variograms and fits of geometrically anisotropic variogram models.

Directions are axial: a pair separation and its reverse have the same direction, folded to
degrees counter-clockwise from the x (east) axis in [0, 180).  A geometrically anisotropic
model has practical range ``a`` along its major axis (direction ``angle``) and
``ratio * a`` across it; along direction ``phi`` its range is
``a / sqrt(cos^2(phi - angle) + sin^2(phi - angle) / ratio^2)``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from pmap.errors import ModelFitError
from pmap.geostats.variogram import (
    _MIN_RANGE_FACTOR,
    MAX_RANGE_FACTOR,
    MODELS,
    SHAPE_BOUNDS,
    SHAPED,
    EmpiricalVariogram,
    VariogramModel,
    _bin_semivariance,
    _check_bins,
    _check_estimator,
    _check_points,
    _lag_edges,
    _matern_factor_spline,
    _pair_blocks,
    _pair_statistic,
    _shaped_structure,
    _structure,
    best_least_squares,
    fit_variogram,
    matern_practical_factor,
)

__all__ = [
    "directional_variograms",
    "anisotropy_from_directional",
    "fit_anisotropic_variogram",
    "MIN_RATIO",
]

#: Smallest anisotropy ratio (minor / major range) a fit may return.
MIN_RATIO = 0.05
# Bounds of the starting anisotropy ratio (a ratio of exactly 1 leaves the angle undefined).
_START_RATIO = (0.1, 0.9)


class _Sums:
    """Per (direction, lag) bin sums of the pairs, coincident pairs kept apart."""

    def __init__(self, n_dir: int, n_bins: int) -> None:
        shape = (n_dir, n_bins)
        self.count = np.zeros(shape)
        self.dist = np.zeros(shape)
        self.stat = np.zeros(shape)
        self.cos2 = np.zeros(shape)
        self.sin2 = np.zeros(shape)
        self.coincident_count = 0.0
        self.coincident_stat = 0.0

    def with_coincident(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Counts, distance sums and statistic sums with the coincident pairs in bin 0 of
        every direction (they have no direction)."""
        count, dist, stat = self.count.copy(), self.dist.copy(), self.stat.copy()
        count[:, 0] += self.coincident_count
        stat[:, 0] += self.coincident_stat
        return count, dist, stat


def _fold(dx: np.ndarray, dy: np.ndarray) -> np.ndarray:
    """Axial direction of separation vectors, degrees in [0, 180)."""
    phi = np.degrees(np.arctan2(dy, dx)) % 180.0
    phi[phi >= 180.0] = 0.0  # -tiny % 180 rounds to 180.0
    return phi


def _offset(phi: np.ndarray, centre: float) -> np.ndarray:
    """Signed axial difference ``phi - centre``, degrees in [-90, 90)."""
    return (phi - centre + 90.0) % 180.0 - 90.0


def _tiles(centres: np.ndarray, tolerance: float) -> bool:
    """Whether the sectors are ``centres[0] + j * 2 tolerance``, j = 0..n-1 in any order,
    so that they cover [0, 180) exactly once."""
    n = centres.size
    if not np.isclose(2.0 * tolerance * n, 180.0, rtol=0, atol=1e-9):
        return False
    j = ((centres - centres[0]) % 180.0) / (2.0 * tolerance)
    near = np.abs(j - np.rint(j)) < 1e-9
    return bool(np.all(near) and np.unique(np.rint(j).astype(int) % n).size == n)


def _directional_sums(
    coords: np.ndarray, values: np.ndarray, cutoff: float, n_bins: int,
    centres: np.ndarray, tolerance: float, estimator: str,
) -> _Sums:
    """Accumulate the pairs within ``cutoff`` into direction-sector x lag bins.

    A pair belongs to the sector of centre ``c`` when its direction is in
    ``[c - tolerance, c + tolerance)`` (all pairs when ``tolerance >= 90``).
    """
    upper = _lag_edges(cutoff, n_bins)
    n_dir = centres.size
    sums = _Sums(n_dir, n_bins)
    tiling = _tiles(centres, tolerance)
    size = n_dir * n_bins
    # Sector j of the tiling is centred on centres[0] + j * 2 tolerance.
    sector_of = np.rint(((centres - centres[0]) % 180.0) / (2.0 * tolerance)).astype(np.intp)
    sector_of %= n_dir
    for d, dz, dx, dy in _pair_blocks(coords, values, cutoff, vectors=True):
        stat = _pair_statistic(dz, estimator)
        same = d <= 0
        if same.any():
            sums.coincident_count += float(same.sum())
            sums.coincident_stat += float(stat[same].sum())
            keep = ~same
            d, dx, dy, stat = d[keep], dx[keep], dy[keep], stat[keep]
        phi = _fold(dx, dy)
        lag = np.searchsorted(upper, d, side="left")
        d2 = d * d
        c2, s2 = (dx * dx - dy * dy) / d2, 2.0 * dx * dy / d2  # cos, sin of 2 phi
        if tiling:
            width = 2.0 * tolerance
            sector = np.floor(((phi - (centres[0] - tolerance)) % 180.0) / width)
            idx = (sector.astype(np.intp) % n_dir) * n_bins + lag
            for out, wts in ((sums.count, None), (sums.dist, d), (sums.stat, stat),
                             (sums.cos2, c2), (sums.sin2, s2)):
                binned = np.bincount(idx, weights=wts, minlength=size).reshape(n_dir, n_bins)
                out += binned[sector_of]
            continue
        for k, centre in enumerate(centres):
            if tolerance >= 90.0:
                sel = slice(None)
            else:
                off = _offset(phi, float(centre))
                sel = (off >= -tolerance) & (off < tolerance)
            idx = lag[sel]
            sums.count[k] += np.bincount(idx, minlength=n_bins)
            sums.dist[k] += np.bincount(idx, weights=d[sel], minlength=n_bins)
            sums.stat[k] += np.bincount(idx, weights=stat[sel], minlength=n_bins)
            sums.cos2[k] += np.bincount(idx, weights=c2[sel], minlength=n_bins)
            sums.sin2[k] += np.bincount(idx, weights=s2[sel], minlength=n_bins)
    return sums


def _empirical(count: np.ndarray, dist: np.ndarray, stat: np.ndarray, cutoff: float,
               estimator: str) -> EmpiricalVariogram:
    keep = count > 0
    return EmpiricalVariogram(
        lag=dist[keep] / count[keep],
        gamma=_bin_semivariance(stat[keep], count[keep], estimator),
        count=count[keep].astype(int),
        cutoff=float(cutoff),
    )


def directional_variograms(
    coords: np.ndarray,
    values: np.ndarray,
    angles_deg: Sequence[float] = (0.0, 45.0, 90.0, 135.0),
    tolerance_deg: float = 22.5,
    cutoff: float | None = None,
    n_bins: int = 15,
    estimator: str = "matheron",
) -> dict[float, EmpiricalVariogram]:
    """Empirical semivariograms of the pairs in angular sectors.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m.
    values : numpy.ndarray, shape (n,)
        Sample values.
    angles_deg : sequence of float
        Sector centres, degrees counter-clockwise from the x axis (folded to [0, 180)).
    tolerance_deg : float
        Half-width of each sector, degrees, in (0, 90]: a pair of direction ``phi`` is in
        the sector of centre ``c`` when ``phi - c`` (axial, in [-90, 90)) lies in
        ``[-tolerance, tolerance)``, so sectors of width ``180 / k`` tile without overlap.
    cutoff : float, optional
        Largest pair distance, m.  Default: bounding-box diagonal / 3.
    n_bins : int
        Number of equal-width lag bins on (0, cutoff], as in
        :func:`~pmap.geostats.variogram.empirical_variogram`.
    estimator : {"matheron", "cressie-hawkins"}
        Semivariance estimator.

    Returns
    -------
    dict of float to EmpiricalVariogram
        Keyed by the folded sector centre, degrees.  Coincident pairs (distance 0) have no
        direction and count in the first bin of every sector.  Bins without pairs are
        dropped (a sector may have no bins at all).
    """
    coords, values = _check_points(coords, values)
    _check_estimator(estimator)
    cutoff = _check_bins(coords, n_bins, cutoff)
    if not 0 < tolerance_deg <= 90:
        raise ValueError(f"tolerance_deg must be in (0, 90], got {tolerance_deg}")
    centres = np.asarray(angles_deg, dtype=float) % 180.0
    if centres.ndim != 1 or centres.size == 0 or not np.all(np.isfinite(centres)):
        raise ValueError(f"angles_deg must be a non-empty sequence of finite angles, "
                         f"got {angles_deg!r}")
    sums = _directional_sums(coords, values, cutoff, n_bins, centres, float(tolerance_deg),
                             estimator)
    count, dist, stat = sums.with_coincident()
    return {float(c): _empirical(count[k], dist[k], stat[k], cutoff, estimator)
            for k, c in enumerate(centres)}


def anisotropy_from_directional(ranges: Mapping[float, float]) -> tuple[float, float, float]:
    """Geometric anisotropy ellipse through directional practical ranges.

    Fits ``1 / a(phi)^2 = c0 - p cos(2 phi) - q sin(2 phi)``, the exact form of a
    geometrically anisotropic range, by least squares over the directions.

    Parameters
    ----------
    ranges : mapping of float to float
        Practical range (m, > 0) per direction (degrees counter-clockwise from x); at
        least 3 distinct directions (mod 180).

    Returns
    -------
    major : float
        Practical range along the major axis, m.
    ratio : float
        Minor / major range, in [:data:`MIN_RATIO`, 1].
    angle : float
        Major-axis direction, degrees counter-clockwise from x, in [0, 180).
    """
    phi = np.radians(np.asarray(list(ranges.keys()), dtype=float) % 180.0)
    a = np.asarray(list(ranges.values()), dtype=float)
    if np.unique(np.round(np.degrees(phi), 9)).size < 3:
        raise ValueError("an anisotropy ellipse needs ranges in at least 3 distinct directions")
    if not (np.all(np.isfinite(a)) and np.all(a > 0)):
        raise ValueError(f"directional ranges must be finite and > 0 m, got {a}")
    design = np.column_stack([np.ones_like(phi), -np.cos(2 * phi), -np.sin(2 * phi)])
    (c0, p, q), *_ = np.linalg.lstsq(design, 1.0 / a**2, rcond=None)
    if not c0 > 0:
        c0 = float(np.mean(1.0 / a**2))
    k = min(float(np.hypot(p, q)), c0 * (1 - MIN_RATIO**2) / (1 + MIN_RATIO**2))
    angle = float(np.degrees(0.5 * np.arctan2(q, p)) % 180.0)
    ratio = float(np.sqrt((c0 - k) / (c0 + k)))
    if ratio >= 1.0 - 1e-12:
        return float(1.0 / np.sqrt(c0)), 1.0, 0.0
    return float(1.0 / np.sqrt(c0 - k)), ratio, 0.0 if angle >= 180.0 else angle


def _range_scale(cos2: np.ndarray, sin2: np.ndarray, ratio: float, angle: float) -> np.ndarray:
    """Root-mean-square ``major range / range along phi`` over a bin's pairs.

    ``(major / range(phi))^2 = A + B cos(2 (phi - angle))``, ``A, B = (1 +- 1/ratio^2) / 2``,
    is linear in ``cos 2 phi`` and ``sin 2 phi``, so its mean over the pairs of a bin follows
    from their means ``cos2``, ``sin2`` (``angle`` in radians).
    """
    inv = 1.0 / (ratio * ratio)
    mean_sq = 0.5 * (1.0 + inv) + 0.5 * (1.0 - inv) * (
        cos2 * np.cos(2.0 * angle) + sin2 * np.sin(2.0 * angle))
    return np.sqrt(np.maximum(mean_sq, 1.0))


def fit_anisotropic_variogram(
    coords: np.ndarray,
    values: np.ndarray,
    kind: str,
    *,
    cutoff: float | None = None,
    n_bins: int = 15,
    n_directions: int = 4,
    min_nugget: float = 0.0,
    estimator: str = "matheron",
) -> VariogramModel:
    """Fit a geometrically anisotropic model jointly over direction x lag bins.

    The pairs are binned by direction sector (``n_directions`` sectors of width
    ``180 / n_directions`` degrees, centred on multiples of it) and lag (``n_bins`` on
    (0, cutoff]).  Nugget, partial sill, major-axis practical range, shape (stable and
    Matern), ratio and angle are fitted by weighted least squares, weights ``N_h / h^2``
    as in :func:`~pmap.geostats.variogram.fit_variogram`, with the model evaluated at each
    bin's mean distance scaled by the root-mean-square direction factor of its pairs (see
    the module docstring), which accounts for the spread of directions within a sector.
    Starts: the ellipse through the
    directional fitted ranges (:func:`anisotropy_from_directional`) and the direction of
    the longest directional range; the lowest weighted SSE is kept.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m.  Cost grows with the number of pairs within the cutoff;
        subsample beyond a few thousand samples.
    values : numpy.ndarray, shape (n,)
        Sample values.
    kind : str
        Model family, one of :data:`~pmap.geostats.variogram.MODELS`.
    cutoff : float, optional
        Largest pair distance, m.  Default: bounding-box diagonal / 3.
    n_bins : int
        Lag bins per direction.
    n_directions : int
        Direction sectors, >= 3.
    min_nugget : float
        Lower bound of the nugget, squared value units.
    estimator : {"matheron", "cressie-hawkins"}
        Semivariance estimator.

    Returns
    -------
    VariogramModel
        With ``range`` the major-axis practical range (m, in [0.001, 3] x cutoff), ``ratio``
        in [:data:`MIN_RATIO`, 1] and ``angle`` in [0, 180) degrees (0 when ``ratio`` is 1).

    Raises
    ------
    ModelFitError
        Too few bins with pairs, constant values, or no start converged.
    """
    if kind not in MODELS:
        raise ModelFitError(f"unknown variogram model {kind!r}; choose one of {MODELS}")
    coords, values = _check_points(coords, values)
    _check_estimator(estimator)
    cutoff = _check_bins(coords, n_bins, cutoff)
    if n_directions < 3:
        raise ValueError(f"n_directions must be >= 3, got {n_directions}")
    if not min_nugget >= 0:
        raise ValueError(f"min_nugget must be >= 0, got {min_nugget}")
    width = 180.0 / n_directions
    centres = width * np.arange(n_directions)
    sums = _directional_sums(coords, values, cutoff, n_bins, centres, width / 2.0, estimator)
    count, dist, stat = sums.with_coincident()

    # Starting values: the omnidirectional fit and one isotropic fit per direction.
    omni_count = sums.count.sum(axis=0)
    omni_count[0] += sums.coincident_count
    omni_stat = sums.stat.sum(axis=0)
    omni_stat[0] += sums.coincident_stat
    omni = fit_variogram(_empirical(omni_count, sums.dist.sum(axis=0), omni_stat, cutoff,
                                    estimator), kind, min_nugget=min_nugget)
    ranges: dict[float, float] = {}
    for k, centre in enumerate(centres):
        try:
            ranges[float(centre)] = fit_variogram(
                _empirical(count[k], dist[k], stat[k], cutoff, estimator), kind,
                min_nugget=min_nugget).range
        except ModelFitError:
            continue

    # Bins of the joint fit: lag > 0, with the mean axial direction of their pairs.
    use = (count > 0) & (dist > 0)
    n_pairs = count[use]
    h = dist[use] / n_pairs / cutoff
    cos2, sin2 = sums.cos2[use] / sums.count[use], sums.sin2[use] / sums.count[use]
    g = _bin_semivariance(stat[use], n_pairs, estimator)
    if h.size < 4:
        raise ModelFitError(f"cannot fit an anisotropic {kind} variogram: {h.size} non-empty "
                            "direction x lag bins, need at least 4")
    scale = float(np.max(g))
    if not scale > 0:
        raise ModelFitError("cannot fit a variogram: semivariance is zero at every lag "
                            "(constant values)")
    w = n_pairs / h**2
    sw = np.sqrt(w / np.sum(w))
    g = g / scale
    nug_lo = float(min_nugget) / scale
    shaped = kind in SHAPED
    shape_lo, shape_hi = SHAPE_BOUNDS.get(kind, (0.0, 0.0))

    def unit(x: np.ndarray, shape: float) -> np.ndarray:
        return _shaped_structure(kind, x, shape) if shaped else _structure(kind, x)

    def residuals(theta: np.ndarray) -> np.ndarray:
        nug, ps, rng = theta[:3]
        ratio, angle = theta[-2:]
        x = h * _range_scale(cos2, sin2, ratio, angle) / rng
        return sw * (nug + ps * unit(x, theta[3] if shaped else 0.0) - g)

    lo = [nug_lo, 0.0, _MIN_RANGE_FACTOR] + ([shape_lo] if shaped else []) + [MIN_RATIO, -np.inf]
    hi = [np.inf, np.inf, MAX_RANGE_FACTOR] + ([shape_hi] if shaped else []) + [1.0, np.inf]
    lo_arr, hi_arr = np.array(lo), np.array(hi)
    finite = np.isfinite(lo_arr)
    lo_in = np.where(finite, lo_arr + 1e-9 * np.maximum(1.0, np.abs(lo_arr, where=finite,
                                                                     out=np.ones_like(lo_arr))),
                     -np.inf)
    hi_in = np.where(np.isfinite(hi_arr), hi_arr * (1.0 - 1e-9), np.inf)
    base = [omni.nugget / scale, max(omni.psill / scale, 1e-3)]
    starts: list[tuple[float, float, float]] = []
    if len(ranges) >= 3:
        starts.append(anisotropy_from_directional(ranges))
    if ranges:
        longest = max(ranges, key=ranges.__getitem__)
        starts.append((ranges[longest], min(ranges.values()) / ranges[longest], longest))
    if not starts:
        starts.append((omni.range, 1.0, 0.0))
    x0s = [np.clip(np.array(base + [min(max(major, omni.range), MAX_RANGE_FACTOR * cutoff)
                                     / cutoff] + ([omni.shape] if shaped else [])
                            + [float(np.clip(ratio0, *_START_RATIO)), np.radians(angle0)]),
                   lo_in, hi_in)
           for major, ratio0, angle0 in starts]
    best = best_least_squares(residuals, x0s, lo_arr, hi_arr, tol=1e-10, max_nfev=1000)
    if best is None:
        raise ModelFitError(f"anisotropic {kind} variogram fit did not converge")
    nug, ps = (0.0 if v < 1e-12 else float(v) for v in best[:2])
    rng = float(best[2]) * cutoff
    shape = float(np.clip(best[3], shape_lo, shape_hi)) if shaped else None
    if kind == "matern":
        rng *= matern_practical_factor(shape) / float(
            _matern_factor_spline(shape_lo, shape_hi)(np.log(shape)))
    ratio = float(min(best[-2], 1.0))
    angle = float(np.degrees(best[-1]) % 180.0)
    if ratio >= 1.0 - 1e-9:
        ratio, angle = 1.0, 0.0
    elif angle >= 180.0:  # -tiny % 180 rounds to 180.0
        angle = 0.0
    return VariogramModel(kind, max(nug, nug_lo) * scale, ps * scale, rng, shape, ratio, angle)
