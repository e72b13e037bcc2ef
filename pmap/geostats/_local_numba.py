"""Compiled kernel of neighbourhood kriging (numba), used by :mod:`pmap.geostats.neighbourhood`.

The same ordinary-kriging algebra as the pure-numpy path of that module.  Targets arrive
in Z-order and are taken in chunks of up to 64 consecutive ones.  Per chunk, the samples
that can be among any of its targets' k nearest (triangle inequality around the chunk's
centre) are gathered from square buckets of samples, sorted by index.  Per target: the k
nearest of those candidates, ranked only within a band around the previous target's k-th
distance (a quickselect when that fails), so the set comes out sorted by index without a
sort; the set looked up among the last 128 factorised in this block; on a miss, the
previous target's factor updated when at most three samples changed (rank-one downdate
of a dropped row, one appended row per new sample), else a fresh Cholesky factorisation,
and the forward solutions ``L^-1 1`` and ``L^-1 z`` redone from the first changed row;
then one forward solve ``y = L^-1 c0`` gives the estimate, variance and Lagrange term.
Blocks of 2,048 targets run in parallel threads.

The bucket search :func:`_knn` (:func:`knn_rows`, :func:`knn_targets`) and the Cholesky
factorisation (:func:`_cholesky`; :func:`simple_kriging_sets` for simple kriging with
known mean 0) are also the numba engine of the module's public ``NeighbourSearch`` and
``simple_kriging_weights``, which :mod:`pmap.geostats.simulation` uses, with
:func:`earlier_knn` for its brute force within a block of the path.

Compiled on first use and cached on disk (``cache=True``); see docs/geostatistics.md for
the measured compile cost.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

#: Model kinds the kernel evaluates itself (others use the numpy path).
KIND_CODES = {"spherical": 0, "exponential": 1, "gaussian": 2, "stable": 3}
_CACHE = 128
# A set that differs from the previous one by at most this many samples in and out is
# factorised by updating the previous factor (O(k^2) per change instead of k^3 / 3) ...
_MAX_CHANGES = 3
# ... for at most this many updates in a row before a fresh factorisation.
_MAX_CHAIN = 32
_RCOND = 1e-12
# Targets (consecutive in Z-order) that share one list of candidate samples ...
_CHUNK = 64
# ... halved while the list is longer than this many times k.
_CHUNK_CANDIDATES = 4
# Candidates near the previous target's k-th distance ranked directly (else quickselect).
_BAND = 32
_FAST = {"reassoc", "contract"}


@njit(cache=True, inline="always")
def _cov(h: float, kind: int, nug: float, ps: float, rng: float, shape: float) -> float:
    """Unit-sill covariance 1 - gamma(h), with gamma(0) = 0."""
    if h <= 0.0:
        return 1.0
    r = h / rng
    if kind == 0:
        st = 1.0 if r >= 1.0 else r * (1.5 - 0.5 * r * r)
    elif kind == 1:
        st = 1.0 - np.exp(-3.0 * r)
    elif kind == 2:
        st = 1.0 - np.exp(-3.0 * r * r)
    else:
        st = 1.0 - np.exp(-3.0 * r**shape)
    return 1.0 - (nug + ps * st)


@njit(cache=True)
def _knn(tx, ty, self_index, xy, bstart, border, b0x, b0y, bsize, nbx, nby, k, radius2,
         best_d, best_i):
    """The k nearest samples of (tx, ty) within the radius; returns how many were found.

    ``best_d`` receives squared distances, ``best_i`` sample indices, nearest first; equally
    distant samples are ordered, and cut at the k-th place, by their index.
    """
    bx = int((tx - b0x) / bsize)
    by = int((ty - b0y) / bsize)
    bx = min(max(bx, 0), nbx - 1)
    by = min(max(by, 0), nby - 1)
    cnt = 0
    r = 0
    while True:
        x_lo = bx - r
        x_hi = bx + r
        y_lo = by - r
        y_hi = by + r
        for yy in range(max(y_lo, 0), min(y_hi, nby - 1) + 1):
            on_edge_y = yy == y_lo or yy == y_hi
            xx = max(x_lo, 0)
            x_end = min(x_hi, nbx - 1)
            while xx <= x_end:
                if on_edge_y or xx == x_lo or xx == x_hi:
                    b = yy * nbx + xx
                    for p in range(bstart[b], bstart[b + 1]):
                        j = border[p]
                        if j == self_index:
                            continue
                        dx = xy[j, 0] - tx
                        dy = xy[j, 1] - ty
                        d2 = dx * dx + dy * dy
                        if d2 > radius2:
                            continue
                        if cnt < k:
                            pos = cnt
                            cnt += 1
                        elif d2 < best_d[k - 1] or (d2 == best_d[k - 1] and j < best_i[k - 1]):
                            pos = k - 1
                        else:
                            continue
                        while pos > 0 and (best_d[pos - 1] > d2
                                           or (best_d[pos - 1] == d2 and best_i[pos - 1] > j)):
                            best_d[pos] = best_d[pos - 1]
                            best_i[pos] = best_i[pos - 1]
                            pos -= 1
                        best_d[pos] = d2
                        best_i[pos] = j
                    xx += 1
                else:
                    xx = x_hi if x_hi <= x_end else x_end + 1
        # Distance from the target to the nearest bucket not yet searched.
        gap = np.inf
        if x_lo > 0:
            gap = min(gap, tx - (b0x + x_lo * bsize))
        if x_hi < nbx - 1:
            gap = min(gap, b0x + (x_hi + 1) * bsize - tx)
        if y_lo > 0:
            gap = min(gap, ty - (b0y + y_lo * bsize))
        if y_hi < nby - 1:
            gap = min(gap, b0y + (y_hi + 1) * bsize - ty)
        if gap == np.inf:
            break
        gap = max(gap, 0.0)
        if gap * gap > radius2:
            break
        if cnt == k and gap * gap > best_d[k - 1]:   # '>': a tie may still win on index
            break
        r += 1
    return cnt


@njit(cache=True)
def _kth_smallest(a, n, kth):
    """The ``kth`` smallest (0-based) of ``a[:n]``; reorders ``a[:n]`` (quickselect)."""
    lo = 0
    hi = n - 1
    while hi > lo:
        pivot = a[(lo + hi) // 2]
        i = lo
        j = hi
        while i <= j:
            while a[i] < pivot:
                i += 1
            while a[j] > pivot:
                j -= 1
            if i <= j:
                tmp = a[i]
                a[i] = a[j]
                a[j] = tmp
                i += 1
                j -= 1
        if kth <= j:
            hi = j
        elif kth >= i:
            lo = i
        else:
            break
    return a[kth]


@njit(cache=True)
def _chunk_candidates(txy, order, lo, hi, with_self, xy, bstart, border, b0x, b0y, bsize, nbx,
                      nby, k, radius2, best_d, best_i, cand, ccx, ccy):
    """Samples that can be among the k nearest of any target ``order[lo:hi]``, by index.

    With c the centre of the targets' bounding box and h its half diagonal, a target's k
    nearest lie within ``h + min(radius, d_k(c) + h)`` of c (triangle inequality; the
    k + 1 nearest when each target leaves itself out).  ``cand`` receives those samples
    sorted by index, ``ccx, ccy`` their coordinates; returns how many.
    """
    xmin = np.inf
    xmax = -np.inf
    ymin = np.inf
    ymax = -np.inf
    for q in range(lo, hi):
        t = order[q]
        xmin = min(xmin, txy[t, 0])
        xmax = max(xmax, txy[t, 0])
        ymin = min(ymin, txy[t, 1])
        ymax = max(ymax, txy[t, 1])
    cx = 0.5 * (xmin + xmax)
    cy = 0.5 * (ymin + ymax)
    h = 0.5 * np.sqrt((xmax - xmin) ** 2 + (ymax - ymin) ** 2)
    kq = k + 1 if with_self else k
    cnt = _knn(cx, cy, -1, xy, bstart, border, b0x, b0y, bsize, nbx, nby, kq, np.inf,
               best_d, best_i)
    reach = np.sqrt(radius2)
    if cnt == kq:
        reach = min(reach, np.sqrt(best_d[kq - 1]) + h)
    big = (h + reach) * (1.0 + 1e-9) + 1e-9    # slack: an extra candidate is harmless
    if big == np.inf:
        x_lo = 0
        x_hi = nbx - 1
        y_lo = 0
        y_hi = nby - 1
    else:
        x_lo = max(int(np.floor((cx - big - b0x) / bsize)), 0)
        x_hi = min(int(np.floor((cx + big - b0x) / bsize)), nbx - 1)
        y_lo = max(int(np.floor((cy - big - b0y) / bsize)), 0)
        y_hi = min(int(np.floor((cy + big - b0y) / bsize)), nby - 1)
    big2 = big * big
    nc = 0
    for yy in range(y_lo, y_hi + 1):
        for xx in range(x_lo, x_hi + 1):
            b = yy * nbx + xx
            for p in range(bstart[b], bstart[b + 1]):
                j = border[p]
                dx = xy[j, 0] - cx
                dy = xy[j, 1] - cy
                if dx * dx + dy * dy <= big2:
                    cand[nc] = j
                    nc += 1
    cand[:nc].sort()
    for i in range(nc):
        ccx[i] = xy[cand[i], 0]
        ccy[i] = xy[cand[i], 1]
    return nc


@njit(cache=True)
def _select_nearest(tx, ty, self_index, cand, ccx, ccy, nc, k, radius2, prev_d2k, step, d2s,
                    scratch, band_d, band_i, members):
    """The k nearest of the candidates ``cand[:nc]`` (at ``ccx, ccy``) within the radius.

    Nearest by squared distance, ties cut at the k-th place by index (as :func:`_knn`);
    ``members`` receives them in the candidates' index order.  The k-th distance of the
    previous target, ``prev_d2k`` (squared; negative if none), moves by at most ``step``
    (m, the distance between the two targets): only the candidates in that band are
    ranked, and a quickselect over all of them is the fallback, so the result is exact
    either way.  Returns (count, squared k-th distance or -1 when fewer were found,
    squared distance of the nearest and its index, the lowest index among equals).
    """
    for i in range(nc):
        dx = ccx[i] - tx
        dy = ccy[i] - ty
        d2s[i] = dx * dx + dy * dy
    if radius2 < np.inf:
        for i in range(nc):
            if d2s[i] > radius2:
                d2s[i] = np.inf
    if self_index >= 0:
        for i in range(nc):
            if cand[i] == self_index:
                d2s[i] = np.inf
    n_valid = 0
    for i in range(nc):
        n_valid += d2s[i] < np.inf
    kk = 0
    dmin = np.inf
    jmin = -1
    if n_valid <= k:
        for i in range(nc):
            if d2s[i] < np.inf:
                members[kk] = cand[i]
                kk += 1
                if d2s[i] < dmin:
                    dmin = d2s[i]
                    jmin = cand[i]
        return kk, -1.0, dmin, jmin
    found = False
    thr = 0.0
    thr_j = 0
    if prev_d2k >= 0.0:
        dk = np.sqrt(prev_d2k)
        lo = dk - step
        lo2 = lo * lo * (1.0 - 1e-12) if lo > 0.0 else -1.0
        hi2 = (dk + step) ** 2 * (1.0 + 1e-12)
        n_in = 0
        n_band = 0
        for i in range(nc):
            d2 = d2s[i]
            n_in += d2 < lo2
            n_band += (d2 >= lo2) & (d2 <= hi2)
        if n_in < k and k <= n_in + n_band and n_band <= band_d.size:
            nb = 0
            for i in range(nc):
                d2 = d2s[i]
                if d2 >= lo2 and d2 <= hi2:     # insertion by (distance, index)
                    pos = nb
                    while pos > 0 and band_d[pos - 1] > d2:
                        band_d[pos] = band_d[pos - 1]
                        band_i[pos] = band_i[pos - 1]
                        pos -= 1
                    band_d[pos] = d2
                    band_i[pos] = cand[i]
                    nb += 1
            thr = band_d[k - n_in - 1]
            thr_j = band_i[k - n_in - 1]
            found = True
    if not found:
        for i in range(nc):
            scratch[i] = d2s[i]
        thr = _kth_smallest(scratch, nc, k - 1)
        need = k
        for i in range(nc):
            need -= d2s[i] < thr
        for i in range(nc):
            if d2s[i] == thr:
                need -= 1
                if need == 0:
                    thr_j = cand[i]
                    break
    for i in range(nc):
        d2 = d2s[i]
        if d2 < thr or (d2 == thr and cand[i] <= thr_j):
            members[kk] = cand[i]
            kk += 1
            if d2 < dmin:
                dmin = d2
                jmin = cand[i]
    return kk, thr, dmin, jmin


@njit(cache=True, fastmath=_FAST)
def _cholesky(xy, members, kk, kind, nug, ps, rng, shape, L):
    """Cholesky factor of the unit-sill covariance matrix of the set ``members`` into L.

    A pivot below ``_RCOND`` restarts with a diagonal jitter (1e-10, then x100 each time).
    Returns whether a jitter was needed.
    """
    jitter = 0.0
    regularised = False
    while True:
        ok = True
        for i in range(kk):
            xi = xy[members[i], 0]
            yi = xy[members[i], 1]
            for j in range(i + 1):
                if i == j:
                    c = 1.0 + jitter
                else:
                    dx = xy[members[j], 0] - xi
                    dy = xy[members[j], 1] - yi
                    c = _cov(np.sqrt(dx * dx + dy * dy), kind, nug, ps, rng, shape)
                acc = c
                for p in range(j):
                    acc -= L[i, p] * L[j, p]
                if i == j:
                    if acc < _RCOND:
                        ok = False
                        break
                    L[i, i] = np.sqrt(acc)
                else:
                    L[i, j] = acc / L[j, j]
            if not ok:
                break
        if ok:
            break
        regularised = True
        jitter = 1e-10 if jitter == 0.0 else jitter * 100.0
    return regularised


@njit(cache=True, fastmath=_FAST)
def _forward_ones_values(z, members, kk, L, a, b, start):
    """a = L^-1 1 and b = L^-1 z over the set ``members``, rows ``start..kk-1``.

    Rows before ``start`` are kept (they do not change when the factor's later rows are
    updated).  Returns (s, ab) = (1'C^-1 1, 1'C^-1 z) = (a'a, a'b).
    """
    for i in range(start, kk):
        ai = 1.0
        bi = z[members[i]]
        for p in range(i):
            ai -= L[i, p] * a[p]
            bi -= L[i, p] * b[p]
        a[i] = ai / L[i, i]
        b[i] = bi / L[i, i]
    s = 0.0
    ab = 0.0
    for i in range(kk):
        s += a[i] * a[i]
        ab += a[i] * b[i]
    return s, ab


@njit(cache=True, fastmath=_FAST)
def _drop_member(L, kk, p):
    """Cholesky factor of the set without its p-th member (in factor order), in place.

    Rows below p move up one; the trailing block gets the rank-one update by the old
    column p (Givens-like cholupdate), O(kk^2).  Returns False if it breaks down.
    """
    m = kk - p - 1
    x = np.empty(m)
    for i in range(m):
        x[i] = L[p + 1 + i, p]
    for i in range(p, kk - 1):                  # shift rows p+1.. up, columns < p kept
        for j in range(p):
            L[i, j] = L[i + 1, j]
        for j in range(p, i + 1):
            L[i, j] = L[i + 1, j + 1]
    for j in range(m):
        jj = p + j
        d = L[jj, jj]
        r = np.sqrt(d * d + x[j] * x[j])
        if not r > 0.0:
            return False
        c = r / d
        sn = x[j] / d
        L[jj, jj] = r
        for i in range(j + 1, m):
            ii = p + i
            L[ii, jj] = (L[ii, jj] + sn * x[i]) / c
            x[i] = c * x[i] - sn * L[ii, jj]
    return True


@njit(cache=True, fastmath=_FAST)
def _append_member(xy, L, order, kk, new, kind, nug, ps, rng, shape):
    """Add sample ``new`` as the last member of the factor (row kk), O(kk^2).

    Returns False if the new diagonal is not safely positive (then refactorise).
    """
    xn = xy[new, 0]
    yn = xy[new, 1]
    ss = 0.0
    for i in range(kk):
        dx = xy[order[i], 0] - xn
        dy = xy[order[i], 1] - yn
        acc = _cov(np.sqrt(dx * dx + dy * dy), kind, nug, ps, rng, shape)
        for p in range(i):
            acc -= L[i, p] * L[kk, p]
        L[kk, i] = acc / L[i, i]
        ss += L[kk, i] * L[kk, i]
    d2 = 1.0 - ss
    if d2 < _RCOND:
        return False
    L[kk, kk] = np.sqrt(d2)
    order[kk] = new
    return True


@njit(cache=True, parallel=True, fastmath=_FAST)
def krige_targets(xy, z, txy, order, self_index, bstart, border, b0x, b0y, bsize, nbx, nby,
                  kind, nug, ps, rng, shape, k, radius2, block, est, var, mu, counts):
    """Krige ``txy[order]`` in blocks; write unit-sill results at the original positions.

    ``self_index[t]`` is the sample to leave out for target ``t`` (-1 for none).
    ``counts`` (n_blocks, 3) receives per block: sets factorised, regularised, empty.
    """
    m = order.size
    n_blocks = (m + block - 1) // block
    with_self = False
    for t in range(m):
        if self_index[t] >= 0:
            with_self = True
            break
    for bi in prange(n_blocks):
        cache_sets = np.full((_CACHE, k), -1, dtype=np.int64)
        cache_order = np.full((_CACHE, k), -1, dtype=np.int64)
        cache_chain = np.zeros(_CACHE, dtype=np.int64)
        cache_kk = np.zeros(_CACHE, dtype=np.int64)
        last = -1
        removed = np.empty(_MAX_CHANGES, dtype=np.int64)
        added = np.empty(_MAX_CHANGES, dtype=np.int64)
        cache_L = np.zeros((_CACHE, k, k))
        cache_a = np.zeros((_CACHE, k))
        cache_b = np.zeros((_CACHE, k))
        cache_s = np.zeros(_CACHE)
        cache_ab = np.zeros(_CACHE)
        next_slot = 0
        best_d = np.empty(k + 1)
        best_i = np.empty(k + 1, dtype=np.int64)
        members = np.empty(k, dtype=np.int64)
        y = np.empty(k)
        n_sets = 0
        n_reg = 0
        n_empty = 0
        cand = np.empty(xy.shape[0], dtype=np.int64)
        d2s = np.empty(xy.shape[0])
        scratch = np.empty(xy.shape[0])
        ccx = np.empty(xy.shape[0])
        ccy = np.empty(xy.shape[0])
        band_d = np.empty(_BAND)
        band_i = np.empty(_BAND, dtype=np.int64)
        d2k = -1.0
        px = 0.0
        py = 0.0
        q_end = min((bi + 1) * block, m)
        chunk_hi = bi * block
        nc = 0
        for q in range(bi * block, q_end):
            if q == chunk_hi:                           # the next chunk of targets
                size = _CHUNK
                while True:
                    chunk_hi = min(q + size, q_end)
                    nc = _chunk_candidates(txy, order, q, chunk_hi, with_self, xy, bstart,
                                           border, b0x, b0y, bsize, nbx, nby, k, radius2,
                                           best_d, best_i, cand, ccx, ccy)
                    if nc <= _CHUNK_CANDIDATES * k or size == 1:
                        break
                    size //= 2
            t = order[q]
            tx = txy[t, 0]
            ty = txy[t, 1]
            step = np.sqrt((tx - px) ** 2 + (ty - py) ** 2)
            px = tx
            py = ty
            kk, d2k, dmin, jmin = _select_nearest(tx, ty, self_index[t], cand, ccx, ccy, nc, k,
                                                  radius2, d2k, step, d2s, scratch, band_d,
                                                  band_i, members)
            if kk == 0:
                est[t] = np.nan
                var[t] = np.nan
                mu[t] = np.nan
                n_empty += 1
                continue
            if dmin == 0.0:
                est[t] = z[jmin]
                var[t] = 0.0
                mu[t] = 0.0
                continue
            slot = -1
            for c in range(_CACHE):
                if cache_kk[c] == kk:
                    same = True
                    for i in range(kk):
                        if cache_sets[c, i] != members[i]:
                            same = False
                            break
                    if same:
                        slot = c
                        break
            if slot < 0:
                slot = next_slot
                next_slot = (next_slot + 1) % _CACHE
                updated = False
                if (last >= 0 and last != slot and cache_kk[last] == kk
                        and cache_chain[last] < _MAX_CHAIN):
                    # The previous set, one or two samples changed: update its factor.
                    nr = 0
                    na = 0
                    a = 0
                    b = 0
                    while (a < kk or b < kk) and nr <= _MAX_CHANGES and na <= _MAX_CHANGES:
                        if b >= kk or (a < kk and cache_sets[last, a] < members[b]):
                            if nr < _MAX_CHANGES:
                                removed[nr] = cache_sets[last, a]
                            nr += 1
                            a += 1
                        elif a >= kk or members[b] < cache_sets[last, a]:
                            if na < _MAX_CHANGES:
                                added[na] = members[b]
                            na += 1
                            b += 1
                        else:
                            a += 1
                            b += 1
                    if nr <= _MAX_CHANGES and na <= _MAX_CHANGES:
                        L = cache_L[slot]
                        od = cache_order[slot]
                        for i in range(kk):
                            od[i] = cache_order[last, i]
                            for j in range(i + 1):
                                L[i, j] = cache_L[last, i, j]
                        cur = kk
                        ok = True
                        first = kk - na                 # first row that changes
                        for r in range(nr):
                            pos = 0
                            while od[pos] != removed[r]:
                                pos += 1
                            first = min(first, pos)
                            if not _drop_member(L, cur, pos):
                                ok = False
                                break
                            for i in range(pos, cur - 1):
                                od[i] = od[i + 1]
                            cur -= 1
                        if ok:
                            for r in range(na):
                                if not _append_member(xy, L, od, cur, added[r], kind, nug, ps,
                                                      rng, shape):
                                    ok = False
                                    break
                                cur += 1
                        if ok:
                            for i in range(first):
                                cache_a[slot, i] = cache_a[last, i]
                                cache_b[slot, i] = cache_b[last, i]
                            s_, ab_ = _forward_ones_values(z, od, kk, L, cache_a[slot],
                                                           cache_b[slot], first)
                            cache_chain[slot] = cache_chain[last] + 1
                            updated = True
                if not updated:
                    for i in range(kk):
                        cache_order[slot, i] = members[i]
                    reg = _cholesky(xy, members, kk, kind, nug, ps, rng, shape, cache_L[slot])
                    s_, ab_ = _forward_ones_values(z, members, kk, cache_L[slot],
                                                   cache_a[slot], cache_b[slot], 0)
                    cache_chain[slot] = 0
                    if reg:
                        n_reg += 1
                cache_s[slot] = s_
                cache_ab[slot] = ab_
                cache_kk[slot] = kk
                for i in range(kk):
                    cache_sets[slot, i] = members[i]
                n_sets += 1
            last = slot
            L = cache_L[slot]
            # y = L^-1 c0; with a = L^-1 1 and b = L^-1 z: tt = 1'C^-1 c0 = a'y,
            # z'C^-1 c0 = b'y, and the weights C^-1 c0 + C^-1 1 (1 - tt) / s.
            qq = 0.0
            tt = 0.0
            zy = 0.0
            for i in range(kk):
                j = cache_order[slot, i]
                dx = xy[j, 0] - tx
                dy = xy[j, 1] - ty
                acc = _cov(np.sqrt(dx * dx + dy * dy), kind, nug, ps, rng, shape)
                for p in range(i):
                    acc -= L[i, p] * y[p]
                y[i] = acc / L[i, i]
                qq += y[i] * y[i]
                tt += cache_a[slot, i] * y[i]
                zy += cache_b[slot, i] * y[i]
            s_ = cache_s[slot]
            est[t] = zy + cache_ab[slot] * (1.0 - tt) / s_
            mu[t] = (1.0 - tt) / s_
            vv = 1.0 - qq + (1.0 - tt) * (1.0 - tt) / s_
            var[t] = vv if vv > 0.0 else 0.0
        counts[bi, 0] = n_sets
        counts[bi, 1] = n_reg
        counts[bi, 2] = n_empty


@njit(cache=True)
def knn_rows(xy, txy, self_index, bstart, border, b0x, b0y, bsize, nbx, nby, k, radius2,
             lo, hi, out_i, out_d):
    """The ``k`` nearest samples of targets ``lo..hi-1`` by :func:`_knn`, in one thread.

    ``out_i`` (m, k) receives sample indices nearest first (ties by index) and ``-1`` in
    empty slots; ``out_d`` (m, k) the distances, ``inf`` in empty slots.
    """
    best_d = np.empty(k)
    best_i = np.empty(k, dtype=np.int64)
    for t in range(lo, hi):
        cnt = _knn(txy[t, 0], txy[t, 1], self_index[t], xy, bstart, border, b0x, b0y,
                   bsize, nbx, nby, k, radius2, best_d, best_i)
        for j in range(cnt):
            out_i[t, j] = best_i[j]
            out_d[t, j] = np.sqrt(best_d[j])
        for j in range(cnt, k):
            out_i[t, j] = -1
            out_d[t, j] = np.inf


@njit(cache=True, parallel=True)
def knn_targets(xy, txy, self_index, bstart, border, b0x, b0y, bsize, nbx, nby, k, radius2,
                block, out_i, out_d):
    """:func:`knn_rows` for all targets, blocks of ``block`` targets in parallel threads."""
    m = txy.shape[0]
    n_blocks = (m + block - 1) // block
    for bi in prange(n_blocks):
        knn_rows(xy, txy, self_index, bstart, border, b0x, b0y, bsize, nbx, nby, k, radius2,
                 bi * block, min((bi + 1) * block, m), out_i, out_d)


@njit(cache=True)
def earlier_knn(pts, k, radius2, out_i):
    """Brute force: each point's ``k`` nearest among the points before it in ``pts``.

    ``out_i`` (b, k) receives indices into ``pts``, nearest first (squared distance, then
    index, as :func:`_knn`), ``-1`` where a point has fewer within the radius.  One
    thread: it serves blocks of about a thousand points, for which starting the threads
    of a parallel loop costs more than it saves.
    """
    b = pts.shape[0]
    for r in range(b):
        best_d = np.empty(k)
        best_i = np.empty(k, dtype=np.int64)
        cnt = 0
        tx = pts[r, 0]
        ty = pts[r, 1]
        for j in range(r):
            dx = pts[j, 0] - tx
            dy = pts[j, 1] - ty
            d2 = dx * dx + dy * dy
            if d2 > radius2:
                continue
            if cnt < k:
                pos = cnt
                cnt += 1
            elif d2 < best_d[k - 1]:                # j only grows: a tie never wins here
                pos = k - 1
            else:
                continue
            while pos > 0 and best_d[pos - 1] > d2:
                best_d[pos] = best_d[pos - 1]
                best_i[pos] = best_i[pos - 1]
                pos -= 1
            best_d[pos] = d2
            best_i[pos] = j
        for i in range(cnt):
            out_i[r, i] = best_i[i]
        for i in range(cnt, k):
            out_i[r, i] = -1


@njit(cache=True, parallel=True)
def simple_kriging_sets(xy, txy, sets, kind, nug, ps, rng, shape, block, weights, var, counts):
    """Simple kriging (known mean 0, unit sill) of each target from its own point set.

    ``sets`` (m, k) holds indices into ``xy``, the filled slots first and ``-1`` after them.
    Per target: the set's Cholesky factor (:func:`_cholesky`), ``y = L^-1 c0``, the
    variance ``1 - y'y`` into ``var`` and the weights ``L'^-1 y`` into ``weights`` (0 in
    empty slots).  ``counts`` (n_blocks,) receives the regularised systems per block.
    """
    m, k = sets.shape
    n_blocks = (m + block - 1) // block
    for bi in prange(n_blocks):
        L = np.zeros((k, k))
        members = np.empty(k, dtype=np.int64)
        y = np.empty(k)
        n_reg = 0
        for t in range(bi * block, min((bi + 1) * block, m)):
            kk = 0
            while kk < k and sets[t, kk] >= 0:
                members[kk] = sets[t, kk]
                kk += 1
            for i in range(kk, k):
                weights[t, i] = 0.0
            if kk == 0:
                var[t] = 1.0
                continue
            if _cholesky(xy, members, kk, kind, nug, ps, rng, shape, L):
                n_reg += 1
            tx = txy[t, 0]
            ty = txy[t, 1]
            qq = 0.0
            for i in range(kk):
                dx = xy[members[i], 0] - tx
                dy = xy[members[i], 1] - ty
                acc = _cov(np.sqrt(dx * dx + dy * dy), kind, nug, ps, rng, shape)
                for p in range(i):
                    acc -= L[i, p] * y[p]
                y[i] = acc / L[i, i]
                qq += y[i] * y[i]
            for i in range(kk - 1, -1, -1):
                acc = y[i]
                for p in range(i + 1, kk):
                    acc -= L[p, i] * weights[t, p]
                weights[t, i] = acc / L[i, i]
            vv = 1.0 - qq
            var[t] = vv if vv > 0.0 else 0.0
        counts[bi] = n_reg


@njit(cache=True, parallel=True)
def covariance_block(xy, txy, kind, nug, ps, rng, shape, out):
    """Unit-sill covariances ``out[i, j] = 1 - gamma(|xy_i - txy_j|)`` (global kriging).

    One loop per model kind, so that the inner loop has no branch on the kind and
    vectorises.
    """
    n = xy.shape[0]
    m = txy.shape[0]
    tx = txy[:, 0].copy()
    ty = txy[:, 1].copy()
    inv = 1.0 / rng
    top = 1.0 - nug
    for i in prange(n):
        xi = xy[i, 0]
        yi = xy[i, 1]
        row = out[i]
        for j in range(m):
            dx = tx[j] - xi
            dy = ty[j] - yi
            row[j] = np.sqrt(dx * dx + dy * dy) * inv
        if kind == 0:
            for j in range(m):
                r = min(row[j], 1.0)
                row[j] = top - ps * (r * (1.5 - 0.5 * r * r))
        elif kind == 1:
            for j in range(m):
                row[j] = top - ps * (1.0 - np.exp(-3.0 * row[j]))
        elif kind == 2:
            for j in range(m):
                row[j] = top - ps * (1.0 - np.exp(-3.0 * row[j] * row[j]))
        else:
            for j in range(m):
                row[j] = top - ps * (1.0 - np.exp(-3.0 * row[j] ** shape))
        for j in range(m):                      # gamma(0) = 0: covariance 1 at distance 0
            if tx[j] == xi and ty[j] == yi:
                row[j] = 1.0


@njit(cache=True, parallel=True)
def _morton_keys(txy, x0, y0, cell, keys):
    """Interleaved bits of the targets' cell column and row (21 bits each) into ``keys``."""
    for t in prange(txy.shape[0]):
        qx = min(max(int(np.floor((txy[t, 0] - x0) / cell)), 0), 2**21 - 1)
        qy = min(max(int(np.floor((txy[t, 1] - y0) / cell)), 0), 2**21 - 1)
        key = 0
        for bit in range(21):
            key |= ((qx >> bit) & 1) << (2 * bit)
            key |= ((qy >> bit) & 1) << (2 * bit + 1)
        keys[t] = key


@njit(cache=True)
def _radix_argsort(keys):
    """Stable argsort of non-negative int64 ``keys`` (least significant digit first, 11 bits)."""
    m = keys.size
    top = 0
    for t in range(m):
        top = max(top, keys[t])
    order = np.arange(m)
    spare = np.empty(m, dtype=np.int64)
    shift = 0
    while shift == 0 or (top >> shift) > 0:
        count = np.zeros(2049, dtype=np.int64)
        for t in range(m):
            count[((keys[order[t]] >> shift) & 2047) + 1] += 1
        for d in range(2048):
            count[d + 1] += count[d]
        for t in range(m):
            j = order[t]
            d = (keys[j] >> shift) & 2047
            spare[count[d]] = j
            count[d] += 1
        order, spare = spare, order
        shift += 11
    return order


def z_order(txy: np.ndarray, cell: float) -> np.ndarray:
    """Order of the targets along a Z-order (Morton) curve at resolution ``cell`` (m)."""
    keys = np.empty(txy.shape[0], dtype=np.int64)
    lo = txy.min(axis=0)
    _morton_keys(txy, float(lo[0]), float(lo[1]), float(cell), keys)
    return _radix_argsort(keys)
