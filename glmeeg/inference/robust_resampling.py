"""Robust group statistics of resampled data: trimmed t (one sample, Yuen) and Welch's t.

Engines with the interface of the GLM engine in :mod:`glmeeg.inference.permutation`: built once
per test from the subjects' values, ``statistics(rows)`` returns the ``(B, P)`` statistic maps
of a batch of resamplings (sign rows or subject orders). Every map value depends only on its
resampling row and its point's data, always computed with the same arithmetic in the same order,
so results are bitwise identical for any batch size.

``trimmed``, one sample, under sign-flipping
    Each point's values are sorted once by absolute value. Flipping signs keeps that order of
    absolute values, so the sorted flipped sample is the negative values walked from the largest
    absolute value down, followed by the non-negative ones walked up: O(n) per point and
    resampling, no sort. Valid when each subject's value is symmetric about 0 under the null
    hypothesis (then the trimmed mean is 0).
``trimmed`` (Yuen) and ``welch``, two groups, under permutation of subjects between groups
    Yuen: each point's pooled values are sorted once; walking them in order and handing each to
    its group under the resampling gives both groups' sorted samples in O(n). Welch: group means
    and centred sums of squares in two passes over the data (centred per point first), the
    points vectorized. The studentized statistic is permuted, not the raw difference: with
    unequal variances the permutation test of the studentized statistic keeps its level
    asymptotically [1]_, and it is exact when the groups' distributions are the same.

The statistics equal :func:`glmeeg.group_level.robust.trimmed_test` and
:func:`glmeeg.group_level.robust.welch_test` on the same data (to rounding), including the direction
of the contrast. Points with a non-finite value give NaN.

The compiled kernels are imported lazily by the permutation engine, so importing glmeeg does
not load numba.

References
----------
.. [1] Janssen, A. (1997). Studentized permutation tests for non-i.i.d. hypotheses and the
   generalized Behrens-Fisher problem. Statistics & Probability Letters, 36(1), 9-21.
.. [2] Yuen, K. K. (1974). The two-sample trimmed t for unequal population variances.
   Biometrika, 61(1), 165-170.
.. [3] Tukey, J. W., & McLaughlin, D. H. (1963). Less vulnerable confidence and significance
   procedures for location based on a single sample: trimming/winsorization 1. Sankhya A, 25,
   331-352.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from ..errors import ModelError

__all__ = ["TrimmedSignFlipEngine", "YuenPermutationEngine", "WelchPermutationEngine"]

# Points per parallel work item (their data stay in cache across a batch); measured best.
_POINT_BLOCK = 64
_WELCH_BLOCK = 256


# ---------------------------------------------------------------------------------------------
# kernels

@njit(cache=True, nogil=True, error_model="numpy")
def _trimmed_parts(s, start, n, g):  # pragma: no cover - compiled
    """Trimmed mean and winsorized variance (ddof 1) of the sorted ``s[start:start + n]``, ``g``
    trimmed per tail. The variance is taken about the winsorized mean in a second pass (no
    cancellation)."""
    h = n - 2 * g
    low = s[start + g]
    high = s[start + n - g - 1]
    total = 0.0
    for j in range(start + g, start + n - g):
        total += s[j]
    mean_w = (total + g * low + g * high) / n
    ss = g * ((low - mean_w) * (low - mean_w) + (high - mean_w) * (high - mean_w))
    for j in range(start + g, start + n - g):
        d = s[j] - mean_w
        ss += d * d
    return total / h, ss / (n - 1)


@njit(parallel=True, cache=True, nogil=True, error_model="numpy")
def trimmed_sign_flip_t(values, order, rows, g, scale, sign, bad, block):  # pragma: no cover - compiled
    """One-sample trimmed t of sign-flipped data: ``(B, P)`` for sign rows ``rows`` (B x n).

    ``values[p]`` are point ``p``'s values sorted by absolute value, ``order[p]`` their
    subjects; ``scale = (1 - 2 g / n) sqrt(n)``; ``sign`` the contrast's direction. The sorted
    flipped sample is built without branches (they would be mispredicted half the time): with
    ``k`` negative values, the negative value at |x| rank ``j`` goes to ``k - 1 - (negatives
    before it)``, a non-negative one to ``k + (non-negatives before it)``."""
    P, n = values.shape
    B = rows.shape[0]
    out = np.empty((B, P))
    n_blocks = (P + block - 1) // block
    for blk in prange(n_blocks):
        lo = blk * block
        hi = min(lo + block, P)
        flipped = np.empty(n)
        s = np.empty(n)
        signs = np.empty(n)
        for b in range(B):
            for i in range(n):
                signs[i] = rows[b, i]
            for p in range(lo, hi):
                if bad[p]:
                    out[b, p] = np.nan
                    continue
                k = 0
                for j in range(n):
                    v = values[p, j] * signs[order[p, j]]
                    flipped[j] = v
                    k += v < 0
                below = 0
                above = 0
                for j in range(n):
                    c = np.int64(flipped[j] < 0)
                    s[c * (k - 1 - below) + (1 - c) * (k + above)] = flipped[j]
                    below += c
                    above += 1 - c
                m, var = _trimmed_parts(s, 0, n, g)
                out[b, p] = (sign * m) / (np.sqrt(var) / scale)
    return out


@njit(parallel=True, cache=True, nogil=True, error_model="numpy")
def yuen_permutation_t(values, order, labels, n1, g1, g2, sign, bad, block):  # pragma: no cover - compiled
    """Yuen's trimmed t of permuted groups: ``(B, P)`` for group labels ``labels`` (B x n, 1 for
    the first group). ``values[p]`` are point ``p``'s pooled values sorted ascending, ``order[p]``
    their subjects. Walking them in order, each value goes (without a branch) to the next place
    of its group: the first group's sorted values in ``s[:n1]``, the second's after them."""
    P, n = values.shape
    B = labels.shape[0]
    n2 = n - n1
    h1 = n1 - 2 * g1
    h2 = n2 - 2 * g2
    out = np.empty((B, P))
    n_blocks = (P + block - 1) // block
    for blk in prange(n_blocks):
        lo = blk * block
        hi = min(lo + block, P)
        s = np.empty(n)
        lab = np.empty(n, dtype=np.int64)
        for b in range(B):
            for i in range(n):
                lab[i] = labels[b, i]
            for p in range(lo, hi):
                if bad[p]:
                    out[b, p] = np.nan
                    continue
                k1 = 0
                k2 = n1
                for j in range(n):
                    c = lab[order[p, j]]
                    s[c * k1 + (1 - c) * k2] = values[p, j]
                    k1 += c
                    k2 += 1 - c
                m1, v1 = _trimmed_parts(s, 0, n1, g1)
                m2, v2 = _trimmed_parts(s, n1, n2, g2)
                d1 = (n1 - 1) * v1 / (h1 * (h1 - 1))
                d2 = (n2 - 1) * v2 / (h2 * (h2 - 1))
                out[b, p] = (sign * (m1 - m2)) / np.sqrt(d1 + d2)
    return out


@njit(cache=True, nogil=True, error_model="numpy")
def _group_means(Z, lab, a1, a2, n1, n2):  # pragma: no cover - compiled
    """Means of the two groups (``lab`` 1.0 / 0.0 per subject) at each column of ``Z``."""
    n, w = Z.shape
    a1[:] = 0.0
    a2[:] = 0.0
    for i in range(n):
        c1 = lab[i]
        c2 = 1.0 - c1
        z = Z[i]
        for j in range(w):
            a1[j] += c1 * z[j]
            a2[j] += c2 * z[j]
    for j in range(w):
        a1[j] /= n1
        a2[j] /= n2


@njit(cache=True, nogil=True, error_model="numpy")
def _group_squares(Z, lab, a1, a2, q1, q2):  # pragma: no cover - compiled
    """Sums of squares of the two groups about their means ``a1``, ``a2``."""
    n, w = Z.shape
    q1[:] = 0.0
    q2[:] = 0.0
    for i in range(n):
        c1 = lab[i]
        c2 = 1.0 - c1
        z = Z[i]
        for j in range(w):
            d1 = z[j] - a1[j]
            d2 = z[j] - a2[j]
            q1[j] += c1 * (d1 * d1)
            q2[j] += c2 * (d2 * d2)


@njit(parallel=True, cache=True, nogil=True, error_model="numpy")
def welch_permutation_t(Yc, labels, n1, sign, bad, block):  # pragma: no cover - compiled
    """Welch's t of permuted groups: ``(B, P)`` for 0/1 float labels ``labels`` (B x n, 1 for the
    first group) on per-point centred data ``Yc`` (n x P). Means, then sums of squares about
    them, each summed over subjects in a fixed order (the points vectorized)."""
    n, P = Yc.shape
    B = labels.shape[0]
    n2 = n - n1
    out = np.empty((B, P))
    n_blocks = (P + block - 1) // block
    for blk in prange(n_blocks):
        lo = blk * block
        hi = min(lo + block, P)
        w = hi - lo
        Z = Yc[:, lo:hi]
        a1 = np.empty(w)
        a2 = np.empty(w)
        q1 = np.empty(w)
        q2 = np.empty(w)
        for b in range(B):
            _group_means(Z, labels[b], a1, a2, n1, n2)
            _group_squares(Z, labels[b], a1, a2, q1, q2)
            for j in range(w):
                if bad[lo + j]:
                    out[b, lo + j] = np.nan
                else:
                    se = np.sqrt(q1[j] / (n1 - 1) / n1 + q2[j] / (n2 - 1) / n2)
                    out[b, lo + j] = (sign * (a1[j] - a2[j])) / se
    return out


# ---------------------------------------------------------------------------------------------
# engines

def _trims(n: int, trim: float) -> int:
    g = int(math.floor(trim * n))
    if n - 2 * g < 2:
        raise ModelError(f"trimming {trim:g} of {n} subjects leaves fewer than 2")
    return g


class TrimmedSignFlipEngine:
    """One-sample trimmed t (Tukey-McLaughlin) of sign-flipped subject values.

    Parameters
    ----------
    Y : numpy.ndarray
        ``(n_subjects, n_points)`` subject contrast estimates.
    trim : float
        Share trimmed from each tail.
    sign : float
        +1 or -1, the contrast's direction (:func:`glmeeg.group_level.robust.group_layout`).
    """

    scheme = "sign-flip"

    def __init__(self, Y: np.ndarray, *, trim: float, sign: float):
        n, P = Y.shape
        self.n, self.P = n, P
        self.g = _trims(n, trim)
        self.scale = (1 - 2 * self.g / n) * math.sqrt(n)
        self.sign = float(sign)
        self.bad = ~np.isfinite(Y).all(axis=0)
        Yf = np.where(self.bad[None, :], 0.0, Y)
        order = np.argsort(np.abs(Yf), axis=0, kind="stable")
        self.values = np.ascontiguousarray(np.take_along_axis(Yf, order, axis=0).T)
        self.order = np.ascontiguousarray(order.T, dtype=np.int32)
        self.bytes_per_map = P * 8 * 4

    def statistics(self, rows: np.ndarray) -> np.ndarray:
        """``(B, P)`` trimmed t maps for sign rows (int8, B x n)."""
        return trimmed_sign_flip_t(self.values, self.order, np.ascontiguousarray(rows, dtype=np.int8),
                                   self.g, self.scale, self.sign, self.bad, _POINT_BLOCK)


class _TwoGroups:
    scheme = "permute"

    def __init__(self, Y: np.ndarray, groups: np.ndarray, sign: float):
        n, P = Y.shape
        self.n, self.P = n, P
        self.groups = np.asarray(groups, dtype=bool)
        self.n1 = int(self.groups.sum())
        self.sign = float(sign)
        self.bad = ~np.isfinite(Y).all(axis=0)
        self.bytes_per_map = P * 8 * 4

    def _labels(self, rows: np.ndarray) -> np.ndarray:
        # Subject i takes design row rows[b, i] (as in the GLM engine), hence its group.
        return self.groups[np.asarray(rows)]


class YuenPermutationEngine(_TwoGroups):
    """Yuen's two-sample trimmed t of subjects permuted between two groups.

    Parameters
    ----------
    Y : numpy.ndarray
        ``(n_subjects, n_points)`` subject contrast estimates.
    groups : numpy.ndarray
        Boolean, True for the group the contrast weights positively.
    trim : float
    sign : float
        +1 or -1, the contrast's direction.
    """

    def __init__(self, Y: np.ndarray, groups: np.ndarray, *, trim: float, sign: float):
        super().__init__(Y, groups, sign)
        n2 = self.n - self.n1
        try:
            self.g1, self.g2 = _trims(self.n1, trim), _trims(n2, trim)
        except ModelError:
            raise ModelError(f"trimming {trim:g} of a group of {min(self.n1, n2)} subjects leaves "
                             "fewer than 2") from None
        Yf = np.where(self.bad[None, :], 0.0, Y)
        order = np.argsort(Yf, axis=0, kind="stable")
        self.values = np.ascontiguousarray(np.take_along_axis(Yf, order, axis=0).T)
        self.order = np.ascontiguousarray(order.T, dtype=np.int32)

    def statistics(self, rows: np.ndarray) -> np.ndarray:
        """``(B, P)`` Yuen t maps for subject orders (int32, B x n)."""
        labels = np.ascontiguousarray(self._labels(rows), dtype=np.int8)
        return yuen_permutation_t(self.values, self.order, labels, self.n1, self.g1, self.g2,
                                  self.sign, self.bad, _POINT_BLOCK)


class WelchPermutationEngine(_TwoGroups):
    """Welch's t of subjects permuted between two groups.

    Parameters
    ----------
    Y : numpy.ndarray
        ``(n_subjects, n_points)`` subject contrast estimates.
    groups : numpy.ndarray
        Boolean, True for the group the contrast weights positively.
    sign : float
        +1 or -1, the contrast's direction.
    """

    def __init__(self, Y: np.ndarray, groups: np.ndarray, *, sign: float):
        super().__init__(Y, groups, sign)
        Yf = np.where(self.bad[None, :], 0.0, Y)
        # Centred per point: the sums of squares then lose nothing to a large common offset.
        self.Yc = np.ascontiguousarray(Yf - Yf.mean(axis=0, keepdims=True))

    def statistics(self, rows: np.ndarray) -> np.ndarray:
        """``(B, P)`` Welch t maps for subject orders (int32, B x n)."""
        labels = np.ascontiguousarray(self._labels(rows), dtype=np.float64)
        return welch_permutation_t(self.Yc, labels, self.n1, self.sign, self.bad, _WELCH_BLOCK)
