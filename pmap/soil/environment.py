"""Phosphorus saturation ratio (PSR): the environmental side of soil P.

The PSR is the molar ratio of extractable P to the extractable Fe and Al that hold it::

    PSR = (P / 31) / (Fe / 56 + Al / 27)        P, Fe, Al: Mehlich-3, mg/kg

Checked against UF/IFAS EDIS SS541 ("Understanding Soil Phosphorus Storage Capacity",
Nair, Harris, Chakraborty & Chrysostome), Equation 1, which writes it with exactly these
divisors, and EDIS SS539, which gives the same form for a Mehlich-1 extract; the Mehlich-3
ratio M3 [P/(Al+Fe)] is that of Sims, Maguire, Leytem, Gartley & Pautler (2002), SSSAJ
66:2016-2032, and Maguire & Sims (2002), SSSAJ 66:2033.  pmap divides by the published
rounded molar masses 31, 56 and 27 g/mol (not 30.97, 55.85, 26.98) so that its values
match the published ones; the difference is below 0.3 %.

Sims et al. (2002) found a Mehlich-3 PSR range of 0.10 to 0.15 to correspond to the
environmental limits of the oxalate degree of P saturation (25-40 %), and Delaware treats
PSR > 0.15 as environmental; these are the defaults of ``environment.watch_psr`` and
``environment.high_psr``.  The thresholds were derived on Mid-Atlantic soils; they are
parameters, to be set for other regions.

All functions take numpy arrays of any shape (or scalars) and are pure; NaN in gives NaN
out.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_number, require
from pmap.errors import ConfigError, InputError

__all__ = [
    "P_MOLAR_MASS",
    "FE_MOLAR_MASS",
    "AL_MOLAR_MASS",
    "PSR_CLASS_LABELS",
    "PsrParams",
    "CappedRates",
    "phosphorus_saturation_ratio",
    "psr_class",
    "cap_p2o5_rates",
]

#: Molar mass of P as the published PSR formula rounds it (g/mol; exact 30.974).
P_MOLAR_MASS: float = 31.0
#: Molar mass of Fe as the published PSR formula rounds it (g/mol; exact 55.845).
FE_MOLAR_MASS: float = 56.0
#: Molar mass of Al as the published PSR formula rounds it (g/mol; exact 26.982).
AL_MOLAR_MASS: float = 27.0

#: PSR class codes (0 = no data).
PSR_CLASS_LABELS: dict[int, str] = {1: "below watch", 2: "watch", 3: "high"}


@dataclass(frozen=True)
class PsrParams:
    """P saturation thresholds and the optional rate cap (config section ``[environment]``)."""

    watch_psr: float = field(
        default=0.10,
        metadata={
            "unit": "mol/mol",
            "doc": "Mehlich-3 PSR at and above which a cell is on watch (lower end of the "
            "range matching the environmental limits of the oxalate P saturation)",
            "source": "Sims, Maguire, Leytem, Gartley & Pautler (2002), SSSAJ 66:2016-2032",
        },
    )
    high_psr: float = field(
        default=0.15,
        metadata={
            "unit": "mol/mol",
            "doc": "Mehlich-3 PSR at and above which P loss risk is high (Delaware's "
            "environmental threshold)",
            "source": "Sims, Maguire, Leytem, Gartley & Pautler (2002), SSSAJ 66:2016-2032",
        },
    )
    cap_rates: bool = field(
        default=False,
        metadata={
            "unit": "",
            "doc": "cap the P2O5 rate where PSR >= environment.high_psr at "
            "environment.capped_rate_kg_ha",
            "source": "common practice, no source",
        },
    )
    capped_rate_kg_ha: float = field(
        default=0.0,
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "largest P2O5 rate where PSR >= environment.high_psr when "
            "environment.cap_rates is true (0 = no P there)",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        check_number("environment.watch_psr", self.watch_psr, gt=0, finite=True)
        check_number("environment.high_psr", self.high_psr, gt=0, finite=True)
        require(self.high_psr > self.watch_psr, "environment.high_psr",
                f"exceed environment.watch_psr ({self.watch_psr:g})", self.high_psr)
        if not isinstance(self.cap_rates, (bool, np.bool_)):
            raise ConfigError(
                f"environment.cap_rates must be true or false, got {self.cap_rates!r}")
        check_number("environment.capped_rate_kg_ha", self.capped_rate_kg_ha, ge=0, finite=True)


@dataclass(frozen=True)
class CappedRates:
    """P2O5 rates after the PSR cap.

    Attributes
    ----------
    rates_kg_ha : numpy.ndarray of float
        Rates (kg P2O5/ha); NaN where the input rate was NaN.
    capped : numpy.ndarray of bool
        Cells whose rate the cap lowered.
    n_capped : int
        Number of such cells.
    n_without_psr : int
        Cells with a rate but no PSR, which the cap could not judge (0 when capping is off).
    """

    rates_kg_ha: np.ndarray
    capped: np.ndarray
    n_capped: int
    n_without_psr: int


def _non_negative(values: ArrayLike, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=float)
    bad = arr < 0  # False for NaN
    if bad.any():
        raise InputError(
            f"{name} must be >= 0 mg/kg; {int(bad.sum())} negative value(s), e.g. "
            f"{float(arr[bad].flat[0]):g}; check the lab values and their unit")
    return arr


def phosphorus_saturation_ratio(
    p_mg_kg: ArrayLike, fe_mg_kg: ArrayLike, al_mg_kg: ArrayLike
) -> np.ndarray:
    """Mehlich-3 P saturation ratio ``(P/31) / (Fe/56 + Al/27)``.

    Parameters
    ----------
    p_mg_kg, fe_mg_kg, al_mg_kg : array_like
        Mehlich-3 extractable P, Fe and Al (mg/kg), of one shape or broadcastable.

    Returns
    -------
    numpy.ndarray
        PSR (mol P per mol Fe + Al); NaN where an input is NaN or Fe and Al are both 0.

    Raises
    ------
    pmap.errors.InputError
        A negative value (the message names the input), or shapes that do not broadcast.
    """
    p = _non_negative(p_mg_kg, "Mehlich-3 P (p_mg_kg)")
    fe = _non_negative(fe_mg_kg, "Mehlich-3 Fe (fe_mg_kg)")
    al = _non_negative(al_mg_kg, "Mehlich-3 Al (al_mg_kg)")
    try:
        p, fe, al = np.broadcast_arrays(p, fe, al)
    except ValueError as exc:
        raise InputError(f"P, Fe and Al have shapes {np.shape(p)}, {np.shape(fe)}, "
                         f"{np.shape(al)}; give them the same shape") from exc
    sorbing = fe / FE_MOLAR_MASS + al / AL_MOLAR_MASS  # mmol/kg
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = (p / P_MOLAR_MASS) / sorbing
    return np.where(sorbing > 0, ratio, np.nan)


def psr_class(psr: ArrayLike, params: PsrParams = PsrParams()) -> np.ndarray:
    """PSR class per cell: 1 below watch, 2 watch, 3 high (a value on a threshold goes up).

    Parameters
    ----------
    psr : array_like
        P saturation ratio (mol/mol), any shape.
    params : PsrParams
        The watch and high thresholds.

    Returns
    -------
    numpy.ndarray of uint8
        Codes of :data:`PSR_CLASS_LABELS`; 0 where PSR is NaN.
    """
    x = np.asarray(psr, dtype=float)
    codes = 1 + (x >= params.watch_psr).astype(np.uint8) + (x >= params.high_psr)
    return np.where(np.isnan(x), 0, codes).astype(np.uint8)


def cap_p2o5_rates(
    rates_kg_ha: ArrayLike, psr: ArrayLike, params: PsrParams = PsrParams()
) -> CappedRates:
    """Cap P2O5 rates where the PSR is high, if ``environment.cap_rates`` is on.

    Parameters
    ----------
    rates_kg_ha : array_like
        P2O5 rates (kg P2O5/ha), any shape.
    psr : array_like
        P saturation ratio (mol/mol), the shape of ``rates_kg_ha``.
    params : PsrParams
        ``cap_rates``, ``high_psr`` and ``capped_rate_kg_ha``.

    Returns
    -------
    CappedRates
        Rates lowered to ``capped_rate_kg_ha`` where PSR >= ``high_psr`` and the rate was
        higher; unchanged elsewhere, and everywhere when capping is off.  A NaN PSR caps
        nothing (counted in ``n_without_psr``).

    Raises
    ------
    pmap.errors.InputError
        Shapes that do not match.
    """
    rates = np.asarray(rates_kg_ha, dtype=float)
    psr_arr = np.asarray(psr, dtype=float)
    if psr_arr.shape != rates.shape:
        raise InputError(f"psr has shape {psr_arr.shape}, the P2O5 rates {rates.shape}")
    if not params.cap_rates:
        return CappedRates(rates_kg_ha=rates.copy(), capped=np.zeros(rates.shape, bool),
                           n_capped=0, n_without_psr=0)
    capped = (psr_arr >= params.high_psr) & (rates > params.capped_rate_kg_ha)
    out = np.where(capped, params.capped_rate_kg_ha, rates)
    without = ~np.isnan(rates) & np.isnan(psr_arr)
    return CappedRates(rates_kg_ha=out, capped=capped, n_capped=int(capped.sum()),
                       n_without_psr=int(without.sum()))
