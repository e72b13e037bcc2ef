"""Empirical semivariograms and the bounded variogram models pmap fits to them.

Range convention
----------------
Every model's ``range`` is the *practical* (effective) range in metres: the distance at
which the model reaches the full sill (spherical) or 95 % of the partial sill
(exponential, gaussian, stable, matern).  gstat's ``vgm()`` range for the exponential and
gaussian models is the scale parameter instead, one third and ``1/sqrt(3)`` of pmap's
value.  pykrige's exponential model uses the practical range like pmap; its gaussian model
uses a 4/7 factor and so differs.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, replace
from functools import lru_cache
from typing import Any

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError

__all__ = [
    "best_least_squares",
    "MODELS",
    "SHAPED",
    "DEFAULT_MODELS",
    "ESTIMATORS",
    "SHAPE_BOUNDS",
    "EmpiricalVariogram",
    "VariogramModel",
    "empirical_variogram",
    "fit_variogram",
    "fit_best_variogram",
    "fit_variograms",
    "weighted_sse",
    "default_cutoff",
    "CONSTANT",
    "MAX_RANGE_FACTOR",
]

#: Variogram model families pmap can fit, all bounded (with a sill).
MODELS: tuple[str, ...] = ("spherical", "exponential", "gaussian", "stable", "matern")
#: Families with a shape parameter: the stable exponent alpha in (0, 2], the Matern
#: smoothness nu > 0.
SHAPED: tuple[str, ...] = ("stable", "matern")
#: Families tried by default.  The shaped ones can be fitted (pass ``MODELS``) but are left
#: out: they nest the exponential and gaussian, and all five take 0.14-0.19 s per 15-bin
#: variogram against 0.09-0.15 s for these three.
DEFAULT_MODELS: tuple[str, ...] = ("spherical", "exponential", "gaussian")
#: Bounds of the fitted shape parameter: stable alpha, Matern nu.
SHAPE_BOUNDS: dict[str, tuple[float, float]] = {"stable": (0.2, 2.0), "matern": (0.2, 5.0)}
#: Empirical semivariance estimators: Matheron's moment estimator and the robust
#: Cressie-Hawkins estimator.
ESTIMATORS: tuple[str, ...] = ("matheron", "cressie-hawkins")
# Shapes of the starting-value grid of the shaped fits.
_SHAPE_GRID: dict[str, tuple[float, ...]] = {
    "stable": (0.2, 0.35, 0.5, 0.75, 1.0, 1.25, 1.5, 1.75, 2.0),
    "matern": (0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 5.0),
}
# Grid cells (one per shape) refined by least squares in a shaped fit.
_SHAPED_STARTS = 3
# Weighted SSEs closer than this fraction of the data's weighted sum of squares are ties.
_TIE = 1e-10
# Correlation left at the practical range of the exponential-type families: 5 %.
_PRACTICAL = 0.05
#: Kind of the zero variogram of a property whose samples are all equal; never fitted.
CONSTANT = "constant"

# Rows of the pair-distance matrix computed at once: bounds memory at ~_BLOCK * n floats.
_BLOCK = 2048
#: Upper bound of a fitted practical range, in multiples of the cutoff.
MAX_RANGE_FACTOR = 3.0
# Refinements of the best grid ranges in an unshaped fit.
_UNSHAPED_STARTS = 3
# Lower bound of a fitted practical range, in multiples of the cutoff.
_MIN_RANGE_FACTOR = 1e-3


@dataclass(frozen=True)
class EmpiricalVariogram:
    """Binned semivariances of a set of samples; bins without pairs are dropped.

    Attributes
    ----------
    lag : numpy.ndarray, shape (k,)
        Mean separation distance of the pairs in each bin, m.
    gamma : numpy.ndarray, shape (k,)
        Semivariance per bin, in squared value units.
    count : numpy.ndarray of int, shape (k,)
        Number of point pairs per bin.
    cutoff : float
        Largest separation distance used, m.
    """

    lag: np.ndarray
    gamma: np.ndarray
    count: np.ndarray
    cutoff: float

    def as_dict(self) -> dict[str, Any]:
        """Bins as plain lists (JSON-able)."""
        return {
            "lag_m": [float(v) for v in self.lag],
            "gamma": [float(v) for v in self.gamma],
            "count": [int(v) for v in self.count],
            "cutoff_m": float(self.cutoff),
        }


@dataclass(frozen=True)
class VariogramModel:
    """A bounded variogram model: nugget plus one structure, optionally geometrically anisotropic.

    Parameters
    ----------
    kind : str
        One of :data:`MODELS`, or :data:`CONSTANT` (nugget and partial sill 0: the
        variogram of a property that does not vary).
    nugget : float
        Semivariance jump at the origin, squared value units, >= 0.
    psill : float
        Partial sill of the structure, squared value units, >= 0.
    range : float
        Practical range along the major axis, m, > 0 (see the module docstring).
    shape : float, optional
        The stable exponent ``alpha`` in (0, 2] or the Matern smoothness ``nu`` in
        [0.05, 20]; required for those kinds, ``None`` for the others.
    ratio : float
        Geometric anisotropy: minor-axis range / major-axis range, in (0, 1]; 1 is isotropic.
    angle : float
        Direction of the major axis, degrees counter-clockwise from the x (east) axis, in
        [0, 180).  Ignored when ``ratio == 1``.
    """

    kind: str
    nugget: float
    psill: float
    range: float
    shape: float | None = None
    ratio: float = 1.0
    angle: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in MODELS and self.kind != CONSTANT:
            raise ValueError(f"unknown variogram model {self.kind!r}; choose one of {MODELS}")
        if self.kind == CONSTANT and (self.nugget != 0 or self.psill != 0):
            raise ValueError(f"a {CONSTANT!r} variogram has nugget and psill 0, got "
                             f"{self.nugget}, {self.psill}")
        for name in ("nugget", "psill", "range", "ratio", "angle"):
            if not np.isfinite(getattr(self, name)):
                raise ValueError(f"variogram {name} must be finite, got {getattr(self, name)}")
        if self.nugget < 0 or self.psill < 0:
            raise ValueError(f"nugget and psill must be >= 0, got {self.nugget}, {self.psill}")
        if self.range <= 0:
            raise ValueError(f"variogram range must be > 0 m, got {self.range}")
        if self.kind in SHAPED:
            if self.shape is None or not np.isfinite(self.shape):
                raise ValueError(f"a {self.kind} variogram needs a finite shape parameter")
            if self.kind == "stable" and not 0 < self.shape <= 2:
                raise ValueError(f"the stable exponent must be in (0, 2], got {self.shape}")
            if self.kind == "matern" and not 0.05 <= self.shape <= 20:
                raise ValueError(f"the Matern smoothness must be in [0.05, 20], got {self.shape}")
        elif self.shape is not None:
            raise ValueError(f"a {self.kind} variogram takes no shape parameter, got {self.shape}")
        if not 0 < self.ratio <= 1:
            raise ValueError(f"anisotropy ratio must be in (0, 1], got {self.ratio}")
        if not 0 <= self.angle < 180:
            raise ValueError(f"anisotropy angle must be in [0, 180) degrees, got {self.angle}")

    @property
    def sill(self) -> float:
        """Total sill, nugget + partial sill, squared value units."""
        return float(self.nugget + self.psill)

    @property
    def anisotropic(self) -> bool:
        """Whether the range depends on direction (``ratio < 1``)."""
        return self.ratio < 1.0

    def isotropic_coords(self, xy: np.ndarray) -> np.ndarray:
        """Coordinates in which this model is isotropic, m along the major axis.

        ``xy`` is rotated so that the major axis lies along the first coordinate and the
        minor-axis coordinate is divided by ``ratio``; Euclidean distances between the
        returned points are the separations to pass to :meth:`__call__`.  Returns ``xy``
        unchanged (as float) when the model is isotropic.
        """
        xy = np.asarray(xy, dtype=float)
        if not self.anisotropic:
            return xy
        theta = np.deg2rad(self.angle)
        c, s = np.cos(theta), np.sin(theta)
        out = np.empty_like(xy)
        out[..., 0] = c * xy[..., 0] + s * xy[..., 1]
        out[..., 1] = (-s * xy[..., 0] + c * xy[..., 1]) / self.ratio
        return out

    def with_sill_scaled(self, factor: float) -> VariogramModel:
        """The same model with nugget and partial sill multiplied by ``factor``."""
        return replace(self, nugget=self.nugget * factor, psill=self.psill * factor)

    def __call__(self, h: np.ndarray | float) -> np.ndarray:
        """Semivariance at (isotropic-equivalent) separation ``h`` (m); exactly 0 at ``h == 0``."""
        h = np.asarray(h, dtype=float)
        out = _semivariance_into(self, np.atleast_1d(h), np.empty(h.shape or (1,)))
        return out.reshape(h.shape)

    def covariance(self, h: np.ndarray | float) -> np.ndarray:
        """Covariance ``sill - gamma(h)``, squared value units; equals the sill at ``h == 0``."""
        return self.sill - self(h)

    def as_dict(self) -> dict[str, Any]:
        """Parameters as plain values (JSON-able); ``range_m`` is the practical range."""
        out: dict[str, Any] = {
            "kind": self.kind,
            "nugget": float(self.nugget),
            "psill": float(self.psill),
            "sill": self.sill,
            "range_m": float(self.range),
        }
        if self.shape is not None:
            out["shape"] = float(self.shape)
        if self.anisotropic:
            out["anisotropy_ratio"] = float(self.ratio)
            out["anisotropy_angle_deg"] = float(self.angle)
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> VariogramModel:
        """Inverse of :meth:`as_dict`."""
        shape = data.get("shape")
        return cls(str(data["kind"]), float(data["nugget"]), float(data["psill"]),
                   float(data["range_m"]), None if shape is None else float(shape),
                   float(data.get("anisotropy_ratio", 1.0)),
                   float(data.get("anisotropy_angle_deg", 0.0)))


def _semivariance_into(model: VariogramModel, h: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Write ``model(h)`` into ``out`` (same shape as ``h``, may not alias it) and return it."""
    np.divide(h, model.range, out=out)
    _structure(model.kind, out, model.shape)
    out *= model.psill
    out += model.nugget
    if h.size and not h.min() > 0:
        out[h <= 0] = 0.0
    return out


@lru_cache(maxsize=256)
def matern_practical_factor(nu: float) -> float:
    """``s`` at which the unit Matern correlation ``2^(1-nu)/Gamma(nu) s^nu K_nu(s)`` is 0.05.

    pmap's Matern range is practical: ``gamma(h)`` uses ``s = factor(nu) h / range``.
    """
    from scipy.optimize import brentq

    def excess(s: float) -> float:
        return float(_matern_correlation(np.array([s]), nu)[0] - _PRACTICAL)

    hi = 1.0
    while excess(hi) > 0:
        hi *= 2.0
    return float(brentq(excess, 1e-9, hi, xtol=1e-14, rtol=1e-14))


def _matern_correlation(s: np.ndarray, nu: float) -> np.ndarray:
    """Unit Matern correlation at scaled distance ``s >= 0`` (1 at 0)."""
    from scipy.special import gammaln, kv

    out = np.ones_like(s)
    pos = s > 0
    sp = s[pos]
    with np.errstate(over="ignore", under="ignore", invalid="ignore"):
        val = np.exp((1.0 - nu) * np.log(2.0) - gammaln(nu) + nu * np.log(sp)) * kv(nu, sp)
    val[~np.isfinite(val)] = 0.0
    out[pos] = np.clip(val, 0.0, 1.0)
    return out


def _structure(kind: str, r: np.ndarray, shape: float | None = None) -> np.ndarray:
    """Unit-sill structure at ``r = h / practical range``; overwrites and returns ``r``.

    Computed in place because it runs on (samples x targets) blocks of millions of cells.
    """
    if kind == "spherical":
        np.minimum(r, 1.0, out=r)
        poly = r * r
        poly *= -0.5
        poly += 1.5
        r *= poly
        return r
    if kind == "exponential":
        r *= -3.0
    elif kind == "gaussian":
        r *= r
        r *= -3.0
    elif kind == "stable":
        np.power(r, float(shape), out=r)
        r *= -3.0
    elif kind == "matern":
        nu = float(shape)
        r *= matern_practical_factor(nu)
        r[...] = 1.0 - _matern_correlation(r, nu)
        return r
    elif kind == CONSTANT:
        r.fill(0.0)
        return r
    else:
        raise ValueError(f"unknown variogram model {kind!r}; choose one of {MODELS}")
    np.exp(r, out=r)
    np.subtract(1.0, r, out=r)
    return r


def _check_points(coords: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    coords = np.asarray(coords, dtype=float)
    values = np.asarray(values, dtype=float)
    if coords.ndim != 2 or coords.shape[1] != 2:
        raise ValueError(f"coords must have shape (n, 2), got {coords.shape}")
    if values.shape != (coords.shape[0],):
        raise ValueError(f"values must have shape ({coords.shape[0]},), got {values.shape}")
    if not (np.all(np.isfinite(coords)) and np.all(np.isfinite(values))):
        raise ValueError("coords and values must be finite (no NaN or inf)")
    return coords, values


def default_cutoff(coords: np.ndarray, fraction: float = 1.0 / 3.0) -> float:
    """``fraction`` of the bounding-box diagonal of ``coords`` (m), gstat's default at 1/3."""
    coords = np.asarray(coords, dtype=float)
    return float(fraction * np.hypot(*(coords.max(axis=0) - coords.min(axis=0))))


def _pair_blocks(
    coords: np.ndarray, values: np.ndarray, cutoff: float, *, vectors: bool = False
) -> Iterator[tuple[np.ndarray, ...]]:
    """Yield the sample pairs ``i < j`` with separation ``<= cutoff`` block by block.

    Each item is ``(d, dz)`` (distance, m; value difference ``z_i - z_j``), or
    ``(d, dz, dx, dy)`` with the separation vector ``x_j - x_i`` (m) when ``vectors``.
    Memory is bounded at about ``_BLOCK * n`` floats per block.
    """
    n = coords.shape[0]
    for i0 in range(0, n - 1, _BLOCK):
        i1 = min(i0 + _BLOCK, n - 1)
        # Columns j > i0 only: the pairs (i, j), i0 <= i < i1, with i < j.
        d = cdist(coords[i0:i1], coords[i0 + 1:])
        near = d <= cutoff
        near &= np.arange(i0 + 1, n)[None, :] > np.arange(i0, i1)[:, None]
        rows, cols = np.nonzero(near)
        d = d[rows, cols]
        cols += i0 + 1
        dz = values[i0 + rows] - values[cols]
        if vectors:
            dxy = coords[cols] - coords[i0 + rows]
            yield d, dz, dxy[:, 0], dxy[:, 1]
        else:
            yield d, dz


def _bin_semivariance(
    stat_sum: np.ndarray, counts: np.ndarray, estimator: str
) -> np.ndarray:
    """Semivariance per bin from the per-bin sums of :func:`_pair_statistic` (count > 0)."""
    if estimator == "matheron":
        return stat_sum / (2.0 * counts)
    mean_root = stat_sum / counts
    return 0.5 * mean_root ** 4 / (0.457 + 0.494 / counts)


def _pair_statistic(dz: np.ndarray, estimator: str) -> np.ndarray:
    """Per-pair term the estimator averages: ``dz^2`` (Matheron) or ``|dz|^(1/2)`` (CH)."""
    if estimator == "matheron":
        return dz * dz
    return np.sqrt(np.abs(dz))


def _check_estimator(estimator: str) -> None:
    if estimator not in ESTIMATORS:
        raise ValueError(f"unknown semivariance estimator {estimator!r}; choose one of "
                         f"{ESTIMATORS}")


def _check_bins(coords: np.ndarray, n_bins: int, cutoff: float | None) -> float:
    """Validated cutoff (m), defaulting to :func:`default_cutoff`."""
    n = coords.shape[0]
    if n < 2:
        raise ModelFitError(f"an empirical variogram needs at least 2 samples, got {n}")
    if n_bins < 1:
        raise ValueError(f"n_bins must be >= 1, got {n_bins}")
    if cutoff is None:
        cutoff = default_cutoff(coords)
    if not (np.isfinite(cutoff) and cutoff > 0):
        raise ModelFitError(f"variogram cutoff must be a positive distance, got {cutoff} m")
    return float(cutoff)


def _lag_edges(cutoff: float, n_bins: int) -> np.ndarray:
    """Upper edges of ``n_bins`` equal-width lag bins on (0, cutoff], m."""
    upper = cutoff * np.arange(1, n_bins + 1) / n_bins
    upper[-1] = cutoff
    return upper


def empirical_variogram(
    coords: np.ndarray,
    values: np.ndarray,
    cutoff: float | None = None,
    n_bins: int = 15,
    *,
    estimator: str = "matheron",
) -> EmpiricalVariogram:
    """Empirical semivariances in equal-width distance bins.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m.
    values : numpy.ndarray, shape (n,)
        Sample values.
    cutoff : float, optional
        Largest pair distance, m.  Default: bounding-box diagonal / 3 (gstat's default).
    n_bins : int
        Number of equal-width bins on (0, cutoff].
    estimator : {"matheron", "cressie-hawkins"}
        ``"matheron"``: ``gamma = sum (z_i - z_j)^2 / (2 N_h)``.  ``"cressie-hawkins"``
        (Cressie & Hawkins 1980), robust to outlying values:
        ``2 gamma = (mean |z_i - z_j|^(1/2))^4 / (0.457 + 0.494 / N_h)``.

    Returns
    -------
    EmpiricalVariogram
        Semivariance per bin, squared value units.  Bin ``k`` holds the pairs with
        distance in ``(k w, (k+1) w]``, ``w = cutoff / n_bins``; coincident pairs
        (distance 0) count in the first bin.  Bins without pairs are dropped.
    """
    coords, values = _check_points(coords, values)
    _check_estimator(estimator)
    cutoff = _check_bins(coords, n_bins, cutoff)
    upper = _lag_edges(cutoff, n_bins)
    counts = np.zeros(n_bins)
    dist_sum = np.zeros(n_bins)
    stat_sum = np.zeros(n_bins)
    for dd, dz in _pair_blocks(coords, values, cutoff):
        idx = np.searchsorted(upper, dd, side="left")
        counts += np.bincount(idx, minlength=n_bins)
        dist_sum += np.bincount(idx, weights=dd, minlength=n_bins)
        stat_sum += np.bincount(idx, weights=_pair_statistic(dz, estimator), minlength=n_bins)
    keep = counts > 0
    return EmpiricalVariogram(
        lag=dist_sum[keep] / counts[keep],
        gamma=_bin_semivariance(stat_sum[keep], counts[keep], estimator),
        count=counts[keep].astype(int),
        cutoff=cutoff,
    )


def _fit_weights(emp: EmpiricalVariogram) -> tuple[np.ndarray, np.ndarray]:
    """Bins usable for fitting (lag > 0) and their weights N_h / h^2 (gstat fit.method 7)."""
    use = emp.lag > 0
    return use, emp.count[use] / emp.lag[use] ** 2


def weighted_sse(emp: EmpiricalVariogram, model: VariogramModel) -> float:
    """Weighted sum of squared residuals, weights ``N_h / h^2``, over bins with lag > 0."""
    use, w = _fit_weights(emp)
    return float(np.sum(w * (model(emp.lag[use]) - emp.gamma[use]) ** 2))


def best_least_squares(
    residuals: Callable[[np.ndarray], np.ndarray], starts: Iterable[np.ndarray],
    lo: np.ndarray, hi: np.ndarray, *, tol: float = 1e-12, max_nfev: int = 2000,
) -> np.ndarray | None:
    """Bounded least squares (trust-region reflective) from each start; the lowest cost.

    Starts that fail (infeasible, a linear-algebra error) or end non-finite are skipped;
    None when none succeeds.
    """
    best: np.ndarray | None = None
    best_cost = np.inf
    for x0 in starts:
        try:
            sol = least_squares(residuals, x0, bounds=(lo, hi), method="trf",
                                xtol=tol, ftol=tol, gtol=tol, max_nfev=max_nfev)
        except (ValueError, np.linalg.LinAlgError):
            continue
        if np.all(np.isfinite(sol.x)) and sol.cost < best_cost:
            best, best_cost = sol.x, sol.cost
    return best


def fit_variogram(
    emp: EmpiricalVariogram, kind: str, *, min_nugget: float = 0.0,
    max_nugget: float | None = None,
) -> VariogramModel:
    """Fit one model family by weighted least squares (weights ``N_h / h^2``).

    Bounds, in the units of the variable ``emp`` was computed from (squared log units
    when it holds logarithms): nugget >= ``min_nugget`` (e.g. the lab's measurement-error
    variance, which no nugget can be below; the caller converts it to those units),
    partial sill >= 0, practical range in ``[0.001, 3] x cutoff`` (m), and for the shaped
    families the shape in :data:`SHAPE_BOUNDS` (stable alpha in [0.2, 2], Matern nu in
    [0.2, 5]), fitted jointly as a fourth parameter.  Unshaped families: the SSE is
    profiled on a grid of 49 ranges with nugget and partial sill solved exactly, and the
    three best grid ranges are refined jointly; the lowest weighted SSE is kept.
    ``max_nugget`` (same units) caps the nugget; ``max_nugget == min_nugget`` holds it there (the "no nugget beyond the
    lab error" candidate of model selection).  Shaped families: the SSE is
    profiled on a (range x shape) grid with nugget and partial sill solved exactly, and
    the best cells of the three best shapes are refined jointly.

    Raises
    ------
    ModelFitError
        Fewer than 3 usable bins, no variation in the data, or no start converged.
    """
    if kind not in MODELS:
        raise ModelFitError(f"unknown variogram model {kind!r}; choose one of {MODELS}")
    use, w = _fit_weights(emp)
    h, g = emp.lag[use], emp.gamma[use]
    if h.size < 3:
        raise ModelFitError(
            f"cannot fit a {kind} variogram: {h.size} non-empty lag bins, need at least 3 "
            "(too few samples or pairs within the cutoff)"
        )
    scale = float(np.max(g))
    if not scale > 0:
        raise ModelFitError(
            "cannot fit a variogram: semivariance is zero at every lag (constant values)")
    cutoff = float(emp.cutoff)
    sw = np.sqrt(w / np.sum(w))
    if not min_nugget >= 0:
        raise ValueError(f"min_nugget must be >= 0, got {min_nugget}")
    nug_lo = float(min_nugget) / scale
    if max_nugget is not None and not max_nugget >= min_nugget:
        raise ValueError(f"max_nugget must be >= min_nugget, got {max_nugget} < {min_nugget}")
    nug_hi = np.inf if max_nugget is None else float(max_nugget) / scale
    # least_squares needs lo < hi: a held nugget gets a band of relative width 1e-12.
    nug_hi_ls = max(nug_hi, nug_lo * (1.0 + 1e-12) + 1e-300)
    if kind in SHAPED:
        return _fit_shaped(kind, h / cutoff, g / scale, sw, nug_lo, scale, cutoff, nug_hi_ls)
    lo = np.array([nug_lo, 0.0, _MIN_RANGE_FACTOR])
    hi = np.array([nug_hi_ls, np.inf, MAX_RANGE_FACTOR])

    def residuals(theta: np.ndarray) -> np.ndarray:
        nug, ps, rng = theta
        return sw * (nug + ps * _structure(kind, h / (rng * cutoff)) - g / scale)

    # Starting values: the weighted SSE profiled over a grid of ranges, nugget and partial
    # sill solved exactly at each; the best few grid ranges are then refined jointly.
    ranges = np.geomspace(_MIN_RANGE_FACTOR, MAX_RANGE_FACTOR, 49)
    grid = np.stack([_structure(kind, h / (r * cutoff)) for r in ranges])
    nug_g, ps_g, sse_g = _linear_sill_fit(grid, g / scale, sw * sw, nug_lo, nug_hi)
    starts = []
    for j in np.argsort(sse_g, kind="stable")[:_UNSHAPED_STARTS]:
        nug0 = min(max(float(nug_g[j]), nug_lo * (1.0 + 1e-6)),
                   0.5 * (nug_lo + nug_hi_ls) if np.isfinite(nug_hi_ls) else np.inf)
        rng0 = min(max(float(ranges[j]), _MIN_RANGE_FACTOR * (1 + 1e-9)),
                   MAX_RANGE_FACTOR * (1 - 1e-9))
        starts.append(np.array([nug0, max(float(ps_g[j]), 1e-3), rng0]))
    best = best_least_squares(residuals, starts, lo, hi)
    if best is None:
        raise ModelFitError(f"{kind} variogram fit did not converge from any starting value")
    nug, ps, rng = (0.0 if v < 1e-12 else v for v in best)
    nug = min(max(nug, nug_lo), nug_hi)
    return VariogramModel(kind, float(nug * scale), float(ps * scale), float(rng * cutoff))


@lru_cache(maxsize=4)
def _matern_factor_spline(lo: float, hi: float) -> Any:
    """Cubic spline of :func:`matern_practical_factor` in ``log(nu)`` on ``[lo, hi]``.

    Used inside the Matern fits, where the optimiser moves ``nu`` continuously; the fitted
    range is converted back with the exact factor, so the returned curve is unchanged.
    """
    from scipy.interpolate import CubicSpline

    nodes = np.geomspace(lo, hi, 97)
    return CubicSpline(np.log(nodes), [matern_practical_factor(float(v)) for v in nodes])


def _shaped_structure(kind: str, x: np.ndarray, shape: float) -> np.ndarray:
    """Unit structure at ``x = h / range`` as fitted (Matern factor from the spline)."""
    if kind == "matern":
        lo, hi = SHAPE_BOUNDS["matern"]
        factor = float(_matern_factor_spline(lo, hi)(np.log(shape)))
        return 1.0 - _matern_correlation(x * factor, shape)
    return _structure(kind, np.array(x, dtype=float), shape)


def _linear_sill_fit(
    c: np.ndarray, g: np.ndarray, w: np.ndarray, nug_lo: float, nug_hi: float = np.inf,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact weighted LS of ``nug + ps * c`` to ``g`` with ``nug >= nug_lo``, ``ps >= 0``.

    ``c`` has shape (..., k) (unit structure at the k bins), ``g`` and ``w`` shape (k,).
    Returns ``nug``, ``ps`` and the weighted SSE, each of shape ``c.shape[:-1]``.
    """
    sw_ = w.sum()
    sc, scc = c @ w, (c * c) @ w
    sg, scg, sgg = float(w @ g), c @ (w * g), float(w @ (g * g))

    def sse(n: np.ndarray, p: np.ndarray) -> np.ndarray:
        return n * n * sw_ + p * p * scc + sgg + 2 * n * p * sc - 2 * n * sg - 2 * p * scg

    with np.errstate(divide="ignore", invalid="ignore"):
        det = sw_ * scc - sc * sc
        p_free = (sw_ * scg - sc * sg) / det
        n_free = (sg - p_free * sc) / sw_
        p_low = np.maximum((scg - nug_lo * sc) / scc, 0.0)
    p_low = np.where(np.isfinite(p_low), p_low, 0.0)
    n_cands = [n_free, np.full_like(sc, nug_lo),
               np.full_like(sc, min(max(nug_lo, sg / sw_), nug_hi))]
    p_cands = [p_free, p_low, np.zeros_like(sc)]
    best_n, best_p = n_cands[2], p_cands[2]
    best = sse(best_n, best_p)
    for n, p in zip(n_cands[:2], p_cands[:2], strict=True):
        ok = np.isfinite(n) & np.isfinite(p) & (n >= nug_lo) & (n <= nug_hi) & (p >= 0)
        val = np.where(ok, sse(np.where(ok, n, 0.0), np.where(ok, p, 0.0)), np.inf)
        better = val < best
        best_n, best_p, best = (np.where(better, n, best_n), np.where(better, p, best_p),
                                np.where(better, val, best))
    return best_n, best_p, best


def _fit_shaped(
    kind: str, x: np.ndarray, g: np.ndarray, sw: np.ndarray, nug_lo: float, scale: float,
    cutoff: float, nug_hi: float = np.inf,
) -> VariogramModel:
    """Shaped fit on lags ``x`` (cutoff units) and semivariances ``g`` (scaled to max 1)."""
    shape_lo, shape_hi = SHAPE_BOUNDS[kind]
    shapes = _SHAPE_GRID[kind]
    ranges = np.geomspace(_MIN_RANGE_FACTOR, MAX_RANGE_FACTOR, 49)
    w = sw * sw
    grid = np.stack([_shaped_structure(kind, x[None, :] / ranges[:, None], a) for a in shapes])
    nug_g, ps_g, sse_g = _linear_sill_fit(grid, g, w, nug_lo, nug_hi)
    best_r = np.argmin(sse_g, axis=1)
    order = np.argsort(sse_g[np.arange(len(shapes)), best_r], kind="stable")
    lo = np.array([nug_lo, 0.0, _MIN_RANGE_FACTOR, shape_lo])
    hi = np.array([nug_hi, np.inf, MAX_RANGE_FACTOR, shape_hi])

    def residuals(theta: np.ndarray) -> np.ndarray:
        nug, ps, rng, shape = theta
        return sw * (nug + ps * _shaped_structure(kind, x / rng, shape) - g)

    starts = []
    for i in order[:_SHAPED_STARTS]:
        j = best_r[i]
        x0 = np.array([nug_g[i, j], max(ps_g[i, j], 1e-3), ranges[j], shapes[i]])
        x0 = np.clip(x0, lo + 1e-9 * np.maximum(1.0, np.abs(lo)),
                     np.where(np.isfinite(hi), hi * (1.0 - 1e-9), np.inf))
        if hi[0] - lo[0] < 1e-6 * max(1.0, lo[0]):
            x0[0] = 0.5 * (lo[0] + hi[0])          # a held nugget
        starts.append(x0)
    best = best_least_squares(residuals, starts, lo, hi)
    if best is None:
        raise ModelFitError(f"{kind} variogram fit did not converge from any starting value")
    nug, ps, rng = (0.0 if v < 1e-12 else float(v) for v in best[:3])
    shape = float(np.clip(best[3], shape_lo, shape_hi))
    rng *= cutoff
    if kind == "matern":
        # The fit used the spline of the practical factor; keep the fitted curve exactly.
        rng *= matern_practical_factor(shape) / float(
            _matern_factor_spline(shape_lo, shape_hi)(np.log(shape)))
    return VariogramModel(kind, min(max(nug, nug_lo), nug_hi) * scale, ps * scale, rng, shape)


def fit_variograms(
    emp: EmpiricalVariogram, kinds: tuple[str, ...] = DEFAULT_MODELS, *, min_nugget: float = 0.0
) -> tuple[list[VariogramModel], dict[str, float]]:
    """Fit every family in ``kinds``; models ranked by weighted SSE, best first.

    ``min_nugget`` is passed to :func:`fit_variogram`.

    Returns
    -------
    models : list of VariogramModel
        The families that could be fitted, lowest weighted SSE first.  Ties, including
        SSEs within ``1e-10`` of the data's weighted sum of squares of the lowest one,
        keep the order of ``kinds``.
    candidates : dict
        Weighted SSE (weights ``N_h / h^2``) of each fitted family.

    Raises
    ------
    ModelFitError
        No family could be fitted; the message gives each family's reason.
    """
    if not kinds:
        raise ModelFitError("no variogram model families to try")
    models: list[VariogramModel] = []
    candidates: dict[str, float] = {}
    reasons: list[str] = []
    for kind in kinds:
        try:
            model = fit_variogram(emp, kind, min_nugget=min_nugget)
        except ModelFitError as exc:
            reasons.append(f"{kind}: {exc}")
            continue
        models.append(model)
        candidates[kind] = weighted_sse(emp, model)
    if not models:
        raise ModelFitError("no variogram model could be fitted (" + "; ".join(reasons) + ")")
    # Nested families (stable at alpha 1 or 2, Matern at nu 1/2 are exponential, gaussian)
    # can reach the same SSE up to round-off: such ties keep the order of ``kinds``.
    use, w = _fit_weights(emp)
    tie = _TIE * float(np.sum(w * emp.gamma[use] ** 2))
    lowest = min(candidates.values())
    models.sort(key=lambda m: max(candidates[m.kind], lowest + tie))
    return models, candidates


def fit_best_variogram(
    emp: EmpiricalVariogram, kinds: tuple[str, ...] = DEFAULT_MODELS, *, min_nugget: float = 0.0
) -> tuple[VariogramModel, dict[str, float]]:
    """Fit every family in ``kinds`` and keep the one with the lowest weighted SSE.

    ``min_nugget`` is passed to :func:`fit_variogram`.

    Returns
    -------
    model : VariogramModel
        The best fit (first in ``kinds`` on a tie).
    candidates : dict
        Weighted SSE (weights ``N_h / h^2``) of each family that could be fitted.

    Raises
    ------
    ModelFitError
        No family could be fitted; the message gives each family's reason.
    """
    models, candidates = fit_variograms(emp, kinds, min_nugget=min_nugget)
    return models[0], candidates
