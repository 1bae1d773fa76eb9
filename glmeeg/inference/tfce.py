"""Threshold-free cluster enhancement (TFCE), computed exactly from the merge history.

For a map ``x`` on a neighbour graph and a point ``p`` with ``h_p = x[p] > 0``,

    TFCE(p) = integral from 0 to h_p of e_p(h)^E h^H dh,

where ``e_p(h)`` is the number of points in the connected component containing ``p`` of the
superlevel set ``{i : x[i] >= h}``. Between two consecutive point values the component of
``p`` does not change, so the integrand is ``e^E h^H`` with a constant ``e`` and each piece
integrates in closed form to ``e^E (b^(H+1) - a^(H+1)) / (H+1)``. No threshold step is
involved: the result is the integral itself, up to floating-point rounding.

Algorithm: points are swept by decreasing value and joined with union-find (union by size,
path halving). Each point opens a segment of the merge tree: the component it belongs to once
it has joined, with the extent it then has, from the point's height down to the height at
which that component next changes extent (the next point to join it or to merge it with
another), or down to 0. The segment's integral is ``e^E (top^(H+1) - bottom^(H+1)) / (H+1)``,
and a point's TFCE is the sum of the integrals of its segment and of the segments below it.
The sums are taken from the bottom up, so every value is a sum of non-negative terms and keeps
full relative accuracy even at points close to 0. (Carrying a running integral per component
and storing members as offsets to their root, as a weighted union-find does, gives the same
integral but subtracts large running sums near the base: relative errors of ~1e-8 at low points
of a 1,200-point map in our tests.) Ties need nothing special: they give segments of zero
height. Cost: one sort plus a nearly linear sweep over points and edges.

The negative part is the same computation on ``max(-x, 0)``, returned negated.

The compiled kernels are imported lazily by the permutation engine, so importing glmeeg does
not load numba.

References
----------
.. [1] Smith, S. M., & Nichols, T. E. (2009). Threshold-free cluster enhancement: addressing
   problems of smoothing, threshold dependence and localisation in cluster inference.
   NeuroImage, 44(1), 83-98.
"""

from __future__ import annotations

import math

import numpy as np
from numba import get_num_threads, njit, prange

from .clusters import check_finite, check_graph, check_grid, check_maps, neighbour, neighbour_span

__all__ = ["tfce", "max_tfce"]


def _check_exponent(value, name: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}") from None
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {v}")
    return v


def _extent_powers(n_points: int, extent_exponent: float) -> np.ndarray:
    """``e^E`` for every possible extent ``e = 0..n_points`` (shared by all maps); empty for
    the default E = 0.5, which the kernels compute as ``sqrt(e)`` (one table fewer in cache)."""
    if extent_exponent == 0.5:
        return np.empty(0)
    return np.arange(n_points + 1, dtype=np.float64) ** extent_exponent


# ---------------------------------------------------------------------------------------------
# kernels

@njit(cache=True, nogil=True)
def _scratch(n):  # pragma: no cover - compiled
    """Work arrays of one TFCE computation on ``n`` points, reused from map to map (fresh
    allocations of this size are page-faulted in on every map when the allocator hands them
    back to the system, as it does in Dask workers)."""
    return (np.empty(n, dtype=np.uint64), np.empty(n, dtype=np.uint64),
            np.empty(n, dtype=np.int32), np.empty(n, dtype=np.int32),
            np.empty((6, 2048), dtype=np.int64), np.empty(n, dtype=np.int32),
            np.empty((n, 2), dtype=np.int32), np.empty(n, dtype=np.int32))


@njit(cache=True, nogil=True)
def _argsort_radix(x, keys, keys2, idx, idx2, count):  # pragma: no cover - compiled
    """Stable ascending argsort of finite float64 values: least-significant-digit radix sort
    on the IEEE bit patterns (six passes of 11 bits; a pass whose digit is the same for every
    value is skipped). About three times faster than numba's quicksort ``np.argsort`` on maps
    of 32,000 points, and deterministic for ties. -0.0 sorts before +0.0, harmless here.

    ``keys``, ``keys2`` (uint64), ``idx``, ``idx2`` (int32, all of ``x.size``) and ``count``
    (6 x 2048 int64) are work space. Returns the order and the other int32 buffer, now free."""
    n = x.size
    bits = x.view(np.uint64)
    count[:, :] = 0
    sign = np.uint64(1) << np.uint64(63)
    mask = np.uint64(2047)
    for i in range(n):
        # Order-preserving map of a float's bits to an unsigned integer: flip all bits of a
        # negative value, only the sign bit of a positive one.
        u = bits[i]
        if u & sign:
            u = ~u
        else:
            u = u | sign
        keys[i] = u
        idx[i] = i
        for d in range(6):
            count[d, np.intp((u >> np.uint64(11 * d)) & mask)] += 1
    for d in range(6):
        c = count[d]
        skip = False
        for b in range(2048):
            if c[b] == n:
                skip = True
            if c[b] != 0:
                break
        if skip:
            continue
        total = 0
        for b in range(2048):
            t = c[b]
            c[b] = total
            total += t
        shift = np.uint64(11 * d)
        for i in range(n):
            u = keys[i]
            b = np.intp((u >> shift) & mask)
            pos = c[b]
            c[b] = pos + 1
            keys2[pos] = u
            idx2[pos] = idx[i]
        keys, keys2 = keys2, keys
        idx, idx2 = idx2, idx
    return idx, idx2


@njit(cache=True, nogil=True)
def _find(x, parent):  # pragma: no cover - compiled
    """Root of ``x`` in the union-find forest, halving the path on the way."""
    while parent[x] != x:
        g = parent[parent[x]]
        parent[x] = g
        x = g
    return x


@njit(cache=True, nogil=True)
def _sweep(x, order, start, stop, step, sign, indptr, indices, cptr, cidx, n_freqs, n_times,
           ext_pow, a1, parent, sc, top, extent, below, cum, out):  # pragma: no cover - compiled
    """One part (positive: sign = 1, negative: sign = -1) of the TFCE of map ``x``.

    ``order[start:stop:step]`` lists the points with ``sign * x > 0`` by decreasing
    ``sign * x``. The j-th of them (j = 0, 1, ...) opens segment j of the merge tree: its
    component, of ``extent[j]`` points from height ``x[p]`` down to the height at which segment
    ``below[j]`` (> j) opens, or to 0 if ``below[j] == -1``. A point not yet swept has
    ``parent == -1``; a root ``r`` keeps its component's size in ``sc[r, 0]`` and its open
    segment in ``sc[r, 1]`` (one cache line for both). Neighbours come from the CSR arrays or
    the grid (see :func:`glmeeg.inference.clusters.neighbour_span`). Heights are kept raised to
    ``a1 = H + 1``; the division by ``a1`` is done once per point at the end. With ``ext_pow``
    empty, ``e^E`` is ``sqrt(e)`` (E = 0.5, the default). Writes ``sign * TFCE`` to ``out`` at
    those points when ``out`` is not empty, and returns the largest TFCE of the part."""
    parent[:] = -1
    root_e = ext_pow.size == 0
    j = 0
    for k in range(start, stop, step):
        p = order[k]
        parent[p] = p
        r = p
        size_r = 1
        lo, count, i, f, t = neighbour_span(p, indptr, cptr, n_freqs, n_times)
        for e in range(count):
            q = neighbour(p, e, lo, count, i, f, t, indices, cidx, n_freqs, n_times)
            if q < 0 or parent[q] < 0:
                continue
            s = _find(q, parent)
            if s == r:
                continue
            # The extent of the component of s changes at this height: its segment ends here
            # (r is p alone, or a component whose segment was ended at an earlier neighbour).
            below[sc[s, 1]] = j
            size_s = sc[s, 0]
            if size_s > size_r:
                parent[r] = s
                r = s
            else:
                parent[s] = r
            size_r += size_s
        sc[r, 0] = size_r
        sc[r, 1] = j
        h = sign * x[p]
        top[j] = h * h * h if a1 == 3.0 else h ** a1  # the default H = 2 without pow
        extent[j] = size_r
        below[j] = -1
        j += 1
    # Integrate from the bottom up (the segment below has the larger index), so that every
    # value is a sum of non-negative pieces: full relative accuracy even at low points.
    for i in range(j - 1, -1, -1):
        b = below[i]
        w = np.sqrt(np.float64(extent[i])) if root_e else ext_pow[extent[i]]
        if b < 0:
            cum[i] = w * top[i]
        else:
            cum[i] = w * (top[i] - top[b]) + cum[b]
    best = 0.0
    if out.size == 0:
        for i in range(j):
            v = cum[i] / a1
            if v > best:
                best = v
        return best
    i = 0
    for k in range(start, stop, step):
        v = cum[i] / a1
        out[order[k]] = sign * v
        if v > best:
            best = v
        i += 1
    return best


@njit(cache=True, nogil=True)
def _tfce_one(x, g, ext_pow, a1, out, work):  # pragma: no cover - compiled
    """TFCE of one map: writes the signed values to ``out`` (all points) unless ``out`` is
    empty, and returns the largest positive TFCE and the largest |negative TFCE|; ``work``
    from :func:`_scratch`; ``g`` the graph ``(indptr, indices, cptr, cidx, n_freqs, n_times)``."""
    n = x.size
    indptr, indices, cptr, cidx, n_freqs, n_times = g
    keys, keys2, idx, idx2, count, parent, sc, below = work
    order, extent = _argsort_radix(x, keys, keys2, idx, idx2, count)
    # The sort's other buffers are free now: the segment heights, integrals and extents
    # live in them (8 + 8 + 4 bytes a point less to keep in cache).
    top = keys.view(np.float64)
    cum = keys2.view(np.float64)
    # order: negative values first (most negative first), positive values last.
    n_neg = 0
    while n_neg < n and x[order[n_neg]] < 0.0:
        n_neg += 1
    n_nonpos = n_neg
    while n_nonpos < n and x[order[n_nonpos]] <= 0.0:
        n_nonpos += 1
    if out.size:
        for k in range(n_neg, n_nonpos):
            out[order[k]] = 0.0
    hi = _sweep(x, order, n - 1, n_nonpos - 1, -1, 1.0, indptr, indices, cptr, cidx, n_freqs,
                n_times, ext_pow, a1, parent, sc, top, extent, below, cum, out)
    lo = _sweep(x, order, 0, n_neg, 1, -1.0, indptr, indices, cptr, cidx, n_freqs, n_times,
                ext_pow, a1, parent, sc, top, extent, below, cum, out)
    return hi, lo


@njit(cache=True, nogil=True)
def _tfce_kernel(x, g, ext_pow, a1):  # pragma: no cover - compiled
    out = np.empty(x.size)
    _tfce_one(x, g, ext_pow, a1, out, _scratch(x.size))
    return out


@njit(parallel=True, cache=True, nogil=True)
def _max_tfce_kernel(maps, g, ext_pow, a1, n_runs):  # pragma: no cover - compiled
    n_maps, n = maps.shape
    res = np.zeros((n_maps, 2))
    none = np.empty(0)
    # ``n_runs`` runs of consecutive maps (one per thread), each with its own work space;
    # every map is computed on its own, so the result does not depend on the split.
    for r in prange(n_runs):
        work = _scratch(n)
        for b in range(r * n_maps // n_runs, (r + 1) * n_maps // n_runs):
            hi, lo = _tfce_one(maps[b], g, ext_pow, a1, none, work)
            res[b, 0] = hi
            res[b, 1] = lo
    return res


# ---------------------------------------------------------------------------------------------
# public functions

def tfce(values, indptr, indices, *, extent_exponent: float = 0.5,
         height_exponent: float = 2.0, grid=None) -> np.ndarray:
    """Threshold-free cluster enhancement of one map, computed exactly.

    Parameters
    ----------
    values : array_like of float, shape (n_points,)
        One map (e.g. a t map); must be finite.
    indptr, indices : array_like of int
        Neighbour graph of the points in CSR form (symmetric, no self loops).
    extent_exponent : float, default 0.5
        ``E``, the exponent of the cluster extent; finite and > 0.
    height_exponent : float, default 2.0
        ``H``, the exponent of the height; finite and > 0.
    grid : tuple, optional
        The same graph in product form (``PointGraph.grid``), read instead of the CSR arrays:
        the same result, with less memory traffic.

    Returns
    -------
    ndarray of float64, shape (n_points,)
        Signed enhanced values: a point with a positive value gets the TFCE of ``max(x, 0)``,
        a point with a negative value minus the TFCE of ``max(-x, 0)``; points at 0 get 0.

    Raises
    ------
    ValueError
        If an exponent is not a finite number > 0 (the message names the parameter), the graph
        is not a valid CSR structure, or ``values`` does not match it or is not finite.

    Notes
    -----
    ``TFCE(p) = integral from 0 to x[p] of e_p(h)^E h^H dh``, with ``e_p(h)`` the number of
    points of the connected component of ``{i : x[i] >= h}`` that holds ``p``. The defaults
    ``E = 0.5`` and ``H = 2`` are those recommended by Smith & Nichols (2009). The integral is
    evaluated in closed form between consecutive merge heights of a union-find sweep over the
    points by decreasing value (see the module notes), not summed over threshold steps, so there
    is no step error and no step to choose. Scaling: ``tfce(c * x) = c^(H+1) * tfce(x)``.

    References
    ----------
    .. [1] Smith, S. M., & Nichols, T. E. (2009). Threshold-free cluster enhancement:
       addressing problems of smoothing, threshold dependence and localisation in cluster
       inference. NeuroImage, 44(1), 83-98.

    Examples
    --------
    Two neighbouring points at height 3 (a plateau of n = 2) and one isolated point at -3:

    >>> import numpy as np
    >>> indptr, indices = np.array([0, 1, 2, 2]), np.array([1, 0])
    >>> tfce(np.array([3.0, 3.0, -3.0]), indptr, indices)  # 2**0.5 * 3**3 / 3 and -3**3 / 3
    array([12.72792206, 12.72792206, -9.        ])
    """
    e_exp = _check_exponent(extent_exponent, "extent_exponent")
    h_exp = _check_exponent(height_exponent, "height_exponent")
    indptr, indices = check_graph(indptr, indices)
    g = (indptr, indices) + check_grid(grid, indptr, indices)
    n = indptr.size - 1
    x = np.ascontiguousarray(values, dtype=np.float64)
    if x.ndim != 1 or x.size != n:
        raise ValueError(f"values must be a 1-D array of n_points = {n} values (the graph's "
                         f"points), got shape {x.shape}")
    check_finite(x, "values")
    return _tfce_kernel(x, g, _extent_powers(n, e_exp), h_exp + 1.0)


def max_tfce(maps, indptr, indices, *, extent_exponent: float = 0.5,
             height_exponent: float = 2.0, grid=None) -> np.ndarray:
    """Largest positive and largest negative TFCE value of each map (the null distribution of
    a TFCE permutation test is built from these).

    Parameters
    ----------
    maps : array_like of float, shape (n_maps, n_points)
        Maps (e.g. the statistic maps of permuted data); must be finite. A C-contiguous
        float64 array is used without a copy.
    indptr, indices : array_like of int
        Neighbour graph of the points in CSR form (symmetric, no self loops).
    extent_exponent : float, default 0.5
        ``E``, the exponent of the cluster extent; finite and > 0.
    height_exponent : float, default 2.0
        ``H``, the exponent of the height; finite and > 0.
    grid : tuple, optional
        The same graph in product form (``PointGraph.grid``), read instead of the CSR arrays:
        the same result, with less memory traffic.

    Returns
    -------
    ndarray of float64, shape (n_maps, 2)
        Column 0: ``max(tfce(map))``; column 1: ``-min(tfce(map))``, a positive number; 0 where
        a map has no positive (negative) point.

    Raises
    ------
    ValueError
        As :func:`tfce`, and if ``maps`` is not 2-D with one column per point.

    Notes
    -----
    Each map is computed by the same code as :func:`tfce` (so the maxima equal those of
    :func:`tfce` bit for bit) and independently of the others, in parallel over maps (numba
    ``prange``): the result of a map does not depend on the batching or the thread count.
    Defaults ``E = 0.5``, ``H = 2`` as recommended by Smith & Nichols (2009).

    References
    ----------
    .. [1] Smith, S. M., & Nichols, T. E. (2009). Threshold-free cluster enhancement:
       addressing problems of smoothing, threshold dependence and localisation in cluster
       inference. NeuroImage, 44(1), 83-98.

    Examples
    --------
    >>> import numpy as np
    >>> indptr, indices = np.array([0, 1, 2, 2]), np.array([1, 0])
    >>> max_tfce(np.array([[3.0, 3.0, -3.0], [0.0, 0.0, 0.0]]), indptr, indices)
    array([[12.72792206,  9.        ],
           [ 0.        ,  0.        ]])
    """
    e_exp = _check_exponent(extent_exponent, "extent_exponent")
    h_exp = _check_exponent(height_exponent, "height_exponent")
    indptr, indices = check_graph(indptr, indices)
    g = (indptr, indices) + check_grid(grid, indptr, indices)
    n = indptr.size - 1
    m = check_maps(maps, n)
    runs = max(1, min(m.shape[0], get_num_threads()))
    return _max_tfce_kernel(m, g, _extent_powers(n, e_exp), h_exp + 1.0, runs)
