"""Simulation-based power of the real design, from a saved result (pilot data or an earlier study).

:func:`glmeeg.planning.analytic.solve_power` answers "how many participants?" for one test with a normal
model. A mass-univariate EEG analysis tests thousands of correlated points under a correction
(max statistic, cluster mass, TFCE ...), for which no closed form exists. Here new studies of
``n`` participants are simulated from what a saved test observed -- its effect map and its
subjects' noise maps -- and each one is analysed with the same group test and correction; the
share of simulated studies that detect the effect is the power, with its Monte-Carlo error.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd
import scipy.stats
from pydantic import BaseModel, ConfigDict

from .. import defaults
from ..errors import ModelError
from ..inference.corrections import (PERMUTATION_METHODS, TFCE, Bonferroni, ClusterMass, Correction,
                                     FalseDiscoveryRate, Holm, MaxStatistic, NoCorrection, adjust_p)
from ..results import TestResult
from .analytic import EEG_TYPICAL_N
from .pilot import (PilotLayout, pilot_arrays, pilot_layout, points_graph_of, positive_number,
                    sample_sizes, target_region, whole_number)

# What counts as detecting the effect in one simulated study.
CRITERIA = ("any", "target")


_CRITERION_TEXT = {"any": "any significant point", "target": "significant in the target region"}

__all__ = ["CRITERIA", "DetectionRate", "SimulatedPower", "simulate_power"]


_SETTINGS = (NoCorrection, Bonferroni, Holm, FalseDiscoveryRate, MaxStatistic, ClusterMass, TFCE)


# Redraws of a resampled group design that is not of full column rank, before giving up.
_MAX_REDRAWS = 100


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class DetectionRate(_Frozen):
    """How often one criterion detected the effect among the simulated studies of one ``n``.

    Attributes
    ----------
    n : int
        Participants per group (designs with groups) or in total.
    total_n : int
        Participants of each simulated study.
    criterion : {"any", "target"}
        ``"any"``: at least one significant point; ``"target"``: at least one significant point
        in the target region (for t tests with the target's sign), see :func:`simulate_power`.
    detections, simulations : int
        Simulated studies that detected the effect, and all simulated studies.
    probability : float
        ``detections / simulations``: the estimated power.
    standard_error : float
        Monte-Carlo standard error ``sqrt(p (1 - p) / simulations)``.
    low, high : float
        Wilson score interval of the probability at the result's ``confidence_level``.
    """

    n: int
    total_n: int
    criterion: Literal["any", "target"]
    detections: int
    simulations: int
    probability: float
    standard_error: float
    low: float
    high: float


class SimulatedPower(_Frozen):
    """Power of a design at several sample sizes, estimated by simulating studies.

    Attributes
    ----------
    test : str
        Name of the saved test simulated from.
    kind : {"t", "F"}
    alternative : {"two-sided", "greater", "less"}
    alpha : float
    correction : Correction
        The correction run on every simulated study (its seed is replaced by one per study).
    group_method : {"glm", "trimmed", "welch"}
    layout : {"one-sample", "groups", "regression"}
        How the simulated group designs are built, and so what ``n`` counts: one-sample and
        regression designs have ``n`` participants in all, designs with groups ``n`` per group.
    groups : int
        Number of groups (1 without groups).
    pilot_subjects : int
        Subjects of the saved test, whose noise maps are resampled.
    n : tuple of int
        The sample sizes simulated, in the order given.
    simulations : int
        Simulated studies per sample size.
    permutations : int or None
        Resamplings of each simulated study's permutation test (None for parametric corrections).
    effect_scale : float
        Factor applied to the pilot's effect.
    seed : int
        Root seed; study ``j`` at sample size ``n`` draws from ``SeedSequence(seed, spawn_key=(n, j))``.
    confidence_level : float
        Level of the intervals of the probabilities.
    target : str
        What the target region is.
    target_points : int
        Points in the target region (0: no target; only the "any" criterion is reported).
    neighbours : str or None
        How the neighbour graph of the points was obtained (cluster and TFCE corrections).
    rates : tuple of DetectionRate
        One per sample size and criterion.
    notes : tuple of str
        Warnings about the plan and cautions on reading it.
    """

    test: str
    kind: Literal["t", "F"]
    alternative: Literal["two-sided", "greater", "less"]
    alpha: float
    correction: Correction
    group_method: Literal["glm", "trimmed", "welch"]
    layout: Literal["one-sample", "groups", "regression"]
    groups: int
    pilot_subjects: int
    n: tuple[int, ...]
    simulations: int
    permutations: int | None
    effect_scale: float
    seed: int
    confidence_level: float
    target: str
    target_points: int
    neighbours: str | None
    rates: tuple[DetectionRate, ...]
    notes: tuple[str, ...]

    def to_frame(self) -> pd.DataFrame:
        """Tidy, plot-ready table: one row per sample size and criterion.

        Columns ``n``, ``total_n``, ``criterion``, ``detections``, ``simulations``,
        ``probability``, ``standard_error``, ``low``, ``high``.
        """
        return pd.DataFrame([r.model_dump() for r in self.rates],
                            columns=list(DetectionRate.model_fields))

    def rate(self, n: int, criterion: str = "any") -> DetectionRate:
        """The detection rate of one criterion at one sample size."""
        for r in self.rates:
            if r.n == n and r.criterion == criterion:
                return r
        raise KeyError(f"no rate for n = {n}, criterion {criterion!r}")

    def __str__(self) -> str:
        per = " per group" if self.layout == "groups" else ""
        side = f", {self.alternative}" if self.kind == "t" else ""
        resampled = (f", {self.permutations} resamplings each" if self.permutations is not None else "")
        lines = [f"Simulated power: test {self.test} ({self.kind} test{side}), {self.correction.describe()}"
                 f", alpha {self.alpha:g}",
                 f"  {self.simulations} simulated studies per n{resampled}; noise: whole residual maps of "
                 f"the {self.pilot_subjects} pilot subjects drawn with replacement; effect: the pilot's "
                 f"x {self.effect_scale:g}; seed {self.seed}",
                 f"  target: {self.target}"]
        if self.neighbours:
            lines.append(f"  neighbours: {self.neighbours}")
        criteria = [c for c in CRITERIA if any(r.criterion == c for r in self.rates)]
        level = f"{100 * self.confidence_level:g} %"
        width = max(len("n" + per), *(len(str(n)) for n in self.n))
        head = f"  {'n' + per:>{width}}  {'total':>5}"
        for c in criteria:
            head += f"  {_CRITERION_TEXT[c] + f' (SE) [{level} interval]':<44}"
        lines.append(head.rstrip())
        for n in self.n:
            row = f"  {n:>{width}}  {self.rate(n).total_n:>5}"
            for c in criteria:
                r = self.rate(n, c)
                row += f"  {f'{r.probability:.3f} ({r.standard_error:.3f}) [{r.low:.3f}, {r.high:.3f}]':<44}"
            lines.append(row.rstrip())
        lines += [f"note: {note}" for note in self.notes]
        return "\n".join(lines)


def _wilson(k: int, n: int, level: float) -> tuple[float, float]:
    ci = scipy.stats.binomtest(k, n).proportion_ci(confidence_level=level, method="wilson")
    return float(ci.low), float(ci.high)


def simulate_power(result: TestResult, *, n: int | Sequence[int], simulations: int | None = None,
                   correction: Correction | None = None, permutations: int | None = None,
                   effect_scale: float = 1.0, alpha: float | None = None, seed: int = 0,
                   graph=None, target: np.ndarray | None = None, confidence_level: float = 0.95,
                   progress: Callable[[int, int, int], None] | None = None,
                   memory_limit: int = 512 * 2**20) -> SimulatedPower:
    """Power of a saved test's design at other sample sizes, by simulating new studies.

    Parameters
    ----------
    result : TestResult
        A saved test (:func:`glmeeg.load_result`) holding its subjects' estimates and group
        design (results written by this version of glmeeg do).
    n : int or sequence of int
        Sample sizes to simulate: participants per group for designs with groups, in total
        otherwise (see Notes). Each must leave the group test at least one residual df.
    simulations : int, optional
        Simulated studies per sample size (>= 1). The Monte-Carlo standard error of a power
        near 0.8 is about ``0.4 / sqrt(simulations)``: 0.028 at 200. Default
        :data:`glmeeg.defaults.SIMULATIONS` (200).
    correction : Correction, optional
        Settings object of :mod:`glmeeg.inference.corrections` run on every simulated study;
        default: the result's own correction.
    permutations : int, optional
        Resamplings of each simulated study's max / cluster / TFCE test (ignored by parametric
        corrections). Fewer than the single analysis would use are enough for a power estimate
        [4]_; ``1 / (permutations + 1)`` must not exceed ``alpha``. Default
        :data:`glmeeg.defaults.SIMULATED_PERMUTATIONS` (500).
    effect_scale : float, default 1.0
        Factor (> 0) on the pilot's effect: below 1 to plan for a smaller effect than the pilot
        showed, which is usually wise (see Notes).
    alpha : float, optional
        Significance level; default: the result's.
    seed : int, default 0
        Root seed (>= 0) of the simulation.
    graph : SensorGraph or tuple of numpy.ndarray, optional
        For cluster and TFCE corrections: the sensor graph of the result's channels (e.g. from
        :func:`glmeeg.sensors.neighbours.neighbours_from_table`) or the points graph's ``(indptr,
        indices)`` (``plan_analysis(design).graph``). Default: rebuilt from the 10-10 positions
        of the channel names.
    target : numpy.ndarray of bool, optional
        ``(n_points,)`` target region; default: the result's significant points.
    confidence_level : float, default 0.95
        Level of the Wilson intervals of the probabilities.
    progress : callable, optional
        Called as ``progress(n, done, simulations)`` after each simulated study.
    memory_limit : int, default 512 MiB
        Bound on the memory of one batch of resampled maps in permutation tests.

    Returns
    -------
    SimulatedPower
        Detection rates per sample size and criterion (``to_frame()`` for a tidy table).

    Raises
    ------
    ModelError
        A result without subject-level estimates (saved by an earlier version: re-run the
        analysis), a sample size too small for the design, ``simulations < 1``,
        ``effect_scale <= 0``, too few permutations for ``alpha``, a correction that is not a
        settings object or does not suit the group method, or no neighbour graph for a cluster
        or TFCE correction.

    Notes
    -----
    The pilot's group model ``Y = G B + E`` is fitted at every point by least squares (QR).
    Its fitted maps ``G B`` are the effect (times ``effect_scale``); its residual maps ``E``,
    scaled by ``sqrt(n0 / (n0 - q))`` so that their variance is the unbiased residual
    variance, are the noise [1]_ [2]_. A simulated subject is one pilot subject drawn with
    replacement: its design row, its fitted map and its whole residual map (all points at
    once, so the correlation of the noise over channels and times is kept), with a random
    sign on the residual when the test involves a mean (sign-flip designs: symmetric errors,
    the assumption of the sign-flip test itself). One-sample and regression designs draw
    ``n`` subjects from all pilot subjects; designs with groups -- the distinct rows of the
    design's indicator columns (values -1, 0, 1), e.g. two roles -- draw ``n`` from each group,
    so every group is represented and each keeps its own noise. A drawn design without full
    column rank is drawn again. Each simulated study is then analysed with the pilot's group
    test (t, F or Hotelling's T², or the trimmed / Welch test) and the chosen correction at
    level ``alpha``.

    A simulated study detects the effect when it has at least one significant point
    (``"any"``; with no effect this is the family-wise error rate), or at least one
    significant point in the target region (``"target"``): by default the points the pilot
    found significant (for cluster corrections, the points of its significant clusters), and
    for t tests only with the pilot's sign there. The power is the share of detecting studies,
    with Monte-Carlo standard error ``sqrt(p (1 - p) / simulations)`` [6]_ and a Wilson
    interval [5]_.

    The noise is the pilot's own: the power is conditional on the pilot's ``n0`` residual
    maps, and sample sizes far above ``n0`` repeat them many times. The effect is the one the
    pilot observed, which is noisy and, when the test or region was picked because it was
    significant, biased upwards (the winner's curse [3]_): ``effect_scale < 1`` shows how fast
    the power falls for a smaller true effect.

    Simulated study ``j`` at sample size ``n`` draws its subjects, signs and the seed of its
    permutation test from ``numpy.random.SeedSequence(seed, spawn_key=(n, j))``, so results are
    reproducible and do not depend on which other sample sizes are simulated or in which order.

    References
    ----------
    .. [1] Davison, A. C., & Hinkley, D. V. (1997). *Bootstrap Methods and their Application*,
       ch. 6 (resampling residuals of linear models). Cambridge University Press.
    .. [2] Boudewyn, M. A., Luck, S. J., Farrens, J. L., & Kappenman, E. S. (2018). How many
       trials does it take to get a significant ERP effect? It depends. *Psychophysiology*,
       55(6), e13049.
    .. [3] Button, K. S., Ioannidis, J. P. A., Mokrysz, C., Nosek, B. A., Flint, J., Robinson,
       E. S. J., & Munafò, M. R. (2013). Power failure: why small sample size undermines the
       reliability of neuroscience. *Nature Reviews Neuroscience*, 14(5), 365-376.
    .. [4] Boos, D. D., & Zhang, J. (2000). Monte Carlo evaluation of resampling-based
       hypothesis tests. *Journal of the American Statistical Association*, 95(450), 486-492.
    .. [5] Wilson, E. B. (1927). Probable inference, the law of succession, and statistical
       inference. *Journal of the American Statistical Association*, 22(158), 209-212.
    .. [6] Morris, T. P., White, I. R., & Crowther, M. J. (2019). Using simulation studies to
       evaluate statistical methods. *Statistics in Medicine*, 38(11), 2074-2102.

    Examples
    --------
    >>> pilot = glmeeg.load_result("results/urgency-high-vs-low")          # doctest: +SKIP
    >>> sim = simulate_power(pilot, n=[12, 16, 24, 32], effect_scale=0.7)  # doctest: +SKIP
    >>> sim.to_frame()                                                     # doctest: +SKIP
    """
    Y, G, L = pilot_arrays(result)
    n0, k, P = Y.shape
    q = G.shape[1]
    method = result.spec.group_method
    trim = result.spec.trim_used
    layout = pilot_layout(G, result.group_columns)
    per = " per group" if layout.kind == "groups" else ""
    ns = sample_sizes(n, result=result, layout=layout, k=k, q=q)
    simulations = whole_number(defaults.SIMULATIONS if simulations is None else simulations,
                               "simulations", least=1)
    if simulations > 1_000_000:
        raise ModelError.of("simulations", f"expected at most 1000000, got {simulations}")
    seed = whole_number(seed, "seed", least=0)
    effect_scale = positive_number(effect_scale, "effect_scale")
    alpha = result.alpha if alpha is None else alpha
    if not (isinstance(alpha, (int, float)) and 0 < alpha < 1):
        raise ModelError.of("alpha", f"expected a number strictly between 0 and 1, got {alpha!r}")
    if not (isinstance(confidence_level, (int, float)) and 0 < confidence_level < 1):
        raise ModelError.of("confidence_level", f"expected a number strictly between 0 and 1, got {confidence_level!r}")
    correction, permutations = _correction(result.correction if correction is None else correction,
                                           defaults.SIMULATED_PERMUTATIONS if permutations is None
                                           else permutations, alpha)
    graph_arrays, neighbours = None, None
    if correction.method in ("cluster", "tfce"):
        graph_arrays, neighbours = points_graph_of(graph, result)
    target_mask, target_text = target_region(result, target)

    # ---- the pilot's effect and noise
    from ..inference.permutation import choose_resampling
    from ..subject_level.ols import fit_ols

    fit = fit_ols(G, Y.reshape(n0, k * P))
    fitted = (G @ fit.betas).reshape(n0, k, P)
    scheme = choose_resampling(G, L)
    study = _Study(effect=effect_scale * fitted, noise=math.sqrt(n0 / (n0 - q)) * (Y - fitted), G=G, L=L,
                   layout=layout, flips=scheme == "sign-flip", seed=seed, per=per,
                   analyse=dict(method=method, trim=trim, alternative=result.alternative,
                                correction=correction, graph=graph_arrays, memory_limit=memory_limit),
                   alpha=alpha, target_mask=target_mask,
                   target_sign=(np.sign(np.nan_to_num(np.asarray(result.statistic, dtype=np.float64)))
                                if result.kind == "t" else None))
    rates = []
    for n_value in ns:
        found = np.zeros(2, dtype=np.int64)
        for j in range(simulations):
            found += study.detections(n_value, j)
            if progress is not None:
                progress(n_value, j + 1, simulations)
        rates += _rates(n_value, found, layout=layout, simulations=simulations,
                        confidence_level=confidence_level, with_target=bool(target_mask.any()))
    notes = _notes(ns, layout=layout, per=per, effect_scale=effect_scale, correction=correction,
                   target_mask=target_mask, scheme=scheme, alpha=alpha, n0=n0)
    return SimulatedPower(test=result.name, kind=result.kind, alternative=result.alternative, alpha=alpha,
                          correction=correction, group_method=method, layout=layout.kind,
                          groups=len(layout.members), pilot_subjects=n0, n=tuple(ns),
                          simulations=simulations, permutations=permutations, effect_scale=effect_scale,
                          seed=seed, confidence_level=confidence_level, target=target_text,
                          target_points=int(target_mask.sum()), neighbours=neighbours,
                          rates=tuple(rates), notes=tuple(notes))


def _correction(correction, permutations, alpha: float):
    """The correction of the simulated studies, with its number of resamplings (None for the
    corrections that do not resample)."""
    if not isinstance(correction, _SETTINGS):
        raise ModelError.of("correction", "expected a settings object of glmeeg.inference.corrections (e.g. "
                         f"ClusterMass()), got {correction!r}")
    if correction.method not in PERMUTATION_METHODS:
        return correction, None
    permutations = whole_number(permutations, "permutations", least=1)
    if 1.0 / (permutations + 1) > alpha:
        raise ModelError.of("permutations", f"{permutations} resamplings cannot give p <= alpha {alpha:g}; "
                         f"use at least {math.ceil(1 / alpha)}")
    return type(correction)(**{**correction.model_dump(), "permutations": permutations}), permutations


@dataclass(frozen=True)
class _Study:
    """How one simulated study is drawn from the pilot and analysed."""

    effect: np.ndarray          # (n0, k, P) the fitted group effect, scaled
    noise: np.ndarray           # (n0, k, P) the residual maps, rescaled to unbiased variance
    G: np.ndarray
    L: np.ndarray
    layout: PilotLayout
    flips: bool
    seed: int
    per: str
    analyse: dict
    alpha: float
    target_mask: np.ndarray
    target_sign: np.ndarray | None   # for t tests: a detection in the target needs the pilot's sign

    def detections(self, n_value: int, j: int) -> tuple[bool, bool]:
        """Study ``j`` of size ``n_value``: (any significant point, a significant point in the target)."""
        rng = np.random.default_rng(np.random.SeedSequence(self.seed, spawn_key=(n_value, j)))
        total = self.layout.total(n_value)
        q = self.G.shape[1]
        for _ in range(_MAX_REDRAWS):
            idx = self.layout.draw(n_value, rng)
            Gs = self.G[idx]
            if self.layout.kind == "one-sample" or np.linalg.matrix_rank(Gs) == q:
                break
        else:
            raise ModelError.of("n", f"{n_value}{self.per} gives group designs without full rank in "
                             f"{_MAX_REDRAWS} draws; use a larger n")
        signs = (1.0 - 2.0 * rng.integers(0, 2, size=total)) if self.flips else np.ones(total)
        study_seed = int(rng.integers(0, 2**63 - 1))
        Ys = self.effect[idx] + signs[:, None, None] * self.noise[idx]
        try:
            stat, p_corrected = _analyse(Ys, Gs, self.L, seed=study_seed, **self.analyse)
        except ModelError as e:
            raise ModelError.of("n", f"{n_value}{self.per}: {e}") from None
        significant = np.nan_to_num(p_corrected, nan=1.0) <= self.alpha
        hit = significant & self.target_mask
        if self.target_sign is not None:
            hit &= np.sign(stat) == self.target_sign
        return bool(significant.any()), bool(hit.any())


def _rates(n_value: int, found: np.ndarray, *, layout: PilotLayout, simulations: int,
           confidence_level: float, with_target: bool) -> list[DetectionRate]:
    out = []
    for criterion, count in zip(CRITERIA, found):
        if criterion == "target" and not with_target:
            continue
        p_hat = count / simulations
        low, high = _wilson(int(count), simulations, confidence_level)
        out.append(DetectionRate(n=n_value, total_n=layout.total(n_value), criterion=criterion,
                                 detections=int(count), simulations=simulations, probability=float(p_hat),
                                 standard_error=math.sqrt(p_hat * (1 - p_hat) / simulations),
                                 low=low, high=high))
    return out


def _analyse(Y, G, L, *, method, trim, alternative, correction, seed, graph,
             memory_limit) -> tuple[np.ndarray, np.ndarray]:
    """The statistic and corrected p of one simulated study, as the pilot's test computes them."""
    from ..group_level import group_statistics

    stats = group_statistics(Y, G, L, method=method, trim=trim, alternative=alternative, intervals=False)
    if correction.method not in PERMUTATION_METHODS:
        return stats.statistic, adjust_p(stats.p, correction)
    from ..inference.permutation import permutation_test

    extra = {} if method == "glm" else {"method": method, "trim": trim}
    perm = permutation_test(Y, G, L, kind=stats.kind, df=stats.df, alternative=alternative,
                            correction=correction.model_copy(update={"seed": seed}), graph=graph,
                            memory_limit=memory_limit, **extra)
    return stats.statistic, perm.p_corrected
def _notes(ns, *, layout: PilotLayout, per: str, effect_scale: float, correction, target_mask, scheme,
           alpha: float, n0: int) -> list[str]:
    notes = []
    low = [v for v in ns if v < EEG_TYPICAL_N[0]]
    if low:
        notes.append(f"n = {', '.join(map(str, low))}{per}: below {EEG_TYPICAL_N[0]}, the lower end of the "
                     f"{EEG_TYPICAL_N[0]}-{EEG_TYPICAL_N[1]} participants common in EEG group studies "
                     "(common practice)")
    if effect_scale >= 1:
        size = "full" if effect_scale == 1 else f"{effect_scale:g} x"
        notes.append(f"the pilot's observed effect is used at {size} "
                     "size; effects seen in a pilot, above all in tests or points picked because they were "
                     "significant, are biased upwards (winner's curse), so these probabilities are likely "
                     "optimistic: try effect_scale below 1")
    if not target_mask.any():
        notes.append("no target region (the pilot has no significant points): only 'any significant point' "
                     "is reported")
    if correction.method == "none":
        notes.append("correction 'none': 'any significant point' is far above alpha even without an effect, "
                     "since nothing is controlled over the points")
    small = [f"{lab} ({m.size})" for lab, m in zip(layout.labels, layout.members) if m.size < 5]
    if small:
        notes.append(f"few pilot subjects carry the noise of group(s) {'; '.join(small)}")
    fewest = min(m.size for m in layout.members)
    big = [v for v in ns if v > fewest]
    if big:
        where = (f"the {fewest} pilot subjects of the smallest group" if layout.kind == "groups"
                 else f"the pilot's {n0} subjects")
        notes.append(f"n = {', '.join(map(str, big))}{per}: above {where}; simulated studies repeat "
                     "pilot subjects' noise maps, so the power leans on the pilot's noise")
    if correction.method in PERMUTATION_METHODS:
        for v in ns:
            total_n = layout.total(v)
            count = 2 ** total_n if scheme == "sign-flip" else math.factorial(total_n)
            if count <= correction.permutations and 1.0 / count > alpha:
                notes.append(f"n = {v}{per}: only {count} resamplings exist; the smallest p is "
                             f"{1 / count:.3g}, above alpha {alpha:g}: nothing can be significant")
    return notes
