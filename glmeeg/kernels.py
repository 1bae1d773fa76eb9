"""Compiled kernels (numba) for the loops numpy cannot fuse.

Imported lazily by the stages that use them, so that importing glmeeg or running
``glmeeg --help`` does not load numba.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ["project_columns"]


@njit(parallel=True, cache=True, nogil=True)
def project_columns(Y, qt, shift, block):  # pragma: no cover - compiled
    """Per column j of ``Y`` (rows x columns, float32 or float64), with ``y = Y[:, j] - s_j``
    where ``s_j = Y[0, j]`` if ``shift`` else 0: return ``qt @ y`` and ``y @ y`` in float64.

    One pass over ``Y``; each value is converted to float64 once, in a register. Columns are
    split into blocks of ``block`` across threads, and rows are taken four at a time so each
    pass over a block's accumulators (kept in cache) serves four rows. Each column's sums run in
    a fixed order of rows, so the result does not depend on the block size or the number of
    threads.
    """
    n, m = Y.shape
    p = qt.shape[0]
    proj = np.empty((p, m))
    sq = np.empty(m)
    n_blocks = (m + block - 1) // block
    for b in prange(n_blocks):
        lo = b * block
        hi = min(lo + block, m)
        w = hi - lo
        acc = np.zeros((p, w))
        s = np.zeros(w)
        v0 = np.empty(w)
        v1 = np.empty(w)
        v2 = np.empty(w)
        v3 = np.empty(w)
        y0 = np.zeros(w)
        if shift:
            for j in range(w):
                y0[j] = Y[0, lo + j]
        i = 0
        while i + 4 <= n:
            for j in range(w):
                a0 = np.float64(Y[i, lo + j]) - y0[j]
                a1 = np.float64(Y[i + 1, lo + j]) - y0[j]
                a2 = np.float64(Y[i + 2, lo + j]) - y0[j]
                a3 = np.float64(Y[i + 3, lo + j]) - y0[j]
                v0[j] = a0
                v1[j] = a1
                v2[j] = a2
                v3[j] = a3
                s[j] += (a0 * a0 + a1 * a1) + (a2 * a2 + a3 * a3)
            for k in range(p):
                q0 = qt[k, i]
                q1 = qt[k, i + 1]
                q2 = qt[k, i + 2]
                q3 = qt[k, i + 3]
                for j in range(w):
                    acc[k, j] += (q0 * v0[j] + q1 * v1[j]) + (q2 * v2[j] + q3 * v3[j])
            i += 4
        while i < n:
            for j in range(w):
                a0 = np.float64(Y[i, lo + j]) - y0[j]
                v0[j] = a0
                s[j] += a0 * a0
            for k in range(p):
                q0 = qt[k, i]
                for j in range(w):
                    acc[k, j] += q0 * v0[j]
            i += 1
        for k in range(p):
            for j in range(w):
                proj[k, lo + j] = acc[k, j]
        for j in range(w):
            sq[lo + j] = s[j]
    return proj, sq


@njit(parallel=True, cache=True, nogil=True)
def residual_sum_squares(Y, q, proj, columns, shift):  # pragma: no cover - compiled
    """Explicit residual sum of squares ``||y - q @ proj[:, j]||²`` for the listed columns,
    with the same shift as :func:`project_columns` (``proj`` computed from the shifted data)."""
    n = Y.shape[0]
    p = q.shape[1]
    out = np.empty(columns.size)
    for c in prange(columns.size):
        j = columns[c]
        y0 = np.float64(Y[0, j]) if shift else 0.0
        s = 0.0
        for i in range(n):
            r = np.float64(Y[i, j]) - y0
            for k in range(p):
                r -= q[i, k] * proj[k, j]
            s += r * r
        out[c] = s
    return out


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
