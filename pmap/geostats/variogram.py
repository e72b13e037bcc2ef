"""Empirical semivariograms and the three bounded variogram models pmap fits to them.

Range convention
----------------
Every model's ``range`` is the *practical* (effective) range in metres: the distance at
which the model reaches the full sill (spherical) or 95 % of the partial sill
(exponential, gaussian).  gstat's ``vgm()`` range for the exponential and gaussian models
is the scale parameter instead, one third and ``1/sqrt(3)`` of pmap's value.  pykrige's
exponential model uses the practical range like pmap; its gaussian model uses a 4/7
factor and so differs.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial.distance import cdist

from pmap.errors import ModelFitError

__all__ = [
    "MODELS",
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
MODELS: tuple[str, ...] = ("spherical", "exponential", "gaussian")
#: Kind of the zero variogram of a property whose samples are all equal; never fitted.
CONSTANT = "constant"

# Rows of the pair-distance matrix computed at once: bounds memory at ~_BLOCK * n floats.
_BLOCK = 2048
#: Upper bound of a fitted practical range, in multiples of the cutoff.
MAX_RANGE_FACTOR = 3.0
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
    """A bounded isotropic variogram model: nugget plus one structure.

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
        Practical range, m, > 0 (see the module docstring).
    """

    kind: str
    nugget: float
    psill: float
    range: float

    def __post_init__(self) -> None:
        if self.kind not in MODELS and self.kind != CONSTANT:
            raise ValueError(f"unknown variogram model {self.kind!r}; choose one of {MODELS}")
        if self.kind == CONSTANT and (self.nugget != 0 or self.psill != 0):
            raise ValueError(f"a {CONSTANT!r} variogram has nugget and psill 0, got "
                             f"{self.nugget}, {self.psill}")
        for name in ("nugget", "psill", "range"):
            if not np.isfinite(getattr(self, name)):
                raise ValueError(f"variogram {name} must be finite, got {getattr(self, name)}")
        if self.nugget < 0 or self.psill < 0:
            raise ValueError(f"nugget and psill must be >= 0, got {self.nugget}, {self.psill}")
        if self.range <= 0:
            raise ValueError(f"variogram range must be > 0 m, got {self.range}")

    @property
    def sill(self) -> float:
        """Total sill, nugget + partial sill, squared value units."""
        return float(self.nugget + self.psill)

    def __call__(self, h: np.ndarray | float) -> np.ndarray:
        """Semivariance at separation ``h`` (m); exactly 0 at ``h == 0``."""
        h = np.asarray(h, dtype=float)
        return _semivariance_into(self, np.atleast_1d(h), np.empty(h.shape or (1,))).reshape(h.shape)

    def covariance(self, h: np.ndarray | float) -> np.ndarray:
        """Covariance ``sill - gamma(h)``, squared value units; equals the sill at ``h == 0``."""
        return self.sill - self(h)

    def as_dict(self) -> dict[str, Any]:
        """Parameters as plain values (JSON-able); ``range_m`` is the practical range."""
        return {
            "kind": self.kind,
            "nugget": float(self.nugget),
            "psill": float(self.psill),
            "sill": self.sill,
            "range_m": float(self.range),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> VariogramModel:
        """Inverse of :meth:`as_dict`."""
        return cls(str(data["kind"]), float(data["nugget"]), float(data["psill"]), float(data["range_m"]))


def _semivariance_into(model: VariogramModel, h: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Write ``model(h)`` into ``out`` (same shape as ``h``, may not alias it) and return it."""
    np.divide(h, model.range, out=out)
    _structure(model.kind, out)
    out *= model.psill
    out += model.nugget
    if h.size and not h.min() > 0:
        out[h <= 0] = 0.0
    return out


def _structure(kind: str, r: np.ndarray) -> np.ndarray:
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


def empirical_variogram(
    coords: np.ndarray,
    values: np.ndarray,
    cutoff: float | None = None,
    n_bins: int = 15,
) -> EmpiricalVariogram:
    """Matheron's semivariance estimator in equal-width distance bins.

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

    Returns
    -------
    EmpiricalVariogram
        ``gamma = sum (z_i - z_j)^2 / (2 N_h)`` per bin.  Bin ``k`` holds the pairs with
        distance in ``(k w, (k+1) w]``, ``w = cutoff / n_bins``; coincident pairs
        (distance 0) count in the first bin.  Bins without pairs are dropped.
    """
    coords, values = _check_points(coords, values)
    n = coords.shape[0]
    if n < 2:
        raise ModelFitError(f"an empirical variogram needs at least 2 samples, got {n}")
    if n_bins < 1:
        raise ValueError(f"n_bins must be >= 1, got {n_bins}")
    if cutoff is None:
        cutoff = default_cutoff(coords)
    if not (np.isfinite(cutoff) and cutoff > 0):
        raise ModelFitError(f"variogram cutoff must be a positive distance, got {cutoff} m")
    upper = cutoff * np.arange(1, n_bins + 1) / n_bins
    upper[-1] = cutoff
    counts = np.zeros(n_bins + 1)
    dist_sum = np.zeros(n_bins + 1)
    sq_sum = np.zeros(n_bins + 1)
    for i0 in range(0, n - 1, _BLOCK):
        i1 = min(i0 + _BLOCK, n - 1)
        d = cdist(coords[i0:i1], coords)
        rows, cols = np.nonzero(np.arange(n)[None, :] > np.arange(i0, i1)[:, None])
        dd = d[rows, cols]
        sq = (values[i0 + rows] - values[cols]) ** 2
        idx = np.searchsorted(upper, dd, side="left")
        counts += np.bincount(idx, minlength=n_bins + 1)
        dist_sum += np.bincount(idx, weights=dd, minlength=n_bins + 1)
        sq_sum += np.bincount(idx, weights=sq, minlength=n_bins + 1)
    counts, dist_sum, sq_sum = counts[:n_bins], dist_sum[:n_bins], sq_sum[:n_bins]
    keep = counts > 0
    return EmpiricalVariogram(
        lag=dist_sum[keep] / counts[keep],
        gamma=sq_sum[keep] / (2.0 * counts[keep]),
        count=counts[keep].astype(int),
        cutoff=float(cutoff),
    )


def _fit_weights(emp: EmpiricalVariogram) -> tuple[np.ndarray, np.ndarray]:
    """Bins usable for fitting (lag > 0) and their weights N_h / h^2 (gstat fit.method 7)."""
    use = emp.lag > 0
    return use, emp.count[use] / emp.lag[use] ** 2


def weighted_sse(emp: EmpiricalVariogram, model: VariogramModel) -> float:
    """Weighted sum of squared residuals, weights ``N_h / h^2``, over bins with lag > 0."""
    use, w = _fit_weights(emp)
    return float(np.sum(w * (model(emp.lag[use]) - emp.gamma[use]) ** 2))


def fit_variogram(
    emp: EmpiricalVariogram, kind: str, *, min_nugget: float = 0.0
) -> VariogramModel:
    """Fit one model family by weighted least squares (weights ``N_h / h^2``).

    Bounds, in the units of the variable ``emp`` was computed from (squared log units
    when it holds logarithms): nugget >= ``min_nugget`` (e.g. the lab's measurement-error
    variance, which no nugget can be below; the caller converts it to those units),
    partial sill >= 0, practical range in ``[0.001, 3] x cutoff`` (m).  A small grid of starting values (range at 0.1-2 cutoffs,
    nugget at 0 and at half the first bin's semivariance) is tried and the lowest
    weighted SSE kept.

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
        raise ModelFitError("cannot fit a variogram: semivariance is zero at every lag (constant values)")
    cutoff = float(emp.cutoff)
    sw = np.sqrt(w / np.sum(w))
    if not min_nugget >= 0:
        raise ValueError(f"min_nugget must be >= 0, got {min_nugget}")
    nug_lo = float(min_nugget) / scale
    lo = np.array([nug_lo, 0.0, _MIN_RANGE_FACTOR])
    hi = np.array([np.inf, np.inf, MAX_RANGE_FACTOR])

    def residuals(theta: np.ndarray) -> np.ndarray:
        nug, ps, rng = theta
        return sw * (nug + ps * _structure(kind, h / (rng * cutoff)) - g / scale)

    best: np.ndarray | None = None
    best_cost = np.inf
    g_far = float(np.mean(g[-max(1, g.size // 3):])) / scale
    for rng0 in (0.1, 0.25, 0.5, 1.0, 2.0):
        for nug0 in (0.0, 0.5 * g[0] / scale):
            nug0 = max(nug0, nug_lo * (1.0 + 1e-6))
            x0 = np.array([nug0, max(g_far - nug0, 0.05), rng0])
            try:
                sol = least_squares(residuals, x0, bounds=(lo, hi), method="trf",
                                    xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=2000)
            except (ValueError, np.linalg.LinAlgError):
                continue
            if np.all(np.isfinite(sol.x)) and sol.cost < best_cost:
                best, best_cost = sol.x, sol.cost
    if best is None:
        raise ModelFitError(f"{kind} variogram fit did not converge from any starting value")
    nug, ps, rng = (0.0 if v < 1e-12 else v for v in best)
    nug = max(nug, nug_lo)
    return VariogramModel(kind, float(nug * scale), float(ps * scale), float(rng * cutoff))


def fit_variograms(
    emp: EmpiricalVariogram, kinds: tuple[str, ...] = MODELS, *, min_nugget: float = 0.0
) -> tuple[list[VariogramModel], dict[str, float]]:
    """Fit every family in ``kinds``; models ranked by weighted SSE, best first.

    ``min_nugget`` is passed to :func:`fit_variogram`.

    Returns
    -------
    models : list of VariogramModel
        The families that could be fitted, lowest weighted SSE first (ties keep the
        order of ``kinds``).
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
    models.sort(key=lambda m: candidates[m.kind])
    return models, candidates


def fit_best_variogram(
    emp: EmpiricalVariogram, kinds: tuple[str, ...] = MODELS, *, min_nugget: float = 0.0
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
