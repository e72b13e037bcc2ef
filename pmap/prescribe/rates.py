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
from pmap.prescribe.interpretation import REGIONS, InterpretationTable, interpretation_table
from pmap.soil.conversions import SOIL_TEST_METHODS, kg_ha_to_lb_acre, lb_acre_to_kg_ha

__all__ = [
    "CROP_REMOVAL_LB_P2O5_PER_BU",
    "resolve_rule",
    "resolve_interpretation",
    "PRODUCT_P2O5_FRACTION",
    "PRODUCT_GRADES",
    "parse_grade",
    "product_grade",
    "product_label",
    "product_rates",
    "nitrogen_kg_ha",
    "product_cost",
    "single_rate",
    "DISPLAY_UNITS",
    "to_display_units",
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

#: Grades (% N, P2O5, K2O by mass) of common P fertilizers.  MAP 11-52-0 and DAP 18-46-0:
#: Ohioline ANR-74; TSP 0-46-0: common practice, no source.
PRODUCT_GRADES: dict[str, tuple[float, float, float]] = {
    "MAP": (11.0, 52.0, 0.0), "DAP": (18.0, 46.0, 0.0), "TSP": (0.0, 46.0, 0.0)}

#: P2O5 mass fraction of the products of :data:`PRODUCT_GRADES`.
PRODUCT_P2O5_FRACTION: dict[str, float] = {k: g[1] / 100 for k, g in PRODUCT_GRADES.items()}

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
    region: str = field(
        default="tri-state",
        metadata={
            "unit": "",
            "doc": "region whose interpretation table (classes, critical level, no-response "
            "limit) applies: tri-state (Indiana, Michigan, Ohio) or iowa; see "
            "docs/rates-and-zones.md",
            "source": "Tri-State 2020 (Bulletin 974); Iowa State PM 1688",
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
            "doc": "soil-test P below which build-up P is added; unset: from the region's "
            "interpretation table for the method and crop (tri-state Mehlich-3 ICP corn/soybean "
            "20, wheat 30; Bray-1 15/25; iowa: the lower bound of the optimum class); a method "
            "with no published table must set it",
            "source": "Tri-State 2020 (Bulletin 974); Tri-State 1995 (E-2567); Iowa State PM 1688",
        },
    )
    maintenance_limit_ppm: float | None = field(
        default=None,
        metadata={
            "unit": "mg/kg",
            "doc": "no-response limit: soil-test P at or above which no P is suggested; unset: "
            "from the region's table (tri-state 50; iowa: the lower bound of the high class); "
            "a method with no published table must set it",
            "source": "Tri-State 2020 (Bulletin 974) via Ohio State agbmps pages; Iowa State PM 1688",
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
            "doc": "fertilizer product: MAP (11-52-0), DAP (18-46-0), TSP (0-46-0), or user "
            "(rates.product_grade and rates.product_name)",
            "source": "Ohioline ANR-74 (MAP, DAP); TSP common practice, no source",
        },
    )
    product_grade: str = field(
        default="",
        metadata={
            "unit": "% N-P2O5-K2O",
            "doc": "grade of a user product (rates.product = \"user\"), e.g. \"10-34-0\"",
            "source": "common practice, no source",
        },
    )
    product_name: str = field(
        default="",
        metadata={
            "unit": "",
            "doc": "name of a user product, shown in tables and files",
            "source": "common practice, no source",
        },
    )
    product_increment_kg_ha: float = field(
        default=5.0,
        metadata={
            "unit": "kg product/ha",
            "doc": "metering step of the applicator: product rates are rounded to it and the "
            "P2O5 delivered is recomputed from the rounded product rate (0 = no rounding)",
            "source": "common practice, no source",
        },
    )
    product_price_per_t: float | None = field(
        default=None,
        metadata={
            "unit": "currency/t product",
            "doc": "price of the product; set, tables and totals show the cost",
            "source": "common practice, no source",
        },
    )
    currency: str = field(
        default="",
        metadata={"unit": "", "doc": "currency label of the price (e.g. USD, EUR)",
                  "source": "common practice, no source"},
    )
    units: str = field(
        default="metric",
        metadata={
            "unit": "",
            "doc": "units of the rate tables and file attributes: metric (kg/ha) or us "
            "(lb/acre added beside kg/ha); pmap computes in SI either way",
            "source": "common practice, no source",
        },
    )
    out_of_field_rate_kg_ha: float = field(
        default=0.0,
        metadata={
            "unit": "kg product/ha",
            "doc": "rate a controller applies outside the field and where pmap gives no rate "
            "(cells far from every sample)",
            "source": "common practice, no source",
        },
    )
    allow_uncalibrated_model: bool = field(
        default=False,
        metadata={
            "unit": "",
            "doc": "accept rates from the soil model's estimate with default (uncalibrated) "
            "parameters when the samples hold no lab soil-test P; without it such a run stops",
            "source": "common practice, no source",
        },
    )
    deficiency_probability_threshold: float | None = field(
        default=None,
        metadata={
            "unit": "probability",
            "doc": "risk-aware rule (off when unset): the rule is applied to the soil-test P "
            "that the cell falls below with this probability (the quantile of the kriging "
            "distribution), so a cell counts as below critical exactly when its probability "
            "of deficiency exceeds the threshold. Lower values apply P more readily",
            "source": "common practice, no source",
        },
    )
    max_distance_from_sample_m: float | None = field(
        default=None,
        metadata={
            "unit": "m",
            "doc": "cells farther than this from every sample get no rate (flagged \"not "
            "sampled\"); unset = rates.max_distance_spacings x the sample spacing (the larger "
            "of the median nearest-neighbour distance and sqrt(hull area / samples))",
            "source": "common practice, no source",
        },
    )
    max_distance_spacings: float = field(
        default=1.5,
        metadata={
            "unit": "sample spacings",
            "doc": "default of rates.max_distance_from_sample_m in multiples of the sample "
            "spacing (on a regular grid every point lies within 0.71 spacings of a sample)",
            "source": "common practice, no source",
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
        check_choice("rates.region", self.region, REGIONS)
        check_choice("rates.product", self.product, (*PRODUCT_GRADES, "user"))
        if self.product == "user":
            parse_grade(self.product_grade, "rates.product_grade")
            require(bool(self.product_name.strip()), "rates.product_name",
                    "name the user product", self.product_name)
        check_number("rates.product_increment_kg_ha", self.product_increment_kg_ha, ge=0,
                     finite=True)
        if self.product_price_per_t is not None:
            check_number("rates.product_price_per_t", self.product_price_per_t, ge=0,
                         finite=True)
        check_choice("rates.units", self.units, ("metric", "us"))
        check_number("rates.out_of_field_rate_kg_ha", self.out_of_field_rate_kg_ha, ge=0,
                     finite=True)
        if self.deficiency_probability_threshold is not None:
            check_number("rates.deficiency_probability_threshold",
                         self.deficiency_probability_threshold, gt=0, lt=1)
        if self.max_distance_from_sample_m is not None:
            check_number("rates.max_distance_from_sample_m", self.max_distance_from_sample_m,
                         gt=0, finite=True)
        check_number("rates.max_distance_spacings", self.max_distance_spacings, gt=0,
                     finite=True)
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


def resolve_interpretation(
    rule: RateRule, method: str, breaks: tuple[float, ...] | None = None,
    labels: tuple[str, ...] | None = None,
) -> InterpretationTable:
    """The one interpretation table that gives both the zone classes and the rule's levels.

    ``method`` is the samples' soil-test method; ``rule.soil_test_method``, when set, takes
    its place (the soil test is then converted to it).  ``breaks`` and ``labels`` are the
    user's ``zones.breaks`` / ``zones.labels`` (None = from the table).

    Raises
    ------
    ConfigError
        No published table for the method, region and crop and values missing (the message
        names the keys), or the critical level or limit is not a class break.
    """
    method = rule.soil_test_method or method
    check_choice("soil-test method", method, SOIL_TEST_METHODS)
    return interpretation_table(method, rule.region, rule.crop, breaks=breaks, labels=labels,
                                critical_ppm=rule.critical_ppm,
                                limit_ppm=rule.maintenance_limit_ppm)


def resolve_rule(rule: RateRule, method: str) -> RateRule:
    """The rule with its method, critical level and limit filled in from the region's table.

    See :func:`resolve_interpretation`; raises ConfigError in the same cases.
    """
    table = resolve_interpretation(rule, method)
    return dataclasses.replace(rule, soil_test_method=table.method,
                               critical_ppm=table.critical_ppm,
                               maintenance_limit_ppm=table.limit_ppm)


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


def parse_grade(grade: str, key: str = "grade") -> tuple[float, float, float]:
    """``"N-P2O5-K2O"`` percentages of a fertilizer grade string such as ``"10-34-0"``.

    Raises
    ------
    ConfigError
        Not three numbers separated by hyphens, a share outside 0-100, their sum over
        100, or no P2O5.
    """
    parts = str(grade).strip().split("-")
    try:
        values = tuple(float(p) for p in parts)
    except ValueError:
        values = ()
    if len(values) != 3 or not all(0 <= v <= 100 for v in values) or sum(values) > 100:
        raise ConfigError(f"{key} must be an N-P2O5-K2O grade such as \"10-34-0\" "
                          f"(three percentages, sum at most 100), got {grade!r}")
    if values[1] <= 0:
        raise ConfigError(f"{key} {grade!r} holds no P2O5: choose a phosphorus product")
    return values  # type: ignore[return-value]


def product_grade(rule: RateRule) -> tuple[float, float, float]:
    """The rule's product grade (% N, P2O5, K2O)."""
    if rule.product == "user":
        return parse_grade(rule.product_grade, "rates.product_grade")
    return PRODUCT_GRADES[rule.product]


def product_label(rule: RateRule) -> str:
    """Name of the rule's product as tables and files show it, e.g. ``"MAP 11-52-0"``."""
    n, p, k = product_grade(rule)
    name = rule.product_name.strip() if rule.product == "user" else rule.product
    return f"{name} {n:g}-{p:g}-{k:g}"


def product_rates(p2o5_kg_ha: ArrayLike, rule: RateRule) -> tuple[np.ndarray, np.ndarray,
                                                                   np.ndarray]:
    """What the applicator meters for P2O5 rates (kg P2O5/ha): product, P2O5 and N (kg/ha).

    Order: the P2O5 rate is rounded first (:func:`p2o5_rate_kg_ha`), then the product rate
    ``p2o5 / P2O5 fraction`` is rounded half-up to ``rule.product_increment_kg_ha`` when set
    (a step that would deliver more P2O5 than ``rule.max_rate_kg_ha`` is taken back one
    increment), and the P2O5 and N delivered are recomputed from the rounded product rate,
    the one the machine meters, so every table agrees with what is applied.

    Returns
    -------
    product, p2o5, nitrogen : numpy.ndarray
        kg product/ha, kg P2O5/ha and kg N/ha; NaN where ``p2o5_kg_ha`` is NaN.
    """
    n_pct, p_pct, _k = product_grade(rule)
    product = np.asarray(p2o5_kg_ha, dtype=float) / (p_pct / 100)
    step = rule.product_increment_kg_ha
    if step > 0:
        product = np.floor(product / step + 0.5) * step
        over = product * p_pct / 100 > rule.max_rate_kg_ha * (1 + 1e-12)
        product = np.where(over, product - step, product)
    return product, product * p_pct / 100, product * n_pct / 100


def nitrogen_kg_ha(product_kg_ha: ArrayLike, product: str | RateRule = "MAP") -> np.ndarray:
    """N supplied (kg N/ha) by a product rate (kg product/ha), e.g. 11 % of MAP.

    ``product`` is a key of :data:`PRODUCT_GRADES` or a rule (whose product may be "user").
    """
    if isinstance(product, RateRule):
        n_pct = product_grade(product)[0]
    else:
        check_choice("product", product, tuple(PRODUCT_GRADES))
        n_pct = PRODUCT_GRADES[product][0]
    return np.asarray(product_kg_ha, dtype=float) * n_pct / 100


def product_cost(product_total_kg: float, rule: RateRule) -> float | None:
    """Cost of ``product_total_kg`` at ``rule.product_price_per_t``; None without a price."""
    if rule.product_price_per_t is None:
        return None
    return float(product_total_kg) / 1000.0 * rule.product_price_per_t


def single_rate(rates_kg_ha: ArrayLike) -> float | None:
    """The one rate when every finite rate is equal (a flat "variable-rate" map), else None."""
    values = np.asarray(rates_kg_ha, dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0 or values.min() != values.max():
        return None
    return float(values[0])


#: Unit label of a rate (per hectare or per acre) for each ``rates.units`` choice.
DISPLAY_UNITS: dict[str, str] = {"metric": "kg/ha", "us": "lb/acre"}


def to_display_units(kg_ha: ArrayLike, units: str) -> np.ndarray:
    """A rate (kg/ha; of P2O5, product or N) in the ``rates.units`` system.

    ``"metric"`` returns kg/ha unchanged; ``"us"`` returns lb/acre (1 lb/acre = 1.12085 kg/ha,
    from the definitions of the pound and the acre).  pmap computes in SI; this is only for
    tables and file attributes.
    """
    check_choice("rates.units", units, tuple(DISPLAY_UNITS))
    values = np.asarray(kg_ha, dtype=float)
    return values.copy() if units == "metric" else kg_ha_to_lb_acre(values)
