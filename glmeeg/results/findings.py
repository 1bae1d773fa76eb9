"""Describing what a test found: clusters and regions of significant points, in labelled terms.

A *cluster* of a cluster-based test is a connected set of neighbouring points beyond the
cluster-forming threshold, with one corrected p for the whole set. For point-wise corrections
(TFCE, max statistic) the same description is given to each connected *region* of significant
points of one sign, with the smallest corrected p in it. Either way the description says that an
effect exists somewhere in the set; its first and last times are not estimates of an effect's
onset or offset (Sassenhagen & Draschkow, 2019). A significant cluster's effect size is that of
the subjects' estimates averaged over its points; since the cluster was selected in the same
data, that size is biased upwards.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict

from ..axes import Axes

__all__ = ["Cluster", "describe_clusters", "clusters_frame", "CLUSTER_CAUTION"]

CLUSTER_CAUTION = ("A cluster test establishes that an effect exists, not its exact onset, offset "
                   "or spatial extent: the edges of a cluster depend on the threshold and the noise "
                   "(Sassenhagen & Draschkow, 2019).")


class Cluster(BaseModel):
    """One cluster (or region of significant points) of a test."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    id: int
    kind: Literal["cluster", "region"]
    sign: Literal["positive", "negative"]
    mass: float
    extent: int
    first_time: float
    last_time: float
    lowest_frequency: float | None = None
    highest_frequency: float | None = None
    channels: tuple[str, ...]
    peak_channel: str
    peak_time: float
    peak_frequency: float | None = None
    peak_statistic: float
    p: float
    significant: bool
    effect_size: float | None = None
    effect_size_low: float | None = None
    effect_size_high: float | None = None
    estimate: float | None = None
    estimate_low: float | None = None
    estimate_high: float | None = None


def describe_clusters(labels: np.ndarray, statistic: np.ndarray, axes: Axes, p_values: dict[int, float],
                      *, alpha: float, kind: Literal["cluster", "region"]) -> tuple[Cluster, ...]:
    """Labelled description of every cluster in ``labels`` (ids 1..K, 0 = none).

    Parameters
    ----------
    labels : numpy.ndarray
        Cluster id of every point.
    statistic : numpy.ndarray
        The test statistic at every point (its sign gives the cluster's sign).
    axes : Axes
    p_values : dict
        Corrected p of each cluster id.
    alpha : float
    kind : {"cluster", "region"}

    Returns
    -------
    tuple of Cluster
        In id order. Channels are listed in the sensors table's order.
    """
    labels = np.asarray(labels)
    if labels.size == 0 or labels.max() == 0:
        return ()
    grid = np.unravel_index(np.arange(axes.n_points), axes.shape)
    ch_idx, t_idx = grid[0], grid[-1]
    f_idx = grid[1] if axes.frequencies is not None else None
    times = np.asarray(axes.times)
    freqs = np.asarray(axes.frequencies) if axes.frequencies is not None else None
    order = np.argsort(labels, kind="stable")
    bounds = np.searchsorted(labels[order], np.arange(1, labels.max() + 2))
    out = []
    for cid in range(1, labels.max() + 1):
        pts = order[bounds[cid - 1]:bounds[cid]]
        if pts.size == 0:
            continue
        vals = statistic[pts]
        peak = pts[int(np.argmax(np.abs(vals)))]
        chans = np.unique(ch_idx[pts])
        p = float(p_values.get(cid, np.nan))
        out.append(Cluster(
            id=cid, kind=kind, sign="positive" if vals.sum() >= 0 else "negative",
            mass=float(vals.sum()), extent=int(pts.size),
            first_time=float(times[t_idx[pts]].min()), last_time=float(times[t_idx[pts]].max()),
            lowest_frequency=float(freqs[f_idx[pts]].min()) if freqs is not None else None,
            highest_frequency=float(freqs[f_idx[pts]].max()) if freqs is not None else None,
            channels=tuple(axes.channels[c] for c in chans),
            peak_channel=axes.channels[ch_idx[peak]], peak_time=float(times[t_idx[peak]]),
            peak_frequency=float(freqs[f_idx[peak]]) if freqs is not None else None,
            peak_statistic=float(statistic[peak]), p=p, significant=bool(p <= alpha)))
    return tuple(out)


def clusters_frame(clusters: tuple[Cluster, ...], *, frequencies: bool) -> pd.DataFrame:
    """The clusters as a table (the content of ``clusters.csv``)."""
    cols = ["id", "kind", "sign", "mass", "extent", "first_time", "last_time"]
    if frequencies:
        cols += ["lowest_frequency", "highest_frequency"]
    cols += ["channels", "peak_channel", "peak_time"]
    if frequencies:
        cols += ["peak_frequency"]
    cols += ["peak_statistic", "p", "significant", "effect_size", "effect_size_low", "effect_size_high",
             "estimate", "estimate_low", "estimate_high"]
    rows = []
    for c in clusters:
        d = c.model_dump()
        d["channels"] = " ".join(c.channels)
        rows.append({k: d[k] for k in cols})
    return pd.DataFrame(rows, columns=cols)


def significant_regions(significant: np.ndarray, statistic: np.ndarray,
                        graph: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Ids (1..K, 0 = none) of connected regions of significant points of one sign.

    Positive and negative regions are labelled separately (a region never mixes signs); ids
    follow the lowest point index, positive regions first.
    """
    from ..inference.clusters import label_clusters

    indptr, indices = graph
    labels = np.zeros(significant.shape, dtype=np.int32)
    offset = 0
    for sign in (1.0, -1.0):
        mask = (significant & (sign * statistic > 0)).astype(np.float64)
        lab = label_clusters(np.ascontiguousarray(mask), indptr, indices, 0.5,
                             grid=getattr(graph, "grid", None))
        labels[lab > 0] = lab[lab > 0] + offset
        offset += int(lab.max())
    return labels
