"""Trimmed-mean (Tukey-McLaughlin, Yuen) and Welch group tests against scipy and statsmodels."""

import numpy as np
import pytest
import scipy.stats
from statsmodels.stats.robust_compare import TrimmedMean
from typer.testing import CliRunner

import glmeeg
from glmeeg.testing import write_study
from glmeeg.cli import app
from glmeeg.errors import ModelError
from glmeeg.group_level.robust import trimmed_test, welch_test, winsorized_normal_sd

RNG_SEED = 17


@pytest.fixture
def data():
    rng = np.random.default_rng(RNG_SEED)
    y = rng.standard_t(3, size=(21, 8)) + 0.4   # heavy tails: where trimming matters
    groups = np.r_[np.ones(9), np.zeros(12)]
    return y, groups


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_one_sample_trimmed_t_equals_statsmodels(data, alternative):
    y, _ = data
    res = trimmed_test(y, np.ones((21, 1)), [[1.0]], trim=0.2, alternative=alternative)
    for j in range(y.shape[1]):
        # statsmodels TrimmedMean(x, 0.2).ttest_mean(): (t, p, df), Tukey-McLaughlin trimmed t.
        t, p, df = TrimmedMean(y[:, j], 0.2).ttest_mean(alternative={"two-sided": "two-sided",
                                                                      "greater": "larger",
                                                                      "less": "smaller"}[alternative])
        assert res.statistic[j] == pytest.approx(t, rel=1e-12)
        assert res.p[j] == pytest.approx(p, rel=1e-10)
        assert res.df[1] == df


@pytest.mark.parametrize("trim", [0.1, 0.2, 0.25])
def test_yuen_equals_scipy_trimmed_ttest_ind(data, trim):
    y, g = data
    G = np.column_stack([np.ones(21), g])
    res = trimmed_test(y, G, [[0.0, 1.0]], trim=trim)
    # scipy.stats.ttest_ind(trim=..., equal_var=False) is Yuen's (1974) trimmed t.
    ref = scipy.stats.ttest_ind(y[g == 1], y[g == 0], trim=trim, equal_var=False)
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=1e-12)
    np.testing.assert_allclose(res.p, ref.pvalue, rtol=1e-10)


def test_welch_equals_scipy(data):
    y, g = data
    G = np.column_stack([np.ones(21), g])
    res = welch_test(y, G, [[0.0, -1.0]], alternative="greater")
    # scipy.stats.ttest_ind(equal_var=False): Welch (1947); contrast -1 compares group 0 - group 1.
    ref = scipy.stats.ttest_ind(y[g == 0], y[g == 1], equal_var=False, alternative="greater")
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=1e-12)
    np.testing.assert_allclose(res.p, ref.pvalue, rtol=1e-10)


def test_winsorized_normal_sd_constant():
    # 0.642 for 20 % trimming (Algina, Keselman & Penfield 2005; three decimals as published).
    assert winsorized_normal_sd(0.2) == pytest.approx(0.642, abs=5e-4)
    assert winsorized_normal_sd(0.0) == 1.0


def test_unsupported_layouts_are_refused():
    G = np.column_stack([np.ones(10), np.arange(10.0)])
    with pytest.raises(ModelError, match="one-sample group model"):
        trimmed_test(np.zeros((10, 3)), G, [[0.0, 1.0]])
    with pytest.raises(ModelError, match="two groups"):
        welch_test(np.zeros((10, 3)), np.ones((10, 1)), [[1.0]])


def test_through_the_design_file(tmp_path):
    tests = '''
[[test]]
name = "yuen"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
group_method = "trimmed"
'''
    design = write_study(tmp_path / "s", n_subjects=14, seed=4, tests=tests)
    run = glmeeg.run_analysis(design)
    t = run.test("yuen")
    assert t.effect_size_low is None and "trimmed means" in str(t)
    # With a permutation correction the two groups are permuted (a one-line error for
    # sign-flipping; tests/test_group_robust_permutation.py has the rest).
    tfce = design.read_text().replace('group_method = "trimmed"', 'group_method = "trimmed"\ncorrection = "tfce"')
    design.write_text(tfce)
    result = CliRunner().invoke(app, ["check", str(design)])
    assert result.exit_code == 0, result.output
    design.write_text(tfce.replace('correction = "tfce"', 'correction = "tfce"\nresampling = "sign-flip"'))
    result = CliRunner().invoke(app, ["check", str(design)])
    assert result.exit_code == 2 and "resampling 'sign-flip' does not suit" in result.stderr
