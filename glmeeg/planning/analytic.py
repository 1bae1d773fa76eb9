"""Parametric power and sample-size planning for the group-level t and F tests.

Given three of effect size, number of participants, significance level and power, the fourth
is solved exactly from the noncentral t or F distribution of the test statistic (Cohen, 1988):

========================  ==========================  ==================  =====================
design                    effect size                 df                  noncentrality
========================  ==========================  ==================  =====================
``"one-sample"``          d = mean / SD               n - 1               d * sqrt(n)
``"paired"``              dz = mean diff. / SD diff.  n - 1               dz * sqrt(n)
``"two-sample"``          d (pooled SD), n per group  2n - 2              d * sqrt(n / 2)
``"f"``                   Cohen's f, N in total       (df1, N - groups)   f**2 * N
========================  ==========================  ==================  =====================

The numbers are for one test at level ``alpha``. A mass-univariate EEG analysis corrects over
thousands of points; plan with the alpha the correction effectively applies (or with the effect
expected where the effect is largest) rather than with the uncorrected 0.05.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Literal

import numpy as np
import pandas as pd
import scipy.optimize
import scipy.stats
from pydantic import BaseModel, ConfigDict

from ..errors import GlmeegError

__all__ = ["PowerSolution", "solve_power", "power_curve", "EEG_TYPICAL_N"]

Design = Literal["one-sample", "paired", "two-sample", "f"]
Alternative = Literal["two-sided", "greater", "less"]
Unknown = Literal["effect_size", "n", "alpha", "power"]

DESIGNS = ("one-sample", "paired", "two-sample", "f")
ALTERNATIVES = ("two-sided", "greater", "less")

# 16-32 participants per group is the range common in EEG group studies (common practice);
# fewer than the lower end is flagged.
EEG_TYPICAL_N = (16, 32)

# Largest n the solver searches: a target no n up to this reaches is reported as impossible.
_N_MAX = 1e7
# Search range of the effect size when it is solved (d or f); power reaches 1 long before.
_EFFECT_MAX = 1e4
# Search range of alpha when it is solved.
_ALPHA_RANGE = (1e-15, 1.0 - 1e-12)


class PowerSolution(BaseModel):
    """Every quantity of a power calculation, with the one that was solved.

    Attributes
    ----------
    design : {"one-sample", "paired", "two-sample", "f"}
    alternative : {"two-sided", "greater", "less"}
        Always ``"two-sided"`` for F tests (their rejection region is the upper tail whatever
        the direction of the differences).
    solved : {"effect_size", "n", "alpha", "power"}
        The quantity that was left out and solved.
    statistic : {"t", "F"}
    effect_size : float
        Cohen's d (one-sample, two-sample), dz (paired) or f (F test), in the direction of
        ``alternative``.
    alpha : float
        Significance level of the one test.
    power : float
        The power asked for, or the power computed (at ``n_exact``, which equals ``n`` unless
        n was solved).
    n : int
        Participants per group for ``"two-sample"``, in total otherwise; when n was solved, the
        exact solution rounded up to a whole participant.
    n_exact : float
        The continuous solution for n (equal to ``n`` when n was given).
    total_n : int
        All participants: ``2 * n`` for ``"two-sample"``, ``n`` otherwise.
    achieved_power : float
        Power at the whole ``n`` (at least ``power`` when n was solved).
    df : float
        Degrees of freedom of t, or the denominator df of F, at the whole ``n``.
    df_numerator : int or None
        Numerator df of F; None for t.
    groups : int or None
        F only: the number of parameters of the full model (groups of a one-way ANOVA); the
        denominator df is ``N - groups``.
    noncentrality : float
        delta of the noncentral t or lambda of the noncentral F at the whole ``n``.
    critical_value : float
        The t (positive; the two-sided test rejects beyond +-value) or F that a result must
        exceed to be significant at ``alpha``, at the whole ``n``.
    warnings : tuple of str
        Notes on the plan (a sample below the range common in EEG studies, a target reached at
        the smallest possible n).
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    design: Design
    alternative: Alternative
    solved: Unknown
    statistic: Literal["t", "F"]
    effect_size: float
    alpha: float
    power: float
    n: int
    n_exact: float
    total_n: int
    achieved_power: float
    df: float
    df_numerator: int | None
    groups: int | None
    noncentrality: float
    critical_value: float
    warnings: tuple[str, ...]

    def assumptions(self) -> str:
        """One sentence on what the numbers assume."""
        if self.design == "f":
            model = ("normally distributed residuals with equal variance in every group, "
                     "independent participants")
        elif self.design == "two-sample":
            model = ("normally distributed scores with equal SDs in both groups, equal group "
                     "sizes, independent participants")
        elif self.design == "paired":
            model = ("normally distributed within-participant differences (dz uses the SD of "
                     "the differences), independent participants")
        else:
            model = "normally distributed scores, independent participants"
        return (f"Assumes {model}, and one test at alpha = {_fmt(self.alpha)}: a correction over "
                "many channels and times lowers the effective alpha, so plan with the corrected "
                "level.")

    def __str__(self) -> str:
        es_name = {"one-sample": "effect size (d)", "paired": "effect size (dz)",
                   "two-sample": "effect size (d)", "f": "effect size (f)"}[self.design]
        n_name = {"two-sample": "n per group", "f": "n (total)"}.get(self.design, "n")
        title = {"one-sample": "one-sample t test", "paired": "paired t test",
                 "two-sample": "two-sample t test (equal groups)",
                 "f": f"F test ({self.df_numerator} numerator df, {self.groups} model parameters)"}
        rows: list[tuple[str, str, bool]] = [
            (es_name, _fmt(self.effect_size), self.solved == "effect_size"),
            ("alpha", _fmt(self.alpha), self.solved == "alpha"),
            ("power", _fmt(self.power), self.solved == "power"),
            (n_name, str(self.n) + (f" (exact {self.n_exact:.2f})" if self.solved == "n" else ""),
             self.solved == "n"),
        ]
        if self.design == "two-sample":
            rows.append(("total n", str(self.total_n), False))
        rows += [("achieved power", _fmt(self.achieved_power), False)]
        if self.statistic == "t":
            rows += [("df", _fmt(self.df), False), ("noncentrality (delta)", _fmt(self.noncentrality), False),
                     ("critical t", _fmt(self.critical_value), False)]
        else:
            rows += [("df", f"{self.df_numerator}, {_fmt(self.df)}", False),
                     ("noncentrality (lambda)", _fmt(self.noncentrality), False),
                     ("critical F", _fmt(self.critical_value), False)]
        width = max(len(r[0]) for r in rows)
        side = "" if self.design == "f" else f", {self.alternative}"
        lines = [f"Power analysis: {title[self.design]}{side}"]
        lines += [f"  {name:<{width}}  {value}{'   <- solved' if mark else ''}" for name, value, mark in rows]
        lines += [f"warning: {w}" for w in self.warnings]
        lines.append(self.assumptions())
        return "\n".join(lines)


def _fmt(x: float) -> str:
    return f"{x:.4g}"


# --------------------------------------------------------------------------- the power function


def _df_and_noncentrality(design: str, effect_size: float, n: float, df_numerator: int | None,
                          groups: int | None) -> tuple[float, float]:
    if design in ("one-sample", "paired"):
        return n - 1.0, effect_size * math.sqrt(n)
    if design == "two-sample":
        return 2.0 * n - 2.0, effect_size * math.sqrt(n / 2.0)
    return n - groups, effect_size ** 2 * n


def _critical_value(design: str, alpha: float, df: float, df_numerator: int | None,
                    alternative: str) -> float:
    if design == "f":
        return float(scipy.stats.f.isf(alpha, df_numerator, df))
    return float(scipy.stats.t.isf(alpha / 2.0 if alternative == "two-sided" else alpha, df))


def _power(design: str, effect_size: float, n: float, alpha: float, alternative: str,
           df_numerator: int | None, groups: int | None) -> float:
    df, nc = _df_and_noncentrality(design, effect_size, n, df_numerator, groups)
    crit = _critical_value(design, alpha, df, df_numerator, alternative)
    if design == "f":
        # scipy's ncf.sf is wrong at exactly lambda = 0 (negative); the central F is the limit.
        if nc == 0.0:
            return float(scipy.stats.f.sf(crit, df_numerator, df))
        return float(scipy.stats.ncf.sf(crit, df_numerator, df, nc))
    # The effect lies in the direction of the alternative, so one tail suffices for greater /
    # less; the two-sided test also counts significant results of the wrong sign.
    p = scipy.stats.nct.sf(crit, df, nc)
    if alternative == "two-sided":
        # P(T'(delta) < -c) written as P(T'(-delta) > c): scipy's nct.cdf returns NaN far in
        # the lower tail (large delta), its sf with a negative delta stays finite.
        p += scipy.stats.nct.sf(crit, df, -nc)
    return float(p)


# --------------------------------------------------------------------------- validation


def _n_min(design: str, groups: int | None) -> float:
    """Smallest continuous n with at least one residual df."""
    return {"one-sample": 2.0, "paired": 2.0, "two-sample": 1.5}.get(design, float((groups or 0) + 1))


def _check_fraction(name: str, value: float) -> float:
    value = float(value)
    if not (0.0 < value < 1.0):
        raise GlmeegError.of(name, f"expected a number strictly between 0 and 1, got {value:g}")
    return value


def _check_setting(design: str, alternative: str, df_numerator: int | None,
                   groups: int | None) -> tuple[int | None, int | None]:
    if design not in DESIGNS:
        raise GlmeegError.of("design", f"expected one of {', '.join(DESIGNS)}, got {design!r}")
    if alternative not in ALTERNATIVES:
        raise GlmeegError.of("alternative", f"expected one of {', '.join(ALTERNATIVES)}, got {alternative!r}")
    if design != "f":
        for name, value in (("df_numerator", df_numerator), ("groups", groups)):
            if value is not None:
                raise GlmeegError.of(name, f"applies to design 'f' only, got {value} with design {design!r}")
        return None, None
    if alternative != "two-sided":
        raise GlmeegError.of("alternative", f"an F test has no direction; expected 'two-sided' (the "
                          f"default) with design 'f', got {alternative!r}")
    if df_numerator is None:
        raise GlmeegError.of("df_numerator", "required with design 'f' (k - 1 for a one-way ANOVA of k "
                          "groups, the number of tested predictors for a regression)")
    if int(df_numerator) != df_numerator or df_numerator < 1:
        raise GlmeegError.of("df_numerator", f"expected a whole number >= 1, got {df_numerator}")
    df_numerator = int(df_numerator)
    if groups is None:
        groups = df_numerator + 1
    if int(groups) != groups or groups < df_numerator + 1:
        raise GlmeegError.of("groups", f"expected a whole number >= df_numerator + 1 = {df_numerator + 1} "
                          f"(the parameters of the full model, intercept included), got {groups}")
    return df_numerator, int(groups)


def _check_effect_size(value: float) -> float:
    value = float(value)
    if not math.isfinite(value) or value < 0.0:
        raise GlmeegError.of("effect_size", f"expected a size >= 0 in the direction of the alternative "
                          f"(use alternative 'less' for an effect below zero), got {value:g}")
    return value


def _check_n(value: float, design: str, groups: int | None, *, whole: bool, name: str = "n") -> float:
    value = float(value)
    low = _n_min(design, groups)
    per = " per group" if design == "two-sample" else ""
    if whole and (not math.isfinite(value) or value != int(value)):
        raise GlmeegError.of(name, f"expected a whole number of participants{per}, got {value:g}")
    least = math.ceil(low) if whole else low
    if not (math.isfinite(value) and value >= least):
        raise GlmeegError.of(name, f"expected at least {least:g}{per} so that "
                          f"the test has at least 1 residual df, got {value:g}")
    return value


# --------------------------------------------------------------------------- solving


def _solve_increasing(f: Callable[[float], float], target: float, lo: float, hi_start: float,
                      hi_max: float) -> tuple[float, bool]:
    """Root of ``f(x) = target`` for increasing ``f`` on ``[lo, hi_max]``.

    Returns ``(x, at_low_end)``; ``at_low_end`` is True when ``f(lo) >= target`` already.
    Returns ``(nan, False)`` when ``f(hi_max) < target``.
    """
    if f(lo) >= target:
        return lo, True
    hi = max(hi_start, lo * 2.0)
    while f(hi) < target:
        if hi >= hi_max:
            return math.nan, False
        lo, hi = hi, min(hi * 4.0, hi_max)
    x = scipy.optimize.brentq(lambda v: f(v) - target, lo, hi, xtol=1e-12, rtol=4 * np.finfo(float).eps,
                              maxiter=500)
    return float(x), False


def solve_power(*, design: Design, effect_size: float | None = None, n: int | None = None,
                alpha: float | None = None, power: float | None = None,
                alternative: Alternative = "two-sided", df_numerator: int | None = None,
                groups: int | None = None) -> PowerSolution:
    """Solve for the one missing quantity of a t or F test's power calculation.

    Exactly one of ``effect_size``, ``n``, ``alpha`` and ``power`` is left as None; it is
    solved from the other three with the exact noncentral t (``scipy.stats.nct``) or
    noncentral F (``scipy.stats.ncf``) distribution.

    Parameters
    ----------
    design : {"one-sample", "paired", "two-sample", "f"}
        ``"one-sample"``: t on n - 1 df, noncentrality d * sqrt(n). ``"paired"``: the same on
        the within-participant differences, with dz. ``"two-sample"``: two independent groups
        of n each, t on 2n - 2 df, noncentrality d * sqrt(n / 2). ``"f"``: an F test of
        ``df_numerator`` df in a linear model of N participants and ``groups`` parameters,
        F on (df_numerator, N - groups) df, noncentrality lambda = f**2 * N.
    effect_size : float or None, default None
        Cohen's d (one-sample: mean / SD; two-sample: mean difference / pooled SD), dz
        (paired: mean difference / SD of the differences) or Cohen's f (F test: SD of the
        group means / SD within groups; f**2 = eta**2 / (1 - eta**2) = R**2 / (1 - R**2)).
        A size >= 0 in the direction of ``alternative``. Small / medium / large are d = 0.2 /
        0.5 / 0.8 and f = 0.10 / 0.25 / 0.40 (Cohen, 1992).
    n : int or None, default None
        Participants per group for ``"two-sample"`` (equal groups), in total otherwise; a whole
        number with at least 1 residual df.
    alpha : float or None, default None
        Significance level of the one test, in (0, 1). Give it (e.g. 0.05) unless it is the
        unknown.
    power : float or None, default None
        Probability of a significant result when the effect is ``effect_size``, in (0, 1).
    alternative : {"two-sided", "greater", "less"}, default "two-sided"
        t designs only; ``"greater"`` / ``"less"`` are one-sided tests in the direction of the
        effect. Design ``"f"`` accepts only ``"two-sided"``.
    df_numerator : int or None, default None
        Design ``"f"`` (required): numerator df, k - 1 for a one-way ANOVA of k groups, the
        number of tested predictors for a regression.
    groups : int or None, default None
        Design ``"f"``: the number of parameters of the full model, intercept included; the
        denominator df is N - ``groups``. It is k for a one-way ANOVA of k groups, p + 1 for a
        regression on p predictors. Default ``df_numerator + 1``, which is both of these when
        the test covers every group or predictor.

    Returns
    -------
    PowerSolution
        Every quantity, the solved one in ``solved``. When n is solved, ``n`` is the exact
        solution ``n_exact`` rounded up to a whole participant, and ``df``, ``noncentrality``,
        ``critical_value`` and ``achieved_power`` refer to that whole ``n``.

    Raises
    ------
    GlmeegError
        Not exactly one unknown; a value out of range (alpha or power outside (0, 1), a
        negative effect size, n without residual df); an impossible target (power <= alpha
        when solving n or the effect size, a zero effect size when solving n, a power no n up
        to 10,000,000 reaches).

    Notes
    -----
    For a t test the power is P(T' > t_crit), plus P(T' < -t_crit) for a two-sided test,
    where T' is noncentral t with the design's df and noncentrality and t_crit the upper
    alpha (alpha / 2 two-sided) quantile of the central t. For F it is P(F' > F_crit) with F'
    noncentral F. Power increases in n, effect size and alpha; the unknown is found by
    Brent's method over a continuous n, effect size or alpha. If the target power is already
    met at the smallest n with 1 residual df, that n is returned with a warning. A warning
    also flags n below 16 (per group for two samples; in total for F), the lower end of the
    16-32 participants common in EEG group studies.

    References
    ----------
    .. [1] Cohen, J. (1988). *Statistical Power Analysis for the Behavioral Sciences* (2nd ed.).
       Lawrence Erlbaum. Chapters 2 (t tests, d) and 8 (F tests, f).
    .. [2] Cohen, J. (1992). A power primer. *Psychological Bulletin*, 112(1), 155-159.

    Examples
    --------
    >>> s = solve_power(design="two-sample", effect_size=0.5, alpha=0.05, power=0.8)
    >>> s.n, round(s.n_exact, 2), s.total_n
    (64, 63.77, 128)
    >>> round(solve_power(design="paired", effect_size=0.5, n=20, alpha=0.05).power, 3)
    0.565
    """
    df_numerator, groups = _check_setting(design, alternative, df_numerator, groups)
    given = {"effect_size": effect_size, "n": n, "alpha": alpha, "power": power}
    missing = [k for k, v in given.items() if v is None]
    if not missing:
        raise GlmeegError("effect_size, n, alpha, power: all four were given; leave out the one "
                          "to solve (set it to None)")
    if len(missing) > 1:
        hint = " (alpha has no default: pass alpha=0.05 for the usual level)" if "alpha" in missing else ""
        raise GlmeegError(f"more than one unknown: {' and '.join(missing)} are missing; give all but "
                          f"one of effect_size, n, alpha, power{hint}")
    solved: Unknown = missing[0]  # type: ignore[assignment]

    if effect_size is not None:
        effect_size = _check_effect_size(effect_size)
    if alpha is not None:
        alpha = _check_fraction("alpha", alpha)
    if power is not None:
        power = _check_fraction("power", power)
    if n is not None:
        n = _check_n(n, design, groups, whole=True)

    def pw(es: float, nn: float, a: float) -> float:
        return _power(design, es, nn, a, alternative, df_numerator, groups)

    notes: list[str] = []
    n_exact: float
    if solved == "power":
        n_exact = n
        power = pw(effect_size, n, alpha)
    elif solved == "alpha":
        n_exact = n
        alpha, low_end = _solve_increasing(lambda a: pw(effect_size, n, a), power, _ALPHA_RANGE[0],
                                           0.05, _ALPHA_RANGE[1])
        if low_end:
            raise GlmeegError.of("power", f"{power:g} is exceeded even at alpha = {_ALPHA_RANGE[0]:g} with "
                              f"effect_size={effect_size:g} and n={n:g}; no alpha to solve")
        if math.isnan(alpha):
            raise GlmeegError.of("power", f"{power:g} is not reached at any alpha below 1 with "
                              f"effect_size={effect_size:g} and n={n:g}")
    else:
        if power <= alpha:
            raise GlmeegError.of("power", f"expected more than alpha = {alpha:g} (a test has power alpha "
                              f"when there is no effect), got {power:g}")
        if solved == "effect_size":
            n_exact = n
            effect_size, _ = _solve_increasing(lambda es: pw(es, n, alpha), power, 0.0, 1.0, _EFFECT_MAX)
            if math.isnan(effect_size):
                raise GlmeegError.of("power", f"{power:g} is not reached by any effect_size up to "
                                  f"{_EFFECT_MAX:g} with n={n:g} and alpha={alpha:g}")
        else:
            if effect_size == 0.0:
                raise GlmeegError.of("effect_size", "expected a size > 0 to solve n (no n detects a zero "
                                  "effect with power above alpha), got 0")
            low = _n_min(design, groups)
            n_exact, low_end = _solve_increasing(lambda nn: pw(effect_size, nn, alpha), power, low,
                                                 8.0, _N_MAX)
            if math.isnan(n_exact):
                raise GlmeegError.of("power", f"{power:g} is not reached by any n up to {_N_MAX:,.0f} with "
                                  f"effect_size={effect_size:g} and alpha={alpha:g}")
            if low_end:
                notes.append(f"power {power:g} is reached already at the smallest n with 1 residual "
                             f"df; n is that minimum, not a solution of the power equation")
            n = max(math.ceil(round(n_exact, 9)), math.ceil(low))

    n_whole = int(n)
    achieved = pw(effect_size, n_whole, alpha)
    df, nc = _df_and_noncentrality(design, effect_size, n_whole, df_numerator, groups)
    crit = _critical_value(design, alpha, df, df_numerator, alternative)
    low_n = EEG_TYPICAL_N[0]
    if n_whole < low_n:
        where = {"two-sample": " per group", "f": " in total"}.get(design, "")
        notes.append(f"n = {n_whole}{where} is below {low_n}, the lower end of the "
                     f"{EEG_TYPICAL_N[0]}-{EEG_TYPICAL_N[1]} participants common in EEG group studies")
    return PowerSolution(
        design=design, alternative=alternative, solved=solved,
        statistic="F" if design == "f" else "t", effect_size=effect_size, alpha=alpha,
        power=power, n=n_whole, n_exact=float(n_exact),
        total_n=2 * n_whole if design == "two-sample" else n_whole, achieved_power=achieved,
        df=df, df_numerator=df_numerator, groups=groups, noncentrality=nc, critical_value=crit,
        warnings=tuple(notes))


def power_curve(*, design: Design, effect_size: float, alpha: float = 0.05,
                n_values: Sequence[float], alternative: Alternative = "two-sided",
                df_numerator: int | None = None, groups: int | None = None) -> pd.DataFrame:
    """Power at several sample sizes, as a table ready to plot.

    Parameters
    ----------
    design : {"one-sample", "paired", "two-sample", "f"}
        As in :func:`solve_power`.
    effect_size : float
        d, dz or f (see :func:`solve_power`), >= 0.
    alpha : float, default 0.05
        Significance level of the one test, in (0, 1).
    n_values : sequence of float
        Sample sizes (per group for ``"two-sample"``, in total otherwise), each with at least 1
        residual df. Non-integer values give the continuous curve the solver works on.
    alternative : {"two-sided", "greater", "less"}, default "two-sided"
    df_numerator, groups : int or None, default None
        Design ``"f"`` only, as in :func:`solve_power`.

    Returns
    -------
    pandas.DataFrame
        Columns ``n`` and ``power``, one row per value of ``n_values`` in the order given.

    Raises
    ------
    GlmeegError
        A setting out of range, as in :func:`solve_power`, or an empty ``n_values``.

    References
    ----------
    .. [1] Cohen, J. (1988). *Statistical Power Analysis for the Behavioral Sciences* (2nd ed.).
       Lawrence Erlbaum.
    .. [2] Cohen, J. (1992). A power primer. *Psychological Bulletin*, 112(1), 155-159.

    Examples
    --------
    >>> power_curve(design="paired", effect_size=0.5, n_values=[16, 24, 32]).round(3)
        n  power
    0  16  0.465
    1  24  0.650
    2  32  0.782
    """
    df_numerator, groups = _check_setting(design, alternative, df_numerator, groups)
    effect_size = _check_effect_size(effect_size)
    alpha = _check_fraction("alpha", alpha)
    values = list(n_values)
    if not values:
        raise GlmeegError.of("n_values", "expected at least one sample size, got none")
    ns = [_check_n(v, design, groups, whole=False, name="n_values") for v in values]
    power = [_power(design, effect_size, v, alpha, alternative, df_numerator, groups) for v in ns]
    return pd.DataFrame({"n": values, "power": power})
