"""Subject level: ordinary least squares at every point of one subject's epochs.

One factorization of the design per subject and one matrix product over all points: the
epochs ``Y`` (trials x points) are processed in column blocks that fit in cache, each block is
converted to float64 once, projected on the design's orthonormal basis, and its residuals are
formed explicitly (not as a difference of sums of squares, which loses digits when the fit is
close). The design is conditioned before it is factorized: columns are centred on the constant
column when there is one and scaled to unit length; the betas are mapped back exactly.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from .errors import ModelError

__all__ = ["OLSFit", "fit_ols", "BLOCK_POINTS"]

# Columns per block: trials x BLOCK_POINTS float64 should stay within a core's L2 cache.
BLOCK_POINTS = 128


def _default_threads() -> int:
    return max(1, min(8, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1))


@dataclass(frozen=True)
class OLSFit:
    """Least-squares fit at every point.

    Attributes
    ----------
    betas : numpy.ndarray
        ``(n_columns, n_points)`` coefficients.
    residual_variance : numpy.ndarray
        ``(n_points,)`` residual sum of squares divided by ``df_resid``.
    df_resid : int
        Rows minus columns.
    xtx_inv : numpy.ndarray
        ``(n_columns, n_columns)`` inverse of the cross-product matrix of the design, so that the
        covariance of ``c @ betas`` at a point is ``c @ xtx_inv @ c * residual_variance``.
    """

    betas: np.ndarray
    residual_variance: np.ndarray
    df_resid: int
    xtx_inv: np.ndarray

    def contrast(self, c: np.ndarray) -> np.ndarray:
        """Contrast estimates ``c @ betas``: ``(rows, n_points)`` for a ``(rows, n_columns)`` c."""
        return np.atleast_2d(c) @ self.betas


def _conditioning(X: np.ndarray) -> np.ndarray:
    """Matrix M with X @ M well conditioned: centre on a constant column, scale to unit norm."""
    n, p = X.shape
    M = np.eye(p)
    const = [j for j in range(p) if X[0, j] != 0 and np.all(X[:, j] == X[0, j])]
    if const:
        j0 = const[0]
        means = X.mean(axis=0)
        for j in range(p):
            if j != j0:
                M[j0, j] = -means[j] / X[0, j0]
    norms = np.linalg.norm(X @ M, axis=0)
    norms[norms == 0] = 1.0
    return M / norms


def fit_ols(X: np.ndarray, Y: np.ndarray, *, block_points: int = BLOCK_POINTS,
            threads: int | None = None) -> OLSFit:
    """Fit ``Y = X @ B + E`` by least squares at every column (point) of ``Y``.

    Parameters
    ----------
    X : numpy.ndarray
        ``(n_rows, n_columns)`` design matrix of full column rank.
    Y : numpy.ndarray
        ``(n_rows, n_points)`` data, any floating dtype (float32 is converted block by block; a
        memory-mapped array is read once).
    block_points : int, default 128
        Points per block; changes speed only, never the result.
    threads : int, optional
        Threads that share the blocks; default: the number of CPU cores (at most 8). Changes
        speed only, never the result.

    Returns
    -------
    OLSFit

    Raises
    ------
    ModelError
        Fewer rows than columns plus one, or mismatched shapes.

    Notes
    -----
    With ``W = X M`` the conditioned design and ``W = Q R`` its thin QR factorization, the
    coefficients are ``B = M R^{-1} Q^T Y`` and the residuals ``Y - Q Q^T Y``. Householder QR is
    backward stable, so the accuracy depends on the condition number of ``W`` rather than of
    ``X^T X`` as with the normal equations [1]_.

    References
    ----------
    .. [1] Golub, G. H., & Van Loan, C. F. (2013). Matrix Computations (4th ed.), section 5.3.
       Johns Hopkins University Press.
    """
    X = np.asarray(X, dtype=np.float64)
    n, p = X.shape
    if Y.ndim != 2 or Y.shape[0] != n:
        raise ModelError(f"data have shape {Y.shape}; expected ({n}, points) to match the design")
    if n <= p:
        raise ModelError(f"{n} rows for {p} design columns: no residual degrees of freedom")
    M = _conditioning(X)
    Q, R = np.linalg.qr(X @ M)
    n_points = Y.shape[1]
    qty = np.empty((p, n_points))
    ss = np.empty(n_points)
    qt = np.ascontiguousarray(Q.T)

    def project(lo: int, hi: int) -> None:
        block = np.empty((n, min(block_points, hi - lo)))
        for start in range(lo, hi, block_points):
            stop = min(start + block_points, hi)
            yb = block[:, : stop - start]
            np.copyto(yb, Y[:, start:stop], casting="same_kind")
            proj = qt @ yb
            qty[:, start:stop] = proj
            yb -= Q @ proj
            ss[start:stop] = np.einsum("ij,ij->j", yb, yb)

    # Blocks are independent and numpy releases the GIL in each step, so threads split the
    # points; every point is computed by the same arithmetic whatever the split.
    n_threads = max(1, min(threads or _default_threads(), n_points // block_points))
    if n_threads == 1:
        project(0, n_points)
    else:
        edges = np.linspace(0, n_points // block_points, n_threads + 1).astype(int) * block_points
        edges[-1] = n_points
        with ThreadPoolExecutor(n_threads) as pool:
            list(pool.map(project, edges[:-1], edges[1:]))
    betas = M @ scipy.linalg.solve_triangular(R, qty, check_finite=False)
    r_inv = scipy.linalg.solve_triangular(R, np.eye(p), check_finite=False)
    xtx_inv = M @ r_inv @ r_inv.T @ M.T
    df = n - p
    return OLSFit(betas=betas, residual_variance=ss / df, df_resid=df, xtx_inv=xtx_inv)
