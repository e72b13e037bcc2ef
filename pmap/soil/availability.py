"""pmap's pH partition of total soil P into organic, available, Fe/Al-bound, Ca-bound and
occluded pools.

The model (equations in docs/soil-model.md):

* an **organic** pool from organic matter: ``OM * 10^4 * f_C / (C:P)`` mg/kg, at most
  ``max_organic_fraction`` of total P; the rest is inorganic P;
* an **occluded** fraction ``o`` of inorganic P set by the weathering class (field-wide or
  per cell) and scaled with clay the way ``1 - PSP`` of the EPIC highly weathered equation
  scales with clay;
* a bell-shaped **availability curve** ``B(pH) = a(pH) k(pH) / peak`` in [0, 1], the product
  of a rising acid (Fe/Al) logistic ``a`` and a falling alkaline (Ca) logistic ``k``;
  CaCO3 deepens the alkaline arm (``k ** (1 + s * CaCO3)``);
* the **available** (labile) share ``(1 - o) * min(1, f_max * B(pH))`` of the inorganic P
  that was in the soil before recent additions, plus the share of recently added P that is
  still labile (the EPIC PSP of fresh P, supplied by :mod:`pmap.soil.model`), so fertilizer
  history shows;
* the rest of the non-occluded inorganic P split between **Fe/Al** and **Ca** in proportion
  to ``1 - a + b_FeAl`` and ``(1 - k) * g_Ca``, where ``g_Ca`` is the calcium supply from
  CaCO3 and exchangeable Ca, so a soil without carbonate or Ca holds little Ca phosphate.

Acidity enters availability once, through ``B(pH)``; base saturation steers only the EPIC
sorption of fresh P (:mod:`pmap.soil.fixation`).  The five pools add up to total P for
every cell.  All functions are vectorised; NaN in pH or total P gives NaN pools, NaN in an
optional input falls back to its default.
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
from pmap.soil.sorption import psp_highly_weathered

__all__ = [
    "WEATHERING_CLASSES",
    "PartitionParams",
    "SoilPools",
    "availability_curve",
    "peak_ph",
    "arm_strengths",
    "occluded_fraction",
    "organic_p",
    "calcium_supply",
    "weathering_codes",
    "partition_total_p",
    "fit_partition",
]

log = logging.getLogger(__name__)

#: Weathering classes known to the model; per-cell codes are 1, 2, 3 in this order.
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
            "doc": "occluded share of inorganic P (total P less organic P) in slightly weathered soils",
            "source": _UNVERIFIED,
        },
    )
    occluded_fraction_moderate: float = field(
        default=0.15,
        metadata={
            "unit": "fraction",
            "doc": "occluded share of inorganic P (total P less organic P) in moderately weathered soils",
            "source": _UNVERIFIED,
        },
    )
    occluded_fraction_high: float = field(
        default=0.50,
        metadata={
            "unit": "fraction",
            "doc": "occluded share of inorganic P (total P less organic P) in highly weathered soils",
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
            "doc": "base saturation assumed where none is given (EPIC sorption of fresh P)",
            "source": _UNVERIFIED,
        },
    )
    organic_c_to_p_ratio: float = field(
        default=100.0,
        metadata={
            "unit": "g C per g P",
            "doc": "C:P mass ratio of soil organic matter (organic P = organic C / ratio)",
            "source": _UNVERIFIED,
        },
    )
    organic_matter_carbon_fraction: float = field(
        default=0.58,
        metadata={
            "unit": "fraction",
            "doc": "organic carbon share of organic matter (van Bemmelen factor)",
            "source": "common practice, no source",
        },
    )
    default_om_pct: float = field(
        default=3.0,
        metadata={
            "unit": "%",
            "doc": "organic matter assumed where none is given",
            "source": "common practice, no source",
        },
    )
    max_organic_fraction: float = field(
        default=0.7,
        metadata={
            "unit": "fraction",
            "doc": "upper limit of the organic share of total P",
            "source": "common practice, no source",
        },
    )
    fe_al_background: float = field(
        default=0.10,
        metadata={
            "unit": "fraction",
            "doc": "Fe/Al weight added to the acid arm's strength when splitting fixed P: oxide "
            "surfaces hold P at every pH",
            "source": _UNVERIFIED,
        },
    )
    caco3_half_supply_pct: float = field(
        default=1.0,
        metadata={
            "unit": "%",
            "doc": "CaCO3 at which the calcium supply for Ca phosphates is half of its maximum",
            "source": _UNVERIFIED,
        },
    )
    ca_half_supply_mg_kg: float = field(
        default=1000.0,
        metadata={
            "unit": "mg/kg",
            "doc": "exchangeable (Mehlich-3) Ca at which the calcium supply is half its maximum",
            "source": _UNVERIFIED,
        },
    )
    min_calcium_supply: float = field(
        default=0.2,
        metadata={
            "unit": "fraction",
            "doc": "calcium supply of a soil whose CaCO3 (and Ca) were measured and are nil",
            "source": _UNVERIFIED,
        },
    )
    recent_p2o5_kg_ha: float = field(
        default=0.0,
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "P2O5 applied since the last crop before sampling, field-wide (its labile "
            "share is the EPIC PSP of fresh P)",
            "source": "common practice, no source",
        },
    )
    recent_p2o5_raster: str | None = field(
        default=None,
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "raster of P2O5 applied since the last crop (an as-applied map), replaces "
            "recent_p2o5_kg_ha where it has data",
            "source": "common practice, no source",
        },
    )
    weathering_raster: str | None = field(
        default=None,
        metadata={
            "unit": "class code",
            "doc": "raster of weathering classes (1 slight, 2 moderate, 3 high) from a soil map; "
            "cells without data use weathering",
            "source": "common practice, no source",
        },
    )
    bulk_density_g_cm3: float = field(
        default=1.3,
        metadata={
            "unit": "g/cm3",
            "doc": "dry bulk density of the sampled layer (turns kg/ha of added P into mg/kg)",
            "source": "common practice, no source",
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
        for key in ("caco3_strength_per_pct", "default_caco3_pct", "default_om_pct",
                    "fe_al_background", "recent_p2o5_kg_ha"):
            check_number(f"soil.{key}", getattr(self, key), ge=0, finite=True)
        for key in ("organic_c_to_p_ratio", "caco3_half_supply_pct", "ca_half_supply_mg_kg",
                    "bulk_density_g_cm3"):
            check_number(f"soil.{key}", getattr(self, key), gt=0, finite=True)
        for key in ("organic_matter_carbon_fraction", "max_organic_fraction",
                    "min_calcium_supply"):
            check_number(f"soil.{key}", getattr(self, key), ge=0, le=1)
        check_number("soil.default_clay_pct", self.default_clay_pct, gt=0)
        check_number("soil.default_base_saturation_pct", self.default_base_saturation_pct,
                     gt=0, le=100)

    @property
    def base_occluded_fraction(self) -> float:
        """Occluded share of inorganic P for :attr:`weathering` before the clay scaling."""
        return float(getattr(self, f"occluded_fraction_{self.weathering}"))

    @property
    def weathering_code(self) -> int:
        """Code of :attr:`weathering` (1 slight, 2 moderate, 3 high)."""
        return WEATHERING_CLASSES.index(self.weathering) + 1


@dataclass(frozen=True)
class SoilPools:
    """Total P split into five pools (mg/kg arrays of one shape).

    ``available + fe_al + ca + occluded + organic`` equals total P to float round-off.
    ``labile_fraction`` is ``available / total`` as the model computed it (fraction).
    """

    available: np.ndarray
    fe_al: np.ndarray
    ca: np.ndarray
    occluded: np.ndarray
    organic: np.ndarray
    labile_fraction: np.ndarray

    #: Names of the pools, in the order of the attributes.
    NAMES = ("available", "fe_al", "ca", "occluded", "organic")

    @property
    def total(self) -> np.ndarray:
        """Sum of the five pools (mg/kg)."""
        return self.available + self.fe_al + self.ca + self.occluded + self.organic

    def as_fractions(self) -> dict[str, np.ndarray]:
        """Each pool as a fraction of total P (NaN where total P is 0 or NaN)."""
        total = self.total
        out = {}
        for name in self.NAMES:
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


def weathering_codes(
    codes: ArrayLike | None, params: PartitionParams, shape: tuple[int, ...]
) -> np.ndarray:
    """Per-cell weathering codes (1 slight, 2 moderate, 3 high) as int8 of ``shape``.

    ``codes`` may be None (every cell takes ``params.weathering``) or an array whose NaN,
    0 or out-of-range cells take it too.
    """
    fallback = params.weathering_code
    if codes is None:
        return np.full(shape, fallback, dtype=np.int8)
    arr = np.broadcast_to(np.asarray(codes, dtype=float), shape)
    valid = np.isin(arr, (1.0, 2.0, 3.0))
    return np.where(valid, np.nan_to_num(arr), fallback).astype(np.int8)


def occluded_fraction(
    params: PartitionParams = PartitionParams(),
    *,
    clay_pct: ArrayLike | None = None,
    weathering_code: ArrayLike | None = None,
    shape: tuple[int, ...] = (),
) -> np.ndarray:
    """Occluded share of inorganic P (fraction) for the weathering class, scaled by clay.

    ``o = o_class * (1 - PSP_hw(clay)) / (1 - PSP_hw(clay_ref))``, clipped to
    ``[0, max_occluded_fraction]``, where PSP_hw is the EPIC highly weathered equation and
    ``clay_ref = params.default_clay_pct``.  ``weathering_code`` (per cell, see
    :func:`weathering_codes`) overrides ``params.weathering`` where it has a class.
    """
    for extra in (clay_pct, weathering_code):
        if extra is not None:
            shape = np.broadcast_shapes(np.shape(extra), shape)
    clay = _optional(clay_pct, params.default_clay_pct, shape)
    clay = np.where(clay > 0, clay, params.default_clay_pct)
    scale = (1.0 - psp_highly_weathered(clay)) / (
        1.0 - psp_highly_weathered(params.default_clay_pct)
    )
    by_class = np.array([0.0, params.occluded_fraction_slight,
                         params.occluded_fraction_moderate, params.occluded_fraction_high])
    base = by_class[weathering_codes(weathering_code, params, shape)]
    return np.clip(base * scale, 0.0, params.max_occluded_fraction)


def organic_p(
    total_p: ArrayLike, params: PartitionParams = PartitionParams(), *,
    om_pct: ArrayLike | None = None,
) -> np.ndarray:
    """Organic P (mg/kg): ``OM * 10^4 * f_C / (C:P)``, at most ``max_organic_fraction * total``.

    Parameters
    ----------
    total_p : array_like
        Total P (mg/kg).
    params : PartitionParams
        ``organic_matter_carbon_fraction``, ``organic_c_to_p_ratio``, ``default_om_pct``
        (used where ``om_pct`` is absent or NaN) and ``max_organic_fraction``.
    om_pct : array_like, optional
        Soil organic matter (% by mass).
    """
    total = np.asarray(total_p, dtype=float)
    om = np.maximum(_optional(om_pct, params.default_om_pct, total.shape), 0.0)
    from_om = om * 1e4 * params.organic_matter_carbon_fraction / params.organic_c_to_p_ratio
    return np.minimum(from_om, params.max_organic_fraction * total)


def calcium_supply(
    params: PartitionParams = PartitionParams(), *,
    caco3_pct: ArrayLike | None = None,
    ca_mg_kg: ArrayLike | None = None,
    shape: tuple[int, ...] = (),
) -> np.ndarray:
    """Calcium supply for Ca phosphates, ``g_Ca`` in [min_calcium_supply, 1] (fraction).

    ``max(C / (C + C_half), Ca / (Ca + Ca_half))`` from CaCO3 (%) and exchangeable Ca
    (mg/kg), floored at ``min_calcium_supply``.  A cell with neither measured takes 1: the
    Ca arm then follows pH alone, as it did before calcium was considered.
    """
    for extra in (caco3_pct, ca_mg_kg):
        if extra is not None:
            shape = np.broadcast_shapes(np.shape(extra), shape)
    supply = np.full(shape, np.nan)
    measured = np.zeros(shape, dtype=bool)
    for x, half in ((caco3_pct, params.caco3_half_supply_pct),
                    (ca_mg_kg, params.ca_half_supply_mg_kg)):
        if x is None:
            continue
        arr = np.broadcast_to(np.asarray(x, dtype=float), shape)
        known = np.isfinite(arr)
        part = np.where(known, np.maximum(arr, 0.0) / (np.maximum(arr, 0.0) + half), 0.0)
        supply = np.where(known, np.fmax(supply, part), supply)
        measured |= known
    supply = np.maximum(np.nan_to_num(supply, nan=0.0), params.min_calcium_supply)
    return np.where(measured, supply, 1.0)


def partition_total_p(
    ph: ArrayLike,
    total_p: ArrayLike,
    params: PartitionParams = PartitionParams(),
    *,
    caco3_pct: ArrayLike | None = None,
    clay_pct: ArrayLike | None = None,
    om_pct: ArrayLike | None = None,
    ca_mg_kg: ArrayLike | None = None,
    weathering_code: ArrayLike | None = None,
    recent_p_mg_kg: ArrayLike | None = None,
    fresh_labile_fraction: ArrayLike | None = None,
) -> SoilPools:
    """Split total P into available, Fe/Al-bound, Ca-bound, occluded and organic pools.

    Parameters
    ----------
    ph : array_like
        Soil pH in water (pH units).
    total_p : array_like
        Total soil P (mg/kg), same shape as ``ph`` (or broadcastable).
    params : PartitionParams
        Model parameters.
    caco3_pct, clay_pct, om_pct : array_like, optional
        CaCO3 (%), clay (%) and organic matter (%).  Absent inputs and NaN cells use the
        defaults in ``params``.
    ca_mg_kg : array_like, optional
        Exchangeable (Mehlich-3) Ca (mg/kg), for the calcium supply of Ca phosphates.
    weathering_code : array_like, optional
        Per-cell weathering class (1 slight, 2 moderate, 3 high); elsewhere ``params``.
    recent_p_mg_kg : array_like, optional
        P added since the last crop (mg/kg of the sampled layer; part of ``total_p``).
    fresh_labile_fraction : array_like, optional
        Share of the recently added P still labile (the EPIC PSP of fresh P); without it
        the added P is treated like the rest of the inorganic P.

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

    organic = organic_p(total, params, om_pct=om_pct)
    inorganic = total - organic
    curve = availability_curve(ph, params, caco3_pct=caco3)
    occluded_share = occluded_fraction(params, clay_pct=clay_pct,
                                       weathering_code=weathering_code, shape=shape)
    labile_share = (1.0 - occluded_share) * np.minimum(params.max_labile_fraction * curve, 1.0)
    occluded = occluded_share * inorganic
    available = labile_share * inorganic
    if recent_p_mg_kg is not None:
        added = np.clip(_optional(recent_p_mg_kg, 0.0, shape), 0.0, None)
        added = np.minimum(added, inorganic - occluded)
        fresh = (labile_share if fresh_labile_fraction is None
                 else np.clip(_optional(fresh_labile_fraction, 0.0, shape), 0.0, 1.0))
        available = labile_share * (inorganic - added) + fresh * added
        available = np.minimum(available, inorganic - occluded)
    fixed = inorganic - available - occluded
    acid_strength, alkaline_strength = arm_strengths(ph, params, caco3_pct=caco3)
    fe_weight = acid_strength + params.fe_al_background
    ca_weight = alkaline_strength * calcium_supply(
        params, caco3_pct=caco3_pct, ca_mg_kg=ca_mg_kg, shape=shape)
    weight = fe_weight + ca_weight
    fe_al_share = np.ones(shape)
    np.divide(fe_weight, weight, out=fe_al_share, where=weight > 0)
    fe_al = fixed * fe_al_share
    ca = fixed - fe_al
    labile_fraction = np.zeros(shape)
    np.divide(available, total, out=labile_fraction, where=total > 0)

    bad = np.isnan(ph) | np.isnan(total)
    pools = [np.where(bad, np.nan, p)
             for p in (available, fe_al, ca, occluded, organic, labile_fraction)]
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
    om_pct: ArrayLike | None = None,
    ca_mg_kg: ArrayLike | None = None,
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
    caco3_pct, clay_pct, om_pct, ca_mg_kg : array_like, optional
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
        "om_pct": om_pct,
        "ca_mg_kg": ca_mg_kg,
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
