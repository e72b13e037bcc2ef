"""Robust outlier statistics: the median/MAD modified z-score of Iglewicz & Hoaglin (1993).

For values ``x`` with median ``m`` and median absolute deviation
``MAD = median(|x - m|)`` the modified z-score is

    M_i = 0.6745 (x_i - m) / MAD

(0.6745 is the 75 % quantile of the standard normal, so ``MAD / 0.6745`` estimates the
standard deviation of normal data), and ``|M_i| > 3.5`` marks a potential outlier
(Iglewicz & Hoaglin 1993, *How to Detect and Handle Outliers*, ASQC).  Median and MAD
are hardly moved by the outliers themselves, unlike the mean and standard deviation, so one
wild value cannot hide itself by inflating the spread.

When more than half the values are equal the MAD is 0 and the score is undefined; these
functions then return NaN scores and flag nothing (a property that is 0 in most of a
field, such as CaCO3, is such a case, and its non-zero values are not outliers).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["MAD_CONSISTENCY", "DEFAULT_THRESHOLD", "MAX_OUTLIER_FRACTION", "Outlier", "modified_z",
           "flag_outliers"]

#: 75 % quantile of the standard normal as Iglewicz & Hoaglin round it.
MAD_CONSISTENCY = 0.6745
#: |modified z| above which Iglewicz & Hoaglin (1993) call a value a potential outlier.
DEFAULT_THRESHOLD = 3.5
#: Outliers are few by definition: when a test flags more than this share of the samples
#: (and more than one), the data hold groups the model does not describe, not slips
#: (common practice, no source).
MAX_OUTLIER_FRACTION = 0.05


@dataclass(frozen=True)
class Outlier:
    """One sample that a robust test flagged.

    Attributes
    ----------
    id : str
        Sample identifier.
    row : int or None
        Row of the sample in its file (spreadsheet row, header = 1), if known.
    value : float
        The sample's value in the property's units (not transformed).
    z : float
        Modified z-score that flagged it (dimensionless).
    kind : str
        ``"value"``: the value itself (in the units kriged, i.e. its logarithm when the
        property is log-kriged) is far from the others; ``"cross-validation"``: its
        leave-one-out standardized error is far from those of the other samples.
    dropped : bool
        Whether the sample was left out of the final fit (``kriging.drop_outliers``).
    """

    id: str
    row: int | None
    value: float
    z: float
    kind: str
    dropped: bool = False

    def as_dict(self) -> dict[str, Any]:
        """Plain values (JSON-able)."""
        return {
            "id": str(self.id),
            "row": None if self.row is None else int(self.row),
            "value": float(self.value),
            "z": float(self.z),
            "kind": self.kind,
            "dropped": bool(self.dropped),
        }


def modified_z(values: np.ndarray) -> np.ndarray:
    """Modified z-score ``0.6745 (x - median) / MAD`` of each value (dimensionless).

    Parameters
    ----------
    values : numpy.ndarray, shape (n,)
        Finite values, any unit.

    Returns
    -------
    numpy.ndarray, shape (n,)
        The scores; all NaN when the MAD is 0 (more than half the values equal) or
        ``values`` is empty.
    """
    values = np.asarray(values, dtype=float)
    if values.ndim != 1:
        raise ValueError(f"values must be one-dimensional, got shape {values.shape}")
    if not np.all(np.isfinite(values)):
        raise ValueError("values must be finite (no NaN or inf)")
    if values.size == 0:
        return np.empty(0)
    median = np.median(values)
    mad = np.median(np.abs(values - median))
    if not mad > 0:
        return np.full(values.shape, np.nan)
    return MAD_CONSISTENCY * (values - median) / mad


def flag_outliers(values: np.ndarray, threshold: float = DEFAULT_THRESHOLD) -> np.ndarray:
    """Boolean mask of the values whose ``|modified z|`` exceeds ``threshold``.

    Nothing is flagged when the score is undefined (MAD 0, see :func:`modified_z`).
    """
    if not threshold > 0:
        raise ValueError(f"threshold must be > 0, got {threshold}")
    z = modified_z(values)
    with np.errstate(invalid="ignore"):
        return np.abs(z) > threshold
