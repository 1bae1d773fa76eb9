"""Subject level: ordinary least squares at every point of one subject's epochs.

One factorization of the design per subject and one pass over the data: a compiled kernel reads
the epochs ``Y`` (trials x points, float32 or float64) once, converts each value to float64 in a
register and accumulates, for every point, the projection on the design's orthonormal basis and
the sum of squares. The residual sum of squares is their difference, computed on data shifted by
the first trial's value when the design has a constant column (so large offsets do not cancel);
at points where the difference would still lose more than three digits (a near-exact fit) the
residuals are formed explicitly. The design is conditioned before it is factorized: columns are
centred on the constant column when there is one and scaled to unit length; the betas are mapped
back exactly. Every point is computed by the same arithmetic in the same order whatever the
block size or number of threads, so results are bitwise reproducible.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg

from ..errors import ModelError

__all__ = ["OLSFit", "fit_ols", "small_product", "unusable_variance", "dependent_columns",
           "require_full_rank", "BLOCK_POINTS"]

# Points per block of work for a thread: the block's float64 accumulators (columns + 2 rows of
# BLOCK_POINTS values) stay in L1/L2 while the trials stream past.
BLOCK_POINTS = 512
# Where ||y||^2 - ||Q^T y||^2 keeps less than this share of ||y||^2, residuals are formed
# explicitly (the difference would lose more than three of sixteen digits).
_CANCELLATION = 1e-3
# A column takes part in a linear dependence when its weight in a null vector of the design
# (columns scaled to unit length) is above this share of the largest weight: far above the
# ~1e-15 that rounding leaves in the other weights of an exact dependence.
_DEPENDENCE_WEIGHT = 1e-8


def unusable_variance(rss: np.ndarray, total: np.ndarray, n: int) -> np.ndarray:
    """Points whose residual sum of squares cannot carry a statistic.

    ``rss`` is not finite, is zero or has underflowed (not above the smallest normal float64),
    or is within the rounding error of a sum of ``n`` squares of the data themselves:
    ``rss <= n ε total`` with ``total`` the sum of squares of the data at the point and ε the
    float64 machine epsilon. There the variance holds no digit of the data, and a t or F from
    it, or an estimate from an exact fit of constant data, is a number, not a result (data
    scaled by 1e-170, constant recordings, estimates equal up to rounding): such points get no
    statistic and are left out of every correction, like points of zero variance.

    References
    ----------
    .. [1] Higham, N. J. (2002). Accuracy and Stability of Numerical Algorithms (2nd ed.),
       section 4.2 (the error bound of recursive summation). SIAM.
    """
    fi = np.finfo(np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        usable = np.isfinite(rss) & (rss > fi.tiny) & (rss > n * fi.eps * np.asarray(total))
    return ~usable


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
    total_sum_squares : numpy.ndarray or None
        ``(n_points,)`` sum of squares of the data the residuals are compared with (about the
        first row when the design has a constant column, else about zero); see
        :func:`unusable_variance`.
    """

    betas: np.ndarray
    residual_variance: np.ndarray
    df_resid: int
    xtx_inv: np.ndarray
    total_sum_squares: np.ndarray | None = None

    def unusable_points(self) -> np.ndarray:
        """Points whose residuals hold no digit of the data (:func:`unusable_variance`): the
        data are constant there, or fitted exactly up to rounding."""
        n = self.df_resid + self.betas.shape[0]
        return unusable_variance(self.residual_variance * self.df_resid, self.total_sum_squares, n)

    def contrast(self, c: np.ndarray) -> np.ndarray:
        """Contrast estimates ``c @ betas``: ``(rows, n_points)`` for a ``(rows, n_columns)`` c."""
        return small_product(np.atleast_2d(np.asarray(c, dtype=np.float64)), self.betas)


def small_product(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``A @ B`` for a small ``A`` (rows x p) and a wide ``B`` (p x points), summed over p in
    a fixed order point by point, so the bits do not depend on BLAS's threads or blocking."""
    out = np.zeros((A.shape[0], B.shape[1]))
    for j in range(A.shape[0]):
        for k in range(A.shape[1]):
            out[j] += A[j, k] * B[k]
    return out


def _constant_column(X: np.ndarray) -> int | None:
    """Index of the first non-zero constant column (an intercept), or None."""
    for j in range(X.shape[1]):
        if X[0, j] != 0 and np.all(X[:, j] == X[0, j]):
            return j
    return None


def _conditioning(X: np.ndarray) -> np.ndarray:
    """Matrix M with X @ M well conditioned: centre on a constant column, scale to unit norm."""
    p = X.shape[1]
    M = np.eye(p)
    j0 = _constant_column(X)
    if j0 is not None:
        means = X.mean(axis=0)
        for j in range(p):
            if j != j0:
                M[j0, j] = -means[j] / X[0, j0]
    norms = np.linalg.norm(X @ M, axis=0)
    norms[norms == 0] = 1.0
    return M / norms


def dependent_columns(X: np.ndarray, M: np.ndarray | None = None) -> tuple[int, tuple[int, ...]]:
    """Numerical rank of a design and the columns that take part in its linear dependences.

    The rank rule of :func:`fit_ols`, :func:`glmeeg.subject_level.fit_robust` and the group
    level: :func:`numpy.linalg.matrix_rank` of the conditioned design ``W = X M`` (columns
    centred on a constant column and scaled to unit length, :func:`_conditioning`; ``M``
    defaults to it), i.e. the number of singular values of ``W`` above
    ``s_max · max(rows, columns) · ε``. The null vectors of ``W`` are mapped back to the columns
    of ``X`` (scaled to unit length); a column is involved when its weight in one of them is
    above ``1e-8`` of that vector's largest weight.

    Returns
    -------
    rank : int
    columns : tuple of int
        Indices (from 0) of the columns involved; empty when ``X`` has full column rank.
    """
    X = np.asarray(X, dtype=np.float64)
    p = X.shape[1]
    M = _conditioning(X) if M is None else M
    W = X @ M
    # vt: (p, p) whichever the shape; the reduced form spares an (n, n) factor of tall designs
    _, s, vt = np.linalg.svd(W, full_matrices=W.shape[0] < p)
    tol = (s.max() if s.size else 0.0) * max(W.shape) * np.finfo(np.float64).eps
    rank = int((s > tol).sum())
    if rank == p:
        return rank, ()
    norms = np.linalg.norm(X, axis=0)
    norms[norms == 0] = 1.0
    null = norms[:, None] * (M @ vt[rank:].T)          # (p, p - rank), unit-length columns of X
    null /= np.abs(null).max(axis=0, keepdims=True)
    involved = np.flatnonzero((np.abs(null) > _DEPENDENCE_WEIGHT).any(axis=1))
    return rank, tuple(int(j) for j in involved)


def require_full_rank(X: np.ndarray, M: np.ndarray | None = None, *, column_names=None,
                      what: str = "design", on: str = "") -> None:
    """Refuse a design that is not of full column rank (:func:`dependent_columns`' rule).

    Parameters
    ----------
    X : numpy.ndarray
        ``(rows, columns)`` design.
    M : numpy.ndarray, optional
        Its conditioning matrix (default :func:`_conditioning` of ``X``).
    column_names : sequence of str, optional
        Names of the columns for the message; default: their indices, counted from 0.
    what : str, default "design"
        What the matrix is, for the message (``"group design"``).
    on : str, default ""
        Where the rank was taken, for the message (``" on the trials with positive weight"``).

    Raises
    ------
    ModelError
        One line: the rank, the columns of the dependence, and what to do. Also when ``X``
        holds NaN or infinite values, or ``column_names`` does not name every column.
    """
    X = np.asarray(X, dtype=np.float64)
    p = X.shape[1]
    if column_names is not None and len(column_names) != p:
        raise ModelError(f"{len(column_names)} column names for the {p} columns of the {what}")
    label = ((lambda j: repr(str(column_names[j]))) if column_names is not None else str)
    bad = np.flatnonzero(~np.isfinite(X).all(axis=0))
    if bad.size:
        raise ModelError(f"{what} column(s) {', '.join(label(j) for j in bad)} hold NaN or "
                         "infinite values")
    rank, involved = dependent_columns(X, M)
    if involved:
        which = ", ".join(label(j) for j in involved)
        counted = "" if column_names is not None else " (counted from 0)"
        dependence = (f"column {which}{counted} is all zero" if len(involved) == 1 else
                      f"columns {which}{counted} are linearly dependent")
        raise ModelError(f"{what} of {p} columns is rank deficient{on} (rank {rank}): "
                         f"{dependence}; drop or merge columns")


def fit_ols(X: np.ndarray, Y: np.ndarray, *, block_points: int = BLOCK_POINTS,
            column_names=None) -> OLSFit:
    """Fit ``Y = X @ B + E`` by least squares at every column (point) of ``Y``.

    Parameters
    ----------
    X : numpy.ndarray
        ``(n_rows, n_columns)`` design matrix of full column rank.
    Y : numpy.ndarray
        ``(n_rows, n_points)`` data, float32 or float64 (other dtypes are converted first);
        a memory-mapped array is read once.
    block_points : int, default 512
        Points per block of work shared out to the threads; changes speed only, never the
        result (bitwise).
    column_names : sequence of str, optional
        Names of the design's columns, for the message of a rank-deficient design (default:
        their indices).

    Returns
    -------
    OLSFit

    Raises
    ------
    ModelError
        Fewer rows than columns plus one, mismatched shapes, a design with NaN or infinite
        values, or a design not of full column rank (:func:`require_full_rank`, naming the
        columns of the dependence).

    Notes
    -----
    With ``W = X M`` the conditioned design and ``W = Q R`` its thin QR factorization, the
    coefficients are ``B = M R^{-1} Q^T Y`` and the residual sum of squares is
    ``||y - 1 s||² - ||Q^T (y - 1 s)||²`` (``s`` the first row when a constant column makes the
    shift harmless, else 0), or ``||y - Q Q^T y||²`` formed explicitly where the difference
    would cancel. Householder QR is backward stable, so the accuracy depends on the condition
    number of ``W`` rather than of ``X^T X`` as with the normal equations [1]_.

    References
    ----------
    .. [1] Golub, G. H., & Van Loan, C. F. (2013). Matrix Computations (4th ed.), section 5.3.
       Johns Hopkins University Press.
    """
    X = np.asarray(X, dtype=np.float64)
    n, p = X.shape
    Y = np.asarray(Y)
    if Y.ndim != 2 or Y.shape[0] != n:
        raise ModelError(f"data have shape {Y.shape}; expected ({n}, points) to match the design")
    if n <= p:
        raise ModelError(f"{n} rows for {p} design columns: no residual degrees of freedom")
    if Y.dtype not in (np.float32, np.float64):
        Y = Y.astype(np.float64)
    from .kernels import project_columns, residual_sum_squares

    M = _conditioning(X)
    require_full_rank(X, M, column_names=column_names)
    Q, R = np.linalg.qr(X @ M)
    shift = _constant_column(X) is not None
    proj, sq = project_columns(Y, np.ascontiguousarray(Q.T), shift, max(1, int(block_points)))
    r_inv = scipy.linalg.solve_triangular(R, np.eye(p), check_finite=False)
    to_betas = M @ r_inv  # p x p: one small product maps every point's projections to betas
    # NaN or Inf in the data make that point's results non-finite; the caller reports them.
    with np.errstate(invalid="ignore", over="ignore"):
        ss = sq - np.einsum("ij,ij->j", proj, proj)
        redo = np.flatnonzero(~(ss > _CANCELLATION * sq))
        if redo.size:
            ss[redo] = residual_sum_squares(Y, np.ascontiguousarray(Q), proj, redo, shift)
        if shift:  # projections of the unshifted data
            proj += np.outer(Q.sum(axis=0), np.asarray(Y[0], dtype=np.float64))
        betas = small_product(to_betas, proj)
    xtx_inv = to_betas @ to_betas.T
    df = n - p
    return OLSFit(betas=betas, residual_variance=ss / df, df_resid=df, xtx_inv=xtx_inv,
                  total_sum_squares=sq)
