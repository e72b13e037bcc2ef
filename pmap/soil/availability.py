"""pmap's pH partition of total soil P into available, Fe/Al-bound, Ca-bound and occluded pools.

The model (equations in docs/soil-model.md):

* an **occluded** fraction ``o`` set by the weathering class and scaled with clay the way
  ``1 - PSP`` of the EPIC highly weathered equation scales with clay;
* a bell-shaped **availability curve** ``B(pH) = a(pH) k(pH) / peak`` in [0, 1], the product
  of a rising acid (Fe/Al) logistic ``a`` and a falling alkaline (Ca) logistic ``k``;
  CaCO3 deepens the alkaline arm (``k ** (1 + s * CaCO3)``);
* the **available** fraction of total P ``(1 - o) * min(1, f_max * r_BS * B(pH))`` where
  ``r_BS`` is the ratio of EPIC moderately weathered PSP at the soil's base saturation to
  that at the default base saturation;
* the rest of the non-occluded P split between **Fe/Al** and **Ca** in proportion to the
  fixing strengths of the two arms, ``1 - a`` and ``1 - k``.

The four pools add up to total P for every cell.  All functions are vectorised; NaN in
pH or total P gives NaN pools, NaN in an optional input falls back to its default.
"""

from __future__ import annotations

import dataclasses
import logging
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import least_squares, minimize_scalar

from pmap._checks import check_choice, check_number
from pmap.errors import ConfigError, InputError, InsufficientDataError, ModelFitError
from pmap.soil.sorption import psp_highly_weathered, psp_moderately_weathered

__all__ = [
    "WEATHERING_CLASSES",
    "PartitionParams",
    "SoilPools",
    "availability_curve",
    "peak_ph",
    "arm_strengths",
    "occluded_fraction",
    "partition_total_p",
    "fit_partition",
]

log = logging.getLogger(__name__)

#: Weathering classes known to the model (field-wide setting).
WEATHERING_CLASSES: tuple[str, ...] = ("slight", "moderate", "high")

_UNVERIFIED = "from memory, unverified"


@dataclass(frozen=True)
class PartitionParams:
    """Parameters of the pH partition of total P (config section ``[soil]``)."""

    acid_midpoint_ph: float = field(
        default=5.0,
        metadata={
            "unit": "pH units",
            "doc": "pH at which the acid (Fe/Al) arm holds availability at half its plateau",
            "source": _UNVERIFIED,
        },
    )
    acid_width_ph: float = field(
        default=0.6,
        metadata={
            "unit": "pH units",
            "doc": "logistic scale of the acid arm (larger = gentler)",
            "source": _UNVERIFIED,
        },
    )
    alkaline_midpoint_ph: float = field(
        default=8.0,
        metadata={
            "unit": "pH units",
            "doc": "pH at which the alkaline (Ca) arm holds availability at half its plateau",
            "source": _UNVERIFIED,
        },
    )
    alkaline_width_ph: float = field(
        default=0.6,
        metadata={
            "unit": "pH units",
            "doc": "logistic scale of the alkaline arm (larger = gentler)",
            "source": _UNVERIFIED,
        },
    )
    max_labile_fraction: float = field(
        default=0.08,
        metadata={
            "unit": "fraction",
            "doc": "available share of non-occluded P at the best pH; calibrate with fit_partition",
            "source": _UNVERIFIED,
        },
    )
    weathering: str = field(
        default="moderate",
        metadata={
            "unit": "",
            "doc": "weathering class of the field's soil: slight, moderate or high",
            "source": "Jones et al. (1984), SSSAJ 48:800-805 (class scheme)",
        },
    )
    occluded_fraction_slight: float = field(
        default=0.05,
        metadata={
            "unit": "fraction",
            "doc": "occluded share of total P in slightly weathered soils",
            "source": _UNVERIFIED,
        },
    )
    occluded_fraction_moderate: float = field(
        default=0.15,
        metadata={
            "unit": "fraction",
            "doc": "occluded share of total P in moderately weathered soils",
            "source": _UNVERIFIED,
        },
    )
    occluded_fraction_high: float = field(
        default=0.50,
        metadata={
            "unit": "fraction",
            "doc": "occluded share of total P in highly weathered soils",
            "source": _UNVERIFIED,
        },
    )
    max_occluded_fraction: float = field(
        default=0.9,
        metadata={
            "unit": "fraction",
            "doc": "upper limit of the occluded share after the clay scaling",
            "source": "common practice, no source",
        },
    )
    caco3_strength_per_pct: float = field(
        default=0.05,
        metadata={
            "unit": "1/%",
            "doc": "deepening of the alkaline arm per % CaCO3 (exponent 1 + s * CaCO3)",
            "source": _UNVERIFIED,
        },
    )
    default_caco3_pct: float = field(
        default=0.0,
        metadata={
            "unit": "%",
            "doc": "CaCO3 assumed where none is given (0 = no extra carbonate effect)",
            "source": "common practice, no source",
        },
    )
    default_clay_pct: float = field(
        default=25.0,
        metadata={
            "unit": "%",
            "doc": "clay assumed where none is given; also the reference of the clay scaling",
            "source": _UNVERIFIED,
        },
    )
    default_base_saturation_pct: float = field(
        default=80.0,
        metadata={
            "unit": "%",
            "doc": "base saturation assumed where none is given; reference of the BS scaling",
            "source": _UNVERIFIED,
        },
    )

    def __post_init__(self) -> None:
        check_choice("soil.weathering", self.weathering, WEATHERING_CLASSES)
        for key in ("acid_midpoint_ph", "alkaline_midpoint_ph"):
            check_number(f"soil.{key}", getattr(self, key), ge=2, le=12)
        if self.acid_midpoint_ph >= self.alkaline_midpoint_ph:
            raise ConfigError(
                "soil.acid_midpoint_ph must be below soil.alkaline_midpoint_ph, got "
                f"{self.acid_midpoint_ph} and {self.alkaline_midpoint_ph}"
            )
        for key in ("acid_width_ph", "alkaline_width_ph"):
            check_number(f"soil.{key}", getattr(self, key), gt=0)
        for key in (
            "max_labile_fraction",
            "occluded_fraction_slight",
            "occluded_fraction_moderate",
            "occluded_fraction_high",
            "max_occluded_fraction",
        ):
            check_number(f"soil.{key}", getattr(self, key), ge=0, le=1)
        check_number("soil.max_labile_fraction", self.max_labile_fraction, gt=0)
        for key in ("caco3_strength_per_pct", "default_caco3_pct"):
            check_number(f"soil.{key}", getattr(self, key), ge=0)
        check_number("soil.default_clay_pct", self.default_clay_pct, gt=0)
        check_number("soil.default_base_saturation_pct", self.default_base_saturation_pct,
                     gt=0, le=100)

    @property
    def base_occluded_fraction(self) -> float:
        """Occluded share of total P for :attr:`weathering` before the clay scaling."""
        return float(getattr(self, f"occluded_fraction_{self.weathering}"))


@dataclass(frozen=True)
class SoilPools:
    """Total P split into four pools (mg/kg arrays of one shape).

    ``available + fe_al + ca + occluded`` equals total P to float round-off.
    ``labile_fraction`` is ``available / total`` as the model computed it (fraction).
    """

    available: np.ndarray
    fe_al: np.ndarray
    ca: np.ndarray
    occluded: np.ndarray
    labile_fraction: np.ndarray

    @property
    def total(self) -> np.ndarray:
        """Sum of the four pools (mg/kg)."""
        return self.available + self.fe_al + self.ca + self.occluded

    def as_fractions(self) -> dict[str, np.ndarray]:
        """Each pool as a fraction of total P (NaN where total P is 0 or NaN)."""
        total = self.total
        out = {}
        for name in ("available", "fe_al", "ca", "occluded"):
            pool = getattr(self, name)
            frac = np.full(total.shape, np.nan)
            np.divide(pool, total, out=frac, where=total > 0)
            out[name] = frac
        return out


def _logistic(z: np.ndarray) -> np.ndarray:
    # exp overflow at extreme arguments is harmless: 1 / (1 + inf) == 0
    with np.errstate(over="ignore"):
        return 1.0 / (1.0 + np.exp(-z))


def _optional(x: ArrayLike | None, default: float, shape: tuple[int, ...]) -> np.ndarray:
    """An optional input broadcast to ``shape``, NaN cells filled with ``default``."""
    if x is None:
        return np.full(shape, float(default))
    arr = np.broadcast_to(np.asarray(x, dtype=float), shape)
    return np.where(np.isnan(arr), float(default), arr)


def _arms(
    ph: np.ndarray, params: PartitionParams, caco3: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    acid = _logistic((ph - params.acid_midpoint_ph) / params.acid_width_ph)
    alkaline = _logistic(-(ph - params.alkaline_midpoint_ph) / params.alkaline_width_ph)
    if caco3 is not None:
        exponent = 1.0 + params.caco3_strength_per_pct * np.maximum(caco3, 0.0)
        alkaline = alkaline**exponent
    return acid, alkaline


def peak_ph(params: PartitionParams = PartitionParams()) -> float:
    """pH (pH units) at which the availability curve peaks, without CaCO3.

    ``log a + log k`` is concave in pH, so the maximum is unique; it is found by a
    bounded scalar search on [0, 14].  With equal arm widths it is the midpoints' mean.
    """

    def neg_log_curve(ph: float) -> float:
        acid, alkaline = _arms(np.asarray(ph, dtype=float), params, None)
        return float(-np.log(acid) - np.log(alkaline))

    result = minimize_scalar(
        neg_log_curve, bounds=(0.0, 14.0), method="bounded", options={"xatol": 1e-10}
    )
    return float(result.x)


def availability_curve(
    ph: ArrayLike,
    params: PartitionParams = PartitionParams(),
    *,
    caco3_pct: ArrayLike | None = None,
) -> np.ndarray:
    """Normalised availability curve ``B(pH)`` in [0, 1] (1 at :func:`peak_ph` without CaCO3).

    Parameters
    ----------
    ph : array_like
        Soil pH (pH units).
    params : PartitionParams
        Arm midpoints and widths.
    caco3_pct : array_like, optional
        CaCO3 (%); deepens the alkaline arm.  NaN cells use ``params.default_caco3_pct``.

    Returns
    -------
    numpy.ndarray
        Relative availability (fraction of the best-pH value).
    """
    ph = np.asarray(ph, dtype=float)
    caco3 = _optional(caco3_pct, params.default_caco3_pct, ph.shape)
    acid, alkaline = _arms(ph, params, caco3)
    top_acid, top_alkaline = _arms(np.asarray(peak_ph(params)), params, None)
    return np.minimum(acid * alkaline / (top_acid * top_alkaline), 1.0)


def arm_strengths(
    ph: ArrayLike,
    params: PartitionParams = PartitionParams(),
    *,
    caco3_pct: ArrayLike | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Fixing strengths of the acid (Fe/Al) and alkaline (Ca) arms, ``1 - a`` and ``1 - k``.

    Returns
    -------
    acid, alkaline : numpy.ndarray
        Strengths in [0, 1] (dimensionless).
    """
    ph = np.asarray(ph, dtype=float)
    caco3 = _optional(caco3_pct, params.default_caco3_pct, ph.shape)
    acid, alkaline = _arms(ph, params, caco3)
    return 1.0 - acid, 1.0 - alkaline


def occluded_fraction(
    params: PartitionParams = PartitionParams(),
    *,
    clay_pct: ArrayLike | None = None,
    shape: tuple[int, ...] = (),
) -> np.ndarray:
    """Occluded share of total P (fraction) for the weathering class, scaled by clay.

    ``o = o_class * (1 - PSP_hw(clay)) / (1 - PSP_hw(clay_ref))``, clipped to
    ``[0, max_occluded_fraction]``, where PSP_hw is the EPIC highly weathered equation and
    ``clay_ref = params.default_clay_pct``.
    """
    if clay_pct is not None:
        shape = np.broadcast_shapes(np.shape(clay_pct), shape)
    clay = _optional(clay_pct, params.default_clay_pct, shape)
    clay = np.where(clay > 0, clay, params.default_clay_pct)
    scale = (1.0 - psp_highly_weathered(clay)) / (
        1.0 - psp_highly_weathered(params.default_clay_pct)
    )
    return np.clip(params.base_occluded_fraction * scale, 0.0, params.max_occluded_fraction)


def _base_saturation_ratio(bs: np.ndarray, params: PartitionParams) -> np.ndarray:
    ph_top = peak_ph(params)
    return psp_moderately_weathered(bs, ph_top) / psp_moderately_weathered(
        params.default_base_saturation_pct, ph_top
    )


def partition_total_p(
    ph: ArrayLike,
    total_p: ArrayLike,
    params: PartitionParams = PartitionParams(),
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
) -> SoilPools:
    """Split total P into available, Fe/Al-bound, Ca-bound and occluded pools.

    Parameters
    ----------
    ph : array_like
        Soil pH (pH units).
    total_p : array_like
        Total soil P (mg/kg), same shape as ``ph`` (or broadcastable).
    params : PartitionParams
        Model parameters.
    caco3_pct, clay_pct, base_saturation_pct : array_like, optional
        CaCO3 (%), clay (%) and base saturation (%).  Absent inputs and NaN cells use
        the defaults in ``params``.

    Returns
    -------
    SoilPools
        Pools (mg/kg) and the available fraction of total P.

    Raises
    ------
    InputError
        If a finite total P is negative or a finite pH lies outside [0, 14].
    """
    ph, total = np.broadcast_arrays(np.asarray(ph, dtype=float), np.asarray(total_p, dtype=float))
    if np.any(total < 0):
        raise InputError("total P must be >= 0 mg/kg; found negative values")
    if np.any((ph < 0) | (ph > 14)):
        raise InputError("pH must lie in [0, 14]; found values outside")
    shape = ph.shape
    caco3 = _optional(caco3_pct, params.default_caco3_pct, shape)
    bs = _optional(base_saturation_pct, params.default_base_saturation_pct, shape)

    curve = availability_curve(ph, params, caco3_pct=caco3)
    occluded_share = occluded_fraction(params, clay_pct=clay_pct, shape=shape)
    labile_of_free = np.minimum(
        params.max_labile_fraction * _base_saturation_ratio(bs, params) * curve, 1.0
    )
    labile_fraction = (1.0 - occluded_share) * labile_of_free

    available = labile_fraction * total
    occluded = occluded_share * total
    fixed = total - available - occluded
    acid_strength, alkaline_strength = arm_strengths(ph, params, caco3_pct=caco3)
    strength = acid_strength + alkaline_strength
    fe_al_share = np.full(shape, 0.5)
    np.divide(acid_strength, strength, out=fe_al_share, where=strength > 0)
    fe_al = fixed * fe_al_share
    ca = fixed - fe_al

    bad = np.isnan(ph) | np.isnan(total)
    pools = [np.where(bad, np.nan, p) for p in (available, fe_al, ca, occluded, labile_fraction)]
    return SoilPools(*pools)


_FIT_BOUNDS: dict[str, tuple[float, float]] = {
    "max_labile_fraction": (1e-4, 1.0),
    "acid_midpoint_ph": (3.0, 6.9),
    "alkaline_midpoint_ph": (6.1, 10.5),
    "acid_width_ph": (0.05, 2.5),
    "alkaline_width_ph": (0.05, 2.5),
}


def fit_partition(
    ph: ArrayLike,
    total_p: ArrayLike,
    measured_available_p: ArrayLike,
    params: PartitionParams = PartitionParams(),
    *,
    fit: tuple[str, ...] = ("max_labile_fraction", "acid_midpoint_ph", "alkaline_midpoint_ph"),
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    base_saturation_pct: ArrayLike | None = None,
    loss: str = "linear",
) -> PartitionParams:
    """Calibrate the availability curve to paired lab data by least squares.

    Minimises the squared differences (mg/kg) between measured available P and the
    model's available pool over samples where all three values are finite.

    Parameters
    ----------
    ph, total_p, measured_available_p : array_like
        Paired sample values: pH (pH units), total P (mg/kg), available P (mg/kg).
    params : PartitionParams
        Starting values and the parameters held fixed.
    fit : tuple of str
        Names of the parameters to fit; any of ``max_labile_fraction``,
        ``acid_midpoint_ph``, ``alkaline_midpoint_ph``, ``acid_width_ph``,
        ``alkaline_width_ph``.
    caco3_pct, clay_pct, base_saturation_pct : array_like, optional
        Per-sample optional inputs as in :func:`partition_total_p`.
    loss : str
        ``scipy.optimize.least_squares`` loss (``"linear"``, ``"soft_l1"``, ``"huber"``...).

    Returns
    -------
    PartitionParams
        ``params`` with the fitted fields replaced.

    Raises
    ------
    InsufficientDataError
        If fewer than ``len(fit) + 2`` complete samples exist.
    ModelFitError
        If the optimiser fails.
    """
    unknown = [name for name in fit if name not in _FIT_BOUNDS]
    if unknown or not fit:
        raise ConfigError(f"fit must name parameters among {sorted(_FIT_BOUNDS)}, got {fit}")
    ph_a = np.ravel(np.asarray(ph, dtype=float))
    total_a = np.ravel(np.asarray(total_p, dtype=float))
    measured = np.ravel(np.asarray(measured_available_p, dtype=float))
    if not ph_a.shape == total_a.shape == measured.shape:
        raise InputError("ph, total_p and measured_available_p must have the same number of values")
    extras = {
        "caco3_pct": caco3_pct,
        "clay_pct": clay_pct,
        "base_saturation_pct": base_saturation_pct,
    }
    extras = {k: None if v is None else np.ravel(np.asarray(v, float)) for k, v in extras.items()}
    keep = np.isfinite(ph_a) & np.isfinite(total_a) & np.isfinite(measured)
    n = int(keep.sum())
    if n < len(fit) + 2:
        raise InsufficientDataError(
            f"calibration needs at least {len(fit) + 2} samples with pH, total P and available "
            f"P; got {n}"
        )
    ph_a, total_a, measured = ph_a[keep], total_a[keep], measured[keep]
    extras = {k: None if v is None else v[keep] for k, v in extras.items()}

    lower = np.array([_FIT_BOUNDS[name][0] for name in fit])
    upper = np.array([_FIT_BOUNDS[name][1] for name in fit])
    start = np.clip([getattr(params, name) for name in fit], lower + 1e-9, upper - 1e-9)

    def candidate(x: np.ndarray) -> PartitionParams | None:
        try:
            return dataclasses.replace(params, **dict(zip(fit, map(float, x), strict=True)))
        except ConfigError:
            return None

    def residuals(x: np.ndarray) -> np.ndarray:
        trial = candidate(x)
        if trial is None:  # midpoints crossed: a large, smooth penalty
            return np.full(n, 1e3 * (1.0 + np.nanmax(measured)))
        pools = partition_total_p(ph_a, total_a, trial, **extras)
        return pools.available - measured

    try:
        result = least_squares(residuals, start, bounds=(lower, upper), loss=loss, x_scale="jac")
    except (ValueError, RuntimeError) as exc:
        raise ModelFitError(f"calibration of the P partition failed: {exc}") from exc
    fitted = candidate(result.x)
    if not result.success or fitted is None:
        raise ModelFitError(f"calibration of the P partition did not converge: {result.message}")
    rmse = float(np.sqrt(np.mean(result.fun**2)))
    log.info(
        "fit_partition: n=%d, RMSE %.3g mg/kg, %s",
        n,
        rmse,
        dict(zip(fit, result.x.tolist(), strict=True)),
    )
    return fitted
