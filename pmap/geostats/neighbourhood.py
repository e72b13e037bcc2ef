"""Ordinary kriging from each target's nearest samples: the engine for dense data.

Each target is kriged from its ``k`` nearest samples (within a search radius, if one is
given), in covariance form::

    [ C  f ] [ w  ]   [ c0 ]
    [ f' 0 ] [ nu ] = [ 1  ]

With ``C = L L'`` (Cholesky), ``u = C^-1 f`` and ``s = f' u``, the solution needs per
target only

* the estimate ``m + c0' g`` with the local mean ``m = u' z / s`` and ``g = C^-1 (z - m f)``,
* the variance ``sill - |L^-1 c0|^2 + (1 - u' c0)^2 / s``,
* the Lagrange term ``mu = -nu = (1 - u' c0) / s`` (the variogram-form sign of
  :mod:`pmap.geostats.kriging`),

where ``L``, ``u``, ``s``, ``m`` and ``g`` depend only on the neighbour set.  On a grid,
neighbouring cells mostly share their set (about five cells per set with 10^4 samples
onto 10^6 cells), so each distinct set is factorised once: the sets of a block of targets
are found by hashing their sorted sample indices, factorised by one batched Cholesky, and
every target then costs one triangular solve of size ``k``, vectorised across the block.
Targets with fewer than ``k`` samples in the radius use the ones they have (the missing
slots are padded with decoupled dummies of weight 0); targets with none get NaN.

Memory is bounded by the block size: peak use does not grow with the number of targets
beyond the three output arrays.

The pieces shared with sequential simulation (:mod:`pmap.geostats.simulation`) are public:
:class:`NeighbourSearch` (the k nearest within a radius, ties by index, either engine) and
:func:`simple_kriging_weights` (the same factorisation, simple kriging with mean 0).
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from pmap.errors import ModelFitError, PmapWarning
from pmap.geostats.variogram import VariogramModel, _check_points, _semivariance_into

__all__ = [
    "ENGINES",
    "numba_available",
    "resolve_engine",
    "LocalSystems",
    "NeighbourSearch",
    "simple_kriging_weights",
    "merge_close_samples",
    "local_ordinary_kriging",
    "local_leave_one_out",
    "DEFAULT_BLOCK",
]

#: Targets handled per block: bounds memory at roughly ``DEFAULT_BLOCK * k^2`` floats.
DEFAULT_BLOCK = 32768
# Reciprocal condition estimate, (min diag L / max diag L)^2, below which a local system is
# regularised (a relative jitter on its diagonal) and counted in a warning.
_RCOND_LOCAL = 1e-12
#: Implementations of the local solve.
ENGINES: tuple[str, ...] = ("auto", "numba", "numpy")
# Model kinds the compiled kernel evaluates (the matern needs scipy's Bessel function).
_NUMBA_KINDS = ("spherical", "exponential", "gaussian", "stable")
# Targets per parallel block of the compiled kernel.
_NUMBA_BLOCK = 2048
# Local systems per batch of the numpy simple-kriging solve: memory about 4 x this x k^2 floats.
_SK_BLOCK = 2048
# Multipliers of the set hash (odd 64-bit integers; fixed so runs are reproducible).
_HASH = np.random.default_rng(20261202).integers(1, 2**63 - 1, size=512, dtype=np.uint64) | 1


@dataclass(frozen=True)
class LocalSystems:
    """Counts of what the neighbourhood solve met, for the record.

    Attributes
    ----------
    targets : int
        Targets kriged.
    distinct_sets : int
        Neighbour sets factorised (summed over blocks).
    regularised : int
        Local systems that were ill-conditioned and got a diagonal jitter.
    no_neighbours : int
        Targets with no sample within the radius (left NaN).
    """

    targets: int
    distinct_sets: int
    regularised: int
    no_neighbours: int


def merge_close_samples(
    coords: np.ndarray, values: np.ndarray, within_m: float
) -> tuple[np.ndarray, np.ndarray, int]:
    """Average samples that lie within ``within_m`` of each other (chained), m.

    Returns
    -------
    coords, values : numpy.ndarray
        One point per group: the mean position and mean value.
    n_merged : int
        Samples removed by merging (input count minus output count).
    """
    coords, values = _check_points(coords, values)
    tree = cKDTree(coords)
    pairs = tree.query_pairs(float(within_m), output_type="ndarray")
    if pairs.size == 0:
        return coords, values, 0
    n = coords.shape[0]
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    k, label = connected_components(graph, directed=False)
    counts = np.bincount(label, minlength=k)
    merged_xy = np.column_stack([np.bincount(label, weights=coords[:, j], minlength=k)
                                 for j in range(2)]) / counts[:, None]
    merged_z = np.bincount(label, weights=values, minlength=k) / counts
    return merged_xy, merged_z, int(n - k)


def _set_hash(idx_sorted: np.ndarray) -> np.ndarray:
    """A 64-bit hash of each row of sorted sample indices (wrapping arithmetic)."""
    k = idx_sorted.shape[1]
    with np.errstate(over="ignore"):
        return (idx_sorted.astype(np.uint64) * _HASH[:k]).sum(axis=1, dtype=np.uint64)


def _factorise_sets(
    xy: np.ndarray, z: np.ndarray, sets: np.ndarray, model: VariogramModel
) -> tuple[np.ndarray, ...]:
    """Cholesky factor and solve vectors of each neighbour set (unit-sill model).

    ``sets`` holds sample indices per row; index ``n`` (= len(z)) marks an empty slot.
    Returns ``chol (B, k, k)``, ``u (B, k)``, ``s (B,)``, ``mean (B,)``, ``g (B, k)``,
    ``real (B, k)`` and the number of regularised sets.
    """
    n = z.size
    real = sets < n
    safe = np.where(real, sets, 0)
    chol, regularised = _cholesky_sets(xy, safe, real, model)
    f = real.astype(float)
    u = _cho_solve_batch(chol, f)
    s = np.einsum("bk,bk->b", f, u)
    zz = np.where(real, z[safe], 0.0)
    mean = np.einsum("bk,bk->b", u, zz) / s
    g = _cho_solve_batch(chol, zz - mean[:, None] * f)
    return chol, u, s, mean, g, real, regularised


def _cholesky_sets(
    xy: np.ndarray, safe: np.ndarray, real: np.ndarray, model: VariogramModel
) -> tuple[np.ndarray, int]:
    """Batched Cholesky factors of the unit-sill covariance matrices of point sets.

    ``safe`` (B, k) indexes ``xy``; slots where ``real`` is False are decoupled dummies
    (covariance 1 on the diagonal, 0 elsewhere).  A set whose reciprocal condition
    estimate ``(min diag L / max diag L)^2`` is below ``_RCOND_LOCAL`` gets a diagonal
    jitter lifting its smallest eigenvalue to 1e-10.  Returns the factors (B, k, k) and
    the number of sets regularised.
    """
    p = xy[safe]                                            # (B, k, 2)
    diff = p[:, :, None, :] - p[:, None, :, :]
    h = np.sqrt(np.einsum("bijc,bijc->bij", diff, diff))
    cov = np.empty_like(h)
    _semivariance_into(model, h, cov)
    np.subtract(1.0, cov, out=cov)                          # unit sill: C = 1 - gamma
    pair_real = real[:, :, None] & real[:, None, :]
    cov[~pair_real] = 0.0
    k = safe.shape[1]
    eye = np.eye(k, dtype=bool)
    cov[:, eye] = 1.0                                       # dummies decoupled, C = 1
    regularised = 0
    try:
        chol = np.linalg.cholesky(cov)
        diag = np.diagonal(chol, axis1=1, axis2=2)
        bad = (diag.min(axis=1) / diag.max(axis=1)) ** 2 < _RCOND_LOCAL
    except np.linalg.LinAlgError:
        chol = None
        bad = np.linalg.eigvalsh(cov)[:, 0] < _RCOND_LOCAL
    if np.any(bad):
        regularised = int(bad.sum())
        low = np.minimum(np.linalg.eigvalsh(cov[bad])[:, 0], 0.0)
        jitter = (-low + 1e-10)[:, None] * np.ones(k)
        fixed = cov[bad]
        fixed[:, eye] += jitter
        cov[bad] = fixed
        chol = np.linalg.cholesky(cov)
    return chol, regularised


def _forward(chol: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``L y = rhs`` for a stack of lower-triangular ``L (B, k, k)``, ``rhs (B, k)``."""
    k = rhs.shape[1]
    y = np.empty_like(rhs)
    for i in range(k):
        acc = rhs[:, i] - np.einsum("bj,bj->b", chol[:, i, :i], y[:, :i]) if i else rhs[:, i]
        y[:, i] = acc / chol[:, i, i]
    return y


def _backward(chol: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve ``L' x = rhs`` for a stack of lower-triangular ``L``."""
    k = rhs.shape[1]
    x = np.empty_like(rhs)
    for i in range(k - 1, -1, -1):
        acc = rhs[:, i] - np.einsum("bj,bj->b", chol[:, i + 1:, i], x[:, i + 1:])
        x[:, i] = acc / chol[:, i, i]
    return x


def _cho_solve_batch(chol: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    return _backward(chol, _forward(chol, rhs))


def _check_neighbourhood(neighbours: int, radius: float | None) -> None:
    if isinstance(neighbours, bool) or int(neighbours) != neighbours or neighbours < 1:
        raise ValueError(f"neighbours must be a whole number >= 1, got {neighbours!r}")
    if radius is not None and not (np.isfinite(radius) and radius > 0):
        raise ValueError(f"radius must be a positive distance in m, got {radius!r}")


class NeighbourSearch:
    """The ``k`` nearest of a fixed set of points, within a radius: the engines' one search.

    Local kriging (:func:`local_ordinary_kriging`) and sequential simulation
    (:mod:`pmap.geostats.simulation`) find neighbours with it.  The numba engine bins the
    points in square buckets of about ``k / 2`` points and searches rings of buckets
    (:func:`pmap.geostats._local_numba.knn_targets`); the numpy engine queries a KD-tree
    (``scipy.spatial.cKDTree``).  Both return the same neighbours in the same order:
    nearest first, equally distant points by their index (also at the k-th place), and
    bit-identical distances ``sqrt(dx*dx + dy*dy)``.

    Distances are plain Euclidean in the coordinates given: pass a model's
    :meth:`~pmap.geostats.variogram.VariogramModel.isotropic_coords` for an anisotropic one.

    Parameters
    ----------
    points : numpy.ndarray, shape (n, 2)
        Points searched, m; ``n`` may be 0.
    k : int
        Neighbours per query, >= 1.
    radius : float, optional
        Search radius, m: farther points are not returned (the bound carries a relative
        allowance of 1e-12 for round-off).
    engine : {"auto", "numba", "numpy"}
        As in :func:`local_ordinary_kriging`; "auto" takes numba when it is installed,
        unless ``PMAP_NUMPY_ONLY`` is set.
    """

    def __init__(
        self, points: np.ndarray, k: int, radius: float | None = None, *, engine: str = "auto"
    ) -> None:
        points = np.ascontiguousarray(points, dtype=float)
        if points.ndim != 2 or points.shape[1] != 2:
            raise ValueError(f"points must have shape (n, 2), got {points.shape}")
        _check_neighbourhood(k, radius)
        self.points = points
        self.k = int(k)
        self.radius = None if radius is None else float(radius)
        self.engine = resolve_engine(engine)
        self._bound = np.inf if radius is None else float(radius) * (1.0 + 1e-12)
        if points.shape[0] and self.engine == "numba":
            self._buckets = _buckets(points, self.k)
        elif points.shape[0]:
            self._tree = cKDTree(points, balanced_tree=False)

    def query(
        self, queries: np.ndarray, *, exclude: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Indices and distances of each query's ``k`` nearest points.

        Parameters
        ----------
        queries : numpy.ndarray, shape (m, 2)
            Query points, m.
        exclude : numpy.ndarray of int, shape (m,), optional
            Per query, the index of one point not to return (``-1`` for none), e.g. the
            query's own index when the queries are the points (leave-one-out).

        Returns
        -------
        index : numpy.ndarray of int64, shape (m, k)
            Point indices, nearest first; ``-1`` in slots left empty (fewer points, or
            none within the radius).
        distance : numpy.ndarray, shape (m, k)
            Their distances, m; ``inf`` in empty slots.
        """
        queries = np.ascontiguousarray(queries, dtype=float).reshape(-1, 2)
        m, n, k = queries.shape[0], self.points.shape[0], self.k
        if exclude is not None:
            exclude = np.asarray(exclude, dtype=np.int64).reshape(m)
        if n == 0 or m == 0:
            return np.full((m, k), -1, dtype=np.int64), np.full((m, k), np.inf)
        if self.engine == "numba":
            return self._query_buckets(queries, exclude)
        return self._query_tree(queries, exclude)

    def _query_buckets(
        self, queries: np.ndarray, exclude: np.ndarray | None
    ) -> tuple[np.ndarray, np.ndarray]:
        from pmap.geostats._local_numba import knn_rows, knn_targets

        m = queries.shape[0]
        border, bstart, b0x, b0y, size, nbx, nby = self._buckets
        own = np.full(m, -1, dtype=np.int64) if exclude is None else exclude
        index = np.empty((m, self.k), dtype=np.int64)
        distance = np.empty((m, self.k))
        args = (self.points, queries, own, bstart, border, b0x, b0y, size, nbx, nby, self.k,
                self._bound**2)
        if m <= _NUMBA_BLOCK:                   # one block: no threads to start
            knn_rows(*args, 0, m, index, distance)
        else:
            knn_targets(*args, _NUMBA_BLOCK, index, distance)
        return index, distance

    def _tree_rows(
        self, queries: np.ndarray, width: int, exclude: np.ndarray | None
    ) -> tuple[np.ndarray, np.ndarray]:
        """The KD-tree's ``width`` nearest (ties in its own order), ``exclude`` dropped."""
        extra = 0 if exclude is None else 1
        d, i = self._tree.query(queries, k=width + extra, distance_upper_bound=self._bound,
                                workers=-1)
        d = d.reshape(-1, width + extra)
        i = i.reshape(-1, width + extra)
        if exclude is not None:
            drop = i == exclude[:, None]
            drop[~drop.any(axis=1), -1] = True              # not among them: drop the last
            keep = ~drop
            d = d[keep].reshape(-1, width)
            i = i[keep].reshape(-1, width)
        return d, i

    def _by_index(self, queries: np.ndarray, d: np.ndarray, i: np.ndarray) -> np.ndarray:
        """Order of each row by squared distance ``dx*dx + dy*dy``, then index: the bucket
        search's order (two squared distances may share one square root)."""
        n = self.points.shape[0]
        p = self.points[np.minimum(i, n - 1)]
        dx = p[:, :, 0] - queries[:, 0, None]
        dy = p[:, :, 1] - queries[:, 1, None]
        d2 = np.where(np.isfinite(d), dx * dx + dy * dy, np.inf)
        return np.lexsort((i, d2))

    def _query_tree(
        self, queries: np.ndarray, exclude: np.ndarray | None
    ) -> tuple[np.ndarray, np.ndarray]:
        n, k = self.points.shape[0], self.k
        if exclude is not None and not np.any(exclude >= 0):
            exclude = None
        avail = n - (0 if exclude is None else 1)
        width = min(k + 1, avail)                           # one more: ties at the k-th place
        d, i = self._tree_rows(queries, width, exclude)
        if width > k:
            kth = d[:, k - 1]
            open_rows = np.flatnonzero(np.isfinite(d[:, k]) & (d[:, k] == kth))
            d, i = d[:, :k].copy(), i[:, :k].copy()
            while open_rows.size:                           # widen until past the tie
                width = min(2 * width, avail)
                dw, iw = self._tree_rows(queries[open_rows], width,
                                         None if exclude is None else exclude[open_rows])
                still = (width < avail) & (dw[:, -1] == kth[open_rows])
                done = ~still
                rows = open_rows[done]
                order = self._by_index(queries[rows], dw[done], iw[done])[:, :k]
                d[rows] = np.take_along_axis(dw[done], order, axis=1)
                i[rows] = np.take_along_axis(iw[done], order, axis=1)
                open_rows = open_rows[still]
        elif width < k:
            d = np.hstack([d, np.full((d.shape[0], k - width), np.inf)])
            i = np.hstack([i, np.full((i.shape[0], k - width), n, dtype=i.dtype)])
        tie = np.flatnonzero(np.any((d[:, 1:] == d[:, :-1]) & np.isfinite(d[:, 1:]), axis=1))
        if tie.size:                                        # equal distances: by index
            order = self._by_index(queries[tie], d[tie], i[tie])
            d[tie] = np.take_along_axis(d[tie], order, axis=1)
            i[tie] = np.take_along_axis(i[tie], order, axis=1)
        i = i.astype(np.int64, copy=False)
        i[i >= n] = -1
        return i, d


def simple_kriging_weights(
    points: np.ndarray,
    targets: np.ndarray,
    sets: np.ndarray,
    model: VariogramModel,
    *,
    engine: str = "auto",
) -> tuple[np.ndarray, np.ndarray, int]:
    """Simple kriging (known mean 0) of each target from its own set of points.

    For target ``t`` with points ``S = sets[t]``: weights ``w = C_SS^-1 c_S`` and standard
    deviation ``sqrt(sill - w' c_S)``, where ``C`` is the model's covariance
    ``sill - gamma(h)``.  Each set's covariance matrix is factorised by the engine's
    Cholesky (:func:`pmap.geostats._local_numba.simple_kriging_sets` for numba, one batched
    ``numpy.linalg.cholesky`` per 2,048 targets for numpy) with the regularisation of
    :func:`local_ordinary_kriging` for a nearly singular set.

    Parameters
    ----------
    points : numpy.ndarray, shape (n, 2)
        Coordinates of the conditioning points, m.
    targets : numpy.ndarray, shape (m, 2)
        Coordinates of the targets, m.
    sets : numpy.ndarray of int, shape (m, k)
        Indices into ``points`` per target; ``-1`` marks an empty slot.  The numba engine
        needs the filled slots first (as :meth:`NeighbourSearch.query` returns them).
    model : VariogramModel
        Covariance model (positive sill); anisotropy is applied to both coordinate sets.
    engine : {"auto", "numba", "numpy"}
        As in :func:`local_ordinary_kriging` (matern models need "numpy" or "auto").

    Returns
    -------
    weights : numpy.ndarray, shape (m, k)
        Simple-kriging weights, 0 in empty slots.
    sd : numpy.ndarray, shape (m,)
        Simple-kriging standard deviation, square root of squared value units; ``sqrt(sill)``
        for a target with an empty set.
    regularised : int
        Local systems that were ill-conditioned and got a diagonal jitter.
    """
    points = np.asarray(points, dtype=float)
    targets = np.asarray(targets, dtype=float)
    sets = np.asarray(sets, dtype=np.int64)
    m = targets.shape[0]
    if sets.ndim != 2 or sets.shape[0] != m:
        raise ValueError(f"sets must have shape ({m}, k), got {sets.shape}")
    if not model.sill > 0:
        raise ValueError("simple kriging needs a model with a positive sill")
    scale = model.sill
    unit = model.with_sill_scaled(1.0 / scale)
    xy = np.ascontiguousarray(unit.isotropic_coords(points))
    txy = np.ascontiguousarray(unit.isotropic_coords(targets))
    k = sets.shape[1]
    weights = np.zeros((m, k))
    var = np.ones(m)
    regularised = 0
    if m and k and _use_numba(engine, unit.kind):
        from pmap.geostats._local_numba import simple_kriging_sets

        counts = np.zeros((m + _NUMBA_BLOCK - 1) // _NUMBA_BLOCK, dtype=np.int64)
        simple_kriging_sets(xy, txy, np.ascontiguousarray(sets), *kernel_model_args(unit),
                            _NUMBA_BLOCK, weights, var, counts)
        regularised = int(counts.sum())
    elif m and k:
        for c0 in range(0, m, _SK_BLOCK):
            c1 = min(c0 + _SK_BLOCK, m)
            ids = sets[c0:c1]
            real = ids >= 0
            safe = np.where(real, ids, 0)
            chol, reg = _cholesky_sets(xy, safe, real, unit)
            regularised += reg
            p = xy[safe]
            d = np.hypot(p[:, :, 0] - txy[c0:c1, 0, None], p[:, :, 1] - txy[c0:c1, 1, None])
            rhs = np.empty_like(d)
            _semivariance_into(unit, d, rhs)
            np.subtract(1.0, rhs, out=rhs)
            rhs[~real] = 0.0
            y = _forward(chol, rhs)
            weights[c0:c1] = _backward(chol, y)
            var[c0:c1] = np.maximum(1.0 - np.einsum("tk,tk->t", y, y), 0.0)
    return weights, np.sqrt(var * scale), regularised


def local_ordinary_kriging(
    coords: np.ndarray,
    values: np.ndarray,
    targets: np.ndarray,
    model: VariogramModel,
    neighbours: int,
    radius: float | None = None,
    *,
    block: int = DEFAULT_BLOCK,
    exclude_self: bool = False,
    engine: str = "auto",
) -> tuple[np.ndarray, np.ndarray, np.ndarray, LocalSystems]:
    """Ordinary kriging of each target from its ``neighbours`` nearest samples.

    Parameters
    ----------
    coords : numpy.ndarray, shape (n, 2)
        Sample coordinates, m; no two alike (merge them first, see
        :func:`merge_close_samples`).
    values : numpy.ndarray, shape (n,)
        Sample values.
    targets : numpy.ndarray, shape (m, 2)
        Prediction points, m.
    model : VariogramModel
        Variogram of ``values``; an anisotropic model searches and weighs in its
        isotropic coordinates (``radius`` is then a distance along the major axis).
    neighbours : int
        Samples per target (all of them if ``n`` is smaller).
    radius : float, optional
        Search radius, m: samples farther away are not used; a target with none gets NaN.
    block : int
        Targets per block; bounds memory.
    exclude_self : bool
        Targets are the samples themselves (``targets is coords``): each is kriged from
        its neighbours other than itself (leave-one-out).
    engine : {"auto", "numba", "numpy"}
        "numba" runs the compiled kernel (:mod:`pmap.geostats._local_numba`), "numpy" the
        pure-numpy path; "auto" takes numba when it is installed and the model kind is one
        it evaluates (not matern), unless the environment variable ``PMAP_NUMPY_ONLY`` is
        set.  Both give the same numbers to round-off.

    Returns
    -------
    estimate, variance, lagrange : numpy.ndarray, shape (m,)
        Value units, squared value units (>= 0), and the variogram-form Lagrange term;
        NaN where no sample lies within the radius.
    stats : LocalSystems
    """
    coords, values = _check_points(coords, values)
    targets = np.asarray(targets, dtype=float)
    if targets.ndim != 2 or targets.shape[1] != 2 or not np.all(np.isfinite(targets)):
        raise ValueError(f"targets must be a finite (m, 2) array, got shape {targets.shape}")
    _check_neighbourhood(neighbours, radius)
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")
    n, m = coords.shape[0], targets.shape[0]
    if n < 2:
        raise ModelFitError(f"ordinary kriging needs at least 2 samples, got {n}")
    k = int(min(neighbours, n - 1 if exclude_self else n))
    scale = model.sill if model.sill > 0 else 1.0
    unit = model.with_sill_scaled(1.0 / scale)
    xy = unit.isotropic_coords(coords)
    txy = unit.isotropic_coords(targets)
    if m == 0:  # nothing to krige (a fit without a map, as in pmap check)
        empty = np.empty(0)
        return empty, empty.copy(), empty.copy(), LocalSystems(0, 0, 0, 0)
    if _use_numba(engine, unit.kind):
        return _numba_path(xy, values, txy, unit, scale, k, radius, exclude_self)
    search = NeighbourSearch(xy, k, radius, engine="numpy")
    estimate = np.full(m, np.nan)
    variance = np.full(m, np.nan)
    lagrange = np.full(m, np.nan)
    n_sets = regularised = empty = 0
    step = max(1, int(block))
    for s0 in range(0, m, step):
        s1 = min(s0 + step, m)
        idx, _ = search.query(txy[s0:s1], exclude=np.arange(s0, s1) if exclude_self else None)
        idx[idx < 0] = n                                    # empty slots sort last
        idx.sort(axis=1)
        has = idx[:, 0] < n
        empty += int((~has).sum())
        rows = np.flatnonzero(has)
        if rows.size == 0:
            continue
        idx = idx[rows]
        _, first, inverse = np.unique(_set_hash(idx), return_index=True, return_inverse=True)
        sets = idx[first]
        if not np.array_equal(sets[inverse], idx):          # hash collision: no sharing
            sets, inverse = idx, np.arange(idx.shape[0])
        n_sets += sets.shape[0]
        chol, u, ssum, mean, g, real, reg = _factorise_sets(xy, values, sets, unit)
        regularised += reg
        # Per target: covariances to its set, one triangular solve.
        p = xy[np.where(real, sets, 0)][inverse]             # (T, k, 2)
        d = np.hypot(p[:, :, 0] - txy[s0 + rows, 0, None], p[:, :, 1] - txy[s0 + rows, 1, None])
        c0 = np.empty_like(d)
        _semivariance_into(unit, d, c0)
        np.subtract(1.0, c0, out=c0)
        dummy = ~real[inverse]
        c0[dummy] = 0.0
        d[dummy] = np.inf
        y = _forward(chol[inverse], c0)
        q = np.einsum("tk,tk->t", y, y)
        t = np.einsum("tk,tk->t", u[inverse], c0)
        ss = ssum[inverse]
        est = mean[inverse] + np.einsum("tk,tk->t", g[inverse], c0)
        mu = (1.0 - t) / ss
        var = 1.0 - q + (1.0 - t) ** 2 / ss
        hit = d.min(axis=1) == 0.0
        if np.any(hit):
            j = np.argmin(d[hit], axis=1)
            est[hit] = values[idx[hit, j]]
            var[hit] = 0.0
            mu[hit] = 0.0
        at = s0 + rows
        estimate[at] = est
        variance[at] = np.maximum(var, 0.0) * scale
        lagrange[at] = mu * scale
    if regularised:
        _warn_regularised(regularised)
    return estimate, variance, lagrange, LocalSystems(m, n_sets, regularised, empty)


def numba_available() -> bool:
    """Whether the compiled kernel can run (numba importable)."""
    try:
        import numba  # noqa: F401
    except ImportError:
        return False
    return True


def resolve_engine(engine: str, kind: str | None = None) -> str:
    """The implementation ``engine`` stands for: ``"numba"`` or ``"numpy"``.

    Parameters
    ----------
    engine : {"auto", "numba", "numpy"}
        "auto" takes numba when it is installed and evaluates ``kind`` (not matern), unless
        the environment variable ``PMAP_NUMPY_ONLY`` is set.
    kind : str, optional
        Variogram family the engine will evaluate; ``None`` when it evaluates none (the
        neighbour search).

    Raises
    ------
    ValueError
        An unknown engine, or "numba" for a family it does not evaluate.
    ImportError
        "numba" without numba installed.
    """
    if engine not in ENGINES:
        raise ValueError(f"engine must be one of {ENGINES}, got {engine!r}")
    if engine == "numpy":
        return "numpy"
    supported = kind is None or kind in _NUMBA_KINDS
    if engine == "numba":
        if not numba_available():
            raise ImportError("engine='numba' needs the numba package (pip install numba)")
        if not supported:
            raise ValueError(f"the numba engine does not evaluate {kind!r} models; use 'numpy'")
        return "numba"
    use = supported and numba_available() and not os.environ.get("PMAP_NUMPY_ONLY")
    return "numba" if use else "numpy"


def _use_numba(engine: str, kind: str | None) -> bool:
    return resolve_engine(engine, kind) == "numba"


def kernel_model_args(unit: VariogramModel) -> tuple[int, float, float, float, float]:
    """A unit-sill model as the compiled kernels take it: kind code, nugget, partial sill,
    range (m) and shape (0 when unshaped)."""
    from pmap.geostats._local_numba import KIND_CODES

    return (KIND_CODES[unit.kind], float(unit.nugget), float(unit.psill), float(unit.range),
            0.0 if unit.shape is None else float(unit.shape))


def _buckets(xy: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray, float, float, float, int, int]:
    """Square buckets of about k/2 samples: order of samples by bucket and bucket offsets."""
    lo = xy.min(axis=0)
    span = np.maximum(xy.max(axis=0) - lo, 0.0)
    n = xy.shape[0]
    area = float(span[0] * span[1])
    size = float(np.sqrt(area * max(k, 2) / (2.0 * n))) if area > 0 else 0.0
    size = max(size, float(span.max()) / max(np.sqrt(n), 1.0), 1e-9)
    nbx = int(span[0] // size) + 1
    nby = int(span[1] // size) + 1
    bx = np.minimum(((xy[:, 0] - lo[0]) // size).astype(np.int64), nbx - 1)
    by = np.minimum(((xy[:, 1] - lo[1]) // size).astype(np.int64), nby - 1)
    bucket = by * nbx + bx
    border = np.argsort(bucket, kind="stable").astype(np.int64)
    bstart = np.zeros(nbx * nby + 1, dtype=np.int64)
    np.cumsum(np.bincount(bucket, minlength=nbx * nby), out=bstart[1:])
    return border, bstart, float(lo[0]), float(lo[1]), size, nbx, nby


def _numba_path(
    xy: np.ndarray, values: np.ndarray, txy: np.ndarray, unit: VariogramModel, scale: float,
    k: int, radius: float | None, exclude_self: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, LocalSystems]:
    from pmap.geostats import _local_numba as kernel

    border, bstart, b0x, b0y, size, nbx, nby = _buckets(xy, k)
    m = txy.shape[0]
    span = np.ptp(txy, axis=0)
    spacing = float(np.sqrt(max(span[0] * span[1], 1e-18) / m)) if m > 1 else size
    order = kernel.z_order(txy, max(min(spacing, size), size * 1e-6))
    self_index = np.arange(m, dtype=np.int64) if exclude_self else np.full(m, -1, dtype=np.int64)
    radius2 = np.inf if radius is None else (float(radius) * (1.0 + 1e-12)) ** 2
    est = np.empty(m)
    var = np.empty(m)
    mu = np.empty(m)
    counts = np.zeros(((m + _NUMBA_BLOCK - 1) // _NUMBA_BLOCK, 3), dtype=np.int64)
    kernel.krige_targets(
        xy, values, txy, order, self_index, bstart, border, b0x, b0y, size, nbx, nby,
        *kernel_model_args(unit), int(k), float(radius2), _NUMBA_BLOCK, est, var, mu, counts,
    )
    n_sets, regularised, empty = (int(v) for v in counts.sum(axis=0))
    if regularised:
        _warn_regularised(regularised)
    return est, var * scale, mu * scale, LocalSystems(m, n_sets, regularised, empty)


def _warn_regularised(count: int) -> None:
    warnings.warn(
        f"{count} local kriging system(s) were numerically singular or nearly so "
        f"(reciprocal condition below {_RCOND_LOCAL:g}) and were regularised with a small "
        "diagonal jitter; a gaussian model without nugget or near-coincident samples cause "
        "this: add a nugget or use another model",
        PmapWarning,
        stacklevel=3,
    )


def local_leave_one_out(
    coords: np.ndarray, values: np.ndarray, model: VariogramModel, neighbours: int,
    radius: float | None = None, *, block: int = DEFAULT_BLOCK, engine: str = "auto",
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Predict every sample from its ``neighbours`` nearest other samples.

    Returns
    -------
    estimate, variance, lagrange : numpy.ndarray, shape (n,)
        As :func:`local_ordinary_kriging`; NaN for a sample with no other within ``radius``.
    """
    coords, values = _check_points(coords, values)
    est, var, mu, _ = local_ordinary_kriging(coords, values, coords, model, neighbours, radius,
                                             block=block, exclude_self=True, engine=engine)
    return est, var, mu
