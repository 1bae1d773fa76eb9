"""Permutation inference for group-level tests: sign-flipping and Freedman-Lane permutation.

The group model ``Y = G B + E`` (subjects x points) is split by the tested contrast ``L`` into the
tested part and a nuisance part ``Z = G N`` (``N`` a basis of the null space of ``L``). The data
are reduced to the nuisance model's residuals ``R = (I - H_Z) Y`` and, for every resampling ``T``
(a permutation or a diagonal of signs), the statistic is computed from the full model fitted to
``T R`` (Freedman & Lane, 1983). Because ``H_Z Y`` lies in the nuisance space, adding it back
would change neither the contrast estimate nor the residuals, so it is left out.

Which resampling is valid depends on what is exchangeable under the null hypothesis (Winkler et
al., 2014):

``sign-flip``
    Independent and symmetric errors: each subject's residual may change sign. Used when the
    test involves the mean (the constant is not in the nuisance space): one-sample and paired
    questions, within-subject contrasts, the intercept of a model with covariates.
``permute``
    Exchangeable errors: subjects' residuals may swap places. Used when the constant is in the
    nuisance space: group differences, covariate slopes.

When the full set of resamplings is no larger than the number asked for, all of them are used
(the identity among them) and p = b / N; otherwise ``permutations`` are drawn at random and the
observed data count once: p = (b + 1) / (m + 1) (Phipson & Smyth, 2010). Random resamplings come
from one seed per test, expanded with :class:`numpy.random.SeedSequence` into one child stream per
block of :data:`BLOCK` resamplings, so any resampling can be regenerated alone and results do not
depend on batch size or on how the work is split. Statistics are computed by a kernel that sums
every value in a fixed order, so they are bitwise identical for any batch size.

The robust group statistics (trimmed-mean t, Yuen's and Welch's t) are resampled by the engines
of :mod:`glmeeg.inference.robust_resampling`, chosen by ``permutation_test``'s ``method``.

References
----------
.. [1] Freedman, D., & Lane, D. (1983). A nonstochastic interpretation of reported significance
   levels. Journal of Business & Economic Statistics, 1(4), 292-298.
.. [2] Winkler, A. M., Ridgway, G. R., Webster, M. A., Smith, S. M., & Nichols, T. E. (2014).
   Permutation inference for the general linear model. NeuroImage, 92, 381-397.
.. [3] Phipson, B., & Smyth, G. K. (2010). Permutation p-values should never be zero.
   Statistical Applications in Genetics and Molecular Biology, 9(1), 39.
.. [4] Nichols, T. E., & Holmes, A. P. (2002). Nonparametric permutation tests for functional
   neuroimaging: a primer with examples. Human Brain Mapping, 15(1), 1-25.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import scipy.linalg
import scipy.stats

from ..errors import ExecutionError, ModelError
from ..group_level.glm import group_arrays
from ..subject_level.ols import _conditioning
from .corrections import TFCE, ClusterMass, MaxStatistic
from .resampling import BLOCK, Scheme, _nuisance, choose_resampling, random_block, resamplings

__all__ = ["BLOCK", "PermutationResult", "choose_resampling", "resamplings", "random_block",
           "null_chunk", "permutation_test",
           "cluster_forming_threshold"]

# Relative tolerance when comparing a resampled statistic with the observed one, so that the
# identity (and exact ties) count as "at least as extreme" despite rounding.
_TIE = 1e-12
_KERNEL_BLOCK = 512
# Resampled maps per batch at most (cache-sized work; memory_limit may lower it).
_MAX_BATCH = 64


@dataclass(frozen=True)
class PermutationResult:
    """Outcome of a permutation-based correction at every point.

    Attributes
    ----------
    scheme : {"sign-flip", "permute"}
    n_resamplings : int
        Resamplings the null distribution holds (all of them when ``exhaustive``).
    exhaustive : bool
    seed : int
    p_uncorrected : numpy.ndarray
        Permutation p-value of every point on its own.
    p_corrected : numpy.ndarray
        Family-wise corrected p of every point (its cluster's p for cluster tests; 1 outside
        clusters).
    null_distribution : numpy.ndarray
        Maximum statistic (max |t|, max F, max cluster statistic or max TFCE, over points and the
        tested tails) of every resampling.
    enhanced : numpy.ndarray or None
        TFCE values, signed like the statistic (TFCE only).
    cluster_labels : numpy.ndarray or None
        Cluster id of every point, 0 outside clusters (cluster test only).
    clusters : list of dict
        One per cluster: ``id``, ``sign``, ``mass``, ``extent``, ``p`` (cluster test only).
    threshold : float or None
        Cluster-forming threshold used (cluster test only).
    """

    scheme: Scheme
    n_resamplings: int
    exhaustive: bool
    seed: int
    p_uncorrected: np.ndarray
    p_corrected: np.ndarray
    null_distribution: np.ndarray
    enhanced: np.ndarray | None = None
    cluster_labels: np.ndarray | None = None
    clusters: list = field(default_factory=list)
    threshold: float | None = None


def cluster_forming_threshold(kind: str, df: tuple[float, float], alternative: str) -> float:
    """The statistic whose parametric p is 0.05 (two-sided t: |t| at p = 0.025 per tail)."""
    if kind == "F":
        return float(scipy.stats.f.isf(0.05, df[0], df[1]))
    tail = 0.025 if alternative == "two-sided" else 0.05
    return float(scipy.stats.t.isf(tail, df[1]))


class _Engine:
    """Statistic maps of resampled data, from one reduction of the data per test."""

    def __init__(self, Y: np.ndarray, G: np.ndarray, L: np.ndarray, scheme: Scheme):
        n, k, P = Y.shape
        self.n, self.k, self.P, self.m = n, k, P, L.shape[0]
        self.scheme = scheme
        M = _conditioning(G)
        Q, R = np.linalg.qr(G @ M)
        self.qt = np.ascontiguousarray(Q.T)                       # (q, n)
        self.K = L @ M @ scipy.linalg.solve_triangular(R, np.eye(R.shape[0]))   # (m, q)
        self.KKt = self.K @ self.K.T
        self.dfe = n - G.shape[1]
        Z = _nuisance(G, L)
        Y2 = Y.reshape(n, k * P)
        if Z.shape[1]:
            Qz, _ = np.linalg.qr(Z)
            Y2 = Y2 - Qz @ (Qz.T @ Y2)
        self.R = np.ascontiguousarray(Y2, dtype=np.float64)      # (n, k*P)
        # Memory of one resampled map and its intermediates (sets the batch size).
        self.bytes_per_map = P * 8 * (self.qt.shape[0] * k + 6)
        Rk = self.R.reshape(n, k, P)
        if k == 1:
            self.rz2 = np.einsum("np,np->p", Rk[:, 0], Rk[:, 0])
        else:
            self.C0 = np.einsum("nkp,nlp->pkl", Rk, Rk)

    def statistics(self, rows: np.ndarray) -> np.ndarray:
        """``(B, P)`` t or F maps for a batch of resamplings (sign rows or subject orders)."""
        from .kernels import weighted_row_sums

        B = rows.shape[0]
        if self.scheme == "sign-flip":
            W = self.qt[None, :, :] * rows[:, None, :].astype(np.float64)
        else:
            W = np.transpose(self.qt[:, rows], (1, 0, 2))
        q = self.qt.shape[0]
        U = weighted_row_sums(np.ascontiguousarray(W.reshape(B * q, self.n)), self.R, _KERNEL_BLOCK)
        U = U.reshape(B, q, self.k, self.P)
        if self.k == 1 and self.m == 1:
            from .kernels import t_from_projections
            with np.errstate(divide="ignore", invalid="ignore"):
                return t_from_projections(U[:, :, 0, :], np.ascontiguousarray(self.K[0]), self.rz2,
                                          self.KKt[0, 0] / self.dfe)
        A = np.einsum("mq,bqkp->bmkp", self.K, U)
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.k == 1:
                ss = self.rz2[None, :] - np.einsum("bqp,bqp->bp", U[:, :, 0], U[:, :, 0])
                s2 = ss / self.dfe
                if self.m == 1:
                    return A[:, 0, 0] / np.sqrt(s2 * self.KKt[0, 0])
                inv = np.linalg.inv(self.KKt)
                return np.einsum("bip,ij,bjp->bp", A[:, :, 0], inv, A[:, :, 0]) / (self.m * s2)
            scale = (self.dfe - self.k + 1) / (self.k * self.dfe)
            if self.k == 2:  # closed-form 2 x 2 inverse: the common three-level factor
                s11 = (self.C0[None, :, 0, 0] - np.einsum("bqp,bqp->bp", U[:, :, 0], U[:, :, 0])) / self.dfe
                s12 = (self.C0[None, :, 0, 1] - np.einsum("bqp,bqp->bp", U[:, :, 0], U[:, :, 1])) / self.dfe
                s22 = (self.C0[None, :, 1, 1] - np.einsum("bqp,bqp->bp", U[:, :, 1], U[:, :, 1])) / self.dfe
                x, y = A[:, 0, 0], A[:, 0, 1]
                det = s11 * s22 - s12 * s12
                t2 = (s22 * x * x - 2.0 * s12 * x * y + s11 * y * y) / det
                return np.where(det > 0, scale * t2 / self.KKt[0, 0], np.nan)
            S = (self.C0[None] - np.einsum("bqkp,bqlp->bpkl", U, U)) / self.dfe
            a = np.transpose(A[:, 0], (0, 2, 1))                   # (B, P, k)
            ok = np.isfinite(S).all(axis=(2, 3)) & (np.linalg.det(S) > 0)
            sol = np.full_like(a, np.nan)
            sol[ok] = np.linalg.solve(S[ok], a[ok][..., None])[..., 0]
            t2 = np.einsum("bpk,bpk->bp", a, sol) / self.KKt[0, 0]
            return scale * t2


def _unusable_points(Y: np.ndarray, G: np.ndarray, L: np.ndarray, *, method: str, trim: float) -> np.ndarray:
    """Points whose observed variance holds no digit of the data (the group test's own rule,
    :func:`glmeeg.group_level.unusable_variance`): they get no statistic in any resampling."""
    from ..group_level.glm import unusable_variance
    from ..subject_level.ols import fit_ols

    n, k, P = Y.shape
    if method != "glm":
        from ..group_level.robust import trimmed_test, welch_test

        stat = (trimmed_test(Y[:, 0], G, L, trim=trim) if method == "trimmed"
                else welch_test(Y[:, 0], G, L)).statistic
        return ~np.isfinite(stat) & np.isfinite(Y[:, 0]).all(axis=0)
    dfe = n - G.shape[1]
    fit = fit_ols(G, Y.reshape(n, k * P))
    with np.errstate(invalid="ignore", over="ignore", under="ignore"):
        rss = (fit.residual_variance * dfe).reshape(k, P)
        return unusable_variance(rss, np.einsum("nkp,nkp->kp", Y, Y), n).any(axis=0)


class _WithoutPoints:
    """An engine whose maps have no statistic (NaN) at the given points."""

    def __init__(self, engine, points: np.ndarray):
        self.engine = engine
        self.points = np.asarray(points, dtype=bool)
        self.scheme = engine.scheme
        self.bytes_per_map = engine.bytes_per_map

    def statistics(self, rows: np.ndarray) -> np.ndarray:
        maps = self.engine.statistics(rows)
        maps[:, self.points] = np.nan
        return maps


def _robust_engine(Y: np.ndarray, G: np.ndarray, L: np.ndarray, scheme: Scheme, *, kind: str,
                   method: str, trim: float):
    """The trimmed-t or Welch engine of a one-sample or two-group test (checked here)."""
    from ..group_level.robust import GROUP_METHODS, group_layout

    if method not in GROUP_METHODS:
        raise ModelError(f"method must be one of {', '.join(GROUP_METHODS)}; got {method!r}")
    if kind != "t" or Y.shape[1] != 1:
        raise ModelError(f"group_method {method!r} takes one subject contrast and gives a t statistic")
    groups, sign = group_layout(G, L, method=method)
    if method == "trimmed" and not 0 <= trim < 0.5:
        raise ModelError(f"trim must be in [0, 0.5); got {trim!r}")
    from .robust_resampling import (TrimmedSignFlipEngine, WelchPermutationEngine,
                                    YuenPermutationEngine)
    if groups is None:
        engine = TrimmedSignFlipEngine(Y[:, 0], trim=trim, sign=sign)
    elif method == "trimmed":
        engine = YuenPermutationEngine(Y[:, 0], groups, trim=trim, sign=sign)
    else:
        engine = WelchPermutationEngine(Y[:, 0], groups, sign=sign)
    # choose_resampling gives sign-flip for the one-sample layout, permute for two groups.
    assert engine.scheme == scheme, (engine.scheme, scheme)
    return engine


def _oriented(stat: np.ndarray, kind: str, alternative: str) -> np.ndarray:
    """Statistic turned so that larger means more extreme for the tested tail(s)."""
    if kind == "F" or alternative == "greater":
        return stat
    if alternative == "less":
        return -stat
    return np.abs(stat)


def _at_least(null: np.ndarray, observed: np.ndarray) -> np.ndarray:
    """How many null values are at least each observed value (with a relative tie tolerance)."""
    s = np.sort(null)
    edge = observed - _TIE * np.abs(observed)
    return s.size - np.searchsorted(s, edge, side="left")


@dataclass(frozen=True)
class _NullWork:
    """What every resampling task shares: the engine (the reduced group data) and settings."""

    engine: object
    edge: np.ndarray
    mode: int
    sign: float
    method: str
    correction: object
    graph: tuple | None
    threshold: float | None
    two_tails: bool
    batch: int
    scheme: str
    n: int
    seed: int


def _batch_max(work: _NullWork, maps: np.ndarray, best: np.ndarray) -> np.ndarray:
    """Each map's maximum of the corrected statistic (``maps`` hold ``sign * statistic`` with
    non-finite values set to 0, as :func:`glmeeg.inference.kernels.scan_maps` leaves them)."""
    c = work.correction
    if work.method == "max-statistic":
        return best
    indptr, indices = work.graph
    grid = getattr(work.graph, "grid", None)
    if work.method == "cluster":
        from .clusters import max_cluster_statistic
        both = max_cluster_statistic(maps, indptr, indices, work.threshold, statistic=c.statistic,
                                     tails="both" if work.two_tails else "positive", grid=grid)
    else:
        from .tfce import max_tfce
        both = max_tfce(maps, indptr, indices, extent_exponent=c.extent_exponent,
                        height_exponent=c.height_exponent, grid=grid)
    return both.max(axis=1) if work.two_tails else both[:, 0]


def null_chunk(work: _NullWork, item: tuple) -> tuple[np.ndarray, np.ndarray]:
    """One task of a permutation test: resamplings ``start`` to ``stop``.

    Returns the number of them at least as extreme as the observed statistic at every point
    (int64) and the maximum statistic of each. Random resamplings are drawn here from their seed
    blocks (``start`` is a multiple of :data:`BLOCK`); exhaustive ones come with the item.
    """
    from .kernels import scan_maps

    start, stop, given = item
    if given is not None:
        rows = given
    else:
        rows = np.concatenate([random_block(work.scheme, work.n, seed=work.seed, block=j,
                                            count=min(BLOCK, stop - j * BLOCK))
                               for j in range(start // BLOCK, -(-stop // BLOCK))])
    P = work.edge.size
    counts = np.zeros(P, dtype=np.int64)
    null = np.empty(rows.shape[0])
    hits = np.empty((min(work.batch, rows.shape[0]), P), dtype=np.int8)
    for a in range(0, rows.shape[0], work.batch):
        maps = np.ascontiguousarray(work.engine.statistics(rows[a:a + work.batch]))
        h = hits[:maps.shape[0]]
        best = scan_maps(maps, work.edge, work.mode, work.sign, h)
        counts += h.sum(axis=0, dtype=np.int64)
        null[a:a + work.batch] = _batch_max(work, maps, best)
    return counts, null


def permutation_test(estimates: np.ndarray, design: np.ndarray, contrast: np.ndarray, *,
                     kind: Literal["t", "F"], df: tuple[float, float],
                     alternative: str = "two-sided",
                     correction: MaxStatistic | ClusterMass | TFCE,
                     graph: tuple[np.ndarray, np.ndarray] | None = None,
                     method: Literal["glm", "trimmed", "welch"] = "glm", trim: float = 0.2,
                     memory_limit: int = 512 * 2**20, backend=None, progress=None,
                     task: str = "resamplings", column_names=None) -> PermutationResult:
    """Family-wise corrected p-values at every point by sign-flipping or permutation.

    Parameters
    ----------
    estimates : numpy.ndarray
        ``(n_subjects, n_points)`` or ``(n_subjects, k, n_points)`` subject contrast estimates.
    design : numpy.ndarray
        ``(n_subjects, q)`` group design.
    contrast : numpy.ndarray
        ``(m, q)`` group contrast.
    kind : {"t", "F"}
        The statistic (as returned by :func:`glmeeg.group_test`, or ``"t"`` for the robust
        methods).
    df : tuple of float
        Its degrees of freedom (for the default cluster-forming threshold). For Yuen's and
        Welch's tests, whose df differ by point, pass the median df (what
        :func:`glmeeg.group_level.robust.trimmed_test` and :func:`~glmeeg.group_level.robust.welch_test`
        report): the threshold is then one |t| for every point and every resampling.
    alternative : {"two-sided", "greater", "less"}
    correction : MaxStatistic, ClusterMass or TFCE
        The correction and its settings (resamplings, seed, scheme, threshold, exponents).
    graph : tuple of numpy.ndarray, optional
        ``(indptr, indices)`` of the points' neighbour graph (CSR); required for cluster and
        TFCE corrections. A :class:`~glmeeg.inference.graph.PointGraph` (from
        :func:`~glmeeg.inference.graph.map_graph`) also carries the product form, which the
        kernels read instead (same results, about half the time on large maps).
    method : {"glm", "trimmed", "welch"}, default "glm"
        The statistic resampled: the group GLM's t or F (Freedman-Lane), the trimmed-mean t
        (one sample: Tukey-McLaughlin, under sign-flipping; two groups: Yuen, under
        permutation) or Welch's t (two groups, under permutation); see
        :mod:`glmeeg.inference.robust_resampling`. The robust methods take the layouts of
        :func:`glmeeg.group_level.robust.group_layout`.
    trim : float, default 0.2
        Share trimmed from each tail (``method="trimmed"`` only).
    memory_limit : int, default 512 MiB
        Bound on the memory of one batch of resampled maps.
    backend : glmeeg.parallel.Backend, optional
        Where the resampling tasks run (default: this process). The engine (the reduced group
        data) is shipped to the workers once; each task draws its own seed blocks. The result
        is bitwise the same for every backend and number of workers.
    progress : callable, optional
        ``progress(task, done, total)`` as resamplings finish.
    task : str, default "resamplings"
        Name of the work in progress reports and error messages.
    column_names : sequence of str, optional
        Names of the group design's columns, for the message of a rank-deficient design
        (default: their indices).

    Returns
    -------
    PermutationResult

    Raises
    ------
    ModelError
        A group design not of full column rank (naming the columns of the dependence), a
        requested scheme that cannot test the contrast, a missing graph, or a design that the
        robust method does not support.

    Notes
    -----
    Two-sided t tests use the maximum of |t| (max), of positive and negative cluster
    statistics (cluster) or of positive and negative TFCE (tfce) in each resampling, so one
    null distribution controls the error over both tails. F tests are upper-tailed.

    The robust statistics are permuted studentized, which keeps Welch's test valid
    asymptotically with unequal group variances (Janssen, 1997); sign-flipping a trimmed mean
    assumes each subject's value is symmetric about 0 under the null hypothesis.

    References
    ----------
    .. [1] Janssen, A. (1997). Studentized permutation tests for non-i.i.d. hypotheses and the
       generalized Behrens-Fisher problem. Statistics & Probability Letters, 36(1), 9-21.
    """
    Y, G, L = group_arrays(estimates, design, contrast, column_names=column_names)
    n, k, P = Y.shape
    if correction.method in ("cluster", "tfce") and graph is None:
        raise ModelError(f"correction '{correction.method}' needs the neighbour graph of the points")
    scheme = choose_resampling(G, L, requested=correction.resampling)
    if method == "glm":
        engine = _Engine(Y, G, L, scheme)
    else:
        engine = _robust_engine(Y, G, L, scheme, kind=kind, method=method, trim=trim)
    unusable = _unusable_points(Y, G, L, method=method, trim=trim)
    if unusable.any():
        engine = _WithoutPoints(engine, unusable)
    total = 2 ** n if scheme == "sign-flip" else math.factorial(n)
    exhaustive = total <= correction.permutations
    # Exhaustive resamplings are listed here; random ones are drawn by the tasks from their blocks.
    rows = resamplings(scheme, n, permutations=correction.permutations, seed=correction.seed)[0] \
        if exhaustive else None
    N = total if exhaustive else correction.permutations
    identity = (np.ones((1, n), dtype=np.int8) if scheme == "sign-flip"
                else np.arange(n, dtype=np.int32)[None, :])
    observed = engine.statistics(identity)[0]
    obs_or = _oriented(observed, kind, alternative)
    finite = np.isfinite(obs_or)
    obs_or_f = np.where(finite, obs_or, -np.inf)

    threshold = None
    if correction.method == "cluster":
        threshold = (correction.threshold if correction.threshold is not None
                     else cluster_forming_threshold(kind, df, alternative))
    two_tails = kind == "t" and alternative == "two-sided"
    sign = -1.0 if (kind == "t" and alternative == "less") else 1.0
    indptr, indices = graph if graph is not None else (None, None)
    grid = getattr(graph, "grid", None)

    mode = 1 if (kind == "F" or alternative == "greater") else (2 if alternative == "less" else 0)

    per_map = engine.bytes_per_map
    if per_map > memory_limit:
        raise ExecutionError(f"one resampled map of {P} points needs about {per_map / 2**20:.0f} MiB, "
                             f"above the memory limit of {memory_limit / 2**20:.0f} MiB; raise --memory-limit")
    # Small batches keep the maps in cache; results do not depend on the batch size.
    batch = int(max(1, min(_MAX_BATCH, memory_limit // max(per_map, 1))))
    edge = np.where(finite, obs_or - _TIE * np.abs(np.where(finite, obs_or, 0.0)), np.inf)
    shared = _NullWork(engine=engine, edge=edge, mode=mode, sign=sign, method=correction.method,
                       correction=correction, graph=graph, threshold=threshold, two_tails=two_tails,
                       batch=batch, scheme=scheme, n=n, seed=correction.seed)
    # Tasks of whole seed blocks: about 200 at most, so progress and load balance stay fine.
    chunk = BLOCK * max(1, -(-N // (BLOCK * 200)))
    items = [(start, min(start + chunk, N), rows[start:start + chunk] if exhaustive else None)
             for start in range(0, N, chunk)]
    done = [0]
    if progress is not None:
        progress(task, 0, N)
    counts = np.zeros(P, dtype=np.int64)
    null = np.empty(N)

    def on_result(i, part):
        # Integer counts: their sum does not depend on the order in which tasks finish.
        counts[:] += part[0]
        null[items[i][0]:items[i][1]] = part[1]
        done[0] += items[i][1] - items[i][0]
        if progress is not None:
            progress(task, done[0], N)

    from ..parallel import InProcess
    (backend or InProcess()).map(null_chunk, items, shared=shared,
                                 labels=[f"{task} {a + 1}-{b}" for a, b, _ in items],
                                 on_result=on_result, keep=False)
    add = 0 if exhaustive else 1

    def p_of(count):
        return (count + add) / (N + add)

    p_unc = np.where(finite, p_of(counts), np.nan)
    result = dict(scheme=scheme, n_resamplings=N, exhaustive=exhaustive, seed=correction.seed,
                  p_uncorrected=p_unc, null_distribution=null, threshold=threshold)
    obs_clean = np.where(finite, observed, 0.0)
    if correction.method == "max-statistic":
        p_corr = np.where(finite, p_of(_at_least(null, obs_or_f)), np.nan)
        return PermutationResult(p_corrected=np.minimum(p_corr, 1.0), **result)
    directed_obs = np.ascontiguousarray(sign * obs_clean)
    if correction.method == "tfce":
        from .tfce import tfce
        enhanced = tfce(directed_obs, indptr, indices, extent_exponent=correction.extent_exponent,
                        height_exponent=correction.height_exponent, grid=grid)
        score = enhanced if not two_tails else np.abs(enhanced)
        score = np.where(score > 0, score, 0.0)
        p_corr = np.where(score > 0, p_of(_at_least(null, score)), 1.0)
        p_corr = np.where(finite, p_corr, np.nan)
        return PermutationResult(p_corrected=p_corr, enhanced=sign * enhanced, **result)
    from .clusters import cluster_table, label_clusters
    labels = np.zeros(P, dtype=np.int32)
    clusters = []
    for tail in ((1.0, -1.0) if two_tails else (1.0,)):
        vals = np.ascontiguousarray(tail * directed_obs)
        lab = label_clusters(vals, indptr, indices, threshold, grid=grid)
        if lab.max() == 0:
            continue
        mass, extent = cluster_table(vals, lab)
        stat = mass if correction.statistic == "mass" else extent.astype(float)
        p = p_of(_at_least(null, stat))
        for cid in range(1, lab.max() + 1):
            clusters.append({"points": np.flatnonzero(lab == cid), "sign": tail * sign,
                             "mass": float(tail * sign * mass[cid - 1]), "extent": int(extent[cid - 1]),
                             "p": float(p[cid - 1])})
    # Number clusters by p, then by size of the statistic.
    clusters.sort(key=lambda c: (c["p"], -abs(c["mass"]), int(c["points"][0])))
    p_corr = np.ones(P)
    for i, c in enumerate(clusters, start=1):
        labels[c["points"]] = i
        p_corr[c["points"]] = c["p"]
        c["id"] = i
    p_corr = np.where(finite, p_corr, np.nan)
    return PermutationResult(p_corrected=p_corr, cluster_labels=labels, clusters=clusters, **result)
