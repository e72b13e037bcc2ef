"""P2O5 rates from soil-test P: the build-up plus maintenance rule, rounding, caps, products.

The rule is published in US units (ppm soil-test P, lb P2O5/acre); pmap evaluates it there
and returns kg P2O5/ha.  All functions are vectorised; NaN soil-test P gives a NaN rate.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_choice, check_number, require
from pmap.errors import ConfigError
from pmap.soil.conversions import SOIL_TEST_METHODS, bray1_from_mehlich3_icp, lb_acre_to_kg_ha

__all__ = [
    "CROP_REMOVAL_LB_P2O5_PER_BU",
    "CRITICAL_PPM_MEHLICH3",
    "CRITICAL_PPM_BRAY1",
    "MAINTENANCE_LIMIT_PPM_MEHLICH3",
    "resolve_rule",
    "PRODUCT_P2O5_FRACTION",
    "RateRule",
    "crop_removal_lb_acre",
    "removal_lb_acre",
    "buildup_maintenance_lb_acre",
    "round_rate",
    "p2o5_rate_kg_ha",
    "product_kg_ha",
]

#: Crop removal (lb P2O5 per bushel of grain).  Source: Villamil, Nafziger & Behnke (2019),
#: Crop, Forage & Turfgrass Management, 180090.
CROP_REMOVAL_LB_P2O5_PER_BU: dict[str, float] = {"corn": 0.37, "soybean": 0.75, "wheat": 0.46}

#: Mehlich-3 critical soil-test P (ppm) by crop.  Source: Tri-State 2020 (Bulletin 974).
CRITICAL_PPM_MEHLICH3: dict[str, float] = {"corn": 20.0, "soybean": 20.0, "wheat": 30.0}

#: Bray P1 critical soil-test P (ppm) by crop.  Source: Tri-State 1995 (E-2567), via Ohio
#: State agronomy pages.
CRITICAL_PPM_BRAY1: dict[str, float] = {"corn": 15.0, "soybean": 15.0}

#: Mehlich-3 soil-test P (ppm) at or above which no P is suggested.  Source: Tri-State 2020
#: (Bulletin 974), via Ohio State agronomy pages.
MAINTENANCE_LIMIT_PPM_MEHLICH3: float = 50.0

#: P2O5 mass fraction of common P fertilizers.  MAP 11-52-0 and DAP 18-46-0: Ohioline
#: ANR-74; TSP 0-46-0: common practice, no source.
PRODUCT_P2O5_FRACTION: dict[str, float] = {"MAP": 0.52, "DAP": 0.46, "TSP": 0.46}

_TRI_STATE = "Tri-State 2020 (Bulletin 974)"


@dataclass(frozen=True)
class RateRule:
    """Build-up plus maintenance P rule (config section ``[rates]``)."""

    crop: str = field(
        default="corn",
        metadata={
            "unit": "",
            "doc": "crop of the removal table (corn, soybean, wheat)",
            "source": "Villamil, Nafziger & Behnke (2019)",
        },
    )
    yield_goal: float = field(
        default=180.0,
        metadata={
            "unit": "bu/acre",
            "doc": "expected grain yield",
            "source": "common practice, no source",
        },
    )
    removal_lb_p2o5_per_bu: float | None = field(
        default=None,
        metadata={
            "unit": "lb P2O5/bu",
            "doc": "crop removal; empty = from the crop table",
            "source": "Villamil, Nafziger & Behnke (2019)",
        },
    )
    soil_test_method: str | None = field(
        default=None,
        metadata={
            "unit": "",
            "doc": "soil-test method the critical and limit values refer to; unset: the "
            "samples' own method (another method makes pmap convert the soil test first)",
            "source": "common practice, no source",
        },
    )
    critical_ppm: float | None = field(
        default=None,
        metadata={
            "unit": "mg/kg",
            "doc": "soil-test P below which build-up P is added; unset: Mehlich-3 corn/soybean "
            "20, wheat 30; Bray-1 corn/soybean 15; other cases must set it",
            "source": "Tri-State 2020 (Bulletin 974); Tri-State 1995 (E-2567) for Bray-1",
        },
    )
    maintenance_limit_ppm: float | None = field(
        default=None,
        metadata={
            "unit": "mg/kg",
            "doc": "soil-test P at or above which no P is suggested; unset: Mehlich-3 50, "
            "Bray-1 33.5 (the Mehlich-3 50 through the Bray-1 regression); Olsen must set it",
            "source": _TRI_STATE,
        },
    )
    buildup_lb_p2o5_per_acre_per_ppm: float = field(
        default=20.0,
        metadata={
            "unit": "lb P2O5/acre per mg/kg",
            "doc": "P2O5 needed to raise soil-test P by 1 ppm (Illinois uses 18)",
            "source": "Tri-State build-up equations",
        },
    )
    years_to_build: int = field(
        default=4,
        metadata={
            "unit": "years",
            "doc": "years over which the build-up to critical is spread",
            "source": "from memory, unverified",
        },
    )
    product: str = field(
        default="MAP",
        metadata={
            "unit": "",
            "doc": "fertilizer product (MAP, DAP, TSP)",
            "source": "Ohioline ANR-74",
        },
    )
    increment_kg_ha: float = field(
        default=5.0,
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "rounding step of the rate (0 = no rounding)",
            "source": "common practice, no source",
        },
    )
    min_rate_kg_ha: float = field(
        default=10.0,
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "rates below this are set to 0",
            "source": "common practice, no source",
        },
    )
    max_rate_kg_ha: float = field(
        default=150.0,
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "cap on the rate",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        if self.removal_lb_p2o5_per_bu is None:
            if self.crop not in CROP_REMOVAL_LB_P2O5_PER_BU:
                raise ConfigError(
                    f"rates.crop must be one of {', '.join(CROP_REMOVAL_LB_P2O5_PER_BU)} "
                    f"or rates.removal_lb_p2o5_per_bu must be set, got crop {self.crop!r}"
                )
        else:
            check_number("rates.removal_lb_p2o5_per_bu", self.removal_lb_p2o5_per_bu, ge=0)
        if self.soil_test_method is not None:
            check_choice("rates.soil_test_method", self.soil_test_method, SOIL_TEST_METHODS)
        check_number("rates.yield_goal", self.yield_goal, ge=0)
        if self.critical_ppm is not None:
            check_number("rates.critical_ppm", self.critical_ppm, gt=0)
        if self.maintenance_limit_ppm is not None:
            check_number("rates.maintenance_limit_ppm", self.maintenance_limit_ppm, gt=0)
        if self.critical_ppm is not None and self.maintenance_limit_ppm is not None:
            require(self.maintenance_limit_ppm > self.critical_ppm, "rates.maintenance_limit_ppm",
                    f"exceed rates.critical_ppm ({self.critical_ppm})", self.maintenance_limit_ppm)
        check_number("rates.buildup_lb_p2o5_per_acre_per_ppm",
                     self.buildup_lb_p2o5_per_acre_per_ppm, ge=0)
        years = self.years_to_build
        require(not isinstance(years, bool) and int(years) == years, "rates.years_to_build",
                "be a whole number", years)
        check_number("rates.years_to_build", years, ge=1)
        check_choice("rates.product", self.product, PRODUCT_P2O5_FRACTION)
        check_number("rates.increment_kg_ha", self.increment_kg_ha, ge=0)
        check_number("rates.min_rate_kg_ha", self.min_rate_kg_ha, ge=0)
        require(self.max_rate_kg_ha > self.min_rate_kg_ha, "rates.max_rate_kg_ha",
                f"exceed rates.min_rate_kg_ha ({self.min_rate_kg_ha})", self.max_rate_kg_ha)
        if self.increment_kg_ha > self.max_rate_kg_ha:
            raise ConfigError(
                f"rates.increment_kg_ha ({self.increment_kg_ha}) must not exceed "
                f"rates.max_rate_kg_ha ({self.max_rate_kg_ha})"
            )

    @property
    def removal_per_bu(self) -> float:
        """Crop removal used by the rule (lb P2O5/bu)."""
        if self.removal_lb_p2o5_per_bu is not None:
            return float(self.removal_lb_p2o5_per_bu)
        return CROP_REMOVAL_LB_P2O5_PER_BU[self.crop]


def _default_critical(method: str, crop: str) -> float | None:
    if method in ("mehlich3_icp", "mehlich3_colorimetric"):
        return CRITICAL_PPM_MEHLICH3.get(crop)
    if method == "bray1":
        return CRITICAL_PPM_BRAY1.get(crop)
    return None


def _default_limit(method: str) -> float | None:
    if method in ("mehlich3_icp", "mehlich3_colorimetric"):
        return MAINTENANCE_LIMIT_PPM_MEHLICH3
    if method == "bray1":
        return round(float(bray1_from_mehlich3_icp(MAINTENANCE_LIMIT_PPM_MEHLICH3)), 1)
    return None


def resolve_rule(rule: RateRule, method: str) -> RateRule:
    """The rule with its method, critical level and limit filled in for soil tests by ``method``.

    Unset values follow the samples' method and the crop (see the ``[rates]`` keys).

    Raises
    ------
    ConfigError
        No published default exists for this method and crop: the message names the key.
    """
    method = rule.soil_test_method or method
    check_choice("soil-test method", method, SOIL_TEST_METHODS)
    critical = rule.critical_ppm if rule.critical_ppm is not None else _default_critical(method, rule.crop)
    if critical is None:
        raise ConfigError(
            f"rates.critical_ppm has no default for {method} soil tests and crop {rule.crop!r}: "
            "set it (mg/kg) from your region's calibration"
        )
    limit = (rule.maintenance_limit_ppm if rule.maintenance_limit_ppm is not None
             else _default_limit(method))
    if limit is None:
        raise ConfigError(
            f"rates.maintenance_limit_ppm has no default for {method} soil tests: set it (mg/kg) "
            "from your region's calibration"
        )
    require(limit > critical, "rates.maintenance_limit_ppm",
            f"exceed rates.critical_ppm ({critical})", limit)
    return dataclasses.replace(rule, soil_test_method=method, critical_ppm=float(critical),
                               maintenance_limit_ppm=float(limit))


def _resolved(rule: RateRule) -> RateRule:
    if rule.critical_ppm is None or rule.maintenance_limit_ppm is None or rule.soil_test_method is None:
        return resolve_rule(rule, rule.soil_test_method or "mehlich3_icp")
    return rule


def crop_removal_lb_acre(crop: str, yield_bu_acre: float) -> float:
    """P2O5 removed by a crop's grain (lb P2O5/acre) from the removal table.

    Parameters
    ----------
    crop : str
        A key of :data:`CROP_REMOVAL_LB_P2O5_PER_BU`.
    yield_bu_acre : float
        Grain yield (bu/acre).
    """
    if crop not in CROP_REMOVAL_LB_P2O5_PER_BU:
        raise ConfigError(
            f"crop must be one of {', '.join(CROP_REMOVAL_LB_P2O5_PER_BU)}, got {crop!r}"
        )
    return CROP_REMOVAL_LB_P2O5_PER_BU[crop] * float(yield_bu_acre)


def removal_lb_acre(rule: RateRule) -> float:
    """Maintenance P2O5 of the rule: yield goal x removal per bushel (lb P2O5/acre)."""
    return rule.removal_per_bu * rule.yield_goal


def buildup_maintenance_lb_acre(stp_ppm: ArrayLike, rule: RateRule = RateRule()) -> np.ndarray:
    """Raw P2O5 need of the build-up plus maintenance rule (lb P2O5/acre).

    * STP below critical: ``(critical - STP) * buildup / years + removal``;
    * critical <= STP < limit: ``removal``;
    * STP >= limit: 0.

    Parameters
    ----------
    stp_ppm : array_like
        Soil-test P in the rule's method (mg/kg = ppm); negative values count as 0.
    rule : RateRule
        The rule.

    Returns
    -------
    numpy.ndarray
        P2O5 need (lb P2O5/acre); NaN where STP is NaN.
    """
    rule = _resolved(rule)
    stp = np.maximum(np.asarray(stp_ppm, dtype=float), 0.0)
    removal = removal_lb_acre(rule)
    buildup = (
        (rule.critical_ppm - stp) * rule.buildup_lb_p2o5_per_acre_per_ppm / rule.years_to_build
    )
    need = np.where(stp < rule.critical_ppm, buildup + removal, removal)
    need = np.where(stp >= rule.maintenance_limit_ppm, 0.0, need)
    return np.where(np.isnan(stp), np.nan, need)


def round_rate(rate_kg_ha: ArrayLike, rule: RateRule = RateRule()) -> np.ndarray:
    """Cap, round and apply the minimum-rate rule to raw rates (kg/ha in, kg/ha out).

    The rate is capped at ``max_rate_kg_ha``, rounded half-up to the nearest
    ``increment_kg_ha`` (a step that would overshoot the cap is taken back one increment,
    so results never exceed the cap), and set to 0 when below ``min_rate_kg_ha``.
    Rounding keeps the order of rates (a higher raw rate never gets a lower result).
    """
    rate = np.minimum(np.maximum(np.asarray(rate_kg_ha, dtype=float), 0.0), rule.max_rate_kg_ha)
    step = rule.increment_kg_ha
    if step > 0:
        rounded = np.floor(rate / step + 0.5) * step
        rate = np.where(rounded > rule.max_rate_kg_ha, rounded - step, rounded)
    return np.where(rate < rule.min_rate_kg_ha, 0.0, rate)


def p2o5_rate_kg_ha(stp_ppm: ArrayLike, rule: RateRule = RateRule()) -> np.ndarray:
    """P2O5 rate to apply (kg P2O5/ha) from soil-test P (mg/kg).

    :func:`buildup_maintenance_lb_acre`, converted to kg/ha, then :func:`round_rate`.
    NaN soil-test P stays NaN.
    """
    raw = lb_acre_to_kg_ha(buildup_maintenance_lb_acre(stp_ppm, rule))
    out = round_rate(raw, rule)
    return np.where(np.isnan(raw), np.nan, out)


def product_kg_ha(p2o5_kg_ha: ArrayLike, product: str | float = "MAP") -> np.ndarray:
    """Product rate (kg product/ha) delivering ``p2o5_kg_ha`` (kg P2O5/ha).

    Parameters
    ----------
    p2o5_kg_ha : array_like
        P2O5 rate (kg P2O5/ha).
    product : str or float
        A key of :data:`PRODUCT_P2O5_FRACTION`, or the product's P2O5 mass fraction (0-1].
    """
    if isinstance(product, str):
        if product not in PRODUCT_P2O5_FRACTION:
            raise ConfigError(
                f"product must be one of {', '.join(PRODUCT_P2O5_FRACTION)}, got {product!r}"
            )
        fraction = PRODUCT_P2O5_FRACTION[product]
    else:
        fraction = float(product)
        if not 0 < fraction <= 1:
            raise ConfigError(f"product P2O5 fraction must lie in (0, 1], got {fraction}")
    return np.asarray(p2o5_kg_ha, dtype=float) / fraction
