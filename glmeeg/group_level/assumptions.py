"""Assumption checks: normality of group-level residuals, outlying subjects and trials.

The parametric t and F tests assume normal group-level errors; sign-flipping assumes symmetric
ones. These checks say where that is doubtful and which subjects or trials drive it, and suggest
the robust options where they matter. They describe the data; they are not tests to pass.

References
----------
.. [1] D'Agostino, R. B., & Pearson, E. S. (1973). Tests for departure from normality.
   Biometrika, 60(3), 613-622.
.. [2] Leys, C., Ley, C., Klein, O., Bernard, P., & Licata, L. (2013). Detecting outliers: do not
   use standard deviation around the mean, use absolute deviation around the median. Journal of
   Experimental Social Psychology, 49(4), 764-766.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.stats

from ..subject_level.ols import fit_ols, unusable_variance

__all__ = ["GroupChecks", "group_checks", "outlying_trials", "robust_z", "MIN_NORMALITY_SUBJECTS",
           "normality_not_tested"]

# D'Agostino's skewness test, half of the D'Agostino-Pearson test, needs at least 8 values
# (scipy.stats.skewtest refuses fewer).
MIN_NORMALITY_SUBJECTS = 8
# Why there is no normality test when there are enough subjects.
NO_RESIDUAL_VARIANCE = ("no point has a usable residual variance (zero, at rounding level or "
                        "missing everywhere)")

# |robust z| beyond which a subject or trial is called outlying (Leys et al. 2013 suggest 2.5-3.5;
# 3.5 is the conservative end: common practice).
OUTLIER_Z = 3.5
# For trials: the largest robust z over channels, so a higher bar (our choice: about a
# Bonferroni margin over 64 channels at the normal tail of 3.5).
TRIAL_Z = 5.0


def robust_z(x: np.ndarray, axis: int = 0) -> np.ndarray:
    """(x - median) / (1.4826 MAD) along ``axis`` (0 where the MAD is 0)."""
    med = np.median(x, axis=axis, keepdims=True)
    mad = 1.4826 * np.median(np.abs(x - med), axis=axis, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (x - med) / mad
    return np.where(mad > 0, z, 0.0)


@dataclass(frozen=True)
class GroupChecks:
    """Per-point residual shape and per-subject outlyingness for one test."""

    skewness: np.ndarray
    excess_kurtosis: np.ndarray
    normality_p: np.ndarray
    share_rejected: float
    subject_outlyingness: np.ndarray
    outlying_subjects: tuple[str, ...]
    notes: tuple[str, ...] = field(default=())


def group_checks(estimates: np.ndarray, design: np.ndarray, subjects: tuple[str, ...], *,
                 alpha: float = 0.05) -> GroupChecks:
    """Normality of the group-level residuals at every point and outlying subjects.

    Parameters
    ----------
    estimates : numpy.ndarray
        ``(n_subjects, n_points)`` subject contrast estimates.
    design : numpy.ndarray
        Group design.
    subjects : tuple of str
    alpha : float, default 0.05
        Level of the per-point D'Agostino-Pearson test (uncorrected: under normality about
        ``alpha`` of the points are rejected by chance).

    Notes
    -----
    A subject's outlyingness is the median over points of its |robust z| among subjects; it is
    outlying when that is itself a robust-z outlier (|z| > 3.5) among the subjects.

    Points whose residual variance holds no digit of the data (zero, at rounding level, or not
    finite: the group test's rule, :func:`glmeeg.subject_level.unusable_variance`) have no
    residual shape to check: their skewness, kurtosis and normality p are NaN, and they take no
    part in the share of rejections or the subjects' outlyingness. When no point is left, the
    notes say so (the normality test was not run for that reason, not for the number of
    subjects).
    """
    Y = np.asarray(estimates, dtype=np.float64)
    fit = fit_ols(design, Y)
    resid = Y - design @ fit.betas
    skew = scipy.stats.skew(resid, axis=0, bias=False)
    kurt = scipy.stats.kurtosis(resid, axis=0, bias=False)
    with np.errstate(invalid="ignore", over="ignore"):
        unusable = unusable_variance(fit.residual_variance * fit.df_resid,
                                     np.einsum("np,np->p", Y, Y), Y.shape[0])
    notes = []
    if Y.shape[0] >= MIN_NORMALITY_SUBJECTS:
        p = scipy.stats.normaltest(resid, axis=0).pvalue
        if unusable.any():
            skew, kurt, p = (np.where(unusable, np.nan, x) for x in (skew, kurt, p))
        share = float(np.mean(p[np.isfinite(p)] < alpha)) if np.isfinite(p).any() else float("nan")
        if unusable.all():
            notes.append(NO_RESIDUAL_VARIANCE + ": no normality test")
    else:
        if unusable.any():
            skew, kurt = (np.where(unusable, np.nan, x) for x in (skew, kurt))
        p = np.full(Y.shape[1], np.nan)
        share = float("nan")
        notes.append(f"fewer than {MIN_NORMALITY_SUBJECTS} subjects: no normality test")
    # Residuals of rounding size are noise, not the subjects' data: left out of the scores.
    kept = resid if not unusable.any() else resid[:, ~unusable]
    score = (np.median(np.abs(robust_z(kept, axis=0)), axis=1) if kept.shape[1]
             else np.zeros(Y.shape[0]))
    flagged = np.abs(robust_z(score[:, None], axis=0)[:, 0]) > OUTLIER_Z
    outlying = tuple(np.asarray(subjects)[flagged & (score > np.median(score))])
    if np.isfinite(share) and share > 2 * alpha:
        notes.append(f"normality is rejected at {100 * share:.0f} % of points (about {100 * alpha:g} % "
                     "expected by chance): consider group_method = \"trimmed\" or a permutation "
                     "correction (max / cluster / tfce)")
    if outlying:
        notes.append(f"outlying subject(s) {', '.join(outlying)}: look at their data; a trimmed-mean "
                     "group test limits their influence")
    return GroupChecks(skewness=skew, excess_kurtosis=kurt, normality_p=p, share_rejected=share,
                       subject_outlyingness=score, outlying_subjects=outlying, notes=tuple(notes))


def normality_not_tested(n_subjects: int) -> str:
    """Why the residual normality test of ``n_subjects`` subjects gave no share of rejections:
    too few subjects, or (with enough of them) no point with a usable residual variance."""
    if n_subjects < MIN_NORMALITY_SUBJECTS:
        return f"fewer than {MIN_NORMALITY_SUBJECTS} subjects"
    return NO_RESIDUAL_VARIANCE


def outlying_trials(X: np.ndarray, Y: np.ndarray, *, n_channels: int = 1) -> np.ndarray:
    """Indices of trials with an artefact: a channel whose residual energy is far above the
    other trials' on that channel.

    The residual energy (sum of squared residuals) of every trial on every channel is taken on a
    log scale and turned into a robust z across trials, channel by channel; a trial is flagged
    when its largest z over channels exceeds :data:`TRIAL_Z` (5: a margin for taking the
    largest of many channels). Artefacts confined to a few channels are found this way where a
    total over all points would dilute them.

    Parameters
    ----------
    X : numpy.ndarray
        The subject's design.
    Y : numpy.ndarray
        ``(trials, points)`` in the flat channel-major order of :class:`~glmeeg.axes.Axes`.
    n_channels : int, default 1
        Number of channels (the points split into this many equal consecutive runs).
    """
    fit = fit_ols(X, Y)
    n, P = Y.shape
    per = P // n_channels
    energy = np.empty((n, n_channels))
    for c in range(n_channels):
        sl = slice(c * per, (c + 1) * per)
        r = np.asarray(Y[:, sl], dtype=np.float64) - X @ fit.betas[:, sl]
        energy[:, c] = np.einsum("ij,ij->i", r, r)
    z = robust_z(np.log(energy + 1e-300), axis=0)
    return np.flatnonzero(z.max(axis=1) > TRIAL_Z)
