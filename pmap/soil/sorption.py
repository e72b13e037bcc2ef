"""EPIC phosphorus sorption coefficient (PSP) and the initial P pools it implies.

PSP is the fraction of fertilizer P that is still labile after an incubation, so
``1 - PSP`` is the fraction the soil fixes.  The regressions are those of Jones, Cole,
Sharpley & Williams (1984), SSSAJ 48:800-805, and Sharpley et al. (1984), SSSAJ 48:805,
as coded in EPIC-derived crop models; the dynamic form is that of Vadas & White (2010) as
used in SWAT2012.  All functions take numpy arrays of any shape (or scalars) and return
float arrays; NaN in gives NaN out.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "PSP_MIN",
    "PSP_MAX",
    "PSP_DYNAMIC_MIN",
    "PSP_DYNAMIC_MAX",
    "psp_calcareous",
    "psp_slightly_weathered",
    "psp_moderately_weathered",
    "psp_highly_weathered",
    "psp_dynamic",
    "initial_pools",
]

#: Lower clamp of the Jones et al. (1984) PSP equations (fraction).
PSP_MIN: float = 0.05
#: Upper clamp of the Jones et al. (1984) PSP equations (fraction).
PSP_MAX: float = 0.75
#: Lower clamp of the Vadas & White (2010) dynamic PSP (fraction).
PSP_DYNAMIC_MIN: float = 0.1
#: Upper clamp of the Vadas & White (2010) dynamic PSP (fraction).
PSP_DYNAMIC_MAX: float = 0.7


def _as_float(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=float)


def _log_positive(x: np.ndarray) -> np.ndarray:
    """Natural log where ``x > 0``; NaN elsewhere (a clay content of 0 % has no log)."""
    out = np.full(x.shape, np.nan)
    np.log(x, out=out, where=x > 0)
    return out


def psp_calcareous(caco3_pct: ArrayLike) -> np.ndarray:
    """PSP of a calcareous soil: ``0.58 - 0.0061 * CaCO3``, clamped to [0.05, 0.75].

    Parameters
    ----------
    caco3_pct : array_like
        Calcium carbonate content (% by mass).

    Returns
    -------
    numpy.ndarray
        PSP (fraction of applied P that stays labile).
    """
    return np.clip(0.58 - 0.0061 * _as_float(caco3_pct), PSP_MIN, PSP_MAX)


def psp_slightly_weathered(labile_p_mg_kg: ArrayLike) -> np.ndarray:
    """PSP of a slightly weathered, non-calcareous soil: ``0.02 + 0.0104 * labile P``.

    Parameters
    ----------
    labile_p_mg_kg : array_like
        Labile (plant-available) soil P (mg/kg).

    Returns
    -------
    numpy.ndarray
        PSP, clamped to [0.05, 0.75].
    """
    return np.clip(0.02 + 0.0104 * _as_float(labile_p_mg_kg), PSP_MIN, PSP_MAX)


def psp_moderately_weathered(base_saturation_pct: ArrayLike, ph: ArrayLike) -> np.ndarray:
    """PSP of a moderately weathered, non-calcareous soil.

    ``PSP = 0.0054 * BS + 0.116 * pH - 0.73``, clamped to [0.05, 0.75].

    Parameters
    ----------
    base_saturation_pct : array_like
        Base saturation of the cation exchange capacity (%).
    ph : array_like
        Soil pH (pH units).

    Returns
    -------
    numpy.ndarray
        PSP (fraction).
    """
    value = 0.0054 * _as_float(base_saturation_pct) + 0.116 * _as_float(ph) - 0.73
    return np.clip(value, PSP_MIN, PSP_MAX)


def psp_highly_weathered(clay_pct: ArrayLike) -> np.ndarray:
    """PSP of a highly weathered, non-calcareous soil: ``0.46 - 0.0916 * ln(clay)``.

    Parameters
    ----------
    clay_pct : array_like
        Clay content (%); values <= 0 give NaN.

    Returns
    -------
    numpy.ndarray
        PSP, clamped to [0.05, 0.75].
    """
    value = 0.46 - 0.0916 * _log_positive(_as_float(clay_pct))
    return np.clip(value, PSP_MIN, PSP_MAX)


def psp_dynamic(
    clay_pct: ArrayLike, solution_p_mg_kg: ArrayLike, org_c_pct: ArrayLike
) -> np.ndarray:
    """Dynamic PSP of Vadas & White (2010), as used in SWAT2012.

    ``PSP = -0.045 ln(clay) + 0.001 solP - 0.035 orgC + 0.43``, clamped to [0.1, 0.7].

    Parameters
    ----------
    clay_pct : array_like
        Clay content (%); values <= 0 give NaN.
    solution_p_mg_kg : array_like
        Solution (labile) P (mg/kg).
    org_c_pct : array_like
        Organic carbon (%).

    Returns
    -------
    numpy.ndarray
        PSP (fraction).
    """
    value = (
        -0.045 * _log_positive(_as_float(clay_pct))
        + 0.001 * _as_float(solution_p_mg_kg)
        - 0.035 * _as_float(org_c_pct)
        + 0.43
    )
    return np.clip(value, PSP_DYNAMIC_MIN, PSP_DYNAMIC_MAX)


def initial_pools(labile_p: ArrayLike, psp: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Initial active and stable mineral P pools implied by labile P and PSP (EPIC).

    ``active = labile * (1 - PSP) / PSP`` and ``stable = 4 * active``.

    Parameters
    ----------
    labile_p : array_like
        Labile P (mg/kg).
    psp : array_like
        P sorption coefficient (fraction, > 0).

    Returns
    -------
    active, stable : numpy.ndarray
        Active and stable mineral P (mg/kg).
    """
    labile = _as_float(labile_p)
    psp_arr = _as_float(psp)
    with np.errstate(divide="ignore", invalid="ignore"):
        active = labile * (1.0 - psp_arr) / psp_arr
    active = np.where(psp_arr > 0, active, np.nan)
    return active, 4.0 * active
