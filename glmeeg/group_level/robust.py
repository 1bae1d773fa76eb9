"""Group level, robust and unequal-variance variants: trimmed means (Yuen) and Welch's t.

These tests replace the group GLM for the two designs they are defined for: one sample (an
intercept-only group model; also paired and within-subject questions, whose subject contrasts
are differences) and two independent groups (a group model with an intercept and one two-level
factor, testing the factor). Every point is computed at once; trimming sorts the subjects'
values at every point along the subject axis.

References
----------
.. [1] Tukey, J. W., & McLaughlin, D. H. (1963). Less vulnerable confidence and significance
   procedures for location based on a single sample: trimming/winsorization 1. Sankhya A, 25,
   331-352.
.. [2] Yuen, K. K. (1974). The two-sample trimmed t for unequal population variances.
   Biometrika, 61(1), 165-170.
.. [3] Welch, B. L. (1947). The generalization of "Student's" problem when several different
   population variances are involved. Biometrika, 34(1-2), 28-35.
.. [4] Algina, J., Keselman, H. J., & Penfield, R. D. (2005). An alternative to Cohen's
   standardized mean difference effect size: a robust parameter and confidence interval in the
   two independent groups case. Psychological Methods, 10(3), 317-328.
"""

from __future__ import annotations

import numpy as np
import scipy.stats

from .. import defaults
from ..errors import ModelError
from .glm import GroupStatistics, p_values, unusable_variance

__all__ = ["GROUP_METHODS", "group_layout", "trimmed_test", "welch_test", "winsorized_normal_sd"]

GROUP_METHODS = ("glm", "trimmed", "welch")


def group_layout(design: np.ndarray, contrast: np.ndarray, *, method: str) -> tuple[np.ndarray | None, float]:
    """Which of the two supported layouts a group design and contrast are.

    Returns
    -------
    groups : numpy.ndarray or None
        None for one sample; else a boolean array marking the subjects of the group the contrast
        weights positively (the first group of the difference).
    sign : float
        +1 or -1: the direction of the contrast relative to the returned layout.

    Raises
    ------
    ModelError
        Anything but an intercept-only model with its intercept tested, or an intercept plus one
        two-level indicator with the indicator tested.
    """
    G = np.asarray(design, dtype=np.float64)
    L = np.atleast_2d(np.asarray(contrast, dtype=np.float64))
    need = (f"group_method {method!r} needs a one-sample group model (formula \"1\") or two groups "
            "(one two-level factor, e.g. \"role\", testing that factor), with one contrast")
    if L.shape[0] != 1:
        raise ModelError(need)
    c = L[0]
    const = [j for j in range(G.shape[1]) if np.all(G[:, j] == G[0, j]) and G[0, j] != 0]
    if G.shape[1] == 1 and const and c[0] != 0:
        if method == "welch":
            raise ModelError("group_method 'welch' compares two groups; a one-sample test has one variance")
        return None, float(np.sign(c[0]))
    if G.shape[1] == 2 and len(const) == 1:
        j = 1 - const[0]
        col = G[:, j]
        levels = np.unique(col)
        if levels.size == 2 and c[const[0]] == 0 and c[j] != 0:
            first = col == levels.max()   # the indicator's "1" group
            if first.sum() < 2 or (~first).sum() < 2:
                raise ModelError(f"group_method {method!r} needs at least 2 subjects in each group")
            return first, float(np.sign(c[j] * (levels.max() - levels.min())))
    raise ModelError(need)


def winsorized_normal_sd(trim: float) -> float:
    """SD of a standard normal winsorized at ``trim`` in each tail (0.642 for 20 %: [4]_)."""
    if trim <= 0:
        return 1.0
    z = scipy.stats.norm.isf(trim)
    var = (1 - 2 * trim) - 2 * z * scipy.stats.norm.pdf(z) + 2 * trim * z * z
    return float(np.sqrt(var))


def _trimmed_parts(y: np.ndarray, trim: float):
    """Trimmed mean, winsorized variance, n and number trimmed per tail, at every point."""
    n = y.shape[0]
    g = int(np.floor(trim * n))
    s = np.sort(y, axis=0)
    mean_t = s[g:n - g].mean(axis=0)
    w = s.copy()
    if g:
        w[:g] = s[g]
        w[n - g:] = s[n - g - 1]
    var_w = w.var(axis=0, ddof=1)
    return mean_t, var_w, n, g


def _finish(estimate, se, df, d, d_name, *, alternative, data) -> GroupStatistics:
    n = data.shape[0]
    with np.errstate(divide="ignore", invalid="ignore", under="ignore", over="ignore"):
        # The variance of the estimate, on the scale of a sum of squares of the data: a
        # variance with no digit of the data gives no statistic (group_level.unusable_variance).
        bad = unusable_variance(se * se * n * (n - 1), np.einsum("np,np->p", data, data), n)
        se = np.where(bad, np.nan, se)
        d = np.where(bad, np.nan, d)
        stat = estimate / se
    df_arr = np.asarray(df, dtype=np.float64)
    if df_arr.ndim == 0:
        p = p_values(stat, "t", (1.0, float(df_arr)), alternative=alternative)
        df_out = (1.0, float(df_arr))
    else:
        # Welch-type df differ by point: p-values point by point (vectorized), df reported as the median.
        with np.errstate(invalid="ignore"):
            t = scipy.stats.t
            if alternative == "two-sided":
                p = np.minimum(1.0, 2.0 * t.sf(np.abs(stat), df_arr))
            elif alternative == "greater":
                p = t.sf(stat, df_arr)
            else:
                p = t.cdf(stat, df_arr)
        df_out = (1.0, float(np.nanmedian(df_arr)))
    nan = np.full(stat.shape, np.nan)
    return GroupStatistics(kind="t", estimate=estimate[None, :], standard_error=se, statistic=stat,
                           df=df_out, p=p, alternative=alternative, effect_size=d,
                           effect_size_corrected=nan, effect_size_name=d_name,
                           effect_size_corrected_name="none", effect_size_low=nan.copy(),
                           effect_size_high=nan.copy(), confidence_level=0.95)


def trimmed_test(estimates: np.ndarray, design: np.ndarray, contrast: np.ndarray, *, trim: float | None = None,
                 alternative: str = "two-sided") -> GroupStatistics:
    """Trimmed-mean t test at every point: one-sample (Tukey-McLaughlin) or two groups (Yuen).

    Parameters
    ----------
    estimates : numpy.ndarray
        ``(n_subjects, n_points)`` subject contrast estimates.
    design, contrast : numpy.ndarray
        Group design and contrast; see :func:`group_layout`.
    trim : float, optional
        Share trimmed from each tail, in [0, 0.5); default :data:`glmeeg.defaults.TRIM` (0.2).
    alternative : {"two-sided", "greater", "less"}

    Returns
    -------
    GroupStatistics
        ``estimate`` is the trimmed mean (or the difference of trimmed means); the effect size is
        the robust d of [4]_: the estimate over the winsorized SD (pooled for two groups), times
        the winsorized SD of a standard normal (0.642 at 20 %), comparable with Cohen's d under
        normality. Welch-type df (two groups) differ by point; ``df`` reports their median.

    Notes
    -----
    One sample: ``t = (m_t) / (s_w / ((1 - 2γ) √n))`` on ``n - 2g - 1`` df, with ``g = ⌊γ n⌋``
    values trimmed from each tail and ``s_w`` the winsorized SD [1]_. Two groups:
    ``d_j = (n_j - 1) s_wj² / (h_j (h_j - 1))`` with ``h_j = n_j - 2 g_j``,
    ``t = (m_t1 - m_t2) / √(d_1 + d_2)`` on ``(d_1 + d_2)² / (d_1²/(h_1 - 1) + d_2²/(h_2 - 1))``
    df [2]_.
    """
    trim = defaults.TRIM if trim is None else trim
    if not 0 <= trim < 0.5:
        raise ModelError(f"trim must be in [0, 0.5); got {trim!r}")
    Y = np.asarray(estimates, dtype=np.float64)
    if Y.ndim != 2:
        raise ModelError("trimmed tests take one subject contrast (a t test)")
    groups, sign = group_layout(design, contrast, method="trimmed")
    k = winsorized_normal_sd(trim)
    with np.errstate(divide="ignore", invalid="ignore"):
        if groups is None:
            m, v, n, g = _trimmed_parts(Y, trim)
            if n - 2 * g < 2:
                raise ModelError(f"trimming {trim:g} of {n} subjects leaves fewer than 2")
            se = np.sqrt(v) / ((1 - 2 * g / n) * np.sqrt(n))
            d = k * sign * m / np.sqrt(v)
            return _finish(sign * m, se, n - 2 * g - 1, d, "robust dz (trimmed)", alternative=alternative,
                           data=Y)
        parts = [_trimmed_parts(Y[sel], trim) for sel in (groups, ~groups)]
        ds, hs = [], []
        for m, v, n, g in parts:
            h = n - 2 * g
            if h < 2:
                raise ModelError(f"trimming {trim:g} of a group of {n} subjects leaves fewer than 2")
            ds.append((n - 1) * v / (h * (h - 1)))
            hs.append(h)
        est = sign * (parts[0][0] - parts[1][0])
        se = np.sqrt(ds[0] + ds[1])
        df = (ds[0] + ds[1]) ** 2 / (ds[0] ** 2 / (hs[0] - 1) + ds[1] ** 2 / (hs[1] - 1))
        n1, n2 = parts[0][2], parts[1][2]
        pooled = np.sqrt(((n1 - 1) * parts[0][1] + (n2 - 1) * parts[1][1]) / (n1 + n2 - 2))
        d = k * est / pooled
    return _finish(est, se, df, d, "robust d (trimmed)", alternative=alternative, data=Y)


def welch_test(estimates: np.ndarray, design: np.ndarray, contrast: np.ndarray, *,
               alternative: str = "two-sided") -> GroupStatistics:
    """Welch's unequal-variance t at every point for two groups [3]_.

    The effect size is the mean difference over the pooled SD (Cohen's d; with unequal
    variances read it with care).
    """
    Y = np.asarray(estimates, dtype=np.float64)
    if Y.ndim != 2:
        raise ModelError("welch tests take one subject contrast (a t test)")
    groups, sign = group_layout(design, contrast, method="welch")
    a, b = Y[groups], Y[~groups]
    n1, n2 = a.shape[0], b.shape[0]
    v1, v2 = a.var(axis=0, ddof=1), b.var(axis=0, ddof=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        q1, q2 = v1 / n1, v2 / n2
        est = sign * (a.mean(axis=0) - b.mean(axis=0))
        se = np.sqrt(q1 + q2)
        df = (q1 + q2) ** 2 / (q1 ** 2 / (n1 - 1) + q2 ** 2 / (n2 - 1))
        d = est / np.sqrt(((n1 - 1) * v1 + (n2 - 1) * v2) / (n1 + n2 - 2))
    return _finish(est, se, df, d, "d (pooled SD)", alternative=alternative, data=Y)
