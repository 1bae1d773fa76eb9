"""The one entrance to the group statistics: every caller (the pipeline, simulated power) asks
:func:`group_statistics` for a test's maps, and the choice between the group methods is made
here and nowhere else."""

from __future__ import annotations

import numpy as np

from .. import defaults
from ..errors import ModelError
from .glm import Alternative, GroupStatistics, group_test, group_test_in_chunks
from .robust import GROUP_METHODS, trimmed_test, welch_test

__all__ = ["group_statistics"]


def group_statistics(estimates: np.ndarray, design: np.ndarray, contrast: np.ndarray, *,
                     method: str = "glm", trim: float | None = None,
                     alternative: Alternative = "two-sided", confidence_level: float | None = None,
                     memory_limit: int | None = None, intervals: bool = True,
                     column_names=None) -> GroupStatistics:
    """The group test of ``method`` at every point.

    Parameters
    ----------
    estimates : numpy.ndarray
        ``(n_subjects, n_points)`` or ``(n_subjects, k, n_points)`` subject contrast estimates
        (``k > 1``, a joint test, with ``method="glm"`` only).
    design, contrast : numpy.ndarray
        Group design ``(n_subjects, q)`` and group contrast ``(m, q)``.
    method : {"glm", "trimmed", "welch"}, default "glm"
        The group GLM (:func:`~glmeeg.group_level.glm.group_test`), trimmed means (one-sample
        trimmed t or Yuen, :func:`~glmeeg.group_level.robust.trimmed_test`) or Welch's
        unequal-variance t (:func:`~glmeeg.group_level.robust.welch_test`).
    trim : float, optional
        Share trimmed per tail by ``"trimmed"``; default :data:`glmeeg.defaults.TRIM`.
    alternative : {"two-sided", "greater", "less"}, default "two-sided"
    confidence_level : float, optional
        Level of the GLM's effect-size intervals; default :data:`glmeeg.defaults.CONFIDENCE_LEVEL`.
    memory_limit : int, optional
        Bytes: the GLM runs over chunks of points of this size (all at once when None).
    intervals : bool, default True
        The GLM's effect-size intervals (False leaves them NaN: repeated tests).
    column_names : sequence of str, optional
        Names of the group design's columns for the message of a rank-deficient design.

    Returns
    -------
    GroupStatistics

    Raises
    ------
    ModelError
        An unknown method, or a design, contrast or data the method cannot test.
    """
    if method not in GROUP_METHODS:
        raise ModelError.of("method", f"expected one of {', '.join(GROUP_METHODS)}, got {method!r}")
    if method != "glm":
        Y = np.asarray(estimates)
        if Y.ndim == 3:
            if Y.shape[1] != 1:
                raise ModelError(f"group_method {method!r} takes one subject contrast")
            Y = Y[:, 0]
        if method == "trimmed":
            return trimmed_test(Y, design, contrast, trim=defaults.TRIM if trim is None else trim,
                                alternative=alternative)
        return welch_test(Y, design, contrast, alternative=alternative)
    level = defaults.CONFIDENCE_LEVEL if confidence_level is None else confidence_level
    if memory_limit is not None:
        return group_test_in_chunks(estimates, design, contrast, memory_limit=memory_limit,
                                    alternative=alternative, confidence_level=level,
                                    column_names=column_names, intervals=intervals)
    return group_test(estimates, design, contrast, alternative=alternative, confidence_level=level,
                      column_names=column_names, intervals=intervals)
