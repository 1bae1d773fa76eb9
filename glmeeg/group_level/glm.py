"""Group level: a GLM across subjects on their contrast estimates, at every point.

The summary-statistics approach: each subject contributes its subject-level contrast
estimate(s) at every point; the group design (one row per subject) is fitted by least squares
at every point with one factorization. A single group contrast of a single subject contrast
gives a t map; several group contrasts give an F map; several subject contrasts (a joint
within-subject question such as "any effect of a three-level factor") give Hotelling's T² at
every point, reported as its exact F transform.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.special
import scipy.stats

from .effect_sizes import noncentrality_interval_f, noncentrality_interval_t
from ..errors import ModelError
from ..subject_level.ols import fit_ols, require_full_rank, unusable_variance

__all__ = ["GroupStatistics", "group_arrays", "group_test", "group_test_in_chunks", "p_values",
           "unusable_variance",
           "hedges_factor"]

Alternative = Literal["two-sided", "greater", "less"]
ALTERNATIVES = ("two-sided", "greater", "less")


@dataclass(frozen=True)
class GroupStatistics:
    """Group-level statistics at every point.

    Attributes
    ----------
    kind : {"t", "F"}
    estimate : numpy.ndarray
        ``(rows, n_points)``: the group contrast of the subject contrast(s); one row for t.
    standard_error : numpy.ndarray
        ``(n_points,)`` standard error of the estimate for t; NaN for F.
    statistic : numpy.ndarray
        ``(n_points,)`` t or F.
    df : tuple of float
        ``(df_numerator, df_denominator)``; ``(1, df)`` for t.
    p : numpy.ndarray
        ``(n_points,)`` parametric p-values (``alternative`` applies to t only).
    effect_size, effect_size_corrected : numpy.ndarray
        t: d (estimate / residual SD; Cohen's dz for a one-sample design) and Hedges' g.
        F: partial eta squared and partial epsilon squared.
    effect_size_name, effect_size_corrected_name : str
    effect_size_low, effect_size_high : numpy.ndarray
        Limits of the ``confidence_level`` interval of ``effect_size`` from the noncentral t
        (d) or F (partial eta squared) distribution. For F the limits map the noncentrality
        ``λ`` by ``λ / (λ + df1 + df2 + 1)`` (an interval of the population partial eta
        squared), not by the point estimate's ``λ̂ / (λ̂ + df2)`` with ``λ̂ = F df1``; see
        :func:`group_test`, Notes.
    confidence_level : float
    """

    kind: Literal["t", "F"]
    estimate: np.ndarray
    standard_error: np.ndarray
    statistic: np.ndarray
    df: tuple[float, float]
    p: np.ndarray
    alternative: Alternative
    effect_size: np.ndarray
    effect_size_corrected: np.ndarray
    effect_size_name: str
    effect_size_corrected_name: str
    effect_size_low: np.ndarray
    effect_size_high: np.ndarray
    confidence_level: float


def hedges_factor(df: float) -> float:
    """Exact small-sample bias factor J(df) = Γ(df/2) / (sqrt(df/2) Γ((df-1)/2)).

    References
    ----------
    .. [1] Hedges, L. V. (1981). Distribution theory for Glass's estimator of effect size and
       related estimators. Journal of Educational Statistics, 6(2), 107-128.
    """
    if df <= 1:
        return float("nan")
    return float(np.exp(scipy.special.gammaln(df / 2) - 0.5 * np.log(df / 2)
                        - scipy.special.gammaln((df - 1) / 2)))


def p_values(statistic: np.ndarray, kind: str, df: tuple[float, float], *,
             alternative: Alternative = "two-sided") -> np.ndarray:
    """Parametric p-values of t (with ``alternative``) or F (upper tail) statistics.

    A statistic that is not finite (NaN, or ±inf from a zero variance) has no p-value (NaN):
    such a point is left out of every correction's family (:func:`glmeeg.inference.adjust_p`
    leaves out NaN entries), as the resampling corrections leave it out of every resampled map.
    """
    with np.errstate(invalid="ignore"):
        if kind == "F":
            p = scipy.stats.f.sf(statistic, df[0], df[1])
        else:
            t = scipy.stats.t
            if alternative == "two-sided":
                p = np.minimum(1.0, 2.0 * t.sf(np.abs(statistic), df[1]))
            elif alternative == "greater":
                p = t.sf(statistic, df[1])
            else:
                p = t.cdf(statistic, df[1])
    infinite = np.isinf(statistic)
    if np.any(infinite):  # the usual maps have none: their p-values are returned untouched
        p = np.where(infinite, np.nan, p)
    return p


def group_arrays(estimates, design, contrast, *,
                 column_names=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Validated float64 arrays of a group test: ``Y`` (n, k, P), ``G`` (n, q), ``L`` (m, q).

    ``column_names`` (optional) name the group design's columns in the message of a
    rank-deficient design; default: their indices.

    Raises
    ------
    ModelError
        Mismatched shapes, no residual df, a group design with NaN or infinite values or not of
        full column rank (naming the columns of the dependence), or several subject contrasts
        with several group contrasts.
    """
    Y = np.asarray(estimates, dtype=np.float64)
    if Y.ndim == 2:
        Y = Y[:, None, :]
    G = np.asarray(design, dtype=np.float64)
    L = np.atleast_2d(np.asarray(contrast, dtype=np.float64))
    n, k, _ = Y.shape
    q, m = G.shape[1], L.shape[0]
    if G.shape[0] != n:
        raise ModelError(f"group design has {G.shape[0]} rows for {n} subjects")
    if L.shape[1] != q:
        raise ModelError(f"group contrast has {L.shape[1]} weights for {q} group design columns")
    if n - q < 1:
        raise ModelError(f"{n} subjects for {q} group design columns: at least {q + 1} are needed")
    # A rank-deficient design has no unique betas; its t and F would be on the wrong df.
    require_full_rank(G, column_names=column_names, what="group design")
    if k > 1 and m > 1:
        raise ModelError("a joint test over several subject contrasts takes one group contrast; "
                         f"got {m} group contrasts")
    return Y, G, L


def group_test(estimates: np.ndarray, design: np.ndarray, contrast: np.ndarray, *,
               alternative: Alternative = "two-sided", confidence_level: float = 0.95,
               column_names=None, intervals: bool = True) -> GroupStatistics:
    """Test a group contrast of subjects' contrast estimates at every point.

    Parameters
    ----------
    estimates : numpy.ndarray
        ``(n_subjects, n_points)`` for one subject contrast, or ``(n_subjects, k, n_points)``
        for ``k`` subject contrasts tested jointly.
    design : numpy.ndarray
        ``(n_subjects, q)`` group design matrix of full column rank.
    contrast : numpy.ndarray
        ``(m, q)`` group contrast weights.
    alternative : {"two-sided", "greater", "less"}, default "two-sided"
        Direction of a t test; F tests are always upper-tailed and need "two-sided".
    confidence_level : float, default 0.95
        Level of the effect-size intervals (two-sided, from the noncentral t or F).
    column_names : sequence of str, optional
        Names of the group design's columns, for the message of a rank-deficient design
        (default: their indices).
    intervals : bool, default True
        Compute the effect-size intervals (most of the time on large maps); False leaves them
        NaN (repeated tests of simulated power).

    Returns
    -------
    GroupStatistics

    Raises
    ------
    ModelError
        Too few subjects for the design (no residual df, or fewer than needed for the joint
        test), a design not of full column rank (naming the columns of the dependence), both
        ``k > 1`` and ``m > 1``, or ``alternative`` not two-sided for an F test.

    Notes
    -----
    With ``B`` the group betas, ``V = (G^T G)^{-1}`` and residual variance ``s²`` at a point:

    * one subject contrast, one group contrast ``c``: ``t = c B / sqrt(s² c V c^T)`` on
      ``n - q`` df;
    * one subject contrast, ``m`` group contrasts ``L``:
      ``F = (L B)^T (L V L^T)^{-1} (L B) / (m s²)`` on ``(m, n - q)`` df;
    * ``k`` subject contrasts, one group contrast ``c``: Hotelling's
      ``T² = a^T S^{-1} a / (c V c^T)`` with ``a = c B`` (a k-vector) and ``S`` the residual
      covariance matrix on ``ν = n - q`` df; ``F = (ν - k + 1) / (k ν) T²`` on
      ``(k, ν - k + 1)`` df [1]_.

    Effect-size intervals invert the noncentral t (for d) or F (for partial eta squared)
    distribution at the observed statistic [5]_.

    Effect sizes: for t, ``d = c B / s`` (with an intercept-only design and ``c = 1`` this is
    Cohen's dz; with two groups and ``c`` their difference, d with the pooled SD [2]_) and
    Hedges' ``g = J(ν) d`` [3]_; for F on ``(ν₁, ν₂)`` df, the sample partial eta squared
    ``F ν₁ / (F ν₁ + ν₂)`` and Kelley's partial epsilon squared ``(F - 1) ν₁ / (F ν₁ + ν₂)``
    [4]_ (may be negative); for the F of ``m`` group contrasts these are
    ``SS_effect / (SS_effect + SS_error)`` and ``(SS_effect - ν₁ MS_error) / (SS_effect +
    SS_error)`` in the sums of squares of the ANOVA table.

    Convention of the partial eta squared interval: the limits ``λ_L, λ_U`` of the noncentrality
    are mapped by ``λ / (λ + ν₁ + ν₂ + 1)``, the population partial eta squared
    ``η²_p = f² / (1 + f²)`` with ``λ = f² N`` and ``N = ν₁ + ν₂ + 1`` (the total sample size of
    a one-way layout) [5]_ [6]_ (from memory). The point estimate is the sample value, which is
    ``λ̂ / (λ̂ + ν₂)`` with ``λ̂ = F ν₁``: the two mappings differ (by ``ν₁ + 1`` in the
    denominator), so the point estimate is not the image of a point of the λ interval, and it
    can lie above the upper limit when ``ν₁`` is large against ``ν₂`` (``ν₁ = 10``, ``ν₂ = 3``,
    ``F = 1``: 0.77 against an upper limit of 0.67 at 95 %). Both follow their sources; the
    numbers are kept as they are.

    References
    ----------
    .. [1] Hotelling, H. (1931). The generalization of Student's ratio. Annals of Mathematical
       Statistics, 2(3), 360-378.
    .. [2] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences (2nd ed.).
       Erlbaum.
    .. [3] Hedges, L. V. (1981). Journal of Educational Statistics, 6(2), 107-128.
    .. [4] Okada, K. (2013). Is omega squared less biased? A comparison of three major effect
       size indices in one-way ANOVA. Behaviormetrika, 40(2), 129-147.
    .. [5] Steiger, J. H. (2004). Beyond the F test: effect size confidence intervals and tests
       of close fit in the analysis of variance and contrast analysis. Psychological Methods,
       9(2), 164-182.
    .. [6] Smithson, M. (2003). Confidence Intervals. Sage (Quantitative Applications in the
       Social Sciences, 140).
    """
    if not 0 < confidence_level < 1:
        raise ModelError(f"confidence_level must be between 0 and 1; got {confidence_level!r}")
    if alternative not in ALTERNATIVES:
        raise ModelError(f"alternative must be one of {', '.join(ALTERNATIVES)}; got {alternative!r}")
    Y, G, L = group_arrays(estimates, design, contrast, column_names=column_names)
    n, k, P = Y.shape
    q = G.shape[1]
    m = L.shape[0]
    dfe = n - q
    if (k > 1 or m > 1) and alternative != "two-sided":
        raise ModelError(f"alternative {alternative!r} applies to t tests only; an F test is "
                         "two-sided (upper-tailed in F)")
    fit = fit_ols(G, Y.reshape(n, k * P))
    B = fit.betas.reshape(q, k, P)
    V = fit.xtx_inv
    with np.errstate(divide="ignore", invalid="ignore", under="ignore", over="ignore"):
        if k == 1:
            # A variance with no digit of the data gives no statistic (unusable_variance).
            bad = unusable_variance(fit.residual_variance * dfe, np.einsum("np,np->p", Y[:, 0], Y[:, 0]), n)
            s2_usable = np.where(bad, np.nan, fit.residual_variance)
        if k == 1 and m == 1:
            c = L[0]
            est = (c @ B[:, 0, :])[None, :]
            s2 = s2_usable
            se = np.sqrt(s2 * (c @ V @ c))
            stat = est[0] / se
            df = (1.0, float(dfe))
            d = est[0] / np.sqrt(s2)
            j = hedges_factor(dfe)
            es, es_c = d, j * d
            names = ("dz", "gz") if q == 1 else ("d", "g")
            lo, hi = (noncentrality_interval_t(stat, dfe, confidence=confidence_level) if intervals
                      else (np.full(P, np.nan), np.full(P, np.nan)))
            scale = np.sqrt(c @ V @ c)  # d = t * sqrt(c V c')
            es_lo, es_hi = lo * scale, hi * scale
        else:
            if k == 1:
                est = L @ B[:, 0, :]                              # (m, P)
                s2 = s2_usable
                Minv = np.linalg.inv(L @ V @ L.T)
                stat = np.einsum("ip,ij,jp->p", est, Minv, est) / (m * s2)
                df = (float(m), float(dfe))
            else:
                if dfe - k + 1 < 1:
                    raise ModelError(f"a joint test of {k} subject contrasts needs at least "
                                     f"{q + k} subjects; there are {n}")
                c = L[0]
                est = np.einsum("q,qkp->kp", c, B)                # (k, P)
                E = Y - np.einsum("nq,qkp->nkp", G, B)
                S = np.einsum("nkp,nlp->pkl", E, E) / dfe
                a = est.T[:, :, None]
                diag = np.einsum("pkk->kp", S) * dfe
                bad = unusable_variance(diag, np.einsum("nkp,nkp->kp", Y, Y), n).any(axis=0)
                finite = np.isfinite(S).all(axis=(1, 2)) & (np.linalg.det(S) > 0) & ~bad
                sol = np.full_like(a, np.nan)
                sol[finite] = np.linalg.solve(S[finite], a[finite])
                t2 = np.einsum("pk,pk->p", est.T, sol[:, :, 0]) / (c @ V @ c)
                stat = (dfe - k + 1) / (k * dfe) * t2
                df = (float(k), float(dfe - k + 1))
            se = np.full(P, np.nan)
            es = stat * df[0] / (stat * df[0] + df[1])
            es_c = (stat - 1) * df[0] / (stat * df[0] + df[1])
            names = ("partial eta squared", "partial epsilon squared")
            lam_lo, lam_hi = (noncentrality_interval_f(stat, df[0], df[1], confidence=confidence_level)
                              if intervals else (np.full(P, np.nan), np.full(P, np.nan)))
            total = df[0] + df[1] + 1
            es_lo, es_hi = lam_lo / (lam_lo + total), lam_hi / (lam_hi + total)
    p = p_values(stat, "t" if (k == 1 and m == 1) else "F", df, alternative=alternative)
    return GroupStatistics(kind="t" if (k == 1 and m == 1) else "F", estimate=est,
                           standard_error=se, statistic=stat, df=df, p=p, alternative=alternative,
                           effect_size=es, effect_size_corrected=es_c, effect_size_name=names[0],
                           effect_size_corrected_name=names[1], effect_size_low=es_lo,
                           effect_size_high=es_hi, confidence_level=confidence_level)


def group_test_in_chunks(estimates: np.ndarray, design: np.ndarray, contrast: np.ndarray, *,
                         memory_limit: int, alternative: Alternative = "two-sided",
                         confidence_level: float = 0.95, column_names=None,
                         intervals: bool = True) -> GroupStatistics:
    """:func:`group_test` over chunks of points sized from a memory budget.

    Every statistic is computed point by point, so the chunks' results are simply put side by
    side. Chunks hold at least 1,024 points; below the budget's size the map is one chunk.
    """
    Y, G, L = group_arrays(estimates, design, contrast, column_names=column_names)
    n, k, P = Y.shape
    per_point = 8 * n * k * 8  # the data, residuals and their products in group_test (about)
    step = max(1024, int(memory_limit) // per_point)
    if step >= P:
        return group_test(Y, G, L, alternative=alternative, confidence_level=confidence_level,
                          intervals=intervals)
    parts = [group_test(Y[:, :, a:a + step], G, L, alternative=alternative,
                        confidence_level=confidence_level, intervals=intervals) for a in range(0, P, step)]
    joined = {f: np.concatenate([getattr(r, f) for r in parts], axis=-1)
              for f in ("estimate", "standard_error", "statistic", "p", "effect_size",
                        "effect_size_corrected", "effect_size_low", "effect_size_high")}
    return dataclasses.replace(parts[0], **joined)
