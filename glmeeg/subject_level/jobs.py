"""One subject's fit as a self-contained job: what it needs, what it costs, what it gives back.

A :class:`SubjectJob` holds everything a worker needs to fit one subject and nothing more: the
path of the subject's epoch file (the worker reads it itself, memory-mapped), the epochs used,
the design matrix, the trial weights and the robust settings. :func:`run_subject_job` is the
task; it returns the betas, which the caller turns into the tests' contrast estimates and keeps
in the fit cache (:mod:`glmeeg.subject_level.cache`). The job's :attr:`~SubjectJob.key` is a hash of all its
inputs, the data file's own SHA-256 among them, so a cached fit is reused only for the very same
fit.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from ..errors import StudyError

__all__ = ["SubjectJob", "SubjectFit", "run_subject_job", "job_memory", "FIT_FORMAT"]

# Bumped whenever a change to the fitting code can change a fit's bits, or the cache entry's
# layout changes (2: the entry carries its key, shape, dtype and SHA-256; 3: and the points
# whose estimates are unusable): old cache entries then no longer match any key.
FIT_FORMAT = 3


@dataclass(frozen=True)
class SubjectJob:
    """Everything needed to fit one subject, anywhere.

    Attributes
    ----------
    subject : str
    path : str
        The subject's epoch array (.npy), read memory-mapped by the worker.
    label : str
        The file as the user named it, for messages.
    epochs : numpy.ndarray
        0-based epochs used, in design-matrix row order.
    design : numpy.ndarray
        ``(len(epochs), p)`` design matrix.
    n_points : int
    itemsize : int
        Bytes per value in the file (4 or 8).
    weights : numpy.ndarray or None
        Trial weights of the kept rows.
    robust : dict or None
        ``{"norm": ..., options of fit_robust}``; None for least squares.
    data_sha256 : str
        SHA-256 of the epoch file ("" when no cache is used).
    """

    subject: str
    path: str
    label: str
    epochs: np.ndarray
    design: np.ndarray
    n_points: int
    itemsize: int
    weights: np.ndarray | None = None
    robust: dict | None = None
    data_sha256: str = ""

    @cached_property
    def key(self) -> str:
        """SHA-256 of every input of the fit (data, epochs, design, weights, method, and the
        versions of glmeeg, numpy, scipy and numba)."""
        import numba
        import scipy

        from .._version import __version__

        def digest(a):
            return None if a is None else hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()

        # The libraries whose arithmetic makes the fit's bits (QR, the compiled kernels).
        versions = [__version__, np.__version__, scipy.__version__, numba.__version__]
        doc = {"format": FIT_FORMAT, "versions": versions, "subject": self.subject,
               "data": self.data_sha256, "n_points": self.n_points,
               "epochs": digest(np.asarray(self.epochs, dtype=np.int64)),
               "design": [list(self.design.shape), digest(np.asarray(self.design, dtype=np.float64))],
               "weights": digest(None if self.weights is None else np.asarray(self.weights, np.float64)),
               "robust": self.robust}
        return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


@dataclass(frozen=True)
class SubjectFit:
    """What a subject's fit gives back: its betas and a few facts for the summary."""

    subject: str
    betas: np.ndarray
    df_resid: int
    robust_iterations_max: int | None = None
    robust_unconverged_points: int | None = None
    # Points (sorted indices) where the data are constant or fitted exactly up to rounding:
    # their estimates are numbers, not results (subject_level.unusable_variance).
    unusable: np.ndarray = field(default_factory=lambda: np.empty(0, dtype=np.int64))

    def summary_fields(self) -> dict:
        if self.robust_iterations_max is None:
            return {}
        return {"robust_iterations_max": self.robust_iterations_max,
                "robust_unconverged_points": self.robust_unconverged_points}


def job_memory(job: SubjectJob) -> int:
    """Bytes a job needs at its peak (about): its epochs as read, plus the per-point results.

    Least squares and robust fits read the data once, block by block, converting to float64
    in cache; weighted least squares makes two float64 copies of the data.
    """
    n, p = job.design.shape
    data = n * job.n_points * job.itemsize
    if job.weights is not None and job.robust is None:
        data += 2 * n * job.n_points * 8
    per_point = (3 * p + 8) * job.n_points * 8
    return int(data + per_point)


def run_subject_job(_shared, job: SubjectJob) -> SubjectFit:
    """Fit one subject (a backend task: ``shared`` is unused).

    Raises
    ------
    StudyError
        The file cannot be read, or it holds NaN or Inf in the epochs used.
    """
    from ..study import read_epoch_file
    from .ols import fit_ols

    Y = read_epoch_file(job.path, job.epochs, subject=job.subject, label=job.label)
    X, w = job.design, job.weights
    robust_info: dict = {}
    if job.robust is not None:
        from .robust import fit_robust

        options = dict(job.robust)
        norm = options.pop("norm")
        fit = fit_robust(X, Y, norm=norm, weights=w, **options)
        robust_info = {"robust_iterations_max": int(fit.iterations.max()),
                       "robust_unconverged_points": int((~fit.converged).sum())}
    elif w is not None:
        keep = w > 0
        root = np.sqrt(w[keep])
        fit = fit_ols(X[keep] * root[:, None], np.asarray(Y[keep], dtype=np.float64) * root[:, None])
    else:
        fit = fit_ols(X, Y)
    if job.robust is not None:
        # Constant data at a point: the robust scale is zero and the estimates exact numbers.
        unusable = np.flatnonzero(np.max(Y, axis=0) == np.min(Y, axis=0))
    else:
        unusable = np.flatnonzero(fit.unusable_points())
    bad = ~np.isfinite(fit.betas).all(axis=0)
    if bad.any():
        cols = np.flatnonzero(bad)[:1000]
        ep = np.unique(job.epochs[np.flatnonzero(~np.isfinite(Y[:, cols]).all(axis=1))])
        raise StudyError(f"subject {job.subject}: {job.label} holds NaN or Inf values in epoch(s) "
                         f"{', '.join(map(str, ep[:10]))}{' ...' if len(ep) > 10 else ''}; "
                         "remove those epochs from the trials table or repair the data")
    del Y
    return SubjectFit(subject=job.subject, betas=np.ascontiguousarray(fit.betas, dtype=np.float64),
                      df_resid=int(fit.df_resid), unusable=unusable.astype(np.int64), **robust_info)
