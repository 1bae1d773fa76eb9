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
    split into blocks of ``block`` across threads; each column's sums run in row order, so the
    result does not depend on the block size or the number of threads.
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
        v = np.empty(w)
        y0 = np.zeros(w)
        if shift:
            for j in range(w):
                y0[j] = Y[0, lo + j]
        for i in range(n):
            for j in range(w):
                v[j] = np.float64(Y[i, lo + j]) - y0[j]
            for j in range(w):
                s[j] += v[j] * v[j]
            for k in range(p):
                q = qt[k, i]
                for j in range(w):
                    acc[k, j] += q * v[j]
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
