"""Multiple-comparison corrections over all points of a map.

Each correction is a small frozen settings object; a test takes exactly one through its
``correction`` argument, and the design file's ``correction = "<name>"`` maps onto it. The
parametric rules adjust p-values (:func:`adjust_p`); the permutation-based rules (max
statistic, cluster mass, TFCE) carry their settings here and are computed by
:mod:`glmeeg.inference.permutation`.

Points without a statistic are left out of the family under every correction: the group tests
give no statistic (NaN) where the variance holds no digit of the data (zero, underflowed, at
rounding level: :func:`glmeeg.subject_level.unusable_variance`) or the data are missing, and
:func:`glmeeg.group_level.p_values` gives no p-value (NaN) for a statistic of ±inf. The
parametric adjustments leave NaN p-values out (they are not counted in Bonferroni's, Holm's or
Benjamini-Hochberg's m) and keep them NaN; the resampling corrections set those points to NaN
in every resampled map, so they enter no maximum, cluster or TFCE value, and give them a NaN
corrected p. Such points are never significant; the run reports how many there are.
"""

from __future__ import annotations


from typing import Annotated, Literal, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, field_validator

from .. import defaults
from ..spec import PERMUTATION_CORRECTIONS, current_correction_name

__all__ = ["NoCorrection", "Bonferroni", "Holm", "FalseDiscoveryRate", "MaxStatistic",
           "ClusterMass", "TFCE", "Correction", "PERMUTATION_METHODS", "correction_from_name",
           "adjust_p"]


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


DEFAULT_SEED = 20090101
Resampling = Literal["auto", "sign-flip", "permute"]


class _Permutation(_Settings):
    """Settings shared by the permutation-based corrections."""

    permutations: int = Field(defaults.PERMUTATIONS, ge=1, le=10_000_000,
                              description="random resamplings; all of them when the full set is no larger")
    seed: int = Field(DEFAULT_SEED, ge=0, description="seed of this test's random resamplings")
    resampling: Resampling = Field("auto", description="sign-flip, permute, or chosen from the design")

    def _resampling_text(self) -> str:
        return (f"{self.permutations} resamplings (seed {self.seed}, "
                f"{'scheme chosen from the design' if self.resampling == 'auto' else self.resampling})")


class MaxStatistic(_Permutation):
    """Family-wise error control by the permutation distribution of the maximum statistic.

    References
    ----------
    .. [1] Nichols, T. E., & Holmes, A. P. (2002). Nonparametric permutation tests for functional
       neuroimaging: a primer with examples. Human Brain Mapping, 15(1), 1-25.
    """

    # "max": this correction's name before glmeeg 0.2, still read from saved results.
    method: Literal["max-statistic", "max"] = "max-statistic"

    @field_validator("method")
    @classmethod
    def _current_name(cls, v: str) -> str:
        return "max-statistic"

    def describe(self) -> str:
        return f"max-statistic permutation correction, {self._resampling_text()}"


class ClusterMass(_Permutation):
    """Cluster-based permutation test: clusters of neighbouring points beyond a threshold.

    Parameters
    ----------
    threshold : float, optional
        Cluster-forming threshold on the statistic (|t| or F). Default: the value whose
        parametric p is 0.05 (two-sided for two-sided t tests).
    statistic : {"mass", "extent"}, default "mass"
        Cluster statistic: sum of the statistic over the cluster's points, or their number.

    References
    ----------
    .. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
       MEG-data. Journal of Neuroscience Methods, 164(1), 177-190.
    .. [2] Sassenhagen, J., & Draschkow, D. (2019). Cluster-based permutation tests of MEG/EEG
       data do not establish significance of effect latency or location. Psychophysiology,
       56(6), e13335.
    """

    method: Literal["cluster"] = "cluster"
    threshold: float | None = Field(None, gt=0, allow_inf_nan=False)
    statistic: Literal["mass", "extent"] = "mass"

    def describe(self) -> str:
        thr = "parametric p < 0.05" if self.threshold is None else f"{self.threshold:g}"
        return (f"cluster-{self.statistic} permutation test (cluster-forming threshold {thr}), "
                f"{self._resampling_text()}")


class TFCE(_Permutation):
    """Threshold-free cluster enhancement with a max-TFCE permutation correction.

    Parameters
    ----------
    extent_exponent : float, default 0.5
        E in the integral of extent^E * height^H over thresholds.
    height_exponent : float, default 2
        H in the same integral.

    References
    ----------
    .. [1] Smith, S. M., & Nichols, T. E. (2009). Threshold-free cluster enhancement: addressing
       problems of smoothing, threshold dependence and localisation in cluster inference.
       NeuroImage, 44(1), 83-98.
    """

    method: Literal["tfce"] = "tfce"
    extent_exponent: float = Field(defaults.TFCE_EXTENT_EXPONENT, gt=0, le=10, allow_inf_nan=False)
    height_exponent: float = Field(defaults.TFCE_HEIGHT_EXPONENT, gt=0, le=10, allow_inf_nan=False)

    def describe(self) -> str:
        return (f"TFCE (E = {self.extent_exponent:g}, H = {self.height_exponent:g}) with max-TFCE "
                f"permutation correction, {self._resampling_text()}")


Correction = Annotated[Union[NoCorrection, Bonferroni, Holm, FalseDiscoveryRate, MaxStatistic,
                             ClusterMass, TFCE], Field(discriminator="method")]
PERMUTATION_METHODS = PERMUTATION_CORRECTIONS

_BY_NAME = {"none": NoCorrection, "bonferroni": Bonferroni, "holm": Holm, "fdr": FalseDiscoveryRate,
            "max-statistic": MaxStatistic, "cluster": ClusterMass, "tfce": TFCE}


def correction_from_name(name: str, **settings) -> Correction:
    """The settings object of the correction a design file names (``"none"``, ``"fdr"`` ...)."""
    try:
        return _BY_NAME[current_correction_name(name)](**settings)
    except KeyError:
        raise ValueError(f"unknown correction {name!r}; expected one of {', '.join(_BY_NAME)}") from None


def adjust_p(p: np.ndarray, correction: Correction) -> np.ndarray:
    """Adjusted p-values of a parametric correction, over all finite entries of ``p``.

    Parameters
    ----------
    p : numpy.ndarray
        p-values at every point (any shape). Entries that are not finite (NaN: a point without
        a statistic) are left out of the family: they are not counted in ``m`` and stay NaN.
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
