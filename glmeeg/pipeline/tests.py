"""The group stage of a run: one test of the subjects' estimates (:func:`test_group`), with its
correction, effect sizes, cluster summaries, bootstrap intervals and residual checks."""

from __future__ import annotations

import numpy as np

from ..group_level.glm import group_test
from ..inference.corrections import PERMUTATION_METHODS, adjust_p
from ..parallel import Backend, Progress
from ..results import Provenance, Resampling, TestResult
from ..results.findings import describe_clusters, significant_regions
from .plan import AnalysisPlan, TestPlan
from .subjects import SubjectEstimates


def _cluster_effect_sizes(clusters, labels: np.ndarray, Y: np.ndarray, test: TestPlan):
    """Effect size (with its interval) of each significant cluster's average.

    Each subject's contrast estimates are averaged over the cluster's points and the group test
    is run on those averages. The cluster was found in the same data, so the size is biased
    upwards (selection): a description of the cluster, not an unbiased estimate.
    """
    out = []
    for c in clusters:
        if not c.significant or test.spec.group_method != "glm":
            out.append(c)
            continue
        avg = Y[:, :, labels == c.id].mean(axis=2, keepdims=True)
        g = group_test(avg, test.group_matrix.matrix, test.group_contrast.matrix,
                       confidence_level=test.spec.confidence_level)
        out.append(c.model_copy(update={"effect_size": float(g.effect_size[0]),
                                        "effect_size_low": float(g.effect_size_low[0]),
                                        "effect_size_high": float(g.effect_size_high[0])}))
    return tuple(out)


def _bootstrap_settings(test: TestPlan) -> dict:
    """Keyword arguments of :func:`glmeeg.group_level.bootstrap.bootstrap_interval` for a test."""
    from ..group_level.robust import group_layout

    groups, sign = group_layout(test.group_matrix.matrix, test.group_contrast.matrix, method="bootstrap")
    trim = test.spec.trim_used if test.spec.group_method == "trimmed" else 0.0
    return dict(groups=groups, sign=sign, trim=trim, confidence_level=test.spec.confidence_level,
                n_resamples=test.spec.bootstrap, method=test.spec.bootstrap_method,
                seed=test.spec.seed if test.spec.seed is not None else 0)


def _cluster_bootstrap(clusters, labels: np.ndarray, Y: np.ndarray, test: TestPlan):
    """Bootstrap interval of the group estimate of each significant cluster's average.

    Each subject's contrast estimates are averaged over the cluster's points; the averages of
    all significant clusters are resampled together (the same resamples, so the intervals are
    joint draws), with the test's bootstrap settings. Like the cluster's effect size, the
    estimate is selected in the same data and biased away from zero.
    """
    from ..group_level.bootstrap import bootstrap_interval, group_estimate

    chosen = [c for c in clusters if c.significant]
    if not chosen:
        return clusters
    avg = np.column_stack([Y[:, 0, labels == c.id].mean(axis=1) for c in chosen])
    settings = _bootstrap_settings(test)
    boot = bootstrap_interval(avg, **settings)
    est = group_estimate(avg, groups=settings["groups"], sign=settings["sign"], trim=settings["trim"])
    update = {c.id: {"estimate": float(est[i]), "estimate_low": float(boot.low[i]),
                     "estimate_high": float(boot.high[i])} for i, c in enumerate(chosen)}
    return tuple(c.model_copy(update=update[c.id]) if c.id in update else c for c in clusters)


def _residual_checks(Y: np.ndarray, test: TestPlan, notes: list) -> dict:
    """Group-level residual checks of a single-contrast test, as result fields; their
    suggestions are appended to ``notes``."""
    from ..group_level.assumptions import NO_RESIDUAL_VARIANCE, group_checks
    from ..results import ResidualChecks

    g = group_checks(Y, test.group_matrix.matrix, test.subjects)
    # The cause of an untested normality is printed with the residual checks; not twice.
    notes.extend(n for n in g.notes if not n.startswith(("fewer than", NO_RESIDUAL_VARIANCE)))
    with np.errstate(all="ignore"):
        skew = float(np.nanmedian(np.abs(g.skewness))) if np.isfinite(g.skewness).any() else float("nan")
        kurt = float(np.nanmedian(g.excess_kurtosis)) if np.isfinite(g.excess_kurtosis).any() else float("nan")
    summary = ResidualChecks(share_rejected=None if np.isnan(g.share_rejected) else g.share_rejected,
                             median_abs_skewness=skew, median_excess_kurtosis=kurt,
                             outlying_subjects=g.outlying_subjects)
    return dict(residual_skewness=g.skewness, residual_kurtosis=g.excess_kurtosis,
                normality_p=g.normality_p, residual_checks=summary)


def test_group(plan: AnalysisPlan, test: TestPlan, estimates: SubjectEstimates, *,
               prov: Provenance, memory_limit: int | None = None, backend: Backend | None = None,
               progress: Progress | None = None) -> TestResult:
    """Run one test at the group level and apply its correction.

    Permutation corrections run their resamplings on ``backend`` (default: this process) in
    batches sized from ``memory_limit`` (default :func:`glmeeg.parallel.default_memory_limit`),
    reporting ``progress(f"test {name}: resamplings", done, total)``.
    """
    from ..parallel import default_memory_limit

    memory_limit = memory_limit or default_memory_limit()
    idx = [estimates.subjects.index(s) for s in test.subjects]
    Y = estimates.estimates[idx][:, estimates.rows[test.spec.name], :]
    stats = _statistics(Y, test, memory_limit)
    extra: dict = {}
    if test.spec.bootstrap:
        from ..group_level.bootstrap import bootstrap_interval
        boot = bootstrap_interval(Y[:, 0], **_bootstrap_settings(test))
        extra.update(estimate_low=boot.low, estimate_high=boot.high)
    notes = list(test.notes)
    if test.subject_contrast.n_rows == 1:
        extra.update(_residual_checks(Y[:, 0], test, notes))
    perm = None
    if test.correction.method in PERMUTATION_METHODS:
        perm = _resampled(plan, test, Y, stats, extra, notes, memory_limit=memory_limit,
                          backend=backend, progress=progress)
        p_corr = perm.p_corrected
    else:
        p_corr = adjust_p(stats.p, test.correction)
    significant = np.nan_to_num(p_corr, nan=1.0) <= test.spec.alpha
    if perm is not None:
        extra.update(_clusters(plan, test, Y, stats, p_corr, significant, perm))
    return _test_result(plan, test, Y, stats, p_corr, significant, extra, notes, prov)


def _statistics(Y: np.ndarray, test: TestPlan, memory_limit: int):
    """The group statistic of a test's method at every point."""
    from ..group_level import group_statistics

    return group_statistics(Y, test.group_matrix.matrix, test.group_contrast.matrix,
                            method=test.spec.group_method, trim=test.spec.trim_used,
                            alternative=test.spec.alternative,
                            confidence_level=test.spec.confidence_level, memory_limit=memory_limit)
def _resampled(plan: AnalysisPlan, test: TestPlan, Y: np.ndarray, stats, extra: dict, notes: list, *,
               memory_limit: int, backend, progress):
    """The permutation test of a resampling correction; its maps and facts go into ``extra``,
    its notes into ``notes``."""
    from ..inference.permutation import permutation_test

    perm = permutation_test(Y, test.group_matrix.matrix, test.group_contrast.matrix,
                            kind=stats.kind, df=stats.df, alternative=test.spec.alternative,
                            correction=test.correction, graph=plan.graph, method=test.spec.group_method,
                            trim=test.spec.trim_used,
                            memory_limit=memory_limit, backend=backend, progress=progress,
                            task=f"test {test.spec.name}: resamplings")
    extra.update(p_permutation=perm.p_uncorrected, null_distribution=perm.null_distribution,
                 resampling=Resampling(scheme=perm.scheme, n_resamplings=perm.n_resamplings,
                                       exhaustive=perm.exhaustive, seed=perm.seed,
                                       cluster_threshold=perm.threshold))
    if perm.enhanced is not None:
        extra["tfce"] = perm.enhanced
    if perm.exhaustive:
        smallest, alpha = 1.0 / perm.n_resamplings, test.spec.alpha
        notes.append(f"all {perm.n_resamplings} possible resamplings were used; the smallest "
                     f"possible p is {smallest:.3g}"
                     + (f", above alpha {alpha:g}: nothing can be significant" if smallest > alpha else ""))
    return perm


def _clusters(plan: AnalysisPlan, test: TestPlan, Y: np.ndarray, stats, p_corr: np.ndarray,
              significant: np.ndarray, perm) -> dict:
    """Cluster labels and described clusters (or regions of significant points) of a test."""
    labels, p_by_id, kind = None, {}, "region"
    if perm.cluster_labels is not None:
        labels, kind = perm.cluster_labels, "cluster"
        p_by_id = {c["id"]: c["p"] for c in perm.clusters}
    elif plan.graph is not None:
        labels = significant_regions(significant, np.nan_to_num(stats.statistic), plan.graph)
        for cid in range(1, int(labels.max()) + 1):
            p_by_id[cid] = float(np.nanmin(p_corr[labels == cid]))
    if labels is None:
        return {}
    clusters = describe_clusters(labels, np.nan_to_num(stats.statistic), plan.study.axes,
                                 p_by_id, alpha=test.spec.alpha, kind=kind)
    clusters = _cluster_effect_sizes(clusters, labels, Y, test)
    if test.spec.bootstrap:
        clusters = _cluster_bootstrap(clusters, labels, Y, test)
    return {"cluster": labels, "clusters": clusters}


def _test_result(plan: AnalysisPlan, test: TestPlan, Y: np.ndarray, stats, p_corr: np.ndarray,
                 significant: np.ndarray, extra: dict, notes: list, prov: Provenance) -> TestResult:
    has_interval = bool(np.isfinite(stats.effect_size_low).any())
    labels = test.subject_contrast.labels if test.subject_contrast.n_rows > 1 else test.group_contrast.labels
    if test.subject_contrast.n_rows == 1 and test.group_contrast.n_rows == 1:
        labels = (f"{test.subject_contrast.labels[0]} | {test.group_contrast.labels[0]}",)
    return TestResult(name=test.spec.name, spec=test.spec, kind=stats.kind, axes=plan.study.axes,
                      subjects=test.subjects, subject_columns=plan.subject_design.column_names,
                      subject_contrast=test.subject_contrast.matrix,
                      subject_contrast_labels=test.subject_contrast.labels,
                      group_formula=test.group_formula, group_columns=test.group_design.column_names,
                      group_contrast=test.group_contrast.matrix,
                      group_contrast_labels=test.group_contrast.labels, df=stats.df,
                      alternative=stats.alternative, alpha=test.spec.alpha, correction=test.correction,
                      estimate=stats.estimate, estimate_labels=tuple(labels),
                      standard_error=stats.standard_error, statistic=stats.statistic, p=stats.p,
                      p_corrected=p_corr, significant=significant, effect_size=stats.effect_size,
                      effect_size_corrected=stats.effect_size_corrected,
                      effect_size_name=stats.effect_size_name,
                      effect_size_corrected_name=stats.effect_size_corrected_name,
                      effect_size_low=stats.effect_size_low if has_interval else None,
                      effect_size_high=stats.effect_size_high if has_interval else None,
                      confidence_level=stats.confidence_level, notes=tuple(notes), provenance=prov,
                      subject_estimates=Y, group_design=test.group_matrix.matrix, **extra)
