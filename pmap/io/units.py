"""Units named in sample-table headers, their conversion to pmap's units, plausibility bands.

A header may name its unit in parentheses or brackets (``Total P (%)``, ``clay [g/kg]``,
``P (Olsen, mg kg-1)``), as a suffix (``p_m3_ppm``, ``clay_pct``, ``OM %``, ``P_M3_lb_ac``)
or, for percent, as a prefix (``% Clay``).  :func:`split_unit` separates the name from the
unit; :func:`to_canonical` converts one column to the canonical unit of its property
(:data:`CANONICAL_UNITS`) and says what it did, or refuses a unit it cannot convert.
:data:`PLAUSIBLE_RANGES` are the bands outside which a value is questioned (a warning, not
an error): most wrong values come from a unit the header did not name.

Conversions (mass fractions are exact; the others state their assumption):

* 1 % = 10 000 mg/kg, 1 g/kg = 1 000 mg/kg = 0.1 %, 1 mg/100g = 10 mg/kg, ppm = ug/g = mg/kg;
* lb/acre soil-test values: mg/kg = lb/acre / 2 for a 2-million-lb furrow slice (6-2/3 inch).
  Source: Ohio State University Extension, ppm x 2 = lb/acre for a 6.7-inch furrow slice;
  the factor is :func:`pmap.soil.conversions.ppm_to_lb_acre`;
* meq/100g (= cmol(+)/kg) of Ca and Al: mg/kg = meq/100g x 10 x molar mass / charge
  (Ca2+ 200.4, Al3+ 89.94).  Source: IUPAC standard atomic weights (Ca 40.078, Al 26.982);
* P2O5 in a P column (a header naming ``P2O5``): x 0.4364 to elemental P
  (:data:`pmap.soil.conversions.P_PER_P2O5`).

Refused: any unit for pH other than pH units, charge units (meq/100g, cmol/kg) for P and
Fe, kg/ha (an amount per area: needs the sampling depth and bulk density), per-volume and
per-litre units (mg/L, mg/dm3: need the bulk density or the extraction ratio), mmol/kg, and
anything but % for base saturation.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from pmap.errors import InputError
from pmap.soil.conversions import P_PER_P2O5, ppm_to_lb_acre

__all__ = [
    "CANONICAL_UNITS",
    "PROPERTY_LABELS",
    "PLAUSIBLE_RANGES",
    "Plausible",
    "split_unit",
    "to_canonical",
    "example_header",
]

#: Canonical unit of every sample property; :func:`to_canonical` converts to these.
CANONICAL_UNITS: dict[str, str] = {
    "ph": "pH units",
    "buffer_ph": "pH units",
    "total_p": "mg/kg",
    "stp": "mg/kg",
    "fe": "mg/kg",
    "al": "mg/kg",
    "ca": "mg/kg",
    "caco3": "%",
    "clay": "%",
    "om": "%",
    "base_saturation": "%",
}

#: How messages name each property.
PROPERTY_LABELS: dict[str, str] = {
    "ph": "pH", "buffer_ph": "buffer pH", "total_p": "total P", "stp": "soil-test P",
    "fe": "Fe", "al": "Al", "ca": "Ca", "caco3": "CaCO3", "clay": "clay", "om": "OM",
    "base_saturation": "base saturation",
}

# Unit spellings, normalised by _unit_key (lower case, no blanks or punctuation, "-1"
# exponents dropped, micro as "u"), to the unit pmap reports.
_SPELLINGS: dict[str, str] = {
    **dict.fromkeys(("%", "pct", "percent", "g100g", "gper100g"), "%"),
    **dict.fromkeys(("mgkg", "mgperkg", "ppm", "ugg", "ugperg", "mgkgdm", "mgkgdw"), "mg/kg"),
    **dict.fromkeys(("gkg", "gperkg"), "g/kg"),
    **dict.fromkeys(("mg100g", "mgper100g"), "mg/100g"),
    **dict.fromkeys(("lbacre", "lbac", "lba", "lbsacre", "lbsac", "lbsa", "lbperacre",
                     "lbsperacre", "lbperac", "lbsperac"), "lb/acre"),
    **dict.fromkeys(("meq100g", "meqper100g", "cmolkg", "cmolckg", "cmol+kg", "cmolperkg"),
                    "meq/100g"),
    **dict.fromkeys(("kgha", "kgperha"), "kg/ha"),
    **dict.fromkeys(("mgl", "mgperl", "mgdm3", "mgperdm3", "mgcm3", "ugml", "ugperml", "mgml"),
                    "mg/L"),
    **dict.fromkeys(("mmolkg", "mmolperkg", "umolg"), "mmol/kg"),
    **dict.fromkeys(("phunits", "phunit", "units"), "pH units"),
    **dict.fromkeys(("m", "metres", "meters"), "m"),
    **dict.fromkeys(("deg", "degrees", "dd", "decimaldegrees"), "degrees"),
}

# A suffix unit: after a blank, "_", "-" or ",", at the end of the header (case ignored).
_SUFFIX = re.compile(
    r"(?:^|[\s_,-]+)("
    r"ppm|pct|percent"
    r"|mg[\s_/]*(?:per[\s_]*)?kg(?:[\s_]*-?1)?(?:[\s_]*d[mw])?"
    r"|g[\s_/]*(?:per[\s_]*)?kg(?:[\s_]*-?1)?"
    r"|mg[\s_/]*(?:per[\s_]*)?100[\s_]*g"
    r"|lbs?[\s_/]*(?:per[\s_]*)?(?:acre|ac|a)\.?"
    r"|meq[\s_/]*(?:per[\s_]*)?100[\s_]*g|cmol[c+]?[\s_/]*kg(?:[\s_]*-?1)?"
    r"|kg[\s_/]*(?:per[\s_]*)?ha(?:[\s_]*-?1)?"
    r")\s*$",
    re.IGNORECASE,
)
_GROUP = re.compile(r"[(\[]([^()\[\]]*)[)\]]")
# Text inside brackets that looks like a unit pmap does not know: a mass, volume or area
# word joined by "/", "per" or a "-1" exponent ("mg/dm3", "ug per ml", "g ha-1").
_UNITISH = re.compile(
    r"(?:^|[^a-z])(?:mg|g|kg|ug|ng|lbs?|l|ml|dm3|cm3|ha|ac|acre|[mun]?mol|meq|cmolc?)"
    r"\s*(?:/|per\b|-1)", re.IGNORECASE)

_MASS_TO_MG_KG = {"mg/kg": 1.0, "g/kg": 1_000.0, "%": 10_000.0, "mg/100g": 10.0}
_MASS_TO_PCT = {"%": 1.0, "g/kg": 0.1, "mg/kg": 1e-4, "mg/100g": 1e-3}
#: mg/kg per lb/acre for a 2-million-lb furrow slice (lb/acre = 2 x ppm).
_MG_KG_PER_LB_ACRE = 1.0 / float(ppm_to_lb_acre(1.0))
# mg/kg per meq/100g: 10 x molar mass (g/mol) / charge.  Source: IUPAC standard atomic
# weights (Ca 40.078, Al 26.9815).
_MG_KG_PER_MEQ = {"ca": 10 * 40.078 / 2, "al": 10 * 26.9815 / 3}


@dataclass(frozen=True)
class Plausible:
    """A band of usual values in the canonical unit, and what a value outside likely means.

    Attributes
    ----------
    low, high : float
        Usual range, canonical unit of the property.
    below, above : str
        Likely cause of a value below ``low`` / above ``high``, for the warning.
    source : str
        Where the band comes from.
    """

    low: float
    high: float
    below: str
    above: str
    source: str


_UNVERIFIED = "from memory, unverified"
_IN_PCT = "is the column in % or g/kg?"
_IN_LB = "is the column in lb/acre, or P2O5 rather than P?"
_FRACTION = "is the column a fraction (0-1) rather than %?"
_G_KG = "is the column in g/kg rather than %?"

#: Usual ranges of each property in its canonical unit; values outside are questioned
#: with a :class:`~pmap.errors.PmapWarning`.  All bands are from memory, unverified.
PLAUSIBLE_RANGES: dict[str, Plausible] = {
    "ph": Plausible(3.5, 9.5, "is it a buffer pH, or a column of another property?",
                    "is it a buffer pH, or a column of another property?", _UNVERIFIED),
    "buffer_ph": Plausible(4.5, 8.0, "is it a soil pH, or another column?",
                           "is it a soil pH, or another column?", _UNVERIFIED),
    "total_p": Plausible(50.0, 5_000.0, _IN_PCT, _IN_LB, _UNVERIFIED),
    "stp": Plausible(0.5, 1_000.0, _IN_PCT, _IN_LB, _UNVERIFIED),
    "fe": Plausible(1.0, 100_000.0, _IN_PCT, "is the column in lb/acre?", _UNVERIFIED),
    "al": Plausible(1.0, 150_000.0, _IN_PCT, "is the column in lb/acre?", _UNVERIFIED),
    "ca": Plausible(10.0, 400_000.0, _IN_PCT, "is the column in lb/acre?", _UNVERIFIED),
    "caco3": Plausible(0.0, 70.0, _FRACTION, _G_KG, _UNVERIFIED),
    "clay": Plausible(1.0, 85.0, _FRACTION, _G_KG, _UNVERIFIED),
    "om": Plausible(0.1, 30.0, _FRACTION, _G_KG, _UNVERIFIED),
    "base_saturation": Plausible(5.0, 100.0, _FRACTION, _G_KG, _UNVERIFIED),
}

#: How a header should name the canonical unit, for the hints in messages.
_EXAMPLE_UNIT = {"mg/kg": "(mg/kg)", "%": "(%)", "pH units": ""}


def _unit_key(text: str) -> str:
    """A unit spelling in the compact form of :data:`_SPELLINGS`."""
    s = str(text).lower().translate(str.maketrans({"µ": "u", "μ": "u", "⁻": "-", "−": "-",
                                                   "¹": "1", "³": "3", "°": "deg"}))
    s = re.sub(r"(?<=[a-z])\s*-\s*1(?![0-9])", "", s)  # "kg-1" -> "kg"
    s = s.replace("(+)", "+")
    return re.sub(r"[^0-9a-z%+]", "", s)


def _unit_of(text: str) -> str | None:
    """The unit a piece of header text names: a known unit, "?" for an unknown one, or None."""
    key = _unit_key(text)
    if key in _SPELLINGS:
        return _SPELLINGS[key]
    if _UNITISH.search(text):
        return "?"
    return None


def split_unit(header: str) -> tuple[str, str | None, str]:
    """Split a header into its name and the unit it names.

    Parameters
    ----------
    header : str
        A column header, e.g. ``"Total P (%)"``, ``"clay_g_kg"``, ``"% OM"``.

    Returns
    -------
    name : str
        The header without its unit (``"Total P"``).
    unit : str or None
        The unit pmap reads (``"%"``, ``"mg/kg"``, ``"g/kg"``, ``"mg/100g"``, ``"lb/acre"``,
        ``"meq/100g"``, ``"kg/ha"``, ``"mg/L"``, ``"mmol/kg"``, ``"pH units"``, ``"m"``,
        ``"degrees"``), ``"?"`` for bracketed text that looks like a unit pmap does not
        know, or None when the header names no unit.
    found : str
        The unit text as written in the header (empty when there is none).
    """
    text = str(header).strip().replace("(+)", "+")
    units: list[tuple[str, str]] = []

    def strip_group(match: re.Match[str]) -> str:
        parts = re.split(r"[,;]", match.group(1))
        keep = []
        for part in parts:
            unit = _unit_of(part)
            if unit is None:
                keep.append(part.strip())
            else:
                units.append((unit, part.strip()))
        kept = ", ".join(p for p in keep if p)
        return f" ({kept}) " if kept else " "

    name = _GROUP.sub(strip_group, text).strip()
    if not units and name:
        if name.startswith("%"):
            units.append(("%", "%"))
            name = name[1:].strip()
        elif name.endswith("%"):
            units.append(("%", "%"))
            name = name[:-1].strip()
        else:
            match = _SUFFIX.search(name)
            if match and match.start() > 0 and _unit_of(match.group(1)) not in (None, "?"):
                units.append((_unit_of(match.group(1)) or "?", match.group(1)))
                name = name[:match.start()].strip()
    name = re.sub(r"\s+", " ", name).strip(" _-,")
    if not units:
        return name, None, ""
    distinct = {u for u, _ in units}
    if len(distinct) > 1:
        return name, "?", " and ".join(f for _, f in units)
    return name, units[0][0], units[0][1]


def to_canonical(
    prop: str, column: str, values: np.ndarray, file_name: str
) -> tuple[np.ndarray, str | None]:
    """Convert one property column to the canonical unit of its property.

    Parameters
    ----------
    prop : str
        Canonical property name (a key of :data:`CANONICAL_UNITS`).
    column : str
        The header, whose unit (:func:`split_unit`) is converted from; no unit means the
        values are already canonical.
    values : numpy.ndarray
        The parsed values (float64, NaN = missing), in the header's unit.
    file_name : str
        For messages.

    Returns
    -------
    values : numpy.ndarray
        In the canonical unit (a new array when converted).
    note : str or None
        One line saying what was converted, e.g. ``"total P: column 'Total P (%)' read as %
        and converted to mg/kg (x 10000)"``; None when nothing was.

    Raises
    ------
    pmap.errors.InputError
        A unit that cannot be converted to the property's unit; the message names the
        column and the unit found.
    """
    canonical = CANONICAL_UNITS[prop]
    label = PROPERTY_LABELS[prop]
    name, unit, found = split_unit(column)
    steps: list[str] = []
    factor = 1.0
    if unit is not None and unit != canonical:
        factor, step = _factor(prop, unit, found, column, file_name)
        steps.append(step)
    if prop in ("total_p", "stp") and "p2o5" in re.sub(r"[^0-9a-z]", "", name.lower()):
        factor *= P_PER_P2O5
        steps.append(f"P2O5 converted to P (x {P_PER_P2O5:.4f})")
    if not steps:
        return values, None
    read_as = unit if unit is not None and unit != canonical else canonical
    note = (f"{label}: column {column!r} read as {read_as} and converted to {canonical} "
            f"({'; '.join(steps)})")
    with np.errstate(over="ignore"):
        converted = np.asarray(values, dtype=np.float64) * factor
    overflow = np.isinf(converted) & np.isfinite(values)
    if overflow.any():
        raise InputError(
            f"{file_name}: column {column!r}: {int(overflow.sum())} value(s) (the first "
            f"{float(np.asarray(values)[overflow][0]):g}) are too large to convert to "
            f"{CANONICAL_UNITS[prop]}; check the column's unit and values")
    return converted, note


def _factor(prop: str, unit: str, found: str, column: str, file_name: str) -> tuple[float, str]:
    """Factor from ``unit`` to the canonical unit of ``prop`` and how to say it."""
    canonical = CANONICAL_UNITS[prop]
    if canonical == "mg/kg":
        if unit in _MASS_TO_MG_KG:
            return _MASS_TO_MG_KG[unit], f"x {_MASS_TO_MG_KG[unit]:g}"
        if unit == "lb/acre":
            return _MG_KG_PER_LB_ACRE, (
                f"x {_MG_KG_PER_LB_ACRE:g}, i.e. lb/acre / 2, assuming a 2-million-lb furrow "
                "slice of 6-2/3 inch; a deeper slice weighs more")
        if unit == "meq/100g" and prop in _MG_KG_PER_MEQ:
            f = _MG_KG_PER_MEQ[prop]
            return f, f"x {f:.4g}, 10 x molar mass / charge of {PROPERTY_LABELS[prop]}"
    elif canonical == "%" and prop != "base_saturation" and unit in _MASS_TO_PCT:
        return _MASS_TO_PCT[unit], f"x {_MASS_TO_PCT[unit]:g}"
    if canonical == "pH units":
        fix = "if the values are pH, remove the unit from the header; otherwise check the column"
    else:
        fix = (f"convert the column to {canonical} and name the unit in the header, e.g. "
               f"{example_header(prop, column)!r}")
    raise InputError(
        f"{file_name}: column {column!r} ({PROPERTY_LABELS[prop]}) is in "
        f"{found or unit!r}{_why_not(prop, unit)}, which pmap cannot convert to {canonical}: "
        f"{fix}"
    )


def _why_not(prop: str, unit: str) -> str:
    """Why a unit cannot be converted, for the message ("" when it is simply another kind)."""
    if unit == "?":
        return " (a unit pmap does not know)"
    if unit == "kg/ha":
        return " (an amount per area: needs the sampling depth and bulk density)"
    if unit == "mg/L":
        return " (per volume of soil or extract: needs the bulk density or extraction ratio)"
    if unit == "meq/100g":
        return " (a charge unit: needs the ion's charge)"
    return ""


def example_header(prop: str, column: str | None = None) -> str:
    """A header naming the canonical unit of ``prop``, e.g. ``"total_p (mg/kg)"``: the
    column's name without its unit (or the property name) and the canonical unit."""
    name = split_unit(column)[0] if column else ""
    suffix = _EXAMPLE_UNIT[CANONICAL_UNITS[prop]]
    return f"{name or prop} {suffix}".strip()
