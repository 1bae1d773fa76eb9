"""Group-level statistics checked against outside references.

* statsmodels OLS ``t_test`` / ``f_test`` fitted point by point (estimates, t, F, p);
* scipy.stats ``ttest_1samp`` / ``ttest_rel`` / ``ttest_ind`` for the one-sample, paired and
  two-sample designs, with every ``alternative``;
* effect sizes by their textbook formulas (Cohen 1988; Hedges 1981);
* the joint within-subject F (Hotelling's T²) against statsmodels MANOVA;
* the whole pipeline (design file -> run) against statsmodels fits of the same study.
"""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest
import scipy.special
import scipy.stats
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.multivariate.manova import MANOVA

import glmeeg
from glmeeg.testing import write_study
from glmeeg.group_level import hedges_factor

ALTERNATIVES = ("two-sided", "greater", "less")


def _p_from_t(t, df, alternative):
    """p of a t statistic (scipy.stats.t), for the one-sided alternatives statsmodels lacks."""
    if alternative == "two-sided":
        return 2 * scipy.stats.t.sf(np.abs(t), df)
    if alternative == "greater":
        return scipy.stats.t.sf(t, df)
    return scipy.stats.t.cdf(t, df)


def _subject_estimates(rng, n, n_points, shift=0.3):
    """Subject contrast estimates with a spread of true effects, scales and offsets."""
    mu = rng.normal(0.0, shift, n_points)
    sd = rng.uniform(0.5, 2.0, n_points)
    return mu + sd * rng.standard_normal((n, n_points))


# ---------------------------------------------------------------------------------------------
# statsmodels OLS t_test / f_test, point by point
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_one_sample_matches_statsmodels_t_test(alternative):
    rng = np.random.default_rng(3101)
    n, n_points = 18, 250
    Y = _subject_estimates(rng, n, n_points)
    G = np.ones((n, 1))
    res = glmeeg.group_test(Y, G, np.array([[1.0]]), alternative=alternative)
    assert res.kind == "t" and res.df == (1.0, n - 1.0)
    for j in range(n_points):
        tt = sm.OLS(Y[:, j], G).fit().t_test(np.array([[1.0]]))  # statsmodels OLS t_test
        assert tt.df_denom == res.df[1]
        # rtol 1e-10: the task's point-by-point target; atol 1e-13 because t and the estimate
        # pass through zero at some points, where only an absolute error (~1e-15 here) is
        # meaningful.
        np.testing.assert_allclose(res.estimate[0, j], tt.effect[0], rtol=1e-10, atol=1e-13)
        np.testing.assert_allclose(res.standard_error[j], tt.sd[0, 0], rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.statistic[j], tt.tvalue[0, 0], rtol=1e-10, atol=1e-13)
        # statsmodels' p is two-sided; one-sided p from its t and df with scipy.stats.t.
        p_ref = tt.pvalue if alternative == "two-sided" else _p_from_t(tt.tvalue[0, 0], tt.df_denom, alternative)
        np.testing.assert_allclose(res.p[j], p_ref, rtol=1e-10, atol=0)


@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_two_groups_and_covariate_match_statsmodels_t_test(alternative):
    rng = np.random.default_rng(3102)
    n, n_points = 22, 250
    group = np.r_[np.zeros(11), np.ones(11)]
    age = rng.integers(20, 60, n).astype(float)
    G = np.column_stack([np.ones(n), group, age])
    c = np.array([[0.0, 1.0, 0.0]])
    Y = _subject_estimates(rng, n, n_points) + np.outer(group, rng.normal(0, 0.5, n_points)) \
        + np.outer(age - 40, rng.normal(0, 0.02, n_points))
    res = glmeeg.group_test(Y, G, c, alternative=alternative)
    assert res.df == (1.0, n - 3.0)
    for j in range(n_points):
        tt = sm.OLS(Y[:, j], G).fit().t_test(c)  # statsmodels OLS t_test
        # Same tolerances and reasons as the one-sample case (age spans 20-60, condition ~1e2).
        np.testing.assert_allclose(res.estimate[0, j], tt.effect[0], rtol=1e-10, atol=1e-13)
        np.testing.assert_allclose(res.standard_error[j], tt.sd[0, 0], rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.statistic[j], tt.tvalue[0, 0], rtol=1e-10, atol=1e-13)
        p_ref = tt.pvalue if alternative == "two-sided" else _p_from_t(tt.tvalue[0, 0], tt.df_denom, alternative)
        np.testing.assert_allclose(res.p[j], p_ref, rtol=1e-10, atol=0)


def test_joint_f_of_two_group_contrasts_matches_statsmodels_f_test():
    rng = np.random.default_rng(3103)
    n, n_points = 27, 250
    level = np.arange(n) % 3
    age = rng.normal(40, 12, n)
    G = np.column_stack([np.ones(n), level == 1, level == 2, age]).astype(float)
    L = np.array([[0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 1.0, 0.0]])
    Y = _subject_estimates(rng, n, n_points) + np.outer(level == 2, rng.normal(0, 0.6, n_points))
    res = glmeeg.group_test(Y, G, L)
    assert res.kind == "F" and res.df == (2.0, n - 4.0)
    G_reduced = G[:, [0, 3]]
    for j in range(n_points):
        full = sm.OLS(Y[:, j], G).fit()
        ft = full.f_test(L)  # statsmodels OLS f_test (Wald F of the two group contrasts)
        assert (ft.df_num, ft.df_denom) == res.df
        np.testing.assert_allclose(res.estimate[:, j], L @ full.params, rtol=1e-10, atol=1e-13)
        # rtol 1e-10: the task's target; F >= 0 and is only compared relatively.
        np.testing.assert_allclose(res.statistic[j], ft.fvalue, rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.p[j], ft.pvalue, rtol=1e-10, atol=0)
        # Partial eta squared = F df1 / (F df1 + df2) (Cohen 1988, from memory) and, the same
        # quantity by its definition, SS_effect / (SS_effect + SS_error) with SS_effect the rise
        # in residual SS when the group columns are dropped (statsmodels fits of both models).
        eta_from_f = ft.fvalue * ft.df_num / (ft.fvalue * ft.df_num + ft.df_denom)
        ss_effect = sm.OLS(Y[:, j], G_reduced).fit().ssr - full.ssr
        eta_from_ss = ss_effect / (ss_effect + full.ssr)
        # rtol 1e-10 against the F form; 1e-9 against the SS form, whose difference of residual
        # sums of squares loses a digit or two where the group effect is small.
        np.testing.assert_allclose(res.effect_size[j], eta_from_f, rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.effect_size[j], eta_from_ss, rtol=1e-9, atol=1e-14)
    assert res.effect_size_name == "partial eta squared"


# ---------------------------------------------------------------------------------------------
# scipy.stats t tests and effect sizes
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("alternative", ALTERNATIVES)
def test_one_sample_paired_two_sample_match_scipy(alternative):
    rng = np.random.default_rng(3104)
    n, n_points = 16, 300
    # One-sample: scipy.stats.ttest_1samp against 0.
    Y = _subject_estimates(rng, n, n_points)
    res = glmeeg.group_test(Y, np.ones((n, 1)), np.array([[1.0]]), alternative=alternative)
    ref = scipy.stats.ttest_1samp(Y, 0.0, axis=0, alternative=alternative)
    # rtol 1e-12: scipy's mean/SD route and glmeeg's QR route differ by a few ulp; atol 1e-13
    # where t is near 0 (relative error is unbounded there, absolute error ~1e-15).
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(res.p, ref.pvalue, rtol=1e-12, atol=0)
    assert res.df[1] == ref.df[0]
    # Cohen's dz = mean of the differences / their SD (ddof=1) (Cohen 1988).
    dz = Y.mean(axis=0) / Y.std(axis=0, ddof=1)
    np.testing.assert_allclose(res.effect_size, dz, rtol=1e-12, atol=1e-14)
    assert res.effect_size_name == "dz"

    # Paired: scipy.stats.ttest_rel on two conditions equals the one-sample test of differences.
    a = _subject_estimates(rng, n, n_points)
    b = a - rng.normal(0.2, 0.8, (n, n_points))
    res = glmeeg.group_test(a - b, np.ones((n, 1)), np.array([[1.0]]), alternative=alternative)
    ref = scipy.stats.ttest_rel(a, b, axis=0, alternative=alternative)
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(res.p, ref.pvalue, rtol=1e-12, atol=0)

    # Two-sample, equal variances: scipy.stats.ttest_ind(y, x); glmeeg tests group y - group x.
    n_x, n_y = 9, 12
    x = _subject_estimates(rng, n_x, n_points)
    y = _subject_estimates(rng, n_y, n_points) + 0.4
    G = np.column_stack([np.ones(n_x + n_y), np.r_[np.zeros(n_x), np.ones(n_y)]])
    res = glmeeg.group_test(np.vstack([x, y]), G, np.array([[0.0, 1.0]]), alternative=alternative)
    ref = scipy.stats.ttest_ind(y, x, axis=0, equal_var=True, alternative=alternative)
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(res.p, ref.pvalue, rtol=1e-12, atol=0)
    # Cohen's d with the pooled SD (Cohen 1988):
    # s_p^2 = ((n_x - 1) s_x^2 + (n_y - 1) s_y^2) / (n_x + n_y - 2).
    df = n_x + n_y - 2
    sp = np.sqrt(((n_x - 1) * x.var(axis=0, ddof=1) + (n_y - 1) * y.var(axis=0, ddof=1)) / df)
    d = (y.mean(axis=0) - x.mean(axis=0)) / sp
    np.testing.assert_allclose(res.effect_size, d, rtol=1e-12, atol=1e-14)
    # Hedges' g = J(df) d with the exact J(df) = Γ(df/2) / (sqrt(df/2) Γ((df-1)/2))
    # (Hedges 1981, from memory); scipy.special.gamma directly (df is small here).
    J = scipy.special.gamma(df / 2) / (np.sqrt(df / 2) * scipy.special.gamma((df - 1) / 2))
    np.testing.assert_allclose(res.effect_size_corrected, J * d, rtol=1e-12, atol=1e-14)
    assert (res.effect_size_name, res.effect_size_corrected_name) == ("d", "g")


def test_hedges_factor_exact_and_approximation():
    for df in [2, 3, 4, 5, 7, 10, 15, 20, 30, 50, 100, 150]:
        # Exact J(df) (Hedges 1981): Γ(df/2) / (sqrt(df/2) Γ((df-1)/2)) with scipy.special.gamma;
        # rtol 1e-13: glmeeg works with log-gamma, a few ulp from the direct ratio.
        exact = scipy.special.gamma(df / 2) / (np.sqrt(df / 2) * scipy.special.gamma((df - 1) / 2))
        np.testing.assert_allclose(hedges_factor(df), exact, rtol=1e-13, atol=0)
        # Hedges' (1981) approximation J ≈ 1 - 3 / (4 df - 1). Its error: the gamma ratio
        # expands as J = 1 - 3/(4df) - 7/(32 df²) + O(df⁻³) and the approximation as
        # 1 - 3/(4df) - 6/(32 df²) + ..., so the approximation is high by about 1/(32 df²)
        # (derived from the Stirling series of Γ(z + 1/2)/Γ(z); from memory). Bound used:
        # 0 < approx - J < 0.035 / df² for df >= 2 (about 0.0072 at df = 2).
        approx = 1 - 3 / (4 * df - 1)
        gap = approx - hedges_factor(df)
        assert 0 < gap < 0.035 / df ** 2, (df, gap)
    # Large df: the gap approaches 1/(32 df²); rtol 2 % for the O(df⁻³) remainder at df = 1000.
    df = 1000
    np.testing.assert_allclose((1 - 3 / (4 * df - 1) - hedges_factor(df)) * df ** 2, 1 / 32,
                               rtol=0.02, atol=0)
    assert np.isnan(hedges_factor(1))


def test_one_sample_hedges_gz():
    rng = np.random.default_rng(3105)
    n, n_points = 12, 100
    Y = _subject_estimates(rng, n, n_points)
    res = glmeeg.group_test(Y, np.ones((n, 1)), np.array([[1.0]]))
    dz = Y.mean(axis=0) / Y.std(axis=0, ddof=1)  # Cohen (1988) dz
    df = n - 1
    J = scipy.special.gamma(df / 2) / (np.sqrt(df / 2) * scipy.special.gamma((df - 1) / 2))  # Hedges (1981)
    # rtol 1e-12: mean/SD arithmetic versus QR, a few ulp apart; atol for dz near 0.
    np.testing.assert_allclose(res.effect_size_corrected, J * dz, rtol=1e-12, atol=1e-14)
    assert res.effect_size_corrected_name == "gz"


# ---------------------------------------------------------------------------------------------
# Joint within-subject F (Hotelling's T²) against statsmodels MANOVA
# ---------------------------------------------------------------------------------------------

def _manova_row(frame: pd.DataFrame, formula: str, term: str, row: str = "Wilks' lambda"):
    """statsmodels MANOVA mv_test: (value, F, num df, den df, p) of one statistic of a term."""
    stat = MANOVA.from_formula(formula, frame).mv_test().results[term]["stat"]
    r = stat.loc[row]
    return (float(r["Value"]), float(r["F Value"]), float(r["Num DF"]), float(r["Den DF"]),
            float(r["Pr > F"]))


@pytest.mark.parametrize("k", [2, 3])
def test_joint_within_subject_f_matches_manova(k):
    rng = np.random.default_rng(3106 + k)
    n, n_points = 14, 12
    names = "abc"[:k]
    # Difference vectors (k subject contrasts per subject) with correlated components.
    mix = np.eye(k) + 0.4 * rng.standard_normal((k, k))
    Y = np.einsum("kl,nlp->nkp", mix, rng.standard_normal((n, k, n_points))) \
        + rng.normal(0, 0.4, (1, k, n_points))
    res = glmeeg.group_test(Y, np.ones((n, 1)), np.array([[1.0]]))
    assert res.kind == "F" and res.df == (float(k), float(n - k))
    formula = " + ".join(names) + " ~ 1"
    for j in range(n_points):
        frame = pd.DataFrame(Y[:, :, j], columns=list(names))
        wilks, F, df1, df2, p = _manova_row(frame, formula, "Intercept")
        hl = _manova_row(frame, formula, "Intercept", "Hotelling-Lawley trace")
        assert (df1, df2) == res.df
        # statsmodels MANOVA (Wilks' lambda and Hotelling-Lawley trace; for one hypothesis
        # degree of freedom both are exact and equal to Hotelling's T² F). rtol 1e-10: the
        # task's target; MANOVA goes through eigenvalues, glmeeg through a solve.
        np.testing.assert_allclose(res.statistic[j], F, rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.statistic[j], hl[1], rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.p[j], p, rtol=1e-10, atol=0)
        # Multivariate partial eta squared with one hypothesis df is 1 - Wilks' lambda
        # (Cohen 1988, from memory), which equals F df1 / (F df1 + df2).
        np.testing.assert_allclose(res.effect_size[j], 1 - wilks, rtol=1e-10, atol=0)


def test_joint_within_subject_f_with_group_design_matches_manova():
    # One group contrast (group y - x) of two subject contrasts, with a covariate: the MANOVA
    # test of the group term (one hypothesis df, so Wilks' F is exact).
    rng = np.random.default_rng(3109)
    n, k, n_points = 20, 2, 10
    frame0 = pd.DataFrame({"group": np.array(["x", "y"])[np.arange(n) % 2],
                           "age": rng.integers(20, 60, n).astype(float)})
    G = np.column_stack([np.ones(n), frame0["group"] == "y", frame0["age"]]).astype(float)
    Y = rng.standard_normal((n, k, n_points)) + 0.5 * G[:, 1, None, None]
    res = glmeeg.group_test(Y, G, np.array([[0.0, 1.0, 0.0]]))
    assert res.df == (2.0, n - 3.0 - 2 + 1)
    for j in range(n_points):
        frame = frame0.assign(a=Y[:, 0, j], b=Y[:, 1, j])
        _, F, df1, df2, p = _manova_row(frame, "a + b ~ group + age", "group")  # statsmodels MANOVA
        assert (df1, df2) == res.df
        # Same tolerance and reason as the one-sample MANOVA check.
        np.testing.assert_allclose(res.statistic[j], F, rtol=1e-10, atol=0)
        np.testing.assert_allclose(res.p[j], p, rtol=1e-10, atol=0)


# ---------------------------------------------------------------------------------------------
# End to end: design file -> run_analysis, against statsmodels fits of the same study
# ---------------------------------------------------------------------------------------------

E2E_TESTS = """\
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"

[[test]]
name = "group-b"
subject_contrast = "condition[T.b]"
group_formula = "group + age"
group_contrast = "group[T.y]"
correction = "fdr"

[[test]]
name = "condition-joint"
subject_contrast = ["condition[T.b]", "condition[T.c]"]
correction = "fdr"
"""


@pytest.fixture(scope="module")
def e2e(tmp_path_factory):
    """A small study, its glmeeg run, and statsmodels subject-level betas at every point."""
    root = tmp_path_factory.mktemp("e2e") / "study"
    design = write_study(root, n_subjects=10, n_trials=30, n_channels=4, n_times=8, seed=3110,
                         tests=E2E_TESTS, effect=0.8)
    plan = glmeeg.plan_analysis(design)
    estimates = glmeeg.fit_subjects(plan)
    run = glmeeg.run_analysis(plan)
    trials = pd.read_csv(root / "trials.csv", dtype={"subject": str})
    subjects = pd.read_csv(root / "subjects.csv", dtype={"subject": str}).set_index("subject")
    ids = list(estimates.subjects)
    n_points = plan.study.axes.n_points
    betas = {name: np.empty((len(ids), n_points)) for name in ("condition[T.b]", "condition[T.c]")}
    for i, s in enumerate(ids):
        rows = trials[trials["subject"] == s]
        epochs = np.load(root / "epochs" / f"{s}.npy")
        Y = epochs[rows["epoch"].to_numpy()].reshape(len(rows), -1).astype(np.float64)
        for j in range(n_points):
            # statsmodels OLS via the formula API on the trials table, one fit per subject and
            # point; treatment coding with reference level a, as in the design file.
            fit = smf.ols("y ~ condition + intensity", data=rows.assign(y=Y[:, j])).fit()
            for name in betas:
                betas[name][i, j] = fit.params[name]
    return {"run": run, "estimates": estimates, "betas": betas, "subjects": subjects.loc[ids],
            "n_points": n_points}


def test_e2e_subject_contrast_estimates_match_statsmodels(e2e):
    est = e2e["estimates"]
    glm_b = est.estimates[:, est.rows["b-vs-a"], :][:, 0, :]
    joint = est.estimates[:, est.rows["condition-joint"], :]
    # rtol 1e-10: the task's target (float32 epochs, both fits in float64); atol 1e-13 for
    # estimates that happen to lie near 0, where only the absolute error (~1e-16) is meaningful.
    np.testing.assert_allclose(glm_b, e2e["betas"]["condition[T.b]"], rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(joint[:, 0], e2e["betas"]["condition[T.b]"], rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(joint[:, 1], e2e["betas"]["condition[T.c]"], rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("name, formula, term", [("b-vs-a", "e ~ 1", "Intercept"),
                                                 ("group-b", "e ~ group + age", "group[T.y]")])
def test_e2e_group_t_matches_statsmodels(e2e, name, formula, term):
    result = e2e["run"].test(name)
    assert result.kind == "t" and list(result.subjects) == list(e2e["subjects"].index)
    b = e2e["betas"]["condition[T.b]"]
    for j in range(e2e["n_points"]):
        data = e2e["subjects"].assign(e=b[:, j])
        tt = smf.ols(formula, data=data).fit().t_test(f"{term} = 0")  # statsmodels OLS t_test
        assert tt.df_denom == result.df[1]
        # rtol 1e-10: the task's target; atol 1e-12 for t and estimates near 0 (their absolute
        # error is ~1e-14 after two levels of fitting).
        np.testing.assert_allclose(result.estimate[0, j], tt.effect[0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(result.statistic[j], tt.tvalue[0, 0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(result.p[j], tt.pvalue, rtol=1e-10, atol=0)


def test_e2e_joint_f_matches_manova_of_statsmodels_betas(e2e):
    result = e2e["run"].test("condition-joint")
    assert result.kind == "F" and result.df == (2.0, 8.0)
    for j in range(e2e["n_points"]):
        frame = pd.DataFrame({"b": e2e["betas"]["condition[T.b]"][:, j],
                              "c": e2e["betas"]["condition[T.c]"][:, j]})
        _, F, df1, df2, p = _manova_row(frame, "b + c ~ 1", "Intercept")  # statsmodels MANOVA
        assert (df1, df2) == result.df
        # rtol 1e-10: the task's target (see the MANOVA checks above).
        np.testing.assert_allclose(result.statistic[j], F, rtol=1e-10, atol=0)
        np.testing.assert_allclose(result.p[j], p, rtol=1e-10, atol=0)


@pytest.mark.parametrize("shape", [(12, 5000), (12, 2, 5000)])
def test_chunks_of_points_give_the_same_maps(shape):
    """group_test_in_chunks on 1,024-point chunks (a tiny budget) equals one group_test call:
    every statistic is pointwise, so chunking changes nothing (bit for bit)."""
    from glmeeg.group_level import group_test_in_chunks

    rng = np.random.default_rng(8)
    Y = rng.standard_normal(shape) + 0.3
    G = np.column_stack([np.ones(12), rng.normal(size=12)])
    L = np.array([[1.0, 0.0]])
    whole = glmeeg.group_test(Y, G, L)
    chunked = group_test_in_chunks(Y, G, L, memory_limit=1)
    for f in ("estimate", "standard_error", "statistic", "p", "effect_size", "effect_size_corrected",
              "effect_size_low", "effect_size_high"):
        a, b = getattr(whole, f), getattr(chunked, f)
        assert a.shape == b.shape
        np.testing.assert_array_equal(a, b, err_msg=f)
    assert chunked.df == whole.df and chunked.kind == whole.kind
