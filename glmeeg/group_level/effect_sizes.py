"""Confidence intervals of standardized effect sizes, from the noncentral t and F distributions.

For a t statistic on ``df`` degrees of freedom, the interval of its noncentrality ``δ`` is found
by inverting the noncentral t CDF at the observed t: the lower limit ``δ_L`` solves
``P(T ≤ t | δ_L) = 1 − α/2`` and the upper limit ``δ_U`` solves ``P(T ≤ t | δ_U) = α/2``. A
standardized contrast ``d = t·√(c V cᵀ)`` has the interval ``δ·√(c V cᵀ)`` (for a one-sample
design ``√(1/n)``, giving the interval of Cohen's dz). For F the same inversion on the noncentral
F gives an interval of ``λ``, mapped to partial eta squared by ``λ / (λ + df₁ + df₂ + 1)``: the
population partial eta squared ``f² / (1 + f²)`` with ``λ = f² N`` and ``N = df₁ + df₂ + 1``, the
total sample size of a one-way layout ([2]_; Smithson 2003, *Confidence Intervals*, Sage; both
from memory). The point estimate :func:`glmeeg.group_test` reports is the sample partial eta
squared ``F df₁ / (F df₁ + df₂)``, i.e. ``λ̂ / (λ̂ + df₂)`` with ``λ̂ = F df₁``: a different
mapping, so the point estimate is not the image of a point of the λ interval. The
inversions run on every point at once by bisection, so no Python loop over points.

References
----------
.. [1] Steiger, J. H., & Fouladi, R. T. (1997). Noncentrality interval estimation and the
   evaluation of statistical models. In L. L. Harlow, S. A. Mulaik & J. H. Steiger (Eds.),
   What if there were no significance tests? (pp. 221-257). Erlbaum.
.. [2] Steiger, J. H. (2004). Beyond the F test: effect size confidence intervals and tests of
   close fit in the analysis of variance and contrast analysis. Psychological Methods, 9(2),
   164-182.
.. [3] Cumming, G., & Finch, S. (2001). A primer on the understanding, use, and calculation of
   confidence intervals that are based on central and noncentral distributions. Educational and
   Psychological Measurement, 61(4), 532-574.
"""

from __future__ import annotations

import numpy as np
import scipy.stats

__all__ = ["noncentrality_interval_t", "noncentrality_interval_f", "size_label"]

_ITERATIONS = 30


def _bisect(f, lo: np.ndarray, hi: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Root of the decreasing function ``f(x) = target`` between ``lo`` and ``hi``, per entry.

    Regula falsi with the Illinois modification (superlinear, always bracketed), finished by
    the bracket's midpoint; every entry takes the same number of vectorized steps.
    """
    lo, hi = lo.copy(), hi.copy()
    flo, fhi = f(lo) - target, f(hi) - target
    last = np.zeros(lo.shape, dtype=np.int8)
    for _ in range(_ITERATIONS):
        denom = fhi - flo
        x = np.where(denom != 0, (lo * fhi - hi * flo) / np.where(denom != 0, denom, 1.0), 0.5 * (lo + hi))
        x = np.where((x > lo) & (x < hi), x, 0.5 * (lo + hi))
        fx = f(x) - target
        right = fx > 0  # decreasing function: the root lies above x
        # Illinois: when the same end is kept twice, halve its function value.
        flo = np.where(~right & (last == -1), 0.5 * flo, flo)
        fhi = np.where(right & (last == 1), 0.5 * fhi, fhi)
        lo, flo = np.where(right, x, lo), np.where(right, fx, flo)
        hi, fhi = np.where(right, hi, x), np.where(right, fhi, fx)
        last = np.where(right, 1, -1).astype(np.int8)
    return np.where(np.abs(flo) < np.abs(fhi), lo, hi)


def noncentrality_interval_t(t: np.ndarray, df: float, *, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Interval of the noncentrality of noncentral t statistics, at every entry of ``t``.

    Parameters
    ----------
    t : numpy.ndarray
        Observed t statistics (NaN stays NaN).
    df : float
        Degrees of freedom.
    confidence : float, default 0.95

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Lower and upper limits of δ.

    Examples
    --------
    >>> lo, hi = noncentrality_interval_t(np.array([0.0]), 20)
    >>> bool(np.isclose(lo[0], -hi[0]))
    True
    """
    t = np.asarray(t, dtype=np.float64)
    a = 1.0 - confidence
    finite = np.isfinite(t)
    x = np.where(finite, t, 0.0)
    # The noncentral t with δ is roughly δ + N(0, 1 + δ²/(2 df)); a bracket of several of those
    # widths around t always holds the limits.
    width = 10.0 + 2.0 * np.abs(x) * (1.0 + 1.0 / np.sqrt(df))
    lo0, hi0 = x - width, x + width

    def cdf(delta):
        v = scipy.stats.nct.cdf(x, df, delta)
        # Far in a tail scipy may return NaN where the CDF is 0 (δ far above t) or 1 (below).
        return np.where(np.isnan(v), (delta < x).astype(np.float64), v)

    lower = _bisect(cdf, lo0, hi0, np.full_like(x, 1.0 - a / 2))
    upper = _bisect(cdf, lo0, hi0, np.full_like(x, a / 2))
    return np.where(finite, lower, np.nan), np.where(finite, upper, np.nan)


def noncentrality_interval_f(f: np.ndarray, df1: float, df2: float, *,
                             confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Interval of the noncentrality λ of noncentral F statistics (limits truncated at 0).

    A limit is 0 when even λ = 0 makes the observed F unusually small (``P(F ≤ f | 0)`` below
    the tail probability), as in [2]_ of the module.
    """
    f = np.asarray(f, dtype=np.float64)
    a = 1.0 - confidence
    finite = np.isfinite(f)
    x = np.where(finite, np.maximum(f, 0.0), 0.0)

    def cdf(lam):
        # scipy's ncf is unreliable at exactly lam = 0: use the central F there.
        safe = np.maximum(lam, 1e-12)
        v = scipy.stats.ncf.cdf(x, df1, df2, safe)
        return np.where(np.isnan(v), 0.0, v)  # NaN only far above the observed F: CDF ~ 0

    central = scipy.stats.f.cdf(x, df1, df2)
    hi0 = np.maximum(10.0, 4.0 * x * df1 + 100.0)
    zero = np.zeros_like(x)
    lower = np.where(central <= 1.0 - a / 2, 0.0, _bisect(cdf, zero, hi0, np.full_like(x, 1.0 - a / 2)))
    upper = np.where(central <= a / 2, 0.0, _bisect(cdf, zero, hi0, np.full_like(x, a / 2)))
    return np.where(finite, lower, np.nan), np.where(finite, upper, np.nan)


def size_label(d: np.ndarray) -> np.ndarray:
    """Plain-language size of |d|: negligible < 0.2 ≤ small < 0.5 ≤ medium < 0.8 ≤ large.

    The 0.2 / 0.5 / 0.8 marks are Cohen's (1988) conventions: common practice, not a law.
    """
    d = np.abs(np.asarray(d, dtype=np.float64))
    out = np.select([d >= 0.8, d >= 0.5, d >= 0.2, np.isfinite(d)],
                    ["large", "medium", "small", "negligible"], default="")
    return out
