"""The whole analysis of a design file, stage by stage: plan, fit subjects, test at group level.

:func:`plan_analysis` reads everything and builds every design and contrast without touching the
EEG data beyond the array headers, so every input error surfaces before any fitting.
:func:`fit_subjects` streams the subjects one at a time; :func:`test_group` runs one test;
:func:`run_analysis` chains them. The CLI is a thin layer over these functions.
"""

from __future__ import annotations

import dataclasses
import os
import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..subject_level.cache import FitCache
from ..errors import ExecutionError, GlmeegError, ModelError, StudyError
from ..formula import ContrastMatrix, Design, DesignMatrix, build_design, contrast_matrix, design_matrix
from ..group_level.glm import group_test
from ..results.findings import describe_clusters, significant_regions
from ..inference.corrections import PERMUTATION_METHODS, adjust_p
from ..results import Provenance, Resampling, RunResult, SubjectSummary, TestResult, provenance
from ..spec import DesignSpec, TestSpec, load_design
from ..study import Study, read_study
from ..parallel import Backend, Progress
from ..subject_level.jobs import SubjectJob
from ..subject_level.ols import small_product

__all__ = ["TestPlan", "AnalysisPlan", "SubjectEstimates", "plan_analysis", "fit_subjects",
           "test_group", "run_analysis"]

log = logging.getLogger("glmeeg")


@dataclass(frozen=True)
class TestPlan:
    """One test, ready to run: its contrasts and its group design over the included subjects."""

    spec: TestSpec
    subject_contrast: ContrastMatrix
    group_formula: str
    group_design: Design
    group_matrix: DesignMatrix
    subjects: tuple[str, ...]
    group_contrast: ContrastMatrix
    notes: tuple[str, ...]
    resampling: str | None = None


@dataclass(frozen=True)
class AnalysisPlan:
    """Everything :func:`run_analysis` will do, checked, before any EEG data are read."""

    design_file: Path | None
    spec: DesignSpec
    study: Study
    subject_design: Design
    subject_matrices: dict[str, DesignMatrix]
    tests: tuple[TestPlan, ...]
    warnings: tuple[str, ...]
    sensor_graph: object | None = None
    graph: tuple[np.ndarray, np.ndarray] | None = None
    extra_inputs: dict | None = None

    def describe(self) -> str:
        """What will be done, as readable text (``glmeeg check``)."""
        st = self.study
        lines = [f"{len(st.subject_ids)} subjects; points: {' x '.join(map(str, st.axes.shape))} "
                 f"({', '.join(st.axes.dims)}) = {st.axes.n_points}; times "
                 f"{st.axes.times[0]:g} to {st.axes.times[-1]:g} s",
                 f"subject model: {self.subject_design.formula}",
                 f"  columns ({len(self.subject_design.column_names)}, full rank): "
                 f"{', '.join(self.subject_design.column_names)}"]
        for v, lv in self.subject_design.factors.items():
            lines.append(f"  factor {v}: levels {', '.join(lv)} (reference {lv[0]})")
        lines.append("  subject   epochs  trials  used  dropped  df   condition")
        for s, X in self.subject_matrices.items():
            rows = st.subject_trials(s)
            lines.append(f"  {s:<9} {st.epoch_counts[s]:>6}  {len(rows):>6}  {X.matrix.shape[0]:>4}  "
                         f"{X.n_dropped:>7}  {X.matrix.shape[0] - X.matrix.shape[1]:>3}  "
                         f"{X.condition_number:9.3g}")
        for t in self.tests:
            kind = "t" if t.subject_contrast.n_rows == 1 and t.group_contrast.n_rows == 1 else "F"
            lines.append(f"test {t.spec.name}: {kind} test, {len(t.subjects)} subjects, "
                         f"{t.spec.correction_settings().describe()}, alpha {t.spec.alpha:g}, "
                         f"{t.spec.alternative}" + (f"; resampling: {t.resampling}" if t.resampling else ""))
            for lab, row in zip(t.subject_contrast.labels, t.subject_contrast.matrix):
                lines.append(f"  subject contrast {lab}: {_weights(self.subject_design.column_names, row)}")
            lines.append(f"  group model: {t.group_formula}; columns {', '.join(t.group_design.column_names)}")
            for lab, row in zip(t.group_contrast.labels, t.group_contrast.matrix):
                lines.append(f"  group contrast {lab}: {_weights(t.group_design.column_names, row)}")
            lines += [f"  note: {n}" for n in t.notes]
        if self.sensor_graph is not None:
            sg = self.sensor_graph
            lines.append(f"neighbours: {sg.method}; {len(sg.edges)} sensor pairs, "
                         f"{self.graph[1].size // 2} point pairs")
        lines += [f"warning: {w}" for w in self.warnings]
        return "\n".join(lines)


def _weights(names, row) -> str:
    return ", ".join(f"{w:g}*{n}" for n, w in zip(names, row) if w != 0)


def plan_analysis(design: str | Path | DesignSpec, *, root: str | Path | None = None) -> AnalysisPlan:
    """Read a design and its study and build every design matrix and contrast.

    Parameters
    ----------
    design : str, Path or DesignSpec
        A design file, or an already validated design (then ``root`` is required).
    root : str or Path, optional
        Folder the study paths are relative to; default: the design file's folder.

    Raises
    ------
    GlmeegError
        Any problem with the design, the study files, the formulas or the contrasts.
    """
    if isinstance(design, DesignSpec):
        spec, design_file = design, None
        if root is None:
            raise ValueError("root is needed when the design is given as a DesignSpec")
    else:
        design_file = Path(os.path.abspath(design))
        spec = load_design(design_file)
        root = design_file.parent if root is None else root
    study = read_study(spec.data, root=root)
    warnings = list(study.warnings)
    sdesign = build_design(study.trials, spec.subject_model.formula, levels=spec.subject_model.levels,
                           source=spec.data.trials, where="subject_model.formula")
    if spec.subject_model.trial_weights is not None and spec.subject_model.trial_weights not in study.trials.columns:
        raise StudyError(f"subject_model.trial_weights: {spec.subject_model.trial_weights!r} is not a "
                         f"column of {spec.data.trials}")
    matrices = {s: design_matrix(sdesign, study.subject_trials(s), who=f"subject {s}")
                for s in study.subject_ids}
    for s, X in matrices.items():
        if X.condition_number > 1e8:
            warnings.append(f"subject {s}: design condition number {X.condition_number:.3g}; estimates "
                            "may be unstable (rescale or centre covariates)")
    subj_table = study.subjects
    tests = []
    for t in spec.test:
        where = f"test {t.name!r}"
        sc = contrast_matrix(sdesign, t.subject_contrast, where=f"{where}: subject_contrast")
        gformula = t.group_formula or spec.group_model.formula
        gsource = spec.data.subjects or "the subjects (no subjects table)"
        gdesign = build_design(subj_table, gformula, levels=spec.group_model.levels, source=gsource,
                               where=f"{where}: group formula")
        gm = design_matrix(gdesign, subj_table, who=f"{where}: group design")
        included = tuple(np.asarray(study.subject_ids)[gm.kept])
        gc = contrast_matrix(gdesign, t.group_contrast, where=f"{where}: group_contrast")
        notes = []
        if gm.condition_number > 1e8:
            warnings.append(f"{where}: group design condition number {gm.condition_number:.3g}; "
                            "estimates may be unstable (rescale or centre covariates such as age)")
        if gm.n_dropped:
            notes.append(f"{gm.n_dropped} subject(s) left out for missing values in {gformula}: "
                         f"{', '.join(np.asarray(study.subject_ids)[~gm.kept])}")
        n, q = gm.matrix.shape
        k, m = sc.n_rows, gc.n_rows
        if k > 1 and m > 1:
            raise ModelError(f"{where}: a joint test over {k} subject contrasts takes one group "
                             f"contrast; got {m}")
        needed = q + k if k > 1 else q + 1
        if n < needed:
            raise ModelError(f"{where}: {n} subjects for a group model with {q} column(s)"
                             f"{f' and {k} joint subject contrasts' if k > 1 else ''}; at least "
                             f"{needed} are needed")
        if (k > 1 or m > 1) and t.alternative != "two-sided":
            raise ModelError(f"{where}: alternative {t.alternative!r} applies to t tests only; this "
                             "is an F test (use two-sided)")
        if t.bootstrap:
            from ..group_level.robust import group_layout
            if k > 1:
                raise ModelError(f"{where}: bootstrap intervals take one subject contrast")
            try:
                group_layout(gm.matrix, gc.matrix, method="bootstrap")
            except ModelError as e:
                raise ModelError(f"{where}: {e}") from None
        if t.group_method != "glm":
            from ..group_level.robust import group_layout
            if k > 1:
                raise ModelError(f"{where}: group_method {t.group_method!r} takes one subject contrast")
            try:
                group_layout(gm.matrix, gc.matrix, method=t.group_method)
            except ModelError as e:
                raise ModelError(f"{where}: {e}") from None
        scheme = None
        if t.correction in PERMUTATION_METHODS:
            from ..inference.permutation import choose_resampling
            try:
                scheme = choose_resampling(gm.matrix, gc.matrix, requested=t.resampling or "auto")
            except ModelError as e:
                raise ModelError(f"{where}: {e}") from None
        if n < 16:
            notes.append(f"{n} subjects: fewer than the 16-32 common in EEG group studies "
                         "(common practice); estimates and power may be poor")
        tests.append(TestPlan(spec=t, subject_contrast=sc, group_formula=gformula, group_design=gdesign,
                              group_matrix=gm, subjects=included, group_contrast=gc, notes=tuple(notes),
                              resampling=scheme))
    sgraph, graph, extra = None, None, {}
    needs = {t.spec.correction for t in tests} & set(PERMUTATION_METHODS)
    if needs:
        sgraph, graph, extra = _neighbour_graph(spec, study, root, required=bool(needs - {"max"}),
                                                warnings=warnings)
    return AnalysisPlan(design_file=design_file, spec=spec, study=study, subject_design=sdesign,
                        subject_matrices=matrices, tests=tuple(tests), warnings=tuple(warnings),
                        sensor_graph=sgraph, graph=graph, extra_inputs=extra)


def _neighbour_graph(spec: DesignSpec, study: Study, root, *, required: bool, warnings: list):
    """Sensor neighbours and the graph of points, for cluster and TFCE corrections."""
    from ..errors import GlmeegError
    from ..inference.graph import map_graph
    from ..sensors.neighbours import sensor_graph
    from ..study import read_neighbour_table

    table, extra = None, {}
    if spec.data.neighbours is not None:
        path = Path(root) / spec.data.neighbours
        table = read_neighbour_table(path, label=spec.data.neighbours)
        extra["neighbours"] = path
    try:
        sg = sensor_graph(study.sensors, neighbour_table=table, neighbour_label=spec.data.neighbours or "",
                          sensors_label=spec.data.channels)
    except GlmeegError:
        if required:
            raise
        warnings.append("no sensor neighbours (no positions or neighbour table): significant "
                        "points are not grouped into regions")
        return None, None, extra
    if sg.isolated:
        warnings.append(f"{len(sg.isolated)} sensor(s) have no neighbours and form clusters on their "
                        f"own: {', '.join(sg.isolated)}")
    return sg, map_graph(sg.adjacency(), study.axes.shape), extra


@dataclass(frozen=True)
class SubjectEstimates:
    """Subject-level contrast estimates of every test, stacked over subjects.

    ``estimates`` has shape ``(n_subjects, n_rows, n_points)`` where the rows are the subject
    contrast rows of all tests, in test order; ``rows[name]`` is the slice of one test.
    """

    subjects: tuple[str, ...]
    estimates: np.ndarray
    rows: dict[str, slice]
    summaries: tuple[SubjectSummary, ...]
    warnings: tuple[str, ...] = ()


def subject_jobs(plan: AnalysisPlan, *, hashes: dict[str, str] | None = None) -> list[SubjectJob]:
    """One :class:`~glmeeg.subject_level.jobs.SubjectJob` per subject, in analysis order.

    ``hashes`` are the SHA-256 of the input files (``Provenance.input_sha256``); they enter the
    jobs' cache keys.
    """
    st = plan.study
    sm = plan.spec.subject_model
    robust = None
    if sm.robust is not None:
        robust = {"norm": sm.robust, **{k: v for k, v in (("tuning", sm.robust_tuning),
                                                           ("max_iterations", sm.robust_max_iterations),
                                                           ("tolerance", sm.robust_tolerance),
                                                           ("convergence", sm.robust_convergence),
                                                           ("scale_constant", sm.robust_scale_constant))
                                        if v is not None}}
    jobs = []
    for s in st.subject_ids:
        X = plan.subject_matrices[s]
        trials = st.subject_trials(s)
        jobs.append(SubjectJob(subject=s, path=str(Path(st.epoch_files[s]).resolve()), label=st.epoch_label(s),
                               epochs=trials["epoch"].to_numpy()[X.kept].astype(np.int64),
                               design=np.asarray(X.matrix, dtype=np.float64), n_points=st.axes.n_points,
                               itemsize=st.epoch_itemsizes.get(s, 8),
                               weights=_trial_weights(plan, trials, X, s), robust=robust,
                               data_sha256=(hashes or {}).get(f"epochs:{s}", "")))
    return jobs


def _contrast_rows(plan: AnalysisPlan) -> tuple[np.ndarray, dict[str, slice]]:
    C = np.vstack([t.subject_contrast.matrix for t in plan.tests])
    rows, start = {}, 0
    for t in plan.tests:
        rows[t.spec.name] = slice(start, start + t.subject_contrast.n_rows)
        start += t.subject_contrast.n_rows
    return C, rows


def check_memory(plan: AnalysisPlan, jobs: list[SubjectJob], memory_limit: int) -> None:
    """Refuse a memory budget too small for one subject's fit or for the group data.

    Raises
    ------
    ExecutionError
        Naming the subject (or the group data), what it needs and the budget.
    """
    from ..parallel import format_size
    from ..subject_level.jobs import job_memory

    n_rows = sum(t.subject_contrast.n_rows for t in plan.tests)
    P = plan.study.axes.n_points
    group = len(jobs) * n_rows * P * 8
    for j in jobs:
        need = job_memory(j)
        if need + group > memory_limit:
            raise ExecutionError(f"subject {j.subject}: its fit needs about {format_size(need)} "
                                 f"({len(j.epochs)} trials x {j.n_points} points) next to "
                                 f"{format_size(group)} of group data, above the memory limit of "
                                 f"{format_size(memory_limit)}; raise --memory-limit")
    for t in plan.tests:
        if t.spec.correction not in PERMUTATION_METHODS:
            continue
        # one resampled map and the reduced data of the test (inference.permutation's engines)
        q, k = t.group_matrix.matrix.shape[1], t.subject_contrast.n_rows
        per_map = P * 8 * (4 if t.spec.group_method != "glm" else q * k + 6)
        need = group + len(t.subjects) * k * P * 8 + per_map
        if need > memory_limit:
            raise ExecutionError(f"test {t.spec.name}: its permutation test needs about "
                                 f"{format_size(need)} (group data and one resampled map of {P} "
                                 f"points), above the memory limit of {format_size(memory_limit)}; "
                                 "raise --memory-limit")


def fit_subjects(plan: AnalysisPlan, *, backend: Backend | None = None, cache: FitCache | None = None,
                 refit: bool = False, hashes: dict[str, str] | None = None,
                 progress: Progress | None = None, memory_limit: int | None = None) -> SubjectEstimates:
    """Fit the subject model at every point of every subject.

    Each subject is one job (:mod:`glmeeg.subject_level.jobs`) that reads its own epoch file; the
    backend runs the jobs (in this process by default, else on Dask workers). Only the
    contrast estimates the tests need are kept, so memory stays near one subject's data per
    worker plus ``n_subjects x n_contrast_rows x n_points`` values.

    Parameters
    ----------
    plan : AnalysisPlan
    backend : Backend, optional
        Where the jobs run (:func:`glmeeg.parallel.open_backend`); default: this process.
    cache : FitCache, optional
        Finished fits are taken from it and every new fit is stored in it as soon as it is done,
        so an interrupted run resumes where it stopped.
    refit : bool, default False
        Ignore the cache's entries (new fits still replace them).
    hashes : dict, optional
        SHA-256 of the input files (``Provenance.input_sha256``): needed with ``cache``.
    progress : callable, optional
        ``progress("fitting subjects", done, total)``.
    memory_limit : int, optional
        Bytes; default :func:`glmeeg.parallel.default_memory_limit`.

    Raises
    ------
    StudyError
        A subject's data hold NaN or Inf in the epochs used.
    ExecutionError
        The memory limit is too small for a subject, or workers died on every try.
    """
    from ..parallel import InProcess, default_memory_limit
    from ..subject_level.jobs import run_subject_job

    st = plan.study
    jobs = subject_jobs(plan, hashes=hashes)
    if cache is not None and not all(j.data_sha256 for j in jobs):
        raise ValueError("a cache needs the SHA-256 of every epoch file (hashes=provenance.input_sha256)")
    check_memory(plan, jobs, memory_limit or default_memory_limit())
    C, rows = _contrast_rows(plan)
    out = np.empty((len(jobs), C.shape[0], st.axes.n_points))
    facts: list = [None] * len(jobs)
    task = "fitting subjects"

    def keep(i, fit) -> None:
        out[i] = small_product(C, fit.betas)
        out[i][:, fit.unusable] = np.nan  # no estimate where the data are constant or fitted exactly
        facts[i] = dataclasses.replace(fit, betas=np.empty((0, 0)))  # the betas are not needed again

    for i, job in enumerate(jobs):
        fit = None if (cache is None or refit) else cache.load(
            job.key, subject=job.subject, shape=(job.design.shape[1], job.n_points))
        if fit is not None:
            keep(i, fit)
            log.info("subject %s: fit taken from the cache", job.subject)
    pending = [i for i in range(len(jobs)) if facts[i] is None]
    done = [len(jobs) - len(pending)]
    if progress:
        progress(task, done[0], len(jobs))

    def on_result(k: int, fit) -> None:
        i = pending[k]
        if cache is not None:
            cache.store(jobs[i].key, fit)
        keep(i, fit)
        done[0] += 1
        log.info("subject %s fitted: %d trials", fit.subject, len(jobs[i].epochs))
        if progress:
            progress(task, done[0], len(jobs))

    (backend or InProcess()).map(run_subject_job, [jobs[i] for i in pending],
                                 labels=[f"subject {jobs[i].subject}" for i in pending],
                                 on_result=on_result, keep=False)
    summaries = []
    for job, fit in zip(jobs, facts):
        X = plan.subject_matrices[job.subject]
        summaries.append(SubjectSummary(subject=job.subject, epochs_in_file=st.epoch_counts[job.subject],
                                        trials_listed=len(st.subject_trials(job.subject)),
                                        trials_used=int(X.kept.sum()), rows_dropped=X.n_dropped,
                                        df_resid=fit.df_resid, condition_number=X.condition_number,
                                        unusable_points=int(fit.unusable.size), **fit.summary_fields()))
    notes = tuple(f"subject {s.subject}: at {s.unusable_points} of {st.axes.n_points} points the data are "
                  "constant or fitted exactly up to rounding; those points get no estimate and no "
                  "group statistic" for s in summaries if s.unusable_points)
    return SubjectEstimates(subjects=st.subject_ids, estimates=out, rows=rows, summaries=tuple(summaries),
                            warnings=notes)


def _trial_weights(plan: AnalysisPlan, trials: pd.DataFrame, X: DesignMatrix, subject: str):
    """The subject's trial weights (kept rows), or None when the design sets none."""
    column = plan.spec.subject_model.trial_weights
    if column is None:
        return None
    w = pd.to_numeric(trials[column], errors="coerce").to_numpy(dtype=np.float64)[X.kept]
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise StudyError(f"subject {subject}: {plan.spec.data.trials} column {column!r} must hold "
                         "finite, non-negative trial weights")
    if np.count_nonzero(w) <= X.matrix.shape[1]:
        raise StudyError(f"subject {subject}: only {np.count_nonzero(w)} trials have a positive weight "
                         f"in {column!r}; the model has {X.matrix.shape[1]} columns")
    return w


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
    trim = (0.2 if test.spec.trim is None else test.spec.trim) if test.spec.group_method == "trimmed" else 0.0
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
    from ..group_level.assumptions import group_checks
    from ..results import ResidualChecks

    g = group_checks(Y, test.group_matrix.matrix, test.subjects)
    notes.extend(n for n in g.notes if not n.startswith("fewer than 8"))
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
    if test.spec.group_method == "trimmed":
        from ..group_level.robust import trimmed_test
        stats = trimmed_test(Y[:, 0], test.group_matrix.matrix, test.group_contrast.matrix,
                             trim=0.2 if test.spec.trim is None else test.spec.trim,
                             alternative=test.spec.alternative)
    elif test.spec.group_method == "welch":
        from ..group_level.robust import welch_test
        stats = welch_test(Y[:, 0], test.group_matrix.matrix, test.group_contrast.matrix,
                           alternative=test.spec.alternative)
    else:
        from ..group_level.glm import group_test_in_chunks
        stats = group_test_in_chunks(Y, test.group_matrix.matrix, test.group_contrast.matrix,
                                     memory_limit=memory_limit, alternative=test.spec.alternative,
                                     confidence_level=test.spec.confidence_level)
    has_interval = bool(np.isfinite(stats.effect_size_low).any())
    extra: dict = {}
    if test.spec.bootstrap:
        from ..group_level.bootstrap import bootstrap_interval
        boot = bootstrap_interval(Y[:, 0], **_bootstrap_settings(test))
        extra.update(estimate_low=boot.low, estimate_high=boot.high)
    correction = test.spec.correction_settings()
    alpha = test.spec.alpha
    notes = list(test.notes)
    if test.subject_contrast.n_rows == 1:
        extra.update(_residual_checks(Y[:, 0], test, notes))
    if correction.method in PERMUTATION_METHODS:
        from ..inference.permutation import permutation_test

        perm = permutation_test(Y, test.group_matrix.matrix, test.group_contrast.matrix,
                                kind=stats.kind, df=stats.df, alternative=test.spec.alternative,
                                correction=correction, graph=plan.graph, method=test.spec.group_method,
                                trim=0.2 if test.spec.trim is None else test.spec.trim,
                                memory_limit=memory_limit, backend=backend, progress=progress,
                                task=f"test {test.spec.name}: resamplings")
        p_corr = perm.p_corrected
        significant = np.nan_to_num(p_corr, nan=1.0) <= alpha
        labels, p_by_id, kind = None, {}, "region"
        if perm.cluster_labels is not None:
            labels, kind = perm.cluster_labels, "cluster"
            p_by_id = {c["id"]: c["p"] for c in perm.clusters}
        elif plan.graph is not None:
            labels = significant_regions(significant, np.nan_to_num(stats.statistic), plan.graph)
            for cid in range(1, int(labels.max()) + 1):
                p_by_id[cid] = float(np.nanmin(p_corr[labels == cid]))
        if labels is not None:
            extra["cluster"] = labels
            clusters = describe_clusters(labels, np.nan_to_num(stats.statistic), plan.study.axes,
                                         p_by_id, alpha=alpha, kind=kind)
            extra["clusters"] = _cluster_effect_sizes(clusters, labels, Y, test)
            if test.spec.bootstrap:
                extra["clusters"] = _cluster_bootstrap(extra["clusters"], labels, Y, test)
        extra.update(p_permutation=perm.p_uncorrected, null_distribution=perm.null_distribution,
                     resampling=Resampling(scheme=perm.scheme, n_resamplings=perm.n_resamplings,
                                           exhaustive=perm.exhaustive, seed=perm.seed,
                                           cluster_threshold=perm.threshold))
        if perm.enhanced is not None:
            extra["tfce"] = perm.enhanced
        if perm.exhaustive:
            smallest = 1.0 / perm.n_resamplings
            notes.append(f"all {perm.n_resamplings} possible resamplings were used; the smallest "
                         f"possible p is {smallest:.3g}"
                         + (f", above alpha {alpha:g}: nothing can be significant" if smallest > alpha else ""))
    else:
        p_corr = adjust_p(stats.p, correction)
        significant = np.nan_to_num(p_corr, nan=1.0) <= alpha
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
                      alternative=stats.alternative, alpha=test.spec.alpha, correction=correction,
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


def run_analysis(design: str | Path | AnalysisPlan, *, progress: Progress | None = None,
                 memory_limit: int | str | None = None, workers: int = 1, scheduler: str | None = None,
                 client=None, cache: str | Path | FitCache | None = None, refit: bool = False) -> RunResult:
    """Run every test of a design file.

    Parameters
    ----------
    design : str, Path or AnalysisPlan
        A design file, or a plan from :func:`plan_analysis`.
    progress : callable, optional
        Called as ``progress(task, done, total)``: ``"fitting subjects"`` after each subject's
        fit, ``"test NAME: resamplings"`` as permutation batches finish.
    memory_limit : int or str, optional
        Memory budget of the run in bytes (or a size such as ``"2GB"``): checked against each
        subject's fit and the group data before any fitting, and used to size the batches of
        resampled maps. Default: half of this machine's memory, between 1 and 16 GiB.
    workers : int, default 1
        1 runs everything in this process (numba uses every core); more starts a local Dask
        cluster of that many worker processes for the run.
    scheduler : str, optional
        Address of an existing Dask scheduler to run on (``tcp://host:8786``). The workers must
        see the study's files at the same paths.
    client : distributed.Client, optional
        An existing Dask client to run on (left open).
    cache : str, Path or FitCache, optional
        Folder of the subject-fit cache (the CLI uses ``OUT/subject-fits``). Finished fits are
        reused, new ones stored as they finish, so an interrupted run resumes. A run that fails
        on an input error removes the entries it added (one that fails for its workers keeps
        them). Entries no longer used are removed by :meth:`FitCache.prune` (the CLI calls it
        once the results are written).
    refit : bool, default False
        Refit every subject even when the cache holds its fit.

    Returns
    -------
    RunResult
        Save it with :func:`glmeeg.write_run`. The same inputs and seeds give bitwise the same
        result for any backend and number of workers.

    Raises
    ------
    ExecutionError
        The scheduler cannot be reached, workers died on every try, or the memory limit is too
        small for a subject.

    Examples
    --------
    >>> run = run_analysis("study/design.toml", workers=2)   # doctest: +SKIP
    >>> print(run.test("urgency-high-vs-low"))              # doctest: +SKIP
    """
    from ..parallel import default_memory_limit, open_backend, parse_size

    limit = default_memory_limit() if memory_limit is None else parse_size(memory_limit)
    plan = design if isinstance(design, AnalysisPlan) else plan_analysis(design)
    if cache is not None and not isinstance(cache, FitCache):
        cache = FitCache(cache)
    check_memory(plan, subject_jobs(plan), limit)
    prov = provenance(design_file=plan.design_file,
                      inputs={**plan.study.input_files, **(plan.extra_inputs or {})})
    before = cache.keys() if cache is not None else set()
    try:
        with open_backend(workers=workers, scheduler=scheduler, client=client) as backend:
            est = fit_subjects(plan, backend=backend, cache=cache, refit=refit, hashes=prov.input_sha256,
                               progress=progress, memory_limit=limit)
            tests = tuple(test_group(plan, t, est, prov=prov, memory_limit=limit, backend=backend,
                                     progress=progress) for t in plan.tests)
    except ExecutionError:
        raise  # dead workers, a lost cluster: the fits finished so far stay, for the re-run
    except GlmeegError:
        if cache is not None:  # an input error leaves the output folder as it was
            cache.rollback(before)
        raise
    first = plan.study.subject_ids[0]
    return RunResult(design=plan.spec.model_dump(mode="json"), subject_formula=plan.subject_design.formula,
                     subject_columns=plan.subject_design.column_names, subjects=est.summaries,
                     tests=tests, warnings=tuple(plan.warnings) + est.warnings, provenance=prov,
                     example_design_subject=first, example_design=plan.subject_matrices[first].matrix)


def check_assumptions(plan: AnalysisPlan) -> str:
    """Fit the subjects and report on the assumptions of every test (``glmeeg check --data``).

    Per subject: trials whose residual energy is far above the others' (artefacts). Per test:
    skewness, kurtosis and D'Agostino-Pearson normality of the group-level residuals at every
    point, the share of points where normality is rejected, outlying subjects, and suggestions
    of robust options where they matter.
    """
    from ..group_level.assumptions import group_checks, outlying_trials

    st = plan.study
    lines = ["assumption checks (they describe the data; they are not tests to pass):"]
    flagged = 0
    for s in st.subject_ids:
        X = plan.subject_matrices[s]
        epochs = st.subject_trials(s)["epoch"].to_numpy()[X.kept]
        bad = outlying_trials(X.matrix, st.read_epochs(s, epochs), n_channels=len(st.axes.channels))
        if bad.size:
            flagged += bad.size
            lines.append(f"  subject {s}: {bad.size} outlying trial(s) (epochs "
                         f"{', '.join(map(str, epochs[bad][:12]))}{' ...' if bad.size > 12 else ''})")
    if flagged:
        lines.append(f"  {flagged} outlying trials in all: consider [subject_model] robust = \"huber\" "
                     "(or \"bisquare\"), or reject those epochs")
    else:
        lines.append("  no outlying trials")
    est = fit_subjects(plan)
    for t in plan.tests:
        if t.subject_contrast.n_rows > 1:
            lines.append(f"  test {t.spec.name}: joint test; residual checks are given for single contrasts")
            continue
        idx = [est.subjects.index(s) for s in t.subjects]
        Y = est.estimates[idx][:, est.rows[t.spec.name].start, :]
        g = group_checks(Y, t.group_matrix.matrix, t.subjects)
        share = "n/a" if np.isnan(g.share_rejected) else f"{100 * g.share_rejected:.1f} %"
        lines.append(f"  test {t.spec.name}: normality rejected at {share} of points; median |skewness| "
                     f"{np.nanmedian(np.abs(g.skewness)):.2f}, median excess kurtosis "
                     f"{np.nanmedian(g.excess_kurtosis):.2f}")
        lines += [f"    {n}" for n in g.notes]
    return "\n".join(lines)
