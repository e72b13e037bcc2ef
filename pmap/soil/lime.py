"""Lime requirement to a target pH, the P gained by liming, and lime-rate classes.

The requirement comes from a buffer pH measured by the laboratory; pmap never guesses a
requirement from soil pH alone.  Two methods (``lime.method``):

``mehlich`` (default)
    The Mehlich buffer calculation of the NCDA&CS Agronomic Division::

        acidity (meq/100 cm3) = (6.6 - buffer pH) * 4
        factor                = (target pH - pH) / (6.6 - pH)
        LR (US short tons/acre) = acidity * factor

    Checked against the division's own description (ncagr.gov, "Agronomic Services - Soil
    Testing - Lime and Fertilizer Requirements", and its buffer factor table page
    agronomi/bufftab1.htm): the unit is stated there as U.S. tons per acre, and the worked
    example pH 5.0 -> 6.0 at acidity 1.2 gives factor 0.625 and LR 0.75 (printed as
    "0.76 ton/acre", a rounding on that page; 1.2 x 0.625 = 0.75 exactly).  The division
    subtracts a residual credit for lime applied in recent months and sets the target pH by
    soil class; pmap applies no residual credit and uses the one ``lime.target_ph``.
``linear``
    A user-supplied calibration ``LR = a + b * buffer pH + c * pH`` (``lime.linear_a``,
    ``linear_b``, ``linear_c``, in ``lime.linear_unit``), e.g. a regional SMP, Sikora or
    modified-Mehlich equation for the target pH.  pmap ships no coefficients: each
    laboratory calibrates its own buffer, and a borrowed equation would be a guess.
    Negative values of the equation are taken as 0.

Where pH is at or above the target the requirement is 0 whatever the buffer pH (no lime
raises pH that is already high enough), so a missing buffer pH only matters below the
target; there the requirement is NaN and :func:`lime_coverage` counts the cells.

The requirement (:func:`lime_requirement_t_acre`, :func:`lime_requirement_t_ha`) is what
the formula says; :func:`lime_rate_t_ha` turns it into a rate to spread (nothing below
``lime.min_rate_t_ha``, at most ``lime.max_rate_t_ha``), and :func:`lime_zones` groups the
rates into a few classes with one rate each.  All functions take numpy arrays of any shape
(or scalars) and are pure; NaN in gives NaN out.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from pmap._checks import check_choice, check_number, require
from pmap.errors import ConfigError, InputError

__all__ = [
    "LIME_METHODS",
    "LINEAR_UNITS",
    "KG_PER_SHORT_TON",
    "HA_PER_ACRE",
    "T_HA_PER_T_ACRE",
    "MEHLICH_BUFFER_REFERENCE_PH",
    "MEHLICH_ACIDITY_PER_PH_UNIT",
    "NO_LIME_CLASS",
    "LimeParams",
    "LimeCoverage",
    "LimeClass",
    "LimeZones",
    "mehlich_buffer_acidity",
    "lime_requirement_t_acre",
    "lime_requirement_t_ha",
    "lime_rate_t_ha",
    "lime_coverage",
    "ph_correction_payoff",
    "p_rate_ph_flag",
    "lime_zones",
]

#: Values of ``lime.method``.
LIME_METHODS: tuple[str, ...] = ("mehlich", "linear", "off")
#: Values of ``lime.linear_unit``: the unit the user's linear equation gives.
LINEAR_UNITS: tuple[str, ...] = ("t/acre", "t/ha")

#: kg in one US short ton: 2000 lb x 0.45359237 kg/lb (the international pound, exact).
KG_PER_SHORT_TON: float = 2000 * 0.45359237
#: ha in one acre: 4046.8564224 m2 (international acre, exact) / 10,000 m2.
HA_PER_ACRE: float = 0.40468564224
#: Metric t/ha in one US short ton per acre: 0.90718474 t / 0.40468564224 ha = 2.2417 t/ha.
T_HA_PER_T_ACRE: float = (KG_PER_SHORT_TON / 1000.0) / HA_PER_ACRE

#: pH of the Mehlich buffer before it reacts with soil: a buffer pH at or above it means no
#: exchangeable acidity (NCDA&CS Agronomic Division).
MEHLICH_BUFFER_REFERENCE_PH: float = 6.6
#: Acidity per unit drop of the Mehlich buffer pH (meq/100 cm3 per pH unit; NCDA&CS).
MEHLICH_ACIDITY_PER_PH_UNIT: float = 4.0

#: Class code of cells that get no lime in :func:`lime_zones` (0 is no data).
NO_LIME_CLASS: int = 1

_PH_RANGE = (0.0, 14.0)


@dataclass(frozen=True)
class LimeParams:
    """Lime requirement, rate limits and rate classes (config section ``[lime]``)."""

    method: str = field(
        default="mehlich",
        metadata={
            "unit": "",
            "doc": "mehlich (NCDA&CS Mehlich buffer calculation from soil and buffer pH), "
            "linear (your laboratory's equation LR = a + b * buffer pH + c * pH, from "
            "lime.linear_a, linear_b, linear_c) or off (no lime map)",
            "source": "NCDA&CS Agronomic Division, Mehlich buffer lime requirement",
        },
    )
    target_ph: float = field(
        default=6.5,
        metadata={
            "unit": "pH units",
            "doc": "pH the lime should raise the soil to (4-8; at most 6.6, the Mehlich "
            "buffer's own pH, with method mehlich); no lime where pH is already at or above it",
            "source": "common practice, no source",
        },
    )
    linear_a: float | None = field(
        default=None,
        metadata={
            "unit": "lime.linear_unit",
            "doc": "intercept a of LR = a + b * buffer pH + c * pH (method linear only; no "
            "default: take it from your laboratory's calibration for lime.target_ph)",
            "source": "user-supplied",
        },
    )
    linear_b: float | None = field(
        default=None,
        metadata={
            "unit": "lime.linear_unit per pH unit",
            "doc": "buffer pH coefficient b of the linear equation (method linear only; no "
            "default)",
            "source": "user-supplied",
        },
    )
    linear_c: float | None = field(
        default=None,
        metadata={
            "unit": "lime.linear_unit per pH unit",
            "doc": "soil pH coefficient c of the linear equation (method linear only; no "
            "default; 0 for a buffer-only equation)",
            "source": "user-supplied",
        },
    )
    linear_unit: str = field(
        default="t/acre",
        metadata={
            "unit": "",
            "doc": "unit the linear equation gives: t/acre (US short tons of lime per acre) "
            "or t/ha (metric tonnes per hectare)",
            "source": "user-supplied",
        },
    )
    min_rate_t_ha: float = field(
        default=0.5,
        metadata={
            "unit": "t/ha",
            "doc": "requirements below this get no lime (too little to spread evenly); "
            "NCDA&CS reports no lime below 0.3 short t/acre (0.67 t/ha)",
            "source": "common practice, no source",
        },
    )
    max_rate_t_ha: float = field(
        default=9.0,
        metadata={
            "unit": "t/ha",
            "doc": "largest rate in one application; a larger requirement is capped here "
            "(split the rest over later years)",
            "source": "common practice, no source",
        },
    )
    ph_floor_for_p_rates: float = field(
        default=5.5,
        metadata={
            "unit": "pH units",
            "doc": "P rates on ground below this pH are flagged: P availability is reduced "
            "there and liming should come first",
            "source": "New England Vegetable Management Guide (P availability reduced below "
            "pH 5.5)",
        },
    )
    zone_breaks_t_ha: tuple[float, ...] = field(
        default=(2.0, 4.0),
        metadata={
            "unit": "t/ha",
            "doc": "lime-rate class breaks, increasing and > 0; class 1 is no lime, then one "
            "class below the first break, one between each pair and one at or above the last",
            "source": "common practice, no source",
        },
    )
    rate_step_t_ha: float = field(
        default=0.5,
        metadata={
            "unit": "t/ha",
            "doc": "each lime class gets its mean rate rounded to a multiple of this",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        check_choice("lime.method", self.method, LIME_METHODS)
        check_number("lime.target_ph", self.target_ph, ge=4.0, le=8.0)
        if self.method == "mehlich":
            require(
                self.target_ph <= MEHLICH_BUFFER_REFERENCE_PH,
                "lime.target_ph",
                f"be <= {MEHLICH_BUFFER_REFERENCE_PH} (the Mehlich buffer's own pH) with "
                "lime.method = \"mehlich\"",
                self.target_ph,
            )
        check_choice("lime.linear_unit", self.linear_unit, LINEAR_UNITS)
        coefficients = {"linear_a": self.linear_a, "linear_b": self.linear_b,
                        "linear_c": self.linear_c}
        if self.method == "linear":
            missing = [f"lime.{k}" for k, v in coefficients.items() if v is None]
            if missing:
                raise ConfigError(
                    f"{', '.join(missing)} must be set when lime.method = \"linear\": pmap has "
                    "no default coefficients; take a, b, c of LR = a + b * buffer pH + c * pH "
                    "from your laboratory's calibration for lime.target_ph")
        for key, value in coefficients.items():
            if value is not None:
                check_number(f"lime.{key}", value, finite=True)
        check_number("lime.max_rate_t_ha", self.max_rate_t_ha, gt=0, finite=True)
        check_number("lime.min_rate_t_ha", self.min_rate_t_ha, ge=0, finite=True)
        require(self.min_rate_t_ha < self.max_rate_t_ha, "lime.min_rate_t_ha",
                f"be < lime.max_rate_t_ha ({self.max_rate_t_ha:g})", self.min_rate_t_ha)
        check_number("lime.ph_floor_for_p_rates", self.ph_floor_for_p_rates, ge=3.0, le=8.0)
        breaks = tuple(self.zone_breaks_t_ha)
        if not breaks:
            raise ConfigError("lime.zone_breaks_t_ha needs at least one break")
        if len(breaks) > 250:
            raise ConfigError(f"lime.zone_breaks_t_ha allows at most 250 breaks, got {len(breaks)}")
        for value in breaks:
            check_number("lime.zone_breaks_t_ha", value, gt=0, finite=True)
        if any(a >= b for a, b in zip(breaks[:-1], breaks[1:], strict=True)):
            raise ConfigError(f"lime.zone_breaks_t_ha must be strictly increasing, got {breaks}")
        object.__setattr__(self, "zone_breaks_t_ha", tuple(float(b) for b in breaks))
        check_number("lime.rate_step_t_ha", self.rate_step_t_ha, gt=0, finite=True)


@dataclass(frozen=True)
class LimeCoverage:
    """Where a lime requirement could be computed.

    Attributes
    ----------
    cells : int
        Cells considered (inside the mask) with a soil pH.
    at_or_above_target : int
        Of those, cells at or above the target pH (requirement 0, no buffer pH needed).
    below_target : int
        Cells below the target pH (these need a buffer pH).
    below_target_without_buffer : int
        Cells below the target with no buffer pH: their requirement is NaN.
    fraction_computed : float
        Share of ``cells`` with a requirement (1 - without_buffer / cells); NaN if no cells.
    """

    cells: int
    at_or_above_target: int
    below_target: int
    below_target_without_buffer: int
    fraction_computed: float


@dataclass(frozen=True)
class LimeClass:
    """One row of the lime-rate class table of :func:`lime_zones`.

    Attributes
    ----------
    class_code : int
        Code in the class raster (1 = no lime).
    label : str
        Range of the class, e.g. ``"2-4 t/ha"``.
    rate_t_ha : float
        The class's one rate: mean rate of its cells rounded to ``lime.rate_step_t_ha``,
        within [0, ``lime.max_rate_t_ha``] (metric t/ha).
    rate_t_acre : float
        The same rate in US short tons per acre.
    cells : int
        Number of cells in the class.
    """

    class_code: int
    label: str
    rate_t_ha: float
    rate_t_acre: float
    cells: int


@dataclass(frozen=True)
class LimeZones:
    """Lime-rate classes of a field.

    Attributes
    ----------
    codes : numpy.ndarray of uint8
        Class per cell (0 = no data: outside the mask or no rate).
    rates_t_ha : numpy.ndarray of float
        The class rate of each cell (t/ha; NaN where ``codes`` is 0).
    table : tuple of LimeClass
        The classes present, by ascending code.
    """

    codes: np.ndarray
    rates_t_ha: np.ndarray
    table: tuple[LimeClass, ...]


def _ph_array(values: ArrayLike, name: str) -> np.ndarray:
    """Float array of pH values; InputError if any finite value lies outside [0, 14]."""
    arr = np.asarray(values, dtype=float)
    lo, hi = _PH_RANGE
    bad = np.isfinite(arr) & ((arr < lo) | (arr > hi))
    if bad.any():
        raise InputError(
            f"{name} must lie in [0, 14] pH units; {int(bad.sum())} value(s) outside, e.g. "
            f"{float(arr[bad].flat[0]):g}; check the column's unit")
    return arr


def _inputs(ph: ArrayLike, buffer_ph: ArrayLike | None) -> tuple[np.ndarray, np.ndarray]:
    ph_arr = _ph_array(ph, "ph")
    if buffer_ph is None:
        return ph_arr, np.full(ph_arr.shape, np.nan)
    buf = _ph_array(buffer_ph, "buffer_ph")
    try:
        ph_arr, buf = np.broadcast_arrays(ph_arr, buf)
    except ValueError as exc:
        raise InputError(
            f"ph has shape {ph_arr.shape} and buffer_ph {buf.shape}; give them the same shape"
        ) from exc
    return ph_arr, buf


def _require_method(params: LimeParams) -> None:
    if params.method == "off":
        raise ConfigError('lime.method is "off": set mehlich or linear to compute lime')


def mehlich_buffer_acidity(buffer_ph: ArrayLike) -> np.ndarray:
    """Exchangeable acidity from the Mehlich buffer pH: ``(6.6 - buffer pH) * 4``.

    Parameters
    ----------
    buffer_ph : array_like
        Mehlich buffer pH (pH units).

    Returns
    -------
    numpy.ndarray
        Acidity (meq/100 cm3 of soil); 0 where the buffer pH is >= 6.6, NaN where NaN.
    """
    buf = _ph_array(buffer_ph, "buffer_ph")
    acidity = (MEHLICH_BUFFER_REFERENCE_PH - buf) * MEHLICH_ACIDITY_PER_PH_UNIT
    return np.where(np.isnan(buf), np.nan, np.maximum(acidity, 0.0))


def _mehlich_t_acre(ph: np.ndarray, buf: np.ndarray, target: float) -> np.ndarray:
    acidity = mehlich_buffer_acidity(buf)
    # Only used where ph < target <= 6.6, so the denominator is > 0 there.
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = (target - ph) / (MEHLICH_BUFFER_REFERENCE_PH - ph)
    return acidity * factor


def _linear_in(ph: np.ndarray, buf: np.ndarray, params: LimeParams) -> np.ndarray:
    a, b, c = float(params.linear_a), float(params.linear_b), float(params.linear_c)  # type: ignore[arg-type]
    buffer_term = b * buf if b != 0 else 0.0
    return np.maximum(a + buffer_term + c * ph, 0.0)


def _requirement(ph: ArrayLike, buffer_ph: ArrayLike | None, params: LimeParams,
                 unit: str) -> np.ndarray:
    _require_method(params)
    ph_arr, buf = _inputs(ph, buffer_ph)
    target = params.target_ph
    if params.method == "mehlich":
        lr = _mehlich_t_acre(ph_arr, buf, target)
        native = "t/acre"
    else:
        lr = _linear_in(ph_arr, buf, params)
        native = params.linear_unit
    if native != unit:
        lr = lr * T_HA_PER_T_ACRE if unit == "t/ha" else lr / T_HA_PER_T_ACRE
    satisfied = ph_arr >= target  # False for NaN pH
    lr = np.where(satisfied, 0.0, lr)
    return np.where(np.isnan(ph_arr), np.nan, lr)


def lime_requirement_t_acre(
    ph: ArrayLike, buffer_ph: ArrayLike | None, params: LimeParams = LimeParams()
) -> np.ndarray:
    """Lime requirement to ``lime.target_ph`` in US short tons per acre.

    Parameters
    ----------
    ph : array_like
        Soil (water) pH (pH units), any shape.
    buffer_ph : array_like or None
        Buffer pH of the method (pH units), same shape as ``ph`` or broadcastable; None
        when the laboratory gave none.
    params : LimeParams
        Method, target pH and, for ``linear``, the coefficients.

    Returns
    -------
    numpy.ndarray
        Requirement (short t/acre of lime as the calibration defines it; >= 0).  0 where pH
        >= target (even without a buffer pH) and, for ``mehlich``, where buffer pH >= 6.6;
        NaN where pH is NaN, or pH is below the target and the buffer pH is NaN or absent.
        No minimum or maximum applied (see :func:`lime_rate_t_ha`).

    Raises
    ------
    pmap.errors.ConfigError
        ``lime.method`` is off.
    pmap.errors.InputError
        A pH outside [0, 14], or shapes that do not match.
    """
    return _requirement(ph, buffer_ph, params, "t/acre")


def lime_requirement_t_ha(
    ph: ArrayLike, buffer_ph: ArrayLike | None, params: LimeParams = LimeParams()
) -> np.ndarray:
    """Lime requirement in metric t/ha: :func:`lime_requirement_t_acre` x 2.2417.

    The factor is :data:`T_HA_PER_T_ACRE` (one short ton, 907.18474 kg, per acre,
    0.40468564224 ha).  A ``linear`` equation given in t/ha is returned as it is.

    Parameters
    ----------
    ph, buffer_ph, params
        As in :func:`lime_requirement_t_acre`.

    Returns
    -------
    numpy.ndarray
        Requirement (t/ha, >= 0; NaN as in :func:`lime_requirement_t_acre`).
    """
    return _requirement(ph, buffer_ph, params, "t/ha")


def lime_rate_t_ha(requirement_t_ha: ArrayLike, params: LimeParams = LimeParams()) -> np.ndarray:
    """Rate to spread from a requirement: 0 below the minimum, capped at the maximum.

    Parameters
    ----------
    requirement_t_ha : array_like
        Lime requirement (t/ha), e.g. from :func:`lime_requirement_t_ha`.
    params : LimeParams
        ``min_rate_t_ha`` and ``max_rate_t_ha``.

    Returns
    -------
    numpy.ndarray
        Rate (t/ha): 0 where the requirement is < ``min_rate_t_ha``, ``max_rate_t_ha`` where
        it is larger, the requirement otherwise; NaN where NaN.
    """
    req = np.asarray(requirement_t_ha, dtype=float)
    rate = np.where(req < params.min_rate_t_ha, 0.0, np.minimum(req, params.max_rate_t_ha))
    return np.where(np.isnan(req), np.nan, rate)


def lime_coverage(
    ph: ArrayLike,
    buffer_ph: ArrayLike | None,
    params: LimeParams = LimeParams(),
    mask: ArrayLike | None = None,
) -> LimeCoverage:
    """Count where a lime requirement can be computed and where a buffer pH is missing.

    Parameters
    ----------
    ph, buffer_ph : array_like
        As in :func:`lime_requirement_t_acre` (buffer_ph may be None).
    params : LimeParams
        The target pH.
    mask : array_like of bool, optional
        Cells to count (e.g. the field); default all.

    Returns
    -------
    LimeCoverage
        Counts over the cells with a pH inside the mask.
    """
    ph_arr, buf = _inputs(ph, buffer_ph)
    inside = np.ones(ph_arr.shape, bool) if mask is None else np.broadcast_to(
        np.asarray(mask, dtype=bool), ph_arr.shape)
    has_ph = inside & ~np.isnan(ph_arr)
    above = has_ph & (ph_arr >= params.target_ph)
    below = has_ph & (ph_arr < params.target_ph)
    missing = below & np.isnan(buf)
    if params.method == "linear" and params.linear_b == 0:
        missing = np.zeros_like(below)  # a pH-only equation the user supplied needs no buffer
    cells = int(has_ph.sum())
    fraction = 1.0 - int(missing.sum()) / cells if cells else float("nan")
    return LimeCoverage(
        cells=cells,
        at_or_above_target=int(above.sum()),
        below_target=int(below.sum()),
        below_target_without_buffer=int(missing.sum()),
        fraction_computed=fraction,
    )


def ph_correction_payoff(
    ph: ArrayLike,
    target_ph: ArrayLike,
    available_at: Callable[[np.ndarray], np.ndarray],
) -> np.ndarray:
    """Available P gained if the soil pH were moved to the target.

    ``gain = available_at(max(pH, target)) - available_at(pH)``: the soil model's available
    P at the target pH minus that at the current pH, cell by cell.

    Parameters
    ----------
    ph : array_like
        Soil pH (pH units), any shape.
    target_ph : array_like
        Target pH (pH units), a scalar or the shape of ``ph``.
    available_at : callable
        Maps an array of pH values (the shape of ``ph``) to available P (mg/kg) of the same
        shape, holding everything else about each cell fixed (the soil model supplies it).

    Returns
    -------
    numpy.ndarray
        Gain in available P (mg/kg): 0 where pH >= target; NaN where pH is NaN.  It is
        negative where the model's availability falls between the pH and the target.

    Raises
    ------
    ValueError
        ``available_at`` returns an array of another shape.
    """
    ph_arr = _ph_array(ph, "ph")
    target = np.broadcast_to(_ph_array(target_ph, "target_ph"), ph_arr.shape)
    below = ph_arr < target  # False for NaN
    moved = np.where(below, target, ph_arr)
    now = np.asarray(available_at(ph_arr.copy()), dtype=float)
    after = np.asarray(available_at(moved), dtype=float)
    if now.shape != ph_arr.shape or after.shape != ph_arr.shape:
        raise ValueError(
            f"available_at must return the shape of ph {ph_arr.shape}, got {now.shape}")
    gain = np.where(below, after - now, 0.0)
    return np.where(np.isnan(ph_arr) | np.isnan(target), np.nan, gain)


def p_rate_ph_flag(ph: ArrayLike, params: LimeParams = LimeParams()) -> np.ndarray:
    """Cells whose pH is below ``lime.ph_floor_for_p_rates`` (lime before P there).

    Parameters
    ----------
    ph : array_like
        Soil pH (pH units), any shape.
    params : LimeParams
        The pH floor.

    Returns
    -------
    numpy.ndarray of bool
        True where pH < floor; False where pH is at or above it or NaN.
    """
    return _ph_array(ph, "ph") < params.ph_floor_for_p_rates


def class_labels(breaks: tuple[float, ...]) -> list[str]:
    labels = ["no lime", f"< {breaks[0]:g} t/ha"]
    labels += [f"{lo:g}-{hi:g} t/ha" for lo, hi in zip(breaks[:-1], breaks[1:], strict=True)]
    labels.append(f">= {breaks[-1]:g} t/ha")
    return labels


def lime_zones(
    rate_t_ha: ArrayLike, mask: ArrayLike | None = None, params: LimeParams = LimeParams()
) -> LimeZones:
    """Group lime rates into classes with one rate each.

    Class 1 holds the cells with rate 0 (no lime); classes 2.. hold positive rates split at
    ``lime.zone_breaks_t_ha`` (a rate equal to a break goes up).  Each lime class gets the
    mean rate of its cells rounded to the nearest multiple of ``lime.rate_step_t_ha``
    (halves up), kept within [0, ``lime.max_rate_t_ha``].

    Parameters
    ----------
    rate_t_ha : array_like
        Lime rate per cell (t/ha, >= 0), e.g. from :func:`lime_rate_t_ha`; NaN = no rate.
    mask : array_like of bool, optional
        Cells to classify (the field); default all.
    params : LimeParams
        Breaks, rounding step and maximum rate.

    Returns
    -------
    LimeZones
        Class raster (uint8, 0 = no data), the class rate per cell, and the table of the
        classes present.

    Raises
    ------
    pmap.errors.InputError
        A negative rate, or a mask of another shape.
    """
    rate = np.asarray(rate_t_ha, dtype=float)
    if mask is None:
        inside = np.ones(rate.shape, bool)
    else:
        inside = np.asarray(mask, dtype=bool)
        if inside.shape != rate.shape:
            raise InputError(f"mask has shape {inside.shape}, the lime rates {rate.shape}")
    negative = np.isfinite(rate) & (rate < 0)
    if negative.any():
        raise InputError(f"lime rates must be >= 0 t/ha; {int(negative.sum())} negative, e.g. "
                         f"{float(rate[negative].flat[0]):g}")
    valid = inside & ~np.isnan(rate)
    breaks = np.asarray(params.zone_breaks_t_ha)
    codes = np.where(rate > 0, np.searchsorted(breaks, rate, side="right") + 2, NO_LIME_CLASS)
    codes = np.where(valid, codes, 0).astype(np.uint8)

    labels = class_labels(params.zone_breaks_t_ha)
    step = params.rate_step_t_ha
    class_rates = np.full(rate.shape, np.nan)
    table = []
    for code in np.unique(codes[codes > 0]).tolist():
        members = codes == code
        if code == NO_LIME_CLASS:
            value = 0.0
        else:
            mean = float(rate[members].mean())
            value = float(np.floor(mean / step + 0.5) * step)
            value = min(max(value, 0.0), params.max_rate_t_ha)
        class_rates[members] = value
        table.append(LimeClass(class_code=int(code), label=labels[code - 1], rate_t_ha=value,
                               rate_t_acre=value / T_HA_PER_T_ACRE, cells=int(members.sum())))
    return LimeZones(codes=codes, rates_t_ha=class_rates, table=tuple(table))
