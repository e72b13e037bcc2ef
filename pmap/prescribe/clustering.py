"""Management zones by clustering: k-means and fuzzy c-means on standardised layers.

An option beside the soil-test classes of :mod:`pmap.prescribe.zones` (config section
``[clusters]``).  The layers (soil-test P, pH, available P, fixation risk, user rasters
such as elevation) are turned into z-scores over the field's cells, clustered by k-means
(scikit-learn) or fuzzy c-means (Bezdek 1981, written here in numpy), and the number of
zones is either set by the user or chosen by indices of the fuzzy partition (Odeh,
Chittleborough & McBratney 1992; Fridgen et al. 2004): the fuzziness performance index (FPI)
and the partition entropy normalised by its maximum, H / ln c (the modified partition
entropy, MPE).  The normalised classification entropy of Fridgen et al. (NCE,
n / (n - c) H) is reported beside them but does not vote: it grows with the number of
clusters like H itself and so leans to two zones (on a field of three planted zones it
chose two where FPI and MPE chose three).  Zones are numbered by ascending mean soil-test
P, so zone 1 is the poorest.

Large fields are fitted on a seeded random subsample of cells (:data:`FIT_SAMPLE_CELLS`);
every cell is then given the zone of its nearest centre (for fuzzy c-means: of its largest
membership, which is the same thing) and its memberships to the fitted centres.

scikit-learn is imported inside the functions that use it: importing it loads pandas (through
``sklearn.utils``), which the numerics must not pull in when they are imported.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pmap._checks import check_choice, check_number, check_whole, require
from pmap.errors import ConfigError, InputError

__all__ = [
    "CLUSTER_METHODS",
    "KNOWN_LAYERS",
    "FIT_SAMPLE_CELLS",
    "ClusterParams",
    "Standardised",
    "ClusterResult",
    "standardise",
    "kmeans",
    "fcm_memberships",
    "fuzzy_cmeans",
    "fuzziness_performance_index",
    "normalized_classification_entropy",
    "modified_partition_entropy",
    "choose_n_zones",
    "cluster_zones",
    "zone_means",
    "zone_rates",
]

#: Values of ``clusters.method``.
CLUSTER_METHODS: tuple[str, ...] = ("off", "kmeans", "fuzzy_cmeans")

#: Layers a run maps that clustering may use (names as in the run's layers); any other name
#: must be a user raster of ``clusters.rasters``.  ``stp`` is the soil-test P that drives the
#: rates (the lab value, or the model's soil-test equivalent).
KNOWN_LAYERS: tuple[str, ...] = (
    "stp", "ph", "total_p", "available_p", "fixation_risk", "caco3", "clay",
    "base_saturation", "om",
)

#: Most cells a clustering is fitted on; larger fields are fitted on a seeded random
#: subsample of this many cells and every cell is assigned to the fitted centres.
FIT_SAMPLE_CELLS: int = 20_000

#: Most zones (the zone raster is uint8 and zone 0 means "no zone").
_MAX_ZONES_LIMIT = 20


@dataclass(frozen=True)
class ClusterParams:
    """Zones by clustering of standardised layers (config section ``[clusters]``)."""

    method: str = field(
        default="off",
        metadata={
            "unit": "",
            "doc": "off (zones are the soil-test classes of [zones]), kmeans or fuzzy_cmeans",
            "source": "k-means: scikit-learn KMeans; fuzzy c-means: Bezdek (1981)",
        },
    )
    layers: tuple[str, ...] = field(
        default=("stp", "ph"),
        metadata={
            "unit": "",
            "doc": "layers clustered, each standardised to z-scores over the field: stp, ph, "
            "total_p, available_p, fixation_risk, caco3, clay, base_saturation, om, or the "
            "name of a user raster of clusters.rasters",
            "source": "common practice, no source",
        },
    )
    n_zones: int = field(
        default=0,
        metadata={
            "unit": "zones",
            "doc": "number of zones; 0 = chosen among 2..clusters.max_zones by the least sum "
            "of the ranks of the fuzziness performance index and the normalised partition "
            "entropy H / ln c (ties to fewer zones)",
            "source": "Odeh, Chittleborough & McBratney (1992); Bezdek (1981); Fridgen et al. "
            "(2004)",
        },
    )
    max_zones: int = field(
        default=6,
        metadata={
            "unit": "zones",
            "doc": "largest number of zones tried when clusters.n_zones = 0 (at least 2)",
            "source": "common practice, no source",
        },
    )
    fuzziness: float = field(
        default=2.0,
        metadata={
            "unit": "",
            "doc": "fuzziness exponent m of fuzzy c-means (> 1; 1 approaches k-means); also "
            "gives the memberships from which the indices of a k-means partition are computed",
            "source": "Bezdek (1981)",
        },
    )
    seed: int = field(
        default=0,
        metadata={
            "unit": "",
            "doc": "seed of the random starts and of the subsample of cells the clustering is "
            "fitted on (fields of more than 20,000 cells); the same seed gives the same zones",
            "source": "common practice, no source",
        },
    )
    rasters: dict[str, str] = field(
        default_factory=dict,
        metadata={
            "unit": "",
            "doc": "user rasters (GeoTIFF) as name = path, e.g. elevation = \"dem.tif\"; read "
            "onto the run's grid (bilinear) and clustered when the name is in clusters.layers",
            "source": "common practice, no source",
        },
    )
    rates_kg_ha: tuple[float, ...] = field(
        default=(),
        metadata={
            "unit": "kg P2O5/ha",
            "doc": "P2O5 rate of each zone, zone 1 (lowest mean soil-test P) first; one rate "
            "per zone the run finds; empty = the [rates] rule at each zone's mean soil-test P",
            "source": "common practice, no source",
        },
    )

    def __post_init__(self) -> None:
        check_choice("clusters.method", self.method, CLUSTER_METHODS)
        layers = self.layers
        require(isinstance(layers, (tuple, list)) and len(layers) > 0
                and all(isinstance(n, str) and n for n in layers),
                "clusters.layers", "be a non-empty list of layer names", layers)
        object.__setattr__(self, "layers", tuple(layers))
        repeated = sorted({n for n in self.layers if self.layers.count(n) > 1})
        require(not repeated, "clusters.layers", f"name each layer once ({', '.join(repeated)} "
                "repeated)", list(self.layers))
        require(isinstance(self.rasters, Mapping), "clusters.rasters",
                "be a table of name = path", self.rasters)
        rasters = dict(self.rasters)
        for name, path in rasters.items():
            key = f"clusters.rasters.{name}"
            require(name not in KNOWN_LAYERS, key, f"not reuse the name of a mapped layer "
                    f"({', '.join(KNOWN_LAYERS)}); rename the raster", name)
            require(isinstance(path, str) and bool(path.strip()), key,
                    "be the path of a GeoTIFF", path)
            require(name in self.layers, key, f"be named in clusters.layers to be used (add "
                    f"{name!r} there or remove the raster)", list(self.layers))
        object.__setattr__(self, "rasters", rasters)
        unknown = [n for n in self.layers if n not in KNOWN_LAYERS and n not in rasters]
        require(not unknown, "clusters.layers", f"name mapped layers ({', '.join(KNOWN_LAYERS)}) "
                f"or rasters of clusters.rasters; unknown: {', '.join(unknown)}",
                list(self.layers))
        check_whole("clusters.n_zones", self.n_zones, ge=0)
        require(self.n_zones != 1, "clusters.n_zones",
                "be 0 (choose by the indices) or at least 2", self.n_zones)
        require(self.n_zones <= _MAX_ZONES_LIMIT, "clusters.n_zones",
                f"be at most {_MAX_ZONES_LIMIT}", self.n_zones)
        check_whole("clusters.max_zones", self.max_zones, ge=2)
        require(self.max_zones <= _MAX_ZONES_LIMIT, "clusters.max_zones",
                f"be at most {_MAX_ZONES_LIMIT}", self.max_zones)
        check_number("clusters.fuzziness", self.fuzziness, gt=1, finite=True)
        check_whole("clusters.seed", self.seed, ge=0)
        rates = tuple(self.rates_kg_ha)
        for rate in rates:
            check_number("clusters.rates_kg_ha", rate, ge=0, finite=True)
        object.__setattr__(self, "rates_kg_ha", tuple(float(r) for r in rates))
        if rates and self.n_zones:
            require(len(rates) == self.n_zones, "clusters.rates_kg_ha",
                    f"give one rate per zone (clusters.n_zones = {self.n_zones})", list(rates))


# --------------------------------------------------------------------------- standardising


@dataclass(frozen=True, eq=False)
class Standardised:
    """Layers as z-scores over the usable cells (see :func:`standardise`).

    ``X`` holds one row per cell where ``valid`` is True (row-major order), one column per
    name of ``names``; ``mean`` and ``std`` (original units) turn it back:
    ``X * std + mean``.  ``dropped`` lists constant layers left out.
    """

    X: np.ndarray
    names: tuple[str, ...]
    valid: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    dropped: tuple[str, ...] = ()

    def to_original(self, z: np.ndarray) -> np.ndarray:
        """Z-scores (rows of ``names``' columns) back in the layers' own units."""
        return np.asarray(z, dtype=float) * self.std + self.mean


def standardise(layers: Mapping[str, np.ndarray], mask: np.ndarray) -> Standardised:
    """Z-scores of layers over the cells inside ``mask`` where every layer is finite.

    Parameters
    ----------
    layers : mapping of str to numpy.ndarray
        Layers of the grid's shape, each in its own unit (mg/kg, pH units, m, ...).
    mask : numpy.ndarray of bool
        Cells inside the field.

    Returns
    -------
    Standardised
        ``X`` (n_cells, n_layers) of z-scores (population standard deviation), the names
        kept, the mask of cells used, the means and standard deviations.  A layer that is
        constant over those cells carries no information for zoning: it is dropped and
        named in ``dropped``.

    Raises
    ------
    pmap.errors.InputError
        A layer of another shape; no cell with every layer finite; every layer constant.
    """
    mask = np.asarray(mask, dtype=bool)
    if not layers:
        raise InputError("no layers to cluster: name some in clusters.layers")
    valid = mask.copy()
    arrays = {}
    for name, layer in layers.items():
        array = np.asarray(layer, dtype=float)
        if array.shape != mask.shape:
            raise InputError(f"clustering layer {name!r} has shape {array.shape}, the field's "
                             f"grid {mask.shape}")
        arrays[name] = array
        valid &= np.isfinite(array)
    if not valid.any():
        raise InputError(f"no cell of the field has a value in every clustering layer "
                         f"({', '.join(arrays)}); check that the layers cover the field")
    names, columns, means, stds, dropped = [], [], [], [], []
    for name, array in arrays.items():
        values = array[valid]
        mean = float(values.mean())
        std = float(values.std())
        if not std > 1e-9 * max(abs(mean), 1.0):
            dropped.append(name)
            continue
        names.append(name)
        columns.append((values - mean) / std)
        means.append(mean)
        stds.append(std)
    if not names:
        raise InputError(f"every clustering layer is constant over the field "
                         f"({', '.join(dropped)}): nothing to cluster; name other layers in "
                         "clusters.layers or set clusters.method = \"off\"")
    return Standardised(np.column_stack(columns), tuple(names), valid, np.array(means),
                        np.array(stds), tuple(dropped))


# --------------------------------------------------------------------------- clustering


def _sq_distances(X: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """Squared Euclidean distances (n, c), memory n x c (no n x c x d temporary)."""
    d2 = ((X**2).sum(axis=1)[:, None] - 2.0 * X @ centres.T + (centres**2).sum(axis=1)[None, :])
    return np.maximum(d2, 0.0)


def kmeans(X: np.ndarray, k: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Hard k-means partition (scikit-learn ``KMeans``, k-means++ starts, ``n_init=10``).

    Parameters
    ----------
    X : numpy.ndarray, shape (n, d)
        Points (z-scores).
    k : int
        Number of clusters, 1 <= k <= n.
    seed : int
        Seed of the starts; the same seed gives the same partition.

    Returns
    -------
    labels : numpy.ndarray of int, shape (n,)
        Cluster 0..k-1 of each point.
    centres : numpy.ndarray, shape (k, d)
        Cluster centres (units of ``X``).
    """
    from sklearn.cluster import KMeans
    from threadpoolctl import threadpool_limits

    X = np.asarray(X, dtype=float)
    # One OpenMP thread: on a field's few thousand cells the threads' start-up and contention
    # cost more than they give (5,400 cells, 10 starts: 1.3 s with two threads on a busy
    # two-core machine, 0.03 s with one); batch runs parallelise over fields anyway.
    with threadpool_limits(limits=1, user_api="openmp"):
        fit = KMeans(n_clusters=int(k), n_init=10, random_state=int(seed)).fit(X)
    return fit.labels_.astype(int), np.asarray(fit.cluster_centers_, dtype=float)


def fcm_memberships(X: np.ndarray, centres: np.ndarray, m: float = 2.0) -> np.ndarray:
    """Fuzzy c-means memberships of points to given centres (Bezdek 1981).

    ``u_ij = 1 / sum_k (d_ij / d_ik) ** (2 / (m - 1))`` with Euclidean distances ``d``; a
    point on a centre belongs to it alone (shared equally among coincident centres).

    Parameters
    ----------
    X : numpy.ndarray, shape (n, d)
        Points.
    centres : numpy.ndarray, shape (c, d)
        Centres (units of ``X``).
    m : float
        Fuzziness exponent, > 1.

    Returns
    -------
    numpy.ndarray, shape (n, c)
        Memberships in [0, 1]; each row sums to 1.
    """
    if not m > 1:
        raise ValueError(f"the fuzziness exponent m must be > 1, got {m}")
    d2 = _sq_distances(np.asarray(X, float), np.asarray(centres, float))
    nearest = d2.min(axis=1, keepdims=True)
    on_centre = nearest[:, 0] <= 1e-300
    # Relative to each row's smallest distance every term is at most 1, so nothing overflows:
    # (d_ij^2 / d_min^2) ** (-1 / (m - 1)) = (d_ij / d_min) ** (-2 / (m - 1)).
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = (d2 / np.where(on_centre[:, None], 1.0, nearest)) ** (-1.0 / (m - 1.0))
    inv[on_centre] = (d2[on_centre] <= 1e-300).astype(float)
    return inv / inv.sum(axis=1, keepdims=True)


def _plus_plus_starts(X: np.ndarray, c: int, rng: np.random.Generator) -> np.ndarray:
    """c distinct starting centres by D^2 seeding (Arthur & Vassilvitskii 2007)."""
    centres = [X[rng.integers(len(X))]]
    d2 = ((X - centres[0]) ** 2).sum(axis=1)
    for _ in range(1, c):
        total = d2.sum()
        idx = rng.choice(len(X), p=d2 / total) if total > 0 else rng.integers(len(X))
        centres.append(X[idx])
        d2 = np.minimum(d2, ((X - X[idx]) ** 2).sum(axis=1))
    return np.array(centres)


def fuzzy_cmeans(
    X: np.ndarray,
    c: int,
    m: float = 2.0,
    seed: int = 0,
    tol: float = 1e-5,
    max_iter: int = 500,
    n_init: int = 3,
) -> tuple[np.ndarray, np.ndarray]:
    """Fuzzy c-means (Bezdek 1981): alternate the two necessary conditions of a minimum.

    Minimises ``J_m = sum_i sum_j u_ij^m ||x_i - v_j||^2`` by alternating
    ``v_j = sum_i u_ij^m x_i / sum_i u_ij^m`` and the membership update of
    :func:`fcm_memberships`, until no membership changes by more than ``tol``.  Each of
    ``n_init`` runs starts from centres drawn by D^2 seeding; the run of least ``J_m`` wins.
    Hard labels are the argmax of the memberships.

    Parameters
    ----------
    X : numpy.ndarray, shape (n, d)
        Points (z-scores).
    c : int
        Number of clusters, 1 <= c <= n.
    m : float
        Fuzziness exponent, > 1 (2 is the usual choice; towards 1 the partition hardens).
    seed : int
        Seed of the starts; the same seed gives the same result.
    tol : float
        Convergence threshold on the largest change of a membership.
    max_iter : int
        Most iterations of a run.
    n_init : int
        Runs from different starts.

    Returns
    -------
    memberships : numpy.ndarray, shape (n, c)
        Memberships of each point; rows sum to 1.
    centres : numpy.ndarray, shape (c, d)
        Cluster centres (units of ``X``).
    """
    X = np.asarray(X, dtype=float)
    c = int(c)
    if not 1 <= c <= len(X):
        raise ValueError(f"need 1 <= c <= n points, got c = {c} for {len(X)} points")
    if not m > 1:
        raise ValueError(f"the fuzziness exponent m must be > 1, got {m}")
    rng = np.random.default_rng(seed)
    best: tuple[float, np.ndarray, np.ndarray] | None = None
    for _ in range(max(1, int(n_init))):
        centres = _plus_plus_starts(X, c, rng)
        u = fcm_memberships(X, centres, m)
        for _ in range(int(max_iter)):
            w = u**m
            centres = (w.T @ X) / w.sum(axis=0)[:, None]
            u_new = fcm_memberships(X, centres, m)
            change = float(np.abs(u_new - u).max())
            u = u_new
            if change <= tol:
                break
        objective = float(((u**m) * _sq_distances(X, centres)).sum())
        if best is None or objective < best[0]:
            best = (objective, u, centres)
    assert best is not None
    return best[1], best[2]


# --------------------------------------------------------------------------- indices


def _memberships(u: np.ndarray) -> np.ndarray:
    u = np.asarray(u, dtype=float)
    if u.ndim != 2 or u.shape[1] < 2 or u.shape[0] < 1:
        raise ValueError(f"memberships must be (n points, c >= 2 clusters), got {u.shape}")
    return u


def fuzziness_performance_index(u: np.ndarray) -> float:
    """Fuzziness performance index of a fuzzy partition (Odeh, Chittleborough & McBratney 1992).

    ``FPI = 1 - (c F - 1) / (c - 1)`` with ``F = sum_i sum_j u_ij^2 / n`` Bezdek's partition
    coefficient, i.e. one minus the normalised partition coefficient: 0 for a crisp
    partition, 1 when every point belongs equally to every cluster.  Fridgen et al. (2004)
    use it to choose the number of management zones (smaller is better).  The same quantity
    is often transcribed as ``1 - c/(c - 1) [1 - F]``, which reverses its scale (1 when
    crisp); pmap keeps the scale the index is read on.

    Parameters
    ----------
    u : numpy.ndarray, shape (n, c)
        Memberships (rows sum to 1), c >= 2.
    """
    u = _memberships(u)
    n, c = u.shape
    partition_coefficient = float((u**2).sum() / n)
    return 1.0 - (c * partition_coefficient - 1.0) / (c - 1.0)


def _partition_entropy(u: np.ndarray) -> float:
    """Bezdek's partition entropy ``H = -sum u ln u / n`` (natural log; 0 ln 0 = 0)."""
    n = u.shape[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(u > 0, u * np.log(u), 0.0)
    return float(-terms.sum() / n)


def normalized_classification_entropy(u: np.ndarray) -> float:
    """Normalised classification entropy of a fuzzy partition (Fridgen et al. 2004).

    ``NCE = n / (n - c) * H`` with ``H = -sum_i sum_j u_ij ln u_ij / n`` Bezdek's partition
    entropy (natural logarithm): 0 for a crisp partition, ``n / (n - c) ln c`` when every
    point belongs equally to every cluster.  Smaller is better.

    Parameters
    ----------
    u : numpy.ndarray, shape (n, c)
        Memberships (rows sum to 1), 2 <= c < n.
    """
    u = _memberships(u)
    n, c = u.shape
    if n <= c:
        raise ValueError(f"NCE needs more points than clusters, got {n} points, {c} clusters")
    return n / (n - c) * _partition_entropy(u)


def modified_partition_entropy(u: np.ndarray) -> float:
    """Partition entropy scaled by its maximum: ``MPE = H / ln c`` (Bezdek 1981).

    0 for a crisp partition, 1 when every point belongs equally to every cluster (the
    partition entropy lies in [0, ln c]).  Boydell & McBratney (2002) call it the modified
    partition entropy; with the FPI it chooses the number of zones (:func:`choose_n_zones`).

    Parameters
    ----------
    u : numpy.ndarray, shape (n, c)
        Memberships (rows sum to 1), c >= 2.
    """
    u = _memberships(u)
    return _partition_entropy(u) / math.log(u.shape[1])


def choose_n_zones(table: Sequence[Mapping[str, Any]]) -> int:
    """The number of zones the indices favour: least sum of the FPI and MPE ranks.

    Each index (:func:`fuzziness_performance_index`, :func:`modified_partition_entropy`;
    smaller is better) is ranked over the candidates (1 = smallest; tied values share the
    mean rank); the candidate with the least sum of its two ranks wins, a tie going to fewer
    zones.  When both indices favour the same number, that number wins.

    Parameters
    ----------
    table : sequence of mapping
        One row per candidate with keys ``n_zones``, ``fpi``, ``mpe``.
    """
    from scipy.stats import rankdata

    if not table:
        raise ValueError("no candidate number of zones")
    counts = np.array([int(r["n_zones"]) for r in table])
    ranks = rankdata([r["fpi"] for r in table]) + rankdata([r["mpe"] for r in table])
    order = np.lexsort((counts, ranks))
    return int(counts[order[0]])


# --------------------------------------------------------------------------- zones


@dataclass(frozen=True, eq=False)
class ClusterResult:
    """Management zones by clustering (see :func:`cluster_zones`).

    Attributes
    ----------
    zones : numpy.ndarray of uint8, shape of the grid
        Zone 1..n_zones per cell, numbered by ascending mean soil-test P (zone 1 the poorest);
        0 outside the field and where a layer has no value.
    max_membership : numpy.ndarray of float, shape of the grid
        Membership of each cell in its zone (fuzzy c-means memberships to the centres with
        the run's exponent, for k-means too); NaN where ``zones`` is 0.
    method : str
        ``kmeans`` or ``fuzzy_cmeans``.
    n_zones : int
        Zones found.
    chosen_by : str
        ``indices`` (least FPI + MPE rank sum) or ``user`` (``clusters.n_zones``).
    layers : tuple of str
        Layers clustered (constant layers left out, see ``dropped``).
    dropped : tuple of str
        Layers left out because they were constant over the field.
    order_layer : str
        Layer whose zone means number the zones (``stp`` when clustered).
    centres : numpy.ndarray, shape (n_zones, n_layers)
        Cluster centres in the layers' own units, zone 1 first.
    means : numpy.ndarray, shape (n_zones, n_layers)
        Mean of each layer over the cells of each zone (own units).
    n_cells : tuple of int
        Cells of each zone.
    index_table : tuple of dict
        Per candidate number of zones: ``n_zones``, ``fpi``, ``nce``, ``mpe`` and for
        k-means ``wcss`` (within-cluster sum of squares of the fitted cells, in squared
        z-score units) and ``silhouette`` (mean silhouette of up to 2,000 fitted cells).
    n_valid_cells, n_fit_cells, n_unzoned_cells : int
        Cells clustered, cells the clustering was fitted on, field cells lacking a layer.
    fuzziness, seed :
        The exponent and seed used.
    notes : tuple of str
        What the clustering did on the user's behalf (dropped layers, subsample, ...).
    """

    zones: np.ndarray
    max_membership: np.ndarray
    method: str
    n_zones: int
    chosen_by: str
    layers: tuple[str, ...]
    dropped: tuple[str, ...]
    order_layer: str
    centres: np.ndarray
    means: np.ndarray
    n_cells: tuple[int, ...]
    index_table: tuple[dict[str, float], ...]
    n_valid_cells: int
    n_fit_cells: int
    n_unzoned_cells: int
    fuzziness: float
    seed: int
    notes: tuple[str, ...] = ()

    @property
    def labels(self) -> tuple[str, ...]:
        """Zone names, zone 1 first: ``"zone 1"``, ``"zone 2"``, ..."""
        return tuple(f"zone {i}" for i in range(1, self.n_zones + 1))

    def as_dict(self) -> dict[str, Any]:
        """Plain JSON-able values for summary.json."""
        zones = []
        for i, label in enumerate(self.labels):
            zones.append({
                "zone": i + 1, "label": label, "n_cells": int(self.n_cells[i]),
                "centre": {n: float(v) for n, v in zip(self.layers, self.centres[i], strict=True)},
                "mean": {n: float(v) for n, v in zip(self.layers, self.means[i], strict=True)},
            })
        return {
            "method": self.method, "n_zones": self.n_zones, "chosen_by": self.chosen_by,
            "rule": "least sum of the FPI and MPE ranks, ties to fewer zones; NCE reported only",
            "layers": list(self.layers), "dropped_constant_layers": list(self.dropped),
            "numbered_by": f"ascending mean {self.order_layer}",
            "fuzziness": self.fuzziness, "seed": self.seed,
            "n_valid_cells": self.n_valid_cells, "n_fit_cells": self.n_fit_cells,
            "n_unzoned_cells": self.n_unzoned_cells,
            "indices": [dict(r) for r in self.index_table], "zones": zones,
            "notes": list(self.notes),
        }


def _silhouette(X: np.ndarray, labels: np.ndarray, seed: int) -> float:
    from sklearn.metrics import silhouette_score

    if not 2 <= len(np.unique(labels)) <= len(X) - 1:
        return float("nan")
    return float(silhouette_score(X, labels, sample_size=min(2000, len(X)), random_state=seed))


def _fit(X: np.ndarray, c: int, params: ClusterParams) -> tuple[np.ndarray, dict[str, float]]:
    """Centres of one candidate c, and its index row (on the fitted cells)."""
    m = params.fuzziness
    if params.method == "kmeans":
        labels, centres = kmeans(X, c, params.seed)
        u = fcm_memberships(X, centres, m)
        wcss = float(((X - centres[labels]) ** 2).sum())
        extra = {"wcss": wcss, "silhouette": _silhouette(X, labels, params.seed)}
    else:
        u, centres = fuzzy_cmeans(X, c, m, params.seed)
        extra = {}
    row = {"n_zones": c, "fpi": fuzziness_performance_index(u),
           "nce": normalized_classification_entropy(u), "mpe": modified_partition_entropy(u)}
    row.update(extra)
    return centres, row


def cluster_zones(
    layers: Mapping[str, np.ndarray],
    mask: np.ndarray,
    params: ClusterParams,
    *,
    max_fit_cells: int = FIT_SAMPLE_CELLS,
) -> ClusterResult:
    """Management zones by k-means or fuzzy c-means of standardised layers.

    Parameters
    ----------
    layers : mapping of str to numpy.ndarray
        The run's layers on the grid (at least those of ``params.layers``; user rasters
        already read onto the grid), each in its own unit.  ``stp`` is soil-test P (mg/kg).
    mask : numpy.ndarray of bool
        Cells inside the field.
    params : ClusterParams
        ``method`` kmeans or fuzzy_cmeans, layers, number of zones, exponent, seed.
    max_fit_cells : int
        Fields with more usable cells are fitted on a seeded random subsample of this many;
        every cell is then assigned to the fitted centres.

    Returns
    -------
    ClusterResult
        Zone raster (1 = lowest mean soil-test P), centres, index table, chosen number.

    Raises
    ------
    pmap.errors.ConfigError
        ``clusters.method`` is off, a layer of ``clusters.layers`` is not in ``layers``, or
        ``clusters.n_zones`` exceeds the distinct cells.
    pmap.errors.InputError
        See :func:`standardise`.
    """
    if params.method == "off":
        raise ConfigError("clusters.method is \"off\": set kmeans or fuzzy_cmeans to cluster")
    missing = [n for n in params.layers if n not in layers]
    if missing:
        raise ConfigError(f"clusters.layers names {', '.join(missing)}, which this run does not "
                          f"have (it has {', '.join(sorted(layers))}); remove "
                          f"{'it' if len(missing) == 1 else 'them'} from clusters.layers")
    mask = np.asarray(mask, dtype=bool)
    std = standardise({n: layers[n] for n in params.layers}, mask)
    notes = [f"layer {n} is constant over the field and was left out" for n in std.dropped]
    X = std.X
    n_valid = len(X)
    n_unzoned = int(mask.sum()) - n_valid
    if n_unzoned:
        notes.append(f"{n_unzoned} field cells lack a value in some clustering layer and have "
                     "no zone")
    rng = np.random.default_rng(params.seed)
    if n_valid > max_fit_cells:
        fit_rows = np.sort(rng.choice(n_valid, size=max_fit_cells, replace=False))
        notes.append(f"fitted on a random subsample of {max_fit_cells} of {n_valid} cells "
                     f"(seed {params.seed}); every cell takes its nearest centre")
    else:
        fit_rows = np.arange(n_valid)
    X_fit = X[fit_rows]
    n_distinct = len(np.unique(X_fit, axis=0))
    if params.n_zones:
        if params.n_zones > n_distinct - 1:
            raise ConfigError(f"clusters.n_zones = {params.n_zones} needs more distinct cells "
                              f"than zones; the field has {n_distinct}: lower clusters.n_zones")
        candidates = [params.n_zones]
    else:
        top = min(params.max_zones, n_distinct - 1)
        if top < 2:
            raise InputError(f"the clustering layers take only {n_distinct} distinct values "
                             "over the field: too few to form zones")
        if top < params.max_zones:
            notes.append(f"tried at most {top} zones: the field has {n_distinct} distinct cells")
        candidates = list(range(2, top + 1))
    fits = {c: _fit(X_fit, c, params) for c in candidates}
    table = tuple(fits[c][1] for c in candidates)
    chosen = params.n_zones or choose_n_zones(table)
    centres = fits[chosen][0]

    u = fcm_memberships(X, centres, params.fuzziness)
    hard = np.argmin(_sq_distances(X, centres), axis=1)
    present = [j for j in range(chosen) if (hard == j).any()]
    if len(present) < chosen:
        notes.append(f"{chosen - len(present)} of {chosen} clusters took no cell and were "
                     "left out")
    order_layer = "stp" if "stp" in std.names else std.names[0]
    col = std.names.index(order_layer)
    original = std.to_original(X)
    mean_of = {j: original[hard == j].mean(axis=0) for j in present}
    ranked = sorted(present, key=lambda j: (mean_of[j][col], j))
    zone_of = np.zeros(chosen, dtype=np.uint8)
    for zone, j in enumerate(ranked, start=1):
        zone_of[j] = zone
    zones = np.zeros(mask.shape, dtype=np.uint8)
    zones[std.valid] = zone_of[hard]
    confidence = np.full(mask.shape, np.nan)
    confidence[std.valid] = u[np.arange(n_valid), hard]
    return ClusterResult(
        zones=zones, max_membership=confidence, method=params.method, n_zones=len(ranked),
        chosen_by="user" if params.n_zones else "indices", layers=std.names,
        dropped=std.dropped, order_layer=order_layer,
        centres=std.to_original(centres[ranked]), means=np.array([mean_of[j] for j in ranked]),
        n_cells=tuple(int((hard == j).sum()) for j in ranked), index_table=table,
        n_valid_cells=n_valid, n_fit_cells=len(fit_rows), n_unzoned_cells=n_unzoned,
        fuzziness=float(params.fuzziness), seed=int(params.seed), notes=tuple(notes),
    )


# --------------------------------------------------------------------------- rates


def zone_means(zones: np.ndarray, values: np.ndarray, n_zones: int) -> np.ndarray:
    """Mean of ``values`` over the cells of each zone 1..n_zones (NaN cells ignored).

    Returns
    -------
    numpy.ndarray, shape (n_zones,)
        Item i - 1 is the mean over zone i in the unit of ``values``; NaN for a zone without
        a finite value.
    """
    zones = np.asarray(zones)
    values = np.asarray(values, dtype=float)
    if values.shape != zones.shape:
        raise InputError(f"values have shape {values.shape}, the zones {zones.shape}")
    out = np.full(int(n_zones), np.nan)
    for i in range(1, int(n_zones) + 1):
        sample = values[(zones == i) & np.isfinite(values)]
        if sample.size:
            out[i - 1] = sample.mean()
    return out


def zone_rates(
    result: ClusterResult,
    params: ClusterParams,
    rate_fn: Callable[[np.ndarray], np.ndarray],
    mean_stp: Sequence[float] | np.ndarray,
) -> np.ndarray:
    """P2O5 rate of each zone (kg P2O5/ha), zone 1 first.

    From ``clusters.rates_kg_ha`` when it is set (the user's table, used as given), else
    ``rate_fn`` at each zone's mean soil-test P.

    Parameters
    ----------
    result : ClusterResult
        The zones.
    params : ClusterParams
        ``rates_kg_ha``: one rate per zone, or empty.
    rate_fn : callable
        Soil-test P (mg/kg, array) -> P2O5 rate (kg/ha, array), e.g.
        ``lambda stp: p2o5_rate_kg_ha(stp, rule)``.
    mean_stp : sequence of float
        Mean soil-test P of each zone (mg/kg), zone 1 first (see :func:`zone_means`).

    Raises
    ------
    pmap.errors.ConfigError
        ``clusters.rates_kg_ha`` does not hold one rate per zone found.
    """
    n = result.n_zones
    if params.rates_kg_ha:
        given = len(params.rates_kg_ha)
        if given != n:
            raise ConfigError(
                f"clusters.rates_kg_ha has {given} rates but the run found {n} zones: give "
                f"{n} rates, zone 1 (lowest mean soil-test P) first, or set "
                f"clusters.n_zones = {given}")
        return np.array(params.rates_kg_ha, dtype=float)
    stp = np.asarray(mean_stp, dtype=float)
    if stp.shape != (n,):
        raise ValueError(f"mean_stp needs one value per zone ({n}), got shape {stp.shape}")
    return np.asarray(rate_fn(stp), dtype=float).reshape(n)
