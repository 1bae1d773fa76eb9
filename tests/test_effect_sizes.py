"""Effect-size intervals against a direct inversion of the noncentral t and F CDFs with scipy."""

import numpy as np
import pytest
import scipy.optimize
import scipy.stats

import glmeeg
from glmeeg.group_level.effect_sizes import noncentrality_interval_f, noncentrality_interval_t, size_label


def _invert(cdf, target, lo, hi):
    # scipy.optimize.brentq on the scalar CDF: the direct inversion the vectorized solver must match.
    return scipy.optimize.brentq(lambda x: cdf(x) - target, lo, hi, xtol=1e-13, rtol=1e-14)


@pytest.mark.parametrize("df", [9, 27, 60])
def test_t_interval_matches_scipy_inversion(df):
    rng = np.random.default_rng(11)
    t = np.concatenate([[0.0, 2.5, -3.0, 8.0], rng.normal(0, 3, 20)])
    lo, hi = noncentrality_interval_t(t, df, confidence=0.95)
    for i, x in enumerate(t):
        cdf = lambda d: scipy.stats.nct.cdf(x, df, d)  # noqa: E731
        # Noncentral t limits (Steiger & Fouladi 1997): P(T <= t | lo) = .975, P(T <= t | hi) = .025.
        ref_lo = _invert(cdf, 0.975, x - 6, x + 6)
        ref_hi = _invert(cdf, 0.025, x - 6, x + 6)
        # Both solvers converge to ~1e-13; the CDF itself is accurate to ~1e-12 (scipy).
        assert lo[i] == pytest.approx(ref_lo, abs=1e-9)
        assert hi[i] == pytest.approx(ref_hi, abs=1e-9)


def test_t_interval_is_symmetric_at_zero_and_keeps_nan():
    lo, hi = noncentrality_interval_t(np.array([0.0, np.nan]), 15)
    # At t = 0 the noncentral t family is symmetric in the noncentrality (closed form).
    assert lo[0] == pytest.approx(-hi[0], abs=1e-12)
    assert np.isnan(lo[1]) and np.isnan(hi[1])


@pytest.mark.parametrize(("df1", "df2"), [(1, 20), (2, 26), (3, 40)])
def test_f_interval_matches_scipy_inversion(df1, df2):
    f = np.array([0.05, 1.0, 3.5, 6.0, 15.0])
    lo, hi = noncentrality_interval_f(f, df1, df2)
    for i, x in enumerate(f):
        cdf = lambda lam: scipy.stats.ncf.cdf(x, df1, df2, lam)  # noqa: E731
        central = scipy.stats.f.cdf(x, df1, df2)
        # Limits truncated at 0 when lambda = 0 already puts the observed F in the tail (Steiger 2004).
        ref_lo = 0.0 if central <= 0.975 else _invert(cdf, 0.975, 1e-12, 400)
        ref_hi = 0.0 if central <= 0.025 else _invert(cdf, 0.025, 1e-12, 400)
        assert lo[i] == pytest.approx(ref_lo, abs=1e-8)
        assert hi[i] == pytest.approx(ref_hi, abs=1e-8)


def test_group_test_dz_interval_is_the_noncentrality_interval_over_sqrt_n():
    rng = np.random.default_rng(5)
    y = rng.normal(0.5, 1.0, size=(18, 3))
    res = glmeeg.group_test(y, np.ones((18, 1)), [[1.0]], confidence_level=0.9)
    t = scipy.stats.ttest_1samp(y, 0).statistic
    for j in range(3):
        cdf = lambda d: scipy.stats.nct.cdf(t[j], 17, d)  # noqa: E731
        # dz = t / sqrt(n), so its interval is the noncentrality interval / sqrt(n) (Cumming & Finch 2001).
        assert res.effect_size_low[j] == pytest.approx(_invert(cdf, 0.95, -10, 10) / np.sqrt(18), abs=1e-9)
        assert res.effect_size_high[j] == pytest.approx(_invert(cdf, 0.05, -10, 10) / np.sqrt(18), abs=1e-9)
        assert res.effect_size_low[j] < res.effect_size[j] < res.effect_size_high[j]


def test_partial_eta_squared_interval_maps_lambda():
    rng = np.random.default_rng(6)
    y = rng.normal(0.4, 1.0, size=(20, 2, 4))
    res = glmeeg.group_test(y, np.ones((20, 1)), [[1.0]])
    lam_lo, lam_hi = noncentrality_interval_f(res.statistic, *res.df)
    total = res.df[0] + res.df[1] + 1
    # Partial eta squared from lambda: lambda / (lambda + df1 + df2 + 1) (Steiger 2004).
    np.testing.assert_allclose(res.effect_size_low, lam_lo / (lam_lo + total), rtol=1e-12)
    np.testing.assert_allclose(res.effect_size_high, lam_hi / (lam_hi + total), rtol=1e-12)


def test_size_labels_follow_cohens_conventions():
    # 0.2 / 0.5 / 0.8: small / medium / large (Cohen 1988; common practice).
    assert size_label(np.array([0.1, -0.2, 0.49, 0.5, -0.79, 0.8, np.nan])).tolist() == [
        "negligible", "small", "small", "medium", "medium", "large", ""]


def test_cluster_effect_size_is_the_test_of_the_cluster_average(tmp_path):
    from glmeeg.testing import write_study

    tests = '''
[[test]]
name = "cl"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 200
'''
    design = write_study(tmp_path / "s", effect=1.5, seed=3, n_subjects=14, n_channels=8,
                         n_times=20, tests=tests)
    plan = glmeeg.plan_analysis(design)
    run = glmeeg.run_analysis(plan)
    t = run.test("cl")
    sig = [c for c in t.clusters if c.significant]
    assert sig
    est = glmeeg.fit_subjects(plan).estimates[:, 0, :]
    for c in sig:
        avg = est[:, t.cluster == c.id].mean(axis=1)
        # dz of the cluster average: mean / SD (Cohen 1988) with the noncentral-t interval.
        assert c.effect_size == pytest.approx(avg.mean() / avg.std(ddof=1), rel=1e-10)
        lo, hi = noncentrality_interval_t(np.array([scipy.stats.ttest_1samp(avg, 0).statistic]), 13)
        assert c.effect_size_low == pytest.approx(lo[0] / np.sqrt(14), rel=1e-8)
        assert c.effect_size_high == pytest.approx(hi[0] / np.sqrt(14), rel=1e-8)
