"""Units, P/P2O5 oxide factors and soil-test extractant conversions.

Everything here is arithmetic on numpy arrays (any shape; NaN stays NaN).  Regional
extractant regressions are functions with their coefficients as keyword parameters, so a
user with a local regression can pass their own.  :class:`SoilTestEquivalent` is the
configurable (and flagged) step from the model's available P to a soil-test value.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_choice, check_number

__all__ = [
    "P_MOLAR_MASS",
    "O_MOLAR_MASS",
    "P2O5_PER_P",
    "P_PER_P2O5",
    "KG_HA_PER_LB_ACRE",
    "SOIL_TEST_METHODS",
    "p_to_p2o5",
    "p2o5_to_p",
    "lb_acre_to_kg_ha",
    "kg_ha_to_lb_acre",
    "mg_kg_to_kg_ha",
    "kg_ha_to_mg_kg",
    "ppm_to_lb_acre",
    "bray1_from_mehlich3_icp",
    "mehlich3_icp_from_bray1",
    "olsen_from_mehlich3",
    "mehlich3_from_olsen",
    "convert_soil_test",
    "SoilTestEquivalent",
]

#: Standard atomic mass of phosphorus (g/mol).  Source: IUPAC, via the periodictable package.
P_MOLAR_MASS: float = 30.973762
#: Standard atomic mass of oxygen (g/mol).  Source: IUPAC, via the periodictable package.
O_MOLAR_MASS: float = 15.999
#: Mass of P2O5 per mass of P (about 2.2913).
P2O5_PER_P: float = (2 * P_MOLAR_MASS + 5 * O_MOLAR_MASS) / (2 * P_MOLAR_MASS)
#: Mass of P per mass of P2O5 (about 0.4364).
P_PER_P2O5: float = 1.0 / P2O5_PER_P
#: kg/ha in one lb/acre, by definition of the pound (0.45359237 kg) and acre (0.40468564224 ha).
KG_HA_PER_LB_ACRE: float = 0.45359237 / 0.40468564224

#: Soil-test P methods pmap knows by name.
SOIL_TEST_METHODS: tuple[str, ...] = ("mehlich3_icp", "mehlich3_colorimetric", "bray1", "olsen")


def _f(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=float)


def p_to_p2o5(p: ArrayLike) -> np.ndarray:
    """Convert a mass of elemental P to P2O5 (same mass unit)."""
    return _f(p) * P2O5_PER_P


def p2o5_to_p(p2o5: ArrayLike) -> np.ndarray:
    """Convert a mass of P2O5 to elemental P (same mass unit)."""
    return _f(p2o5) * P_PER_P2O5


def lb_acre_to_kg_ha(lb_acre: ArrayLike) -> np.ndarray:
    """Convert lb/acre to kg/ha."""
    return _f(lb_acre) * KG_HA_PER_LB_ACRE


def kg_ha_to_lb_acre(kg_ha: ArrayLike) -> np.ndarray:
    """Convert kg/ha to lb/acre."""
    return _f(kg_ha) / KG_HA_PER_LB_ACRE


def mg_kg_to_kg_ha(
    mg_kg: ArrayLike, bulk_density_g_cm3: ArrayLike, depth_mm: ArrayLike
) -> np.ndarray:
    """Convert a soil concentration to an areal amount in a layer (SWAT2012 soil_chem).

    Parameters
    ----------
    mg_kg : array_like
        Concentration (mg/kg).
    bulk_density_g_cm3 : array_like
        Dry bulk density of the layer (g/cm3).
    depth_mm : array_like
        Layer thickness (mm).

    Returns
    -------
    numpy.ndarray
        Amount in the layer (kg/ha): ``mg_kg * BD * depth / 100``.
    """
    return _f(mg_kg) * _f(bulk_density_g_cm3) * _f(depth_mm) / 100.0


def kg_ha_to_mg_kg(
    kg_ha: ArrayLike, bulk_density_g_cm3: ArrayLike, depth_mm: ArrayLike
) -> np.ndarray:
    """Inverse of :func:`mg_kg_to_kg_ha`: kg/ha in a layer to mg/kg."""
    return _f(kg_ha) * 100.0 / (_f(bulk_density_g_cm3) * _f(depth_mm))


def ppm_to_lb_acre(ppm: ArrayLike, slice_lb: float = 2e6) -> np.ndarray:
    """Convert ppm (mg/kg) to lb/acre for a furrow slice weighing ``slice_lb`` lb/acre.

    The default 2 million lb/acre is the ~6.7-inch slice (x 2 rule); an 8-inch slice is
    about 2.4 million lb/acre.
    """
    return _f(ppm) * slice_lb / 1e6


def bray1_from_mehlich3_icp(
    m3: ArrayLike, intercept: float = -8.08, slope: float = 0.832
) -> np.ndarray:
    """Bray-1 P (mg/kg) from Mehlich-3 ICP P (mg/kg): ``intercept + slope * M3``.

    Default coefficients: Ohio State, "Understanding Soil Test Reports for Phosphorus
    Values".  A regional regression; pass local coefficients where known.
    """
    return intercept + slope * _f(m3)


def mehlich3_icp_from_bray1(
    bray1: ArrayLike, intercept: float = -8.08, slope: float = 0.832
) -> np.ndarray:
    """Inverse of :func:`bray1_from_mehlich3_icp` (mg/kg to mg/kg)."""
    return (_f(bray1) - intercept) / slope


def olsen_from_mehlich3(m3: ArrayLike, divisor: float = 2.05, offset: float = 14.0) -> np.ndarray:
    """Olsen P (mg/kg) from Mehlich-3 P (mg/kg): ``M3 / divisor - offset``.

    Default coefficients: Montana State Extension (2020), citing Idaho data.
    """
    return _f(m3) / divisor - offset


def mehlich3_from_olsen(
    olsen: ArrayLike, divisor: float = 2.05, offset: float = 14.0
) -> np.ndarray:
    """Inverse of :func:`olsen_from_mehlich3` (mg/kg to mg/kg)."""
    return (_f(olsen) + offset) * divisor


def convert_soil_test(values: ArrayLike, from_method: str, to_method: str) -> np.ndarray:
    """Convert soil-test P between methods with the default regional regressions.

    Mehlich-3 colorimetric is taken equal to Bray-1 (Iowa State, 2023; not valid on
    calcareous soils).  Mehlich-3 ICP is the hub: other pairs go through it.  Olsen is
    converted from Mehlich-3 ICP with the Montana State regression.

    Parameters
    ----------
    values : array_like
        Soil-test P in ``from_method`` (mg/kg).
    from_method, to_method : str
        Names from :data:`SOIL_TEST_METHODS`.

    Returns
    -------
    numpy.ndarray
        Soil-test P in ``to_method`` (mg/kg).  Results of the regressions below 0 are
        returned as 0.
    """
    check_choice("from_method", from_method, SOIL_TEST_METHODS)
    check_choice("to_method", to_method, SOIL_TEST_METHODS)
    x = _f(values)
    if from_method == to_method:
        return x.copy()
    if from_method == "olsen":
        m3 = mehlich3_from_olsen(x)
    elif from_method == "mehlich3_icp":
        m3 = x
    else:  # bray1 and mehlich3_colorimetric read alike
        m3 = mehlich3_icp_from_bray1(x)
    if to_method == "mehlich3_icp":
        out = m3
    elif to_method == "olsen":
        out = olsen_from_mehlich3(m3)
    else:
        out = bray1_from_mehlich3_icp(m3)
    return np.where(np.isnan(out), np.nan, np.maximum(out, 0.0))


@dataclass(frozen=True)
class SoilTestEquivalent:
    """Linear step from the model's available P to a soil-test P equivalent.

    Used only when the lab gave no soil-test P column, so rates and zones must be derived
    from total P through the soil model.  The result is a model estimate, not a
    measurement, and must be flagged as such wherever it is shown.
    """

    method: str = field(
        default="mehlich3_icp",
        metadata={
            "unit": "",
            "doc": "soil-test method the equivalent is expressed in",
            "source": "common practice, no source",
        },
    )
    intercept: float = field(
        default=0.0,
        metadata={
            "unit": "mg/kg",
            "doc": "soil-test P at zero model-available P; calibrate against local paired data",
            "source": "from memory, unverified",
        },
    )
    slope: float = field(
        default=1.0,
        metadata={
            "unit": "mg/kg per mg/kg",
            "doc": "soil-test P per unit of model-available P; calibrate against local paired data",
            "source": "from memory, unverified",
        },
    )

    def __post_init__(self) -> None:
        check_choice("soil_test_equivalent.method", self.method, SOIL_TEST_METHODS)
        check_number("soil_test_equivalent.intercept", self.intercept, finite=True)
        check_number("soil_test_equivalent.slope", self.slope, gt=0, finite=True)

    def to_soil_test(self, available_p: ArrayLike) -> np.ndarray:
        """Soil-test P equivalent (mg/kg, in :attr:`method`) of model-available P (mg/kg).

        Values below 0 are returned as 0; NaN stays NaN.
        """
        out = self.intercept + self.slope * _f(available_p)
        return np.where(np.isnan(out), np.nan, np.maximum(out, 0.0))
