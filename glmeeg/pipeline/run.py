"""A whole run of a design: plan, subject fits, every test, in one call (:func:`run_analysis`);
and the data checks of ``glmeeg check --data`` (:func:`check_assumptions`)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import ExecutionError, GlmeegError
from ..parallel import Progress
from ..results import RunResult, provenance
from ..subject_level.cache import FitCache
from .plan import AnalysisPlan, plan_analysis
from .subjects import check_memory, fit_subjects, subject_jobs
from .tests import test_group


def run_analysis(design: str | Path | AnalysisPlan, *, progress: Progress | None = None,
                 memory_limit: int | str | None = None, workers: int = 1, scheduler: str | None = None,
                 client=None, cache: str | Path | FitCache | None = None, refit: bool = False,
                 prune: bool = True) -> RunResult:
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
        on an input error removes the entries it added, and the folders it made for them (one
        that fails for its workers keeps them). After a run that succeeds, entries of earlier
        data or subject models are removed (:meth:`FitCache.prune`), unless ``prune=False``.
    refit : bool, default False
        Refit every subject even when the cache holds its fit.
    prune : bool, default True
        Remove the cache's entries that this run did not use (keep them when several designs
        share one cache folder).

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
                      inputs={**plan.study.input_files, **plan.extra_inputs})
    before = cache.keys() if cache is not None else set()
    # Folders the cache will make (its own, and the output folder above it), removed again if the
    # run stops on an input error.
    made = [] if cache is None else [f for f in (cache.folder, *cache.folder.absolute().parents)
                                     if not f.exists()]
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
            _remove_empty(made)
        raise
    if cache is not None and prune:  # fits of earlier data or subject models are not needed again
        cache.prune({j.key for j in subject_jobs(plan, hashes=prov.input_sha256)})
    first = plan.study.subject_ids[0]
    return RunResult(design=plan.spec.model_dump(mode="json"), subject_formula=plan.subject_design.formula,
                     subject_columns=plan.subject_design.column_names, subjects=est.summaries,
                     tests=tests, warnings=tuple(plan.warnings) + est.warnings, provenance=prov,
                     example_design_subject=first, example_design=plan.subject_matrices[first].matrix)


def _remove_empty(folders: list[Path]) -> None:
    """Remove these folders, innermost first, while they are empty."""
    for folder in folders:
        try:
            folder.rmdir()
        except FileNotFoundError:
            continue  # removed already (the cache removes its own folder when it empties it)
        except OSError:
            break


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
