"""Multiple-comparison corrections over all points of a map.

Each correction is a small frozen settings object; a test takes exactly one through its
``correction`` argument, and the design file's ``correction = "<name>"`` maps onto it. The
parametric rules here adjust p-values; the permutation-based rules (max statistic, cluster
mass, TFCE) are further members of the same :data:`Correction` union.

Points whose p-value is not finite (a statistic that could not be computed, e.g. zero variance)
are left out of the family and keep a NaN corrected p; the run reports how many there are.
"""

from __future__ import annotations

from typing import Annotated, Literal, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

__all__ = ["NoCorrection", "Bonferroni", "Holm", "FalseDiscoveryRate", "Correction",
           "correction_from_name", "adjust_p"]


class _Settings(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")

    def describe(self) -> str:  # pragma: no cover - overridden
        raise NotImplementedError


class NoCorrection(_Settings):
    """Uncorrected p-values: no control of errors over the family of points."""

    method: Literal["none"] = "none"

    def describe(self) -> str:
        return "no correction for multiple comparisons"


class Bonferroni(_Settings):
    """Bonferroni: p multiplied by the number of points (family-wise error control)."""

    method: Literal["bonferroni"] = "bonferroni"

    def describe(self) -> str:
        return "Bonferroni correction over all points (family-wise error rate)"


class Holm(_Settings):
    """Holm's step-down Bonferroni (family-wise error control, uniformly more powerful).

    References
    ----------
    .. [1] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
       Scandinavian Journal of Statistics, 6(2), 65-70.
    """

    method: Literal["holm"] = "holm"

    def describe(self) -> str:
        return "Holm step-down correction over all points (family-wise error rate)"


class FalseDiscoveryRate(_Settings):
    """Benjamini-Hochberg step-up procedure (false discovery rate control).

    Valid for independent or positively dependent tests (PRDS), which covers the positively
    correlated neighbouring points of EEG maps.

    References
    ----------
    .. [1] Benjamini, Y., & Hochberg, Y. (1995). Controlling the false discovery rate: a
       practical and powerful approach to multiple testing. Journal of the Royal Statistical
       Society B, 57(1), 289-300.
    .. [2] Benjamini, Y., & Yekutieli, D. (2001). The control of the false discovery rate in
       multiple testing under dependency. Annals of Statistics, 29(4), 1165-1188.
    """

    method: Literal["fdr"] = "fdr"

    def describe(self) -> str:
        return "Benjamini-Hochberg false discovery rate over all points"


Correction = Annotated[Union[NoCorrection, Bonferroni, Holm, FalseDiscoveryRate],
                       Field(discriminator="method")]

_BY_NAME = {"none": NoCorrection, "bonferroni": Bonferroni, "holm": Holm, "fdr": FalseDiscoveryRate}


def correction_from_name(name: str, **settings) -> Correction:
    """The settings object of the correction a design file names (``"none"``, ``"fdr"`` ...)."""
    try:
        return _BY_NAME[name](**settings)
    except KeyError:
        raise ValueError(f"unknown correction {name!r}; expected one of {', '.join(_BY_NAME)}") from None


def adjust_p(p: np.ndarray, correction: Correction) -> np.ndarray:
    """Adjusted p-values of a parametric correction, over all finite entries of ``p``.

    Parameters
    ----------
    p : numpy.ndarray
        p-values at every point (any shape). NaN entries are left out of the family.
    correction : NoCorrection, Bonferroni, Holm or FalseDiscoveryRate

    Returns
    -------
    numpy.ndarray
        Adjusted p-values, same shape, capped at 1; a point is significant at level alpha
        when its adjusted p is at most alpha.

    Examples
    --------
    >>> adjust_p(np.array([0.01, 0.04, 0.03]), Holm()).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    x = p[finite]
    m = x.size
    if m == 0:
        return out
    method = correction.method
    if method == "none":
        adj = x.copy()
    elif method == "bonferroni":
        adj = np.minimum(1.0, x * m)
    elif method in ("holm", "fdr"):
        order = np.argsort(x, kind="stable")
        ranked = x[order]
        rank = np.arange(1, m + 1)
        if method == "holm":
            adj_sorted = np.minimum(1.0, np.maximum.accumulate((m - rank + 1) * ranked))
        else:
            adj_sorted = np.minimum(1.0, np.minimum.accumulate((m / rank * ranked)[::-1])[::-1])
        adj = np.empty(m)
        adj[order] = adj_sorted
    else:
        raise ValueError(f"{type(correction).__name__} is not a p-value adjustment")
    out[finite] = adj
    return out
