"""Clusters of supra-threshold points on a neighbour graph, and the cluster null statistic.

A point is one channel x time (x frequency) sample of a flat map. The neighbour graph is given
in CSR form: the neighbours of point ``i`` are ``indices[indptr[i]:indptr[i + 1]]``. It must be
symmetric (``j`` lists ``i`` whenever ``i`` lists ``j``) and have no self loops; these two
properties are the graph builder's contract and are not re-checked here (the checks cost more
than the kernels).

The kernels also take the graph in product form, ``grid = (channel_indptr, channel_indices,
n_freqs, n_times)`` (:class:`glmeeg.inference.graph.PointGraph`): a point's neighbours are then
computed from the sensor graph and the point's coordinates, and the CSR arrays are not read.
Which neighbours a point has is the same either way, so every result is the same bit for bit;
only the memory traffic differs (on 288,000 points, TFCE takes half the time).

A cluster is a connected component of the points whose value exceeds the cluster-forming
threshold (strictly). Its mass is the sum of its values, its extent the number of its points.

The compiled kernels are imported lazily by the permutation engine, so importing glmeeg does
not load numba.

References
----------
.. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
   MEG-data. Journal of Neuroscience Methods, 164(1), 177-190.
"""

from __future__ import annotations

import math

import numpy as np
from numba import get_num_threads, njit, prange

__all__ = ["label_clusters", "cluster_table", "max_cluster_statistic"]

_STATISTICS = ("mass", "extent")
_TAILS = ("both", "positive", "negative")


# ---------------------------------------------------------------------------------------------
# validation (shared with tfce.py)

def check_graph(indptr, indices, n_points: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Return ``indptr`` (int64) and ``indices`` (int32) as C-contiguous arrays after checking
    that they form a CSR graph (over ``n_points`` points if given). Raises ValueError."""
    indptr = np.ascontiguousarray(indptr)
    indices = np.ascontiguousarray(indices)
    for name, a in (("indptr", indptr), ("indices", indices)):
        if a.ndim != 1 or not (a.size == 0 or np.issubdtype(a.dtype, np.integer)):
            raise ValueError(f"{name} must be a 1-D integer array, got dtype {a.dtype} with "
                             f"shape {a.shape}")
    indptr = indptr.astype(np.int64, copy=False)
    if indptr.size < 1:
        raise ValueError("indptr must have n_points + 1 entries, got an empty array")
    p = indptr.size - 1
    if p >= 2**31 - 1:  # points are int32 inside the kernels
        raise ValueError(f"the graph must have fewer than 2**31 - 1 points, got {p}")
    if n_points is not None and p != n_points:
        raise ValueError(f"indptr must have n_points + 1 = {n_points + 1} entries, got "
                         f"{indptr.size}")
    if indptr[0] != 0 or indptr[-1] != indices.size:
        raise ValueError(f"indptr must start at 0 and end at len(indices) = {indices.size}, got "
                         f"{indptr[0]} and {indptr[-1]}")
    if p > 0 and np.any(np.diff(indptr) < 0):
        raise ValueError("indptr must be non-decreasing")
    if indices.size and (indices.min() < 0 or indices.max() >= p):
        raise ValueError(f"indices must lie in [0, {p}), got values from {indices.min()} to "
                         f"{indices.max()}")
    return indptr, indices.astype(np.int32, copy=False)


# The "no grid" value of the kernels' product-form arguments: read the CSR arrays.
_NO_GRID = (np.zeros(1, dtype=np.int64), np.zeros(0, dtype=np.int32), 0, 0)


def check_grid(grid, indptr: np.ndarray, indices: np.ndarray) -> tuple:
    """The kernels' product-form arguments ``(channel_indptr, channel_indices, n_freqs,
    n_times)`` after checking them against the CSR graph (points and edge counts); the "no
    grid" value for None. Raises ValueError."""
    if grid is None:
        return _NO_GRID
    try:
        cptr, cidx, n_freqs, n_times = grid
        cptr = np.ascontiguousarray(cptr, dtype=np.int64)
        cidx = np.ascontiguousarray(cidx, dtype=np.int32)
        n_freqs, n_times = int(n_freqs), int(n_times)
    except (TypeError, ValueError):
        raise ValueError("grid must be (channel_indptr, channel_indices, n_freqs, n_times)") from None
    n_channels = cptr.size - 1
    p = indptr.size - 1
    if (n_channels < 1 or n_freqs < 1 or n_times < 1 or cptr[0] != 0 or cptr[-1] != cidx.size
            or np.any(np.diff(cptr) < 0)
            or (cidx.size and (cidx.min() < 0 or cidx.max() >= n_channels))):
        raise ValueError("grid: channel_indptr and channel_indices must form a CSR graph of the "
                         "channels, with n_freqs, n_times >= 1")
    edges = cidx.size * n_freqs * n_times + 2 * n_channels * ((n_freqs - 1) * n_times
                                                             + n_freqs * (n_times - 1))
    if n_channels * n_freqs * n_times != p or edges != indices.size:
        raise ValueError(f"grid: {n_channels} channels x {n_freqs} x {n_times} with "
                         f"{cidx.size} channel links does not describe the graph of {p} points "
                         f"and {indices.size} links")
    return cptr, cidx, n_freqs, n_times


def check_finite(values: np.ndarray, name: str) -> None:
    """Raise ValueError naming the first non-finite entry of ``values``."""
    bad = ~np.isfinite(values)
    if bad.any():
        where = tuple(int(i) for i in np.unravel_index(int(np.argmax(bad.ravel())),
                                                        values.shape))
        shown = where[0] if len(where) == 1 else where
        raise ValueError(f"{name} must be finite, got {values[where]} at {shown}")


def _check_threshold(threshold) -> float:
    try:
        thr = float(threshold)
    except (TypeError, ValueError):
        raise ValueError(f"threshold must be a finite number, got {threshold!r}") from None
    if not math.isfinite(thr):
        raise ValueError(f"threshold must be a finite number, got {thr}")
    return thr


def _check_map(values, n_points: int, name: str = "values") -> np.ndarray:
    x = np.ascontiguousarray(values, dtype=np.float64)
    if x.ndim != 1 or x.size != n_points:
        raise ValueError(f"{name} must be a 1-D array of n_points = {n_points} values (the "
                         f"graph's points), got shape {x.shape}")
    check_finite(x, name)
    return x


def check_maps(maps, n_points: int) -> np.ndarray:
    """Return ``maps`` as a C-contiguous float64 (B, P) array after checking shape and
    finiteness. Raises ValueError."""
    m = np.ascontiguousarray(maps, dtype=np.float64)
    if m.ndim != 2 or m.shape[1] != n_points:
        raise ValueError(f"maps must be a 2-D array (n_maps, n_points = {n_points}), got shape "
                         f"{m.shape}")
    check_finite(m, "maps")
    return m


# ---------------------------------------------------------------------------------------------
# kernels

@njit(cache=True, nogil=True)
def neighbour_span(p, indptr, cptr, n_freqs, n_times):  # pragma: no cover - compiled
    """``(first, count, i, f, t)`` for enumerating the neighbours of point ``p`` with
    :func:`neighbour`: the CSR entries ``first .. first + count`` when ``n_times == 0``; else
    the links ``cptr[c] ..`` of the point's channel ``c`` and then four lattice steps, with
    ``i``, ``f``, ``t`` the point's place within its channel, frequency and time."""
    if n_times == 0:
        lo = indptr[p]
        return lo, indptr[p + 1] - lo, 0, 0, 0
    inner = n_freqs * n_times
    c = p // inner
    i = p - c * inner
    f = i // n_times
    lo = cptr[c]
    return lo, cptr[c + 1] - lo + 4, i, f, i - f * n_times


@njit(cache=True, nogil=True)
def neighbour(p, e, lo, count, i, f, t, indices, cidx, n_freqs,
              n_times):  # pragma: no cover - compiled
    """The ``e``-th neighbour of point ``p`` (span from :func:`neighbour_span`), or -1 for a
    lattice step that leaves the map."""
    if n_times == 0:
        return indices[lo + e]
    nn = count - 4
    if e < nn:
        return cidx[lo + e] * (n_freqs * n_times) + i
    if e == nn:
        return p - 1 if t > 0 else -1
    if e == nn + 1:
        return p + 1 if t < n_times - 1 else -1
    if e == nn + 2:
        return p - n_times if f > 0 else -1
    return p + n_times if f < n_freqs - 1 else -1


@njit(cache=True, nogil=True)
def _label_one(x, indptr, indices, cptr, cidx, n_freqs, n_times, thr, sign, labels, stack,
               first):  # pragma: no cover - compiled
    """Label the components of ``{i : sign * x[i] > thr and labels[i] == 0}`` with ids
    ``first, first + 1, ...`` in order of their lowest point index; return the next free id.

    Iterative depth-first growth with an explicit stack (no recursion). A point is labelled
    when pushed, so it is pushed once."""
    n = x.size
    k = first
    for i in range(n):
        if labels[i] != 0 or not (sign * x[i] > thr):
            continue
        labels[i] = k
        stack[0] = i
        top = 1
        while top > 0:
            top -= 1
            j = stack[top]
            lo, count, ii, f, t = neighbour_span(j, indptr, cptr, n_freqs, n_times)
            for e in range(count):
                q = neighbour(j, e, lo, count, ii, f, t, indices, cidx, n_freqs, n_times)
                if q >= 0 and labels[q] == 0 and sign * x[q] > thr:
                    labels[q] = k
                    stack[top] = q
                    top += 1
        k += 1
    return k


@njit(cache=True, nogil=True)
def _label_kernel(x, indptr, indices, cptr, cidx, n_freqs, n_times,
                  thr):  # pragma: no cover - compiled
    labels = np.zeros(x.size, dtype=np.int32)
    stack = np.empty(x.size, dtype=np.int32)
    _label_one(x, indptr, indices, cptr, cidx, n_freqs, n_times, thr, 1.0, labels, stack, 1)
    return labels


@njit(cache=True, nogil=True)
def _max_cluster_one(x, indptr, indices, cptr, cidx, n_freqs, n_times, thr, want_pos, want_neg,
                     use_mass, labels, stack, out):  # pragma: no cover - compiled
    """Largest positive and negative cluster statistic of one map, written to ``out[0:2]``.

    Positive clusters get ids 1..K+, negative ones K+ + 1..K; masses are then summed in
    increasing point order, as :func:`cluster_table` sums them, so the observed map and the
    null maps are treated with the same arithmetic."""
    labels[:] = 0
    k_pos = 1
    if want_pos:
        k_pos = _label_one(x, indptr, indices, cptr, cidx, n_freqs, n_times, thr, 1.0, labels,
                           stack, k_pos)
    k_all = k_pos
    if want_neg:
        k_all = _label_one(x, indptr, indices, cptr, cidx, n_freqs, n_times, thr, -1.0, labels,
                           stack, k_pos)
    best_pos = 0.0
    best_neg = 0.0
    if k_all > 1:
        acc = np.zeros(k_all)
        if use_mass:
            for i in range(x.size):
                c = labels[i]
                if c != 0:
                    acc[c] += x[i] if c < k_pos else -x[i]
        else:
            for i in range(x.size):
                acc[labels[i]] += 1.0
        for c in range(1, k_pos):
            if acc[c] > best_pos:
                best_pos = acc[c]
        for c in range(k_pos, k_all):
            if acc[c] > best_neg:
                best_neg = acc[c]
    out[0] = best_pos
    out[1] = best_neg


@njit(parallel=True, cache=True, nogil=True)
def _max_cluster_kernel(maps, indptr, indices, cptr, cidx, n_freqs, n_times, thr, want_pos,
                        want_neg, use_mass, n_runs):  # pragma: no cover - compiled
    n_maps, n = maps.shape
    out = np.zeros((n_maps, 2))
    # ``n_runs`` runs of consecutive maps (one per thread), with their own work space (8 bytes
    # a point), reused from map to map; every map is computed on its own, whatever the split.
    for r in prange(n_runs):
        labels = np.empty(n, dtype=np.int32)
        stack = np.empty(n, dtype=np.int32)
        for b in range(r * n_maps // n_runs, (r + 1) * n_maps // n_runs):
            _max_cluster_one(maps[b], indptr, indices, cptr, cidx, n_freqs, n_times, thr,
                             want_pos, want_neg, use_mass, labels, stack, out[b])
    return out


# ---------------------------------------------------------------------------------------------
# public functions

def label_clusters(values, indptr, indices, threshold, *, grid=None) -> np.ndarray:
    """Label the clusters of points whose value exceeds a threshold.

    Parameters
    ----------
    values : array_like of float, shape (n_points,)
        One map; must be finite.
    indptr, indices : array_like of int
        Neighbour graph of the points in CSR form (symmetric, no self loops).
    threshold : float
        Cluster-forming threshold; a point takes part if ``value > threshold`` (strictly).
        For clusters of negative values, pass ``-values`` and the threshold's magnitude.
    grid : tuple, optional
        The same graph in product form (``PointGraph.grid``), read instead of the CSR arrays.

    Returns
    -------
    labels : ndarray of int32, shape (n_points,)
        0 for points in no cluster; clusters are numbered 1..K in increasing order of their
        lowest point index, so the numbering depends only on the map and the graph.

    Raises
    ------
    ValueError
        If the graph is not a valid CSR structure, ``values`` does not match it or is not
        finite, or ``threshold`` is not a finite number.

    Notes
    -----
    Connected components of the supra-threshold subgraph, grown iteratively with an explicit
    stack (no recursion); time and memory are linear in the number of points and edges.

    References
    ----------
    .. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
       MEG-data. Journal of Neuroscience Methods, 164(1), 177-190.

    Examples
    --------
    Points 0-1-2 form a path, point 3 has no neighbour:

    >>> import numpy as np
    >>> indptr, indices = np.array([0, 1, 3, 4, 4]), np.array([1, 0, 2, 1])
    >>> label_clusters(np.array([3.0, 2.5, 0.1, 4.0]), indptr, indices, 1.0)
    array([1, 1, 0, 2], dtype=int32)
    """
    indptr, indices = check_graph(indptr, indices)
    g = check_grid(grid, indptr, indices)
    x = _check_map(values, indptr.size - 1)
    thr = _check_threshold(threshold)
    return _label_kernel(x, indptr, indices, *g, thr)


def cluster_table(values, labels) -> tuple[np.ndarray, np.ndarray]:
    """Mass and extent of each labelled cluster.

    Parameters
    ----------
    values : array_like of float, shape (n_points,)
        The map the clusters were formed on.
    labels : array_like of int, shape (n_points,)
        Cluster labels as returned by :func:`label_clusters` (0 = no cluster, 1..K).

    Returns
    -------
    mass : ndarray of float64, shape (K,)
        ``mass[k - 1]`` is the sum of the values of cluster ``k``, summed in increasing point
        order (the order :func:`max_cluster_statistic` uses, so both give the same bits).
    extent : ndarray of int64, shape (K,)
        ``extent[k - 1]`` is the number of points in cluster ``k``.

    Raises
    ------
    ValueError
        If the arrays differ in length or ``labels`` holds negative values.

    References
    ----------
    .. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
       MEG-data. Journal of Neuroscience Methods, 164(1), 177-190.

    Examples
    --------
    >>> import numpy as np
    >>> cluster_table(np.array([3.0, 2.5, 0.1, 4.0]), np.array([1, 1, 0, 2]))
    (array([5.5, 4. ]), array([2, 1]))
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    lab = np.asarray(labels).ravel()
    if x.size != lab.size:
        raise ValueError(f"labels must have one entry per value ({x.size}), got {lab.size}")
    if lab.size == 0 or lab.max() <= 0:
        return np.zeros(0), np.zeros(0, dtype=np.int64)
    if lab.min() < 0:
        raise ValueError(f"labels must be >= 0, got {lab.min()}")
    k = int(lab.max())
    lab = lab.astype(np.intp, copy=False)
    mass = np.bincount(lab, weights=x, minlength=k + 1)[1:]
    extent = np.bincount(lab, minlength=k + 1)[1:].astype(np.int64)
    return mass, extent


def max_cluster_statistic(maps, indptr, indices, threshold, *, statistic: str = "mass",
                          tails: str = "both", grid=None) -> np.ndarray:
    """Largest positive and largest negative cluster statistic of each map (the null
    distribution of a cluster-based permutation test is built from these).

    Parameters
    ----------
    maps : array_like of float, shape (n_maps, n_points)
        Maps (e.g. the statistic maps of permuted data); must be finite. A C-contiguous
        float64 array is used without a copy.
    indptr, indices : array_like of int
        Neighbour graph of the points in CSR form (symmetric, no self loops).
    threshold : float
        Cluster-forming threshold, >= 0 when ``tails="both"``. Positive clusters are formed by
        ``value > threshold``, negative clusters by ``value < -threshold``.
    statistic : {"mass", "extent"}, default "mass"
        Cluster mass (sum of the values; of ``-value`` for negative clusters) or cluster extent
        (number of points).
    tails : {"both", "positive", "negative"}, default "both"
        Which clusters to look for; the column of a tail not asked for is 0.
    grid : tuple, optional
        The same graph in product form (``PointGraph.grid``), read instead of the CSR arrays.

    Returns
    -------
    ndarray of float64, shape (n_maps, 2)
        Column 0: largest positive-cluster statistic; column 1: largest negative-cluster
        statistic as a positive number. 0 where a map has no such cluster.

    Raises
    ------
    ValueError
        For a malformed graph, maps of the wrong shape or with non-finite values, a threshold
        that is not finite (or negative with ``tails="both"``), or an unknown ``statistic`` or
        ``tails``.

    Notes
    -----
    Maps are processed in parallel (numba ``prange``); each map's result is computed by the
    same code whatever the number of maps or threads, so it does not depend on the batching.
    Masses are summed in increasing point order, exactly as :func:`cluster_table` sums them on
    the labels of :func:`label_clusters`: the observed map passed here gives the same bits.

    References
    ----------
    .. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
       MEG-data. Journal of Neuroscience Methods, 164(1), 177-190.

    Examples
    --------
    >>> indptr, indices = np.array([0, 1, 3, 4, 4]), np.array([1, 0, 2, 1])
    >>> max_cluster_statistic(np.array([[3.0, 2.5, 0.1, -4.0]]), indptr, indices, 1.0)
    array([[5.5, 4. ]])
    """
    if statistic not in _STATISTICS:
        raise ValueError(f"statistic must be one of {', '.join(_STATISTICS)}, got {statistic!r}")
    if tails not in _TAILS:
        raise ValueError(f"tails must be one of {', '.join(_TAILS)}, got {tails!r}")
    thr = _check_threshold(threshold)
    if tails == "both" and thr < 0:
        raise ValueError(f"threshold must be >= 0 when tails is 'both', got {thr}")
    indptr, indices = check_graph(indptr, indices)
    g = check_grid(grid, indptr, indices)
    m = check_maps(maps, indptr.size - 1)
    runs = max(1, min(m.shape[0], get_num_threads()))
    return _max_cluster_kernel(m, indptr, indices, *g, thr, tails != "negative",
                               tails != "positive", statistic == "mass", runs)
