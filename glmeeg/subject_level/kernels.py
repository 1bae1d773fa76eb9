"""Compiled kernels (numba) of the subject-level fit: projections and residual sums of squares over all points.

Imported lazily by the code that uses them, so that importing glmeeg or running
``glmeeg --help`` does not load numba.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ['project_columns', 'residual_sum_squares']


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
