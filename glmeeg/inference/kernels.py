"""Compiled kernels (numba) of the permutation engine: weighted sums, t from projections, map scans.

Imported lazily by the code that uses them, so that importing glmeeg or running
``glmeeg --help`` does not load numba.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ['weighted_row_sums', 't_from_projections', 'scan_maps']


@njit(parallel=True, cache=True, nogil=True)
def weighted_row_sums(W, R, block):  # pragma: no cover - compiled
    """``W @ R`` for ``W`` (rows x n) and ``R`` (n x columns), float64, with every output value
    summed over ``n`` in the same order whatever the shapes: row ``r`` of the result depends only
    on ``W[r]`` and ``R``, so a permutation's statistics are bitwise the same in any batch.

    Columns are split into cache-sized blocks across threads; within a block, rows of ``W`` are
    taken four at a time so that each value of ``R`` read serves four output rows.
    """
    rows, n = W.shape
    m = R.shape[1]
    out = np.empty((rows, m))
    n_blocks = (m + block - 1) // block
    for b in prange(n_blocks):
        lo = b * block
        hi = min(lo + block, m)
        w = hi - lo
        a0 = np.empty(w)
        a1 = np.empty(w)
        a2 = np.empty(w)
        a3 = np.empty(w)
        r = 0
        while r + 4 <= rows:
            a0[:] = 0.0
            a1[:] = 0.0
            a2[:] = 0.0
            a3[:] = 0.0
            for i in range(n):
                c0 = W[r, i]
                c1 = W[r + 1, i]
                c2 = W[r + 2, i]
                c3 = W[r + 3, i]
                for j in range(w):
                    x = R[i, lo + j]
                    a0[j] += c0 * x
                    a1[j] += c1 * x
                    a2[j] += c2 * x
                    a3[j] += c3 * x
            for j in range(w):
                out[r, lo + j] = a0[j]
                out[r + 1, lo + j] = a1[j]
                out[r + 2, lo + j] = a2[j]
                out[r + 3, lo + j] = a3[j]
            r += 4
        while r < rows:
            a0[:] = 0.0
            for i in range(n):
                c0 = W[r, i]
                for j in range(w):
                    a0[j] += c0 * R[i, lo + j]
            for j in range(w):
                out[r, lo + j] = a0[j]
            r += 1
    return out


@njit(parallel=True, cache=True, nogil=True)
def t_from_projections(U, k, rz2, scale):  # pragma: no cover - compiled
    """t maps of resampled data from their projections ``U`` (B x q x P) on the design basis:
    ``t = (k @ U) / sqrt((rz2 - |U|²) * scale)`` per map and point, one pass over ``U``."""
    B, q, P = U.shape
    out = np.empty((B, P))
    for b in prange(B):
        for p in range(P):
            num = 0.0
            ss = rz2[p]
            for j in range(q):
                u = U[b, j, p]
                num += k[j] * u
                ss -= u * u
            out[b, p] = num / np.sqrt(ss * scale)
    return out


@njit(parallel=True, cache=True, nogil=True)
def scan_maps(maps, edge, mode, sign, counts_out):  # pragma: no cover - compiled
    """One pass over resampled maps (B x P), in place.

    For each map: the largest oriented value (``mode`` 0: |x|, 1: x, 2: -x), and per point
    whether the oriented value reaches ``edge`` (summed into ``counts_out``, B x P int8 scratch
    reduced by the caller). The map is overwritten with ``sign * x`` and non-finite values
    with 0, ready for the cluster and TFCE kernels.
    """
    B, P = maps.shape
    best = np.empty(B)
    for b in prange(B):
        m = -np.inf
        for p in range(P):
            x = maps[b, p]
            if np.isfinite(x):
                if mode == 0:
                    o = abs(x)
                elif mode == 1:
                    o = x
                else:
                    o = -x
                if o > m:
                    m = o
                counts_out[b, p] = 1 if o >= edge[p] else 0
                maps[b, p] = sign * x
            else:
                counts_out[b, p] = 0
                maps[b, p] = 0.0
        best[b] = m
    return best
