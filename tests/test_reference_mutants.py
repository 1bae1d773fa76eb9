"""Reference tests for the three bugs that survived the mutation campaign of issue 14.

* Freedman-Lane permuting the raw data instead of the nuisance model's residuals: the null
  distribution rebuilt independently from the textbook scheme (Freedman & Lane, 1983;
  Winkler et al., 2014: Y* = P R_Z + H_Z Y, the full model fitted by numpy.linalg.lstsq) with
  the same seed stream, to 1e-10; and the type-I error rate with a strong nuisance covariate
  within a binomial tolerance.
* A text contrast coming out with the opposite sign: the weights of text contrasts exactly, the
  contrast's effect against statsmodels' ``t_test`` of the same string, and the sign of a
  planted difference through ``glmeeg.run_analysis``.
* Partial epsilon squared of F tests losing its df1 factor: against statsmodels' ``anova_lm``
  sums of squares with df1 = 2 and 3.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

import glmeeg
from glmeeg.testing import write_study
from glmeeg.formula import build_design, contrast_matrix
from glmeeg.inference.corrections import MaxStatistic
from glmeeg.inference.permutation import permutation_test

# --- Freedman-Lane: the null distribution rebuilt from the textbook scheme --------------------

# numpy.random.SeedSequence.spawn: resampling block j (of 100) comes from the j-th child of the
# test's seed, SeedSequence(seed, spawn_key=(j,)); the engine documents this stream
# (glmeeg.inference.permutation.random_block), which is what makes a rebuild possible.
BLOCK = 100


def _draws(scheme: str, n: int, seed: int, count: int) -> np.ndarray:
    rows = []
    for j in range(-(-count // BLOCK)):
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(j,)))
        size = (min(BLOCK, count - j * BLOCK), n)
        rows.append(1 - 2 * rng.integers(0, 2, size=size) if scheme == "sign-flip"
                    else np.argsort(rng.random(size), axis=1, kind="stable"))
    return np.concatenate(rows)


def _statistic(G: np.ndarray, L: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """t (one contrast row) or F of the full model at every column of Y, by lstsq and the
    closed forms t = c b / sqrt(s2 c (G'G)^-1 c'), F = (Lb)'(L (G'G)^-1 L')^-1 (Lb) / (m s2)."""
    n, q = G.shape
    B, *_ = np.linalg.lstsq(G, Y, rcond=None)
    E = Y - G @ B
    s2 = (E * E).sum(axis=0) / (n - q)
    V = np.linalg.inv(G.T @ G)
    A = L @ B
    if L.shape[0] == 1:
        return A[0] / np.sqrt(s2 * (L @ V @ L.T)[0, 0])
    W = np.linalg.inv(L @ V @ L.T)
    return np.einsum("ip,ij,jp->p", A, W, A) / (L.shape[0] * s2)


def _freedman_lane_null(G, L, Y, tested, scheme, seed, count):
    """Max statistic of every resampling and the per-point counts, rebuilt from the scheme.

    The nuisance Z is the design's untested columns (the contrasts here pick columns): the
    nuisance model's fit H_Z Y and residuals R_Z = Y - H_Z Y; resampling j gives
    Y* = P_j R_Z + H_Z Y (subject i's residual moved to row perm[i], or its sign flipped),
    and the full model is fitted to Y*.
    """
    Z = np.delete(G, tested, axis=1)
    if Z.shape[1]:
        fitted = Z @ np.linalg.lstsq(Z, Y, rcond=None)[0]
    else:
        fitted = np.zeros_like(Y)
    R = Y - fitted
    observed = _statistic(G, L, Y)
    two_sided = L.shape[0] == 1
    obs = np.abs(observed) if two_sided else observed
    null = np.empty(count)
    at_least = np.zeros(Y.shape[1], dtype=np.int64)
    for b, row in enumerate(_draws(scheme, G.shape[0], seed, count)):
        if scheme == "sign-flip":
            Rs = row[:, None] * R
        else:
            Rs = np.empty_like(R)
            Rs[row] = R
        stat = _statistic(G, L, Rs + fitted)
        stat = np.abs(stat) if two_sided else stat
        null[b] = stat.max()
        # the engine's rule for "at least as extreme": a relative tie tolerance of 1e-12
        at_least += stat >= obs - 1e-12 * np.abs(obs)
    return null, at_least, obs


def _covariate_cases():
    rng = np.random.default_rng(2014)
    n = 16
    x = np.r_[np.zeros(8), np.ones(8)]
    z = 2.0 * x + rng.normal(0.0, 0.5, n) + 1.0                  # correlated with x, mean far from 0
    levels = np.arange(n) % 3
    d1, d2 = (levels == 1).astype(float), (levels == 2).astype(float)
    w = 1.5 * d1 - d2 + rng.normal(0.0, 0.5, n)                  # correlated with the factor
    ones = np.ones(n)
    return {
        # group difference with a covariate: the constant is in the nuisance space -> permute
        "group difference, covariate": (np.column_stack([ones, x, z]), [[0.0, 1.0, 0.0]], [1], "permute"),
        # intercept with a covariate: the constant is tested -> sign-flip, nuisance z
        "intercept, covariate": (np.column_stack([ones, z]), [[1.0, 0.0]], [0], "sign-flip"),
        # F of a three-level factor with a covariate (df1 = 2) -> permute
        "factor F, covariate": (np.column_stack([ones, d1, d2, w]),
                                [[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]], [1, 2], "permute"),
    }


@pytest.mark.parametrize("case", list(_covariate_cases()))
def test_freedman_lane_null_distribution_is_the_textbook_scheme(case):
    """Same seed stream, same resamplings: the engine's null of the max statistic equals the
    rebuild to rtol 1e-10 (the engine forms residual sums of squares from projections, the
    rebuild explicitly: rounding ~1e-14 relative, as in the group-level reference tests)."""
    G, L, tested, scheme = _covariate_cases()[case]
    L = np.asarray(L)
    rng = np.random.default_rng(83)
    n, P = G.shape[0], 25
    # A strong nuisance effect (the covariate's slope 4 against noise 1) and a null tested
    # effect at most points, a real one at a few: raw-data and residual permutation differ.
    Y = 2.0 + 4.0 * G[:, [-1]] + rng.standard_normal((n, P))
    Y[:, :3] += np.outer(G[:, tested[0]], [0.5, 1.0, 1.5])
    count, seed = 1000, 1983
    res = permutation_test(Y, G, L, kind="t" if L.shape[0] == 1 else "F",
                           df=(float(L.shape[0]), float(n - G.shape[1])),
                           correction=MaxStatistic(permutations=count, seed=seed))
    assert res.scheme == scheme and not res.exhaustive and res.n_resamplings == count
    null, at_least, obs = _freedman_lane_null(G, L, Y, tested, scheme, seed, count)
    np.testing.assert_allclose(res.null_distribution, null, rtol=1e-10, atol=0)
    # Phipson & Smyth (2010): p = (b + 1) / (m + 1), per point and against the max null.
    np.testing.assert_array_equal(res.p_uncorrected, (at_least + 1) / (count + 1))
    corrected = ((null[None, :] >= (obs - 1e-12 * np.abs(obs))[:, None]).sum(axis=1) + 1) / (count + 1)
    np.testing.assert_array_equal(res.p_corrected, corrected)


def _size_design(case: str, rng):
    n = 20
    ones = np.ones(n)
    if case == "group difference":
        x = np.r_[np.zeros(10), np.ones(10)]
        z = 2.0 * x + rng.normal(0.0, 0.5, n)                    # correlation with x about 0.9
        return np.column_stack([ones, x, z]), np.array([[0.0, 1.0, 0.0]])
    z = rng.normal(1.0, 1.0, n)                                  # mean 1: far from orthogonal to 1
    return np.column_stack([ones, z]), np.array([[1.0, 0.0]])


@pytest.mark.parametrize("case", ["group difference", "intercept"])
def test_freedman_lane_size_with_a_strong_correlated_nuisance(case):
    """Type-I error rate at alpha = 0.05 under the null, nuisance slope 5 against noise 1.

    Eklund et al. (2016): validate by null simulation. S = 5 tests (own seeds) of P = 800
    points (independent null data, one design), B = 999 resamplings each. The rate's variance
    is (alpha (1 - alpha) / (B + 1) + alpha (1 - alpha) / P) / S: the Monte-Carlo error of
    each test's critical value (the beta law of a uniform order statistic), shared by its
    points, plus the binomial error of its points; sd = 0.0046. The tolerance is 3.29 sd (a
    two-sided 0.001 normal quantile, scipy.stats.norm): [0.0348, 0.0652]. Permuting the raw
    data instead gives about 0.18 in the intercept case (its sign-flips carry the covariate's
    effect into the null).
    """
    alpha, S, P, B = 0.05, 5, 800, 999
    sd = np.sqrt((alpha * (1 - alpha) / (B + 1) + alpha * (1 - alpha) / P) / S)
    half = scipy.stats.norm.isf(0.0005) * sd
    rng = np.random.default_rng(1983 if case == "intercept" else 1984)
    G, L = _size_design(case, rng)
    n = G.shape[0]
    rejected = 0
    for s in range(S):
        Y = (5.0 * G[:, -1])[:, None] + (3.0 if case == "group difference" else 0.0) \
            + rng.standard_normal((n, P))
        res = permutation_test(Y, G, L, kind="t", df=(1.0, n - G.shape[1] + 0.0),
                               correction=MaxStatistic(permutations=B, seed=100 + s))
        rejected += int((res.p_uncorrected <= alpha).sum())
    rate = rejected / (S * P)
    assert abs(rate - alpha) <= half, (rate, alpha - half, alpha + half)


# --- text contrasts: exact weights and the sign of a planted difference -------------------------

def _trials(rng, n=60):
    return pd.DataFrame({"condition": np.array(["a", "b", "c"])[np.arange(n) % 3],
                         "intensity": rng.normal(50.0, 10.0, n)})


@pytest.mark.parametrize("text, weights", [
    ("condition[T.b]", [[0, 1, 0, 0]]),
    ("condition[T.b] - condition[T.c]", [[0, 1, -1, 0]]),
    ("condition[T.c] - condition[T.b]", [[0, -1, 1, 0]]),
    ("-condition[T.b] + 2 * intensity", [[0, -1, 0, 2]]),
    ("0.5 * condition[T.b] + 0.5 * condition[T.c]", [[0, 0.5, 0.5, 0]]),
    ("condition[T.b], condition[T.c] - condition[T.b]", [[0, 1, 0, 0], [0, -1, 1, 0]]),
])
def test_text_contrast_weights_are_exact(text, weights):
    """The weights are the coefficients as written on the columns (Intercept, condition[T.b],
    condition[T.c], intensity) -- the definition of a linear contrast -- and the contrast of
    a fit equals statsmodels' t_test effect of the same string on the same OLS fit."""
    rng = np.random.default_rng(5)
    table = _trials(rng)
    design = build_design(table, "condition + intensity", levels={"condition": ["a", "b", "c"]},
                          source="trials.csv", where="subject_model.formula")
    assert design.column_names == ("Intercept", "condition[T.b]", "condition[T.c]", "intensity")
    C = contrast_matrix(design, text, where="test")
    np.testing.assert_array_equal(C.matrix, np.asarray(weights, dtype=float))
    y = rng.standard_normal(len(table)) + (table["condition"] == "b") * 1.0
    fit = smf.ols("y ~ condition + intensity", data=table.assign(y=y)).fit()
    for row, part in zip(C.matrix, [s.strip() for s in text.split(",")]):
        effect = fit.t_test(f"{part} = 0").effect  # statsmodels' own evaluation of the string
        # rtol 1e-12: the same betas weighted two ways (rounding of a few products)
        np.testing.assert_allclose(row @ fit.params.to_numpy(), effect[0], rtol=1e-12, atol=1e-14)


SIGN_TESTS = """\
[[test]]
name = "b-minus-c"
subject_contrast = "condition[T.b] - condition[T.c]"
correction = "none"

[[test]]
name = "c-minus-b"
subject_contrast = "condition[T.c] - condition[T.b]"
correction = "none"
"""


def test_the_sign_of_a_planted_difference_through_the_pipeline(tmp_path):
    """The study writer adds +1.5 to condition b at channel 1, samples 2-4 (closed form: the
    expected b - c difference there is +1.5, elsewhere 0). b - c is positive there and c - b
    its exact negation; the subject estimates equal statsmodels' t_test effects of the same
    strings on each subject's trials."""
    design = write_study(tmp_path / "s", n_subjects=10, n_trials=30, n_channels=3, n_times=6,
                         seed=21, tests=SIGN_TESTS, effect=1.5)
    run = glmeeg.run_analysis(design)
    bc, cb = run.test("b-minus-c"), run.test("c-minus-b")
    axes = bc.axes
    planted = np.zeros(axes.shape, dtype=bool)
    planted[1, 2:5] = True
    planted = planted.ravel()
    # Each subject's b - c estimate has sd about sqrt(1/10 + 1/10) = 0.45 (10 trials per
    # condition, unit noise), the mean of 10 subjects about 0.14: 1.5 +- 0.6 is over 4 sd.
    est = bc.estimate[0]
    assert (est[planted] > 0).all() and (bc.statistic[planted] > 0).all()
    assert abs(est[planted].mean() - 1.5) < 0.6
    np.testing.assert_array_equal(cb.estimate, -bc.estimate)
    np.testing.assert_allclose(cb.statistic, -bc.statistic, rtol=1e-12, atol=0)
    trials = pd.read_csv(tmp_path / "s" / "trials.csv", dtype={"subject": str})
    for i, s in enumerate(bc.subjects[:3]):
        rows = trials[trials["subject"] == s]
        epochs = np.load(tmp_path / "s" / "epochs" / f"{s}.npy")
        Y = epochs[rows["epoch"].to_numpy()].reshape(len(rows), -1).astype(np.float64)
        for j in np.flatnonzero(planted):
            fit = smf.ols("y ~ condition + intensity", data=rows.assign(y=Y[:, j])).fit()
            effect = fit.t_test("condition[T.b] - condition[T.c] = 0").effect[0]
            # rtol 1e-10: statsmodels and glmeeg fit the same float32 data in float64
            np.testing.assert_allclose(bc.subject_estimates[i, 0, j], effect, rtol=1e-10, atol=1e-13)


# --- partial epsilon squared of F tests with df1 >= 2 ------------------------------------------

@pytest.mark.parametrize("n_levels", [3, 4])
def test_partial_epsilon_and_eta_squared_match_statsmodels_anova(n_levels):
    """Partial eta and epsilon squared of the F test of a factor with df1 = levels - 1 next to
    a covariate, from statsmodels' anova_lm (type II) sums of squares:
    eta2_p = SS_effect / (SS_effect + SS_error) and Kelley's
    eps2_p = (SS_effect - df1 MS_error) / (SS_effect + SS_error) (Okada 2013, from memory).
    With df1 = 1 a formula that drops the df1 factor gives the same number; here it cannot."""
    rng = np.random.default_rng(40 + n_levels)
    n, P = 24, 30
    level = np.arange(n) % n_levels
    age = rng.normal(40.0, 10.0, n)
    G = np.column_stack([np.ones(n)] + [(level == v).astype(float) for v in range(1, n_levels)] + [age])
    L = np.eye(G.shape[1])[1:n_levels]
    Y = rng.standard_normal((n, P)) + np.outer(level == 1, np.linspace(0.0, 2.0, P)) + 0.02 * age[:, None]
    res = glmeeg.group_test(Y, G, L)
    assert res.kind == "F" and res.df == (n_levels - 1.0, n - G.shape[1] + 0.0)
    assert res.effect_size_name == "partial eta squared"
    assert res.effect_size_corrected_name == "partial epsilon squared"
    frame = pd.DataFrame({"g": level.astype(str), "age": age})
    for j in range(P):
        table = anova_lm(smf.ols("y ~ C(g) + age", data=frame.assign(y=Y[:, j])).fit(), typ=2)
        ss_effect, df1 = table.loc["C(g)", "sum_sq"], table.loc["C(g)", "df"]
        ss_error, df2 = table.loc["Residual", "sum_sq"], table.loc["Residual", "df"]
        assert (df1, df2) == res.df
        eta = ss_effect / (ss_effect + ss_error)
        eps = (ss_effect - df1 * ss_error / df2) / (ss_effect + ss_error)
        # rtol 1e-10: the task's point-by-point target against statsmodels; atol 1e-12 for
        # epsilon squared near 0 (it changes sign with F - 1).
        np.testing.assert_allclose(res.effect_size[j], eta, rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.effect_size_corrected[j], eps, rtol=1e-10, atol=1e-12)
