"""Soil-test P interpretation tables: one table per soil-test method, region and crop.

A table is what a lab report prints beside a soil-test value: class breaks (mg/kg), class
names, and the two values the rate rule turns on, the *critical level* (below it a yield
response to P is expected: build-up) and the *no-response limit* (at or above it no P is
suggested).  Both are class breaks of the same table, so the zone classes and the rates
can never tell different stories: every class lies wholly below the critical level
("build-up"), between the two ("maintenance") or at or above the limit ("none").

Values differ by determination: Mehlich-3 read by ICP gives higher P than the same extract
read colorimetrically, so each method has its own table, and a method a region publishes
no values for has none (the user must set them).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from pmap.errors import ConfigError
from pmap.prescribe.zones import _check_breaks, classify
from pmap.soil.conversions import SOIL_TEST_METHODS

__all__ = [
    "ROLES",
    "REGIONS",
    "InterpretationTable",
    "BUILTIN_TABLES",
    "interpretation_table",
]

#: What a class asks of the rule, lowest soil test first.
ROLES: tuple[str, ...] = ("build-up", "maintenance", "none")

_ROLE_LABELS = {"build-up": "below critical", "maintenance": "maintenance range",
                "none": "at or above limit"}


@dataclass(frozen=True)
class InterpretationTable:
    """Class breaks and the rule's two levels for one method, region and crop.

    Attributes
    ----------
    method, region, crop : str
        Soil-test method (a key of :data:`pmap.soil.conversions.SOIL_TEST_METHODS`), region
        of the calibration, crop.
    breaks : tuple of float
        Strictly increasing class breaks (mg/kg); a value equal to a break is in the upper
        class.  ``critical_ppm`` and ``limit_ppm`` are among them.
    labels : tuple of str
        Class names, lowest first (``len(breaks) + 1``).
    critical_ppm, limit_ppm : float
        Critical level and no-response limit (mg/kg), ``critical < limit``.
    source : str
        Where the values come from (or ``"set in the config"``).
    """

    method: str
    region: str
    crop: str
    breaks: tuple[float, ...]
    labels: tuple[str, ...]
    critical_ppm: float
    limit_ppm: float
    source: str

    def __post_init__(self) -> None:
        breaks = _check_breaks(self.breaks, "zones.breaks")
        object.__setattr__(self, "breaks", breaks)
        object.__setattr__(self, "labels", tuple(str(x) for x in self.labels))
        if len(self.labels) != len(breaks) + 1:
            raise ConfigError(
                f"zones.labels needs {len(breaks) + 1} names (one more than the breaks), "
                f"got {len(self.labels)}")
        if not self.critical_ppm < self.limit_ppm:
            raise ConfigError(
                f"rates.maintenance_limit_ppm ({self.limit_ppm:g}) must exceed "
                f"rates.critical_ppm ({self.critical_ppm:g})")
        for key, value in (("rates.critical_ppm", self.critical_ppm),
                           ("rates.maintenance_limit_ppm", self.limit_ppm)):
            if float(value) not in breaks:
                raise ConfigError(
                    f"{key} ({value:g} mg/kg) must be one of zones.breaks {list(breaks)}: a "
                    "class boundary has to fall at the critical level and at the limit, or "
                    "zones and rates would disagree")

    @property
    def n_classes(self) -> int:
        """Number of classes."""
        return len(self.breaks) + 1

    def classify(self, values: ArrayLike) -> np.ndarray:
        """Class codes 1..n of soil-test P ``values`` (mg/kg); 0 where NaN."""
        return classify(values, self.breaks)

    def role_of(self, class_id: int) -> str:
        """ "build-up", "maintenance" or "none" for class ``class_id`` (1-based)."""
        if not 1 <= class_id <= self.n_classes:
            raise ValueError(f"class {class_id} is not in 1..{self.n_classes}")
        lower = -np.inf if class_id == 1 else self.breaks[class_id - 2]
        if lower >= self.limit_ppm:
            return "none"
        if lower >= self.critical_ppm:
            return "maintenance"
        return "build-up"

    @property
    def roles(self) -> tuple[str, ...]:
        """Role of every class, lowest first."""
        return tuple(self.role_of(k) for k in range(1, self.n_classes + 1))

    def as_dict(self) -> dict:
        """JSON-able record for the summary."""
        return {"method": self.method, "region": self.region, "crop": self.crop,
                "breaks_mg_kg": list(self.breaks), "labels": list(self.labels),
                "roles": list(self.roles), "critical_ppm": self.critical_ppm,
                "limit_ppm": self.limit_ppm, "source": self.source}


_TRI_STATE_2020 = ("Tri-State Fertilizer Recommendations 2020 (Bulletin 974), via Ohio State "
                   "agbmps.osu.edu 'Soil Test P value less than 50 PPM' (critical 20/30, no P at "
                   "50 ppm); read as Mehlich-3 ICP")
_TRI_STATE_1995 = ("Tri-State 1995 (Vitosh et al., E-2567), via Ohio State agbmps.osu.edu "
                   "'Soil test P levels less than 50 PPM' (critical 15/25, no P above 50 ppm)")
_IOWA = ("Iowa State PM 1688 (Mallarino & Sawyer, rev. 2013), optimum class via Iowa State ICM "
         "News Oct 2016; other class bounds and 'no P at high' from memory, unverified")


def _three(critical: float, limit: float) -> tuple[tuple[float, ...], tuple[str, ...]]:
    return (critical, limit), tuple(_ROLE_LABELS[r] for r in ROLES)


def _role_labels(breaks: tuple[float, ...], critical: float, limit: float) -> tuple[str, ...]:
    """Names for user breaks: the role's name, numbered where a role spans several classes."""
    lowers = (-np.inf, *breaks)
    roles = ["none" if lo >= limit else "maintenance" if lo >= critical else "build-up"
             for lo in lowers]
    out = []
    for k, role in enumerate(roles):
        n = roles.count(role)
        name = _ROLE_LABELS[role]
        out.append(name if n == 1 else f"{name} {roles[:k + 1].count(role)}")
    return tuple(out)


_IOWA_LABELS = ("very low", "low", "optimum", "high", "very high")

#: Built-in tables: (region, method, crop) -> (breaks, labels, critical, limit, source).
BUILTIN_TABLES: dict[tuple[str, str, str], tuple] = {}

# Tri-State 2020 states its values for "Mehlich-3" without naming the determination.  pmap
# reads them as ICP: the Ohio State conversion published with them (Ohio State FAQ
# "Understanding Soil Test Reports for Phosphorus Values": Bray-1 = -8.08 + 0.832 Mehlich-3)
# is stated for Mehlich-3 ICP, and most labs read Mehlich-3 P by ICP (Miller 2011, SERA-6).
# This is an inference, so colorimetric Mehlich-3 gets no Tri-State default: ICP reads more P
# than colorimetry at low levels (Mallarino 2003, SSSAJ 67:1928), so the two must not share one.
# No-response limit per crop: the agbmps page above gives 50 ppm for the rotation's crops; another
# Ohio State page is said to give 40 for corn/soybean (not found, unverified).  pmap uses 50;
# set rates.maintenance_limit_ppm = 40 for the narrower range.
_TRI_STATE_M3 = {"corn": (20.0, 50.0), "soybean": (20.0, 50.0), "wheat": (30.0, 50.0)}
# Bray P1 (1995): the agbmps page gives the critical levels and "no additional P above 50 ppm
# when all rotational crops are considered"; that is the limit used (no regression involved).
_TRI_STATE_BRAY = {"corn": (15.0, 50.0), "soybean": (15.0, 50.0), "wheat": (25.0, 50.0)}
for _crop, (_crit, _limit) in _TRI_STATE_M3.items():
    BUILTIN_TABLES[("tri-state", "mehlich3_icp", _crop)] = (
        *_three(_crit, _limit), _crit, _limit, _TRI_STATE_2020)
for _crop, (_crit, _limit) in _TRI_STATE_BRAY.items():
    BUILTIN_TABLES[("tri-state", "bray1", _crop)] = (
        *_three(_crit, _limit), _crit, _limit, _TRI_STATE_1995)
# Iowa: optimum class (critical = its lower bound) per method; the other bounds, and no P at
# "high" and "very high" (limit = lower bound of "high"), from memory, unverified.  Wheat has no
# Iowa table here.
for _crop in ("corn", "soybean"):
    for _method, _breaks in (("mehlich3_icp", (16.0, 26.0, 36.0, 46.0)),
                             ("mehlich3_colorimetric", (9.0, 16.0, 21.0, 31.0)),
                             ("bray1", (9.0, 16.0, 21.0, 31.0)),
                             ("olsen", (6.0, 10.0, 14.0, 21.0))):
        BUILTIN_TABLES[("iowa", _method, _crop)] = (
            _breaks, _IOWA_LABELS, _breaks[1], _breaks[2], _IOWA)

#: Regions with built-in tables.
REGIONS: tuple[str, ...] = ("tri-state", "iowa")


def interpretation_table(
    method: str,
    region: str,
    crop: str,
    *,
    breaks: Sequence[float] | None = None,
    labels: Sequence[str] | None = None,
    critical_ppm: float | None = None,
    limit_ppm: float | None = None,
) -> InterpretationTable:
    """The interpretation table for a method, region and crop, with the user's overrides.

    Values the user sets (``zones.breaks``, ``zones.labels``, ``rates.critical_ppm``,
    ``rates.maintenance_limit_ppm``) replace the built-in ones.  With only the critical
    level and limit set, the classes are the three roles at those values.

    Raises
    ------
    ConfigError
        Unknown method or region; no built-in table and values missing (the message names
        the keys to set); the critical level or limit not among the breaks.
    """
    if method not in SOIL_TEST_METHODS:
        raise ConfigError(f"soil-test method must be one of {', '.join(SOIL_TEST_METHODS)}, "
                          f"got {method!r}")
    if region not in REGIONS:
        raise ConfigError(f"rates.region must be one of {', '.join(REGIONS)}, got {region!r}")
    builtin = BUILTIN_TABLES.get((region, method, crop))
    critical = critical_ppm if critical_ppm is not None else (builtin[2] if builtin else None)
    limit = limit_ppm if limit_ppm is not None else (builtin[3] if builtin else None)
    missing = [key for key, value in (("rates.critical_ppm", critical),
                                      ("rates.maintenance_limit_ppm", limit)) if value is None]
    if missing:
        have = sorted({m for (r, m, _c) in BUILTIN_TABLES if r == region})
        raise ConfigError(
            f"no published {region} interpretation of {method} soil tests for {crop}: set "
            f"{' and '.join(missing)} (mg/kg) from your region's calibration (and zones.breaks "
            f"for more classes), or choose rates.region / a method with built-in values "
            f"({region}: {', '.join(have)})")
    if breaks is None:
        if builtin is not None and critical_ppm is None and limit_ppm is None:
            breaks, default_labels = builtin[0], builtin[1]
        else:
            breaks, default_labels = _three(float(critical), float(limit))
        labels = default_labels if labels is None else labels
    elif labels is None:
        labels = _role_labels(tuple(float(b) for b in breaks), float(critical), float(limit))
    source = builtin[4] if builtin is not None and critical_ppm is None and limit_ppm is None \
        else "set in the config"
    return InterpretationTable(method=method, region=region, crop=crop, breaks=tuple(breaks),
                               labels=tuple(labels), critical_ppm=float(critical),
                               limit_ppm=float(limit), source=source)
