"""The subject stage of a run: one fit per subject, streamed one at a time through a backend and
the fit cache (:func:`fit_subjects`), reduced to the contrast estimates the tests need."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import ExecutionError, StudyError
from ..formula import DesignMatrix
from ..inference.corrections import PERMUTATION_METHODS
from ..parallel import Backend, Progress
from ..results import SubjectSummary
from ..subject_level.cache import FitCache
from ..subject_level.jobs import SubjectJob
from ..subject_level.ols import small_product
from .plan import AnalysisPlan, log


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
        from ..subject_level.robust import robust_options

        robust = robust_options(sm.robust, tuning=sm.robust_tuning, max_iterations=sm.robust_max_iterations,
                                tolerance=sm.robust_tolerance, convergence=sm.robust_convergence,
                                scale_constant=sm.robust_scale_constant)
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
    from ..subject_level.ols import require_full_rank

    require_full_rank(X.matrix[w > 0], column_names=X.column_names, what=f"subject {subject}: design",
                      on=f" on the trials with positive weight in {column!r}")
    return w
