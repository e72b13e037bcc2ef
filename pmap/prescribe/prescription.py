"""From zones to a prescription: one rate per polygon, its uncertainty, and the tables.

Every number a table shows is derived from the per-polygon records ("patches") this module
builds, so the class table, the field totals and the polygon files always agree.  Pure
numerics: arrays in, records out.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree
from scipy.special import ndtr, ndtri

from pmap.errors import InputError
from pmap.prescribe.patches import label_patches, patch_means

__all__ = [
    "NOT_SAMPLED",
    "BASIS_MEASURED",
    "BASIS_MODEL",
    "BASIS_NOT_SAMPLED",
    "Patch",
    "deficiency_probability",
    "stp_quantile",
    "sample_spacing_m",
    "distance_to_samples",
    "rate_coverage",
    "prescription_patches",
    "class_table",
    "field_totals",
    "single_rate_notice",
]

#: Zone code of cells too far from every sample to carry a rate.
NOT_SAMPLED: int = 255

#: What a polygon's rate rests on.
BASIS_MEASURED = "measured soil test"
BASIS_MODEL = "model estimate"
BASIS_NOT_SAMPLED = "not sampled"


def deficiency_probability(mean: ArrayLike, variance: ArrayLike, critical: float, *,
                           log: bool) -> np.ndarray:
    """Probability that soil-test P lies below ``critical`` (mg/kg) at each target.

    The kriging distribution at a target is normal with ``mean`` and ``variance`` in the
    kriged space: log space when ``log`` (lognormal kriging), where the threshold is
    ``log(critical)``.  With variance 0 the probability is 1 below the threshold and 0 at
    or above it (a value equal to the critical level is not deficient, as in the rule).
    NaN stays NaN.

    Parameters
    ----------
    mean, variance : array_like
        Kriging mean and variance in the kriged space: mg/kg and (mg/kg)^2, or, when
        ``log``, the log-space mean ``m`` and variance ``s2`` of ln(mg/kg) (not the
        back-transformed estimate).
    critical : float
        Critical soil-test level (mg/kg), in the same extraction method as ``mean``.
    log : bool
        The soil test was log-kriged (lognormal kriging).

    Returns
    -------
    numpy.ndarray of float
        Probability in [0, 1].
    """
    if log and not critical > 0:
        raise InputError(f"the critical level must be > 0 mg/kg for a log-kriged soil test, "
                         f"got {critical}")
    m = np.asarray(mean, dtype=float)
    s = np.sqrt(np.maximum(np.asarray(variance, dtype=float), 0.0))
    c = np.log(critical) if log else float(critical)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (c - m) / s
        p = np.where(s > 0, ndtr(z), np.where(m < c, 1.0, 0.0))
    return np.where(np.isnan(m) | np.isnan(s), np.nan, p)


def stp_quantile(mean: ArrayLike, variance: ArrayLike, q: float, *, log: bool) -> np.ndarray:
    """The ``q``-quantile of soil-test P (mg/kg) under the kriging distribution.

    Consistent with :func:`deficiency_probability`: ``stp_quantile(q) < c`` exactly when
    the probability of being below ``c`` exceeds ``q``.  ``mean`` and ``variance`` are in
    the kriged space as for :func:`deficiency_probability`; the result is mg/kg (the
    exponential of the log-space quantile when ``log``).  The risk-aware rule feeds the
    rate rule this quantile (e.g. ``q = 0.2``: a level the soil test exceeds with 80 %
    probability) instead of the estimate.
    """
    if not 0 < q < 1:
        raise ValueError(f"q must lie in (0, 1), got {q}")
    m = np.asarray(mean, dtype=float)
    s = np.sqrt(np.maximum(np.asarray(variance, dtype=float), 0.0))
    value = m + s * ndtri(q)
    return np.exp(value) if log else value


def sample_spacing_m(sample_xy: ArrayLike) -> float:
    """Typical sample spacing (m); NaN for < 2 samples.

    The larger of the median distance from each sample to its nearest neighbour and the
    spacing of a square grid of the same density over the samples' convex hull,
    ``sqrt(hull area / n)``.  On a regular grid of spacing d both are about d; scattered
    samples (on-the-go sensor readings) have nearest neighbours about half as far apart as
    their density says (median ``0.47 / sqrt(density)`` for random points), which would
    leave cells between them without a rate.
    """
    from scipy.spatial import ConvexHull, QhullError

    xy = np.asarray(sample_xy, dtype=float)
    if len(xy) < 2:
        return float("nan")
    d, _ = cKDTree(xy).query(xy, k=2)
    spacing = float(np.median(d[:, 1]))
    if len(xy) >= 3:
        try:
            spacing = max(spacing, float(np.sqrt(ConvexHull(xy).volume / len(xy))))
        except QhullError:              # collinear samples: no hull area
            pass
    return spacing


def distance_to_samples(cell_xy: ArrayLike, sample_xy: ArrayLike) -> np.ndarray:
    """Distance (m) from each cell centre (x, y in m, shape (n, 2)) to the nearest sample."""
    samples = np.asarray(sample_xy, dtype=float)
    if samples.ndim != 2 or samples.shape[1] != 2 or len(samples) == 0:
        raise InputError(f"sample coordinates must be a non-empty (n, 2) array, got shape "
                         f"{samples.shape}")
    d, _ = cKDTree(samples).query(np.asarray(cell_xy, dtype=float))
    return np.asarray(d, dtype=float)


def rate_coverage(distance: ArrayLike, max_m: float) -> np.ndarray:
    """Cells close enough to a sample to carry a rate: ``distance <= max_m`` (both m).

    The configured default of ``max_m`` is 1.5 sample spacings
    (:func:`sample_spacing_m`): on a regular grid of spacing d every point lies within
    d / sqrt(2) = 0.71 d of a sample, and within d of one when a single sample is missing,
    so 1.5 d tolerates a missing sample and a headland strip up to about one spacing past
    the outer samples, while a second field or an island two spacings away gets no rate.
    NaN distances are not covered.
    """
    if not max_m > 0:
        raise InputError(f"the maximum distance from a sample must be > 0 m, got {max_m}")
    d = np.asarray(distance, dtype=float)
    return np.isfinite(d) & (d <= max_m)


@dataclass(frozen=True)
class Patch:
    """One rate polygon: a 4-connected patch of one zone class, and its single rate.

    Rates are kg/ha (P2O5, product, N); ``mean_stp_mg_kg`` is in the lab's method,
    ``mean_rule_stp_mg_kg`` in the rule's; ``mean_deficiency_probability`` is NaN when not
    computed.  ``role`` is the class's role in the rule ("build-up", "maintenance",
    "none") or "not sampled".
    """

    zone_id: int
    class_id: int
    class_label: str
    role: str
    basis: str
    n_cells: int
    area_ha: float
    mean_stp_mg_kg: float
    mean_rule_stp_mg_kg: float
    mean_deficiency_probability: float
    p2o5_kg_ha: float
    product: str
    product_kg_ha: float
    n_kg_ha: float

    @property
    def p2o5_total_kg(self) -> float:
        """P2O5 over the polygon (kg)."""
        return self.p2o5_kg_ha * self.area_ha

    @property
    def product_total_kg(self) -> float:
        """Product over the polygon (kg)."""
        return self.product_kg_ha * self.area_ha

    @property
    def n_total_kg(self) -> float:
        """N supplied over the polygon (kg)."""
        return self.n_kg_ha * self.area_ha

    def as_dict(self) -> dict:
        """The record with its totals, for tables and attribute columns."""
        return {**asdict(self), "p2o5_total_kg": self.p2o5_total_kg,
                "product_total_kg": self.product_total_kg, "n_total_kg": self.n_total_kg}


RateFn = Callable[[np.ndarray], np.ndarray]
ProductFn = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray]]


def prescription_patches(
    zones: np.ndarray,
    class_labels: Sequence[str],
    *,
    cell_area_ha: float,
    stp: np.ndarray,
    rule_stp: np.ndarray,
    rate_fn: RateFn,
    product_fn: ProductFn,
    product: str,
    grade: tuple[float, float, float],
    basis: str,
    roles: Sequence[str] | None = None,
    deficiency: np.ndarray | None = None,
    covered: np.ndarray | None = None,
    no_rate_product_kg_ha: float = 0.0,
) -> tuple[list[Patch], np.ndarray]:
    """One record per connected patch of ``zones``, each with the ONE rate its polygon carries.

    A patch's P2O5 rate is ``rate_fn`` of its mean soil-test P in the RULE's method
    (``rule_stp``, already converted when the lab's method differs); ``product_fn`` turns it
    into (product, P2O5 delivered, N) in kg/ha.  Cells coded :data:`NOT_SAMPLED`, and zone
    cells where ``covered`` is False, form patches labelled "not sampled" whose product
    rate is ``no_rate_product_kg_ha``: they are coded :data:`NOT_SAMPLED` (255) before the
    labelling, so they number after every class and never join a sampled patch.

    Parameters
    ----------
    zones : numpy.ndarray of uint8, shape (rows, cols)
        Zone codes 1..n, :data:`NOT_SAMPLED`, 0 outside.
    class_labels : sequence of str
        Name of class k at index k - 1.
    stp, rule_stp, deficiency : numpy.ndarray, shape (rows, cols)
        Soil-test P in the lab's and the rule's method (mg/kg), probability of deficiency.
    grade : (float, float, float)
        The product's % N, P2O5, K2O (for the "not sampled" rate).
    basis : str
        :data:`BASIS_MEASURED` or :data:`BASIS_MODEL`, for every sampled patch.
    roles : sequence of str, optional
        Role of class k at index k - 1.
    covered : numpy.ndarray of bool, shape (rows, cols), optional
        Cells close enough to a sample to carry a rate (:func:`rate_coverage`).
    no_rate_product_kg_ha : float
        Product rate (kg/ha) of the "not sampled" patches.

    Returns
    -------
    patches : list of Patch
        Patch k (``zone_id`` k) is patch k of :func:`pmap.prescribe.patches.label_patches`.
    labels : numpy.ndarray of int32
        The patch-label raster (0 outside).
    """
    zones = np.asarray(zones)
    for name, layer in (("stp", stp), ("rule_stp", rule_stp), ("deficiency", deficiency),
                        ("covered", covered)):
        if layer is not None and np.shape(layer) != zones.shape:
            raise InputError(f"{name} has shape {np.shape(layer)}, the zones {zones.shape}")
    codes = np.unique(zones[zones > 0]).tolist()
    bad = [c for c in codes if c != NOT_SAMPLED and not 1 <= c <= len(class_labels)]
    if bad:
        raise InputError(f"zone codes {bad} have no class label ({len(class_labels)} labels "
                         f"given; codes are 1..{len(class_labels)} or {NOT_SAMPLED})")
    if covered is not None:
        zones = np.where((zones > 0) & ~np.asarray(covered, dtype=bool), NOT_SAMPLED, zones)
    labels, patch_class = label_patches(zones)
    n = len(patch_class)
    counts = np.bincount(labels.ravel(), minlength=n + 1)[1:]
    mean_stp = patch_means(labels, stp)
    mean_rule = patch_means(labels, rule_stp)
    mean_def = (patch_means(labels, deficiency) if deficiency is not None
                else np.full(n, np.nan))
    p2o5 = np.asarray(rate_fn(mean_rule), dtype=float)
    prod, delivered, nitrogen = product_fn(p2o5)
    patches = []
    for i, cls in enumerate(patch_class.tolist()):
        if cls == NOT_SAMPLED:
            label, role, why = "not sampled", "not sampled", BASIS_NOT_SAMPLED
            prod_i = float(no_rate_product_kg_ha)
            p2o5_i, n_i = prod_i * grade[1] / 100, prod_i * grade[0] / 100
            stp_i = rule_i = def_i = float("nan")
        else:
            label = class_labels[cls - 1]
            role = roles[cls - 1] if roles is not None else ""
            why = basis
            prod_i, p2o5_i, n_i = float(prod[i]), float(delivered[i]), float(nitrogen[i])
            stp_i, rule_i, def_i = float(mean_stp[i]), float(mean_rule[i]), float(mean_def[i])
        patches.append(Patch(
            zone_id=i + 1, class_id=int(cls), class_label=label, role=role, basis=why,
            n_cells=int(counts[i]), area_ha=float(counts[i]) * float(cell_area_ha),
            mean_stp_mg_kg=stp_i, mean_rule_stp_mg_kg=rule_i,
            mean_deficiency_probability=def_i, p2o5_kg_ha=p2o5_i, product=product,
            product_kg_ha=prod_i, n_kg_ha=n_i))
    return patches, labels


def _weighted(values: list[float], weights: list[float]) -> float:
    v, w = np.asarray(values, dtype=float), np.asarray(weights, dtype=float)
    ok = np.isfinite(v)
    return float(np.sum(v[ok] * w[ok]) / np.sum(w[ok])) if ok.any() and w[ok].sum() > 0 \
        else float("nan")


def class_table(patches: Sequence[Patch]) -> list[dict]:
    """Per zone class, derived only from the polygons: area, means, rate range and totals.

    One row per class present, ascending by class id (not sampled last): ``class_id``,
    ``class_label``, ``role``, ``n_polygons``, ``area_ha``, area-weighted
    ``mean_stp_mg_kg`` and ``mean_deficiency_probability``, ``min_p2o5_kg_ha``,
    ``max_p2o5_kg_ha``, ``mean_p2o5_kg_ha`` (total / area), and the P2O5, product and N
    totals (kg) - each the sum over the class's polygons.
    """
    rows = []
    for cls in sorted({p.class_id for p in patches}):
        mine = [p for p in patches if p.class_id == cls]
        area = sum(p.area_ha for p in mine)
        p2o5_total = sum(p.p2o5_total_kg for p in mine)
        rows.append({
            "class_id": cls, "class_label": mine[0].class_label, "role": mine[0].role,
            "n_polygons": len(mine), "area_ha": area,
            "mean_stp_mg_kg": _weighted([p.mean_stp_mg_kg for p in mine],
                                        [p.area_ha for p in mine]),
            "mean_deficiency_probability": _weighted(
                [p.mean_deficiency_probability for p in mine], [p.area_ha for p in mine]),
            "min_p2o5_kg_ha": min(p.p2o5_kg_ha for p in mine),
            "max_p2o5_kg_ha": max(p.p2o5_kg_ha for p in mine),
            "mean_p2o5_kg_ha": p2o5_total / area if area > 0 else float("nan"),
            "p2o5_total_kg": p2o5_total,
            "product": mine[0].product,
            "product_total_kg": sum(p.product_total_kg for p in mine),
            "n_total_kg": sum(p.n_total_kg for p in mine),
        })
    return rows


def field_totals(patches: Sequence[Patch]) -> dict:
    """Field totals from the polygons: area (ha), P2O5, product and N (kg), mean rate."""
    area = sum(p.area_ha for p in patches)
    p2o5 = sum(p.p2o5_total_kg for p in patches)
    unsampled = sum(p.area_ha for p in patches if p.class_id == NOT_SAMPLED)
    return {
        "area_ha": area,
        "area_without_rate_ha": unsampled,
        "p2o5_total_kg": p2o5,
        "product": patches[0].product if patches else "",
        "product_total_kg": sum(p.product_total_kg for p in patches),
        "n_total_kg": sum(p.n_total_kg for p in patches),
        "mean_p2o5_kg_ha": p2o5 / area if area > 0 else float("nan"),
    }


def single_rate_notice(patches: Sequence[Patch], unit: str = "kg P2O5/ha") -> str | None:
    """A sentence when every sampled polygon gets the same rate (a flat map), else None."""
    rates = {round(p.p2o5_kg_ha, 6) for p in patches if p.class_id != NOT_SAMPLED}
    if len(rates) != 1:
        return None
    rate = rates.pop()
    return (f"ONE RATE FOR THE WHOLE FIELD: every zone gets {rate:g} {unit}; the soil test "
            "does not call for variable-rate application here")
