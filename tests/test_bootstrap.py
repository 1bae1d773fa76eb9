"""Bootstrap intervals against scipy.stats.bootstrap (within Monte-Carlo error) and via the pipeline."""

import numpy as np
import pytest
import scipy.stats

import glmeeg
from glmeeg.testing import write_study
from glmeeg.group_level.bootstrap import bootstrap_interval


@pytest.mark.parametrize(("method", "scipy_method"), [("percentile", "percentile"), ("bca", "BCa")])
def test_one_sample_interval_agrees_with_scipy_bootstrap(method, scipy_method):
    rng = np.random.default_rng(21)
    y = rng.exponential(size=(25, 3)) - 0.7   # skewed: where BCa and percentile differ
    ours = bootstrap_interval(y, n_resamples=9999, method=method, seed=1)
    for j in range(3):
        ref = scipy.stats.bootstrap((y[:, j],), np.mean, n_resamples=9999, method=scipy_method,
                                    random_state=2).confidence_interval
        width = ref.high - ref.low
        # Two independent 9,999-resample runs: endpoints differ by Monte-Carlo error, a few % of
        # the width (SE of a 2.5 % quantile ~ sqrt(.025 * .975 / 9999) / density); 8 % is loose.
        assert ours.low[j] == pytest.approx(ref.low, abs=0.08 * width)
        assert ours.high[j] == pytest.approx(ref.high, abs=0.08 * width)


def test_two_group_interval_agrees_with_scipy_bootstrap():
    rng = np.random.default_rng(22)
    y = rng.normal(size=(24, 2))
    y[:10] += 0.8
    groups = np.r_[np.ones(10, bool), np.zeros(14, bool)]
    ours = bootstrap_interval(y, groups=groups, n_resamples=9999, method="percentile", seed=3)
    ref = scipy.stats.bootstrap((y[groups, 0], y[~groups, 0]), lambda a, b: a.mean() - b.mean(),
                                n_resamples=9999, method="percentile", random_state=4).confidence_interval
    width = ref.high - ref.low
    assert ours.low[0] == pytest.approx(ref.low, abs=0.08 * width)
    assert ours.high[0] == pytest.approx(ref.high, abs=0.08 * width)


def test_same_seed_same_interval_and_points_are_independent_of_blocks():
    rng = np.random.default_rng(23)
    y = rng.normal(size=(15, 40))
    a = bootstrap_interval(y, n_resamples=500, seed=7)
    b = bootstrap_interval(y, n_resamples=500, seed=7)
    np.testing.assert_array_equal(a.low, b.low)
    c = bootstrap_interval(y[:, 10:20], n_resamples=500, seed=7)
    np.testing.assert_array_equal(c.high, a.high[10:20])


def test_bootstrap_through_the_design_file(tmp_path):
    tests = '''
[[test]]
name = "b-vs-a"
subject_contrast = "condition[T.b]"
correction = "holm"
bootstrap = 500
seed = 5
'''
    design = write_study(tmp_path / "s", n_subjects=12, seed=6, effect=1.0, tests=tests)
    t = glmeeg.run_analysis(design).test("b-vs-a")
    frame = t.to_frame()
    assert {"estimate_low", "estimate_high"} <= set(frame.columns)
    assert (frame["estimate_low"] <= frame["estimate"]).all() and (frame["estimate"] <= frame["estimate_high"]).all()


def test_each_significant_cluster_gets_a_bootstrap_interval_of_its_average(tmp_path):
    tests = '''
[[test]]
name = "cl"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 200
bootstrap = 9999
bootstrap_method = "percentile"
seed = 4
'''
    design = write_study(tmp_path / "s", effect=1.5, seed=3, n_subjects=14, n_channels=8,
                         n_times=20, tests=tests)
    plan = glmeeg.plan_analysis(design)
    t = glmeeg.run_analysis(plan).test("cl")
    sig = [c for c in t.clusters if c.significant]
    assert sig and all(c.estimate_low is None for c in t.clusters if not c.significant)
    est = glmeeg.fit_subjects(plan).estimates[:, 0, :]
    for c in sig:
        avg = est[:, t.cluster == c.id].mean(axis=1)
        assert c.estimate == pytest.approx(avg.mean(), rel=1e-12)
        # Source: scipy.stats.bootstrap on the subjects' cluster averages; independent
        # 9,999-resample runs agree within Monte-Carlo error (8 % of the width, as above).
        ref = scipy.stats.bootstrap((avg,), np.mean, n_resamples=9999, method="percentile",
                                    random_state=8).confidence_interval
        width = ref.high - ref.low
        assert c.estimate_low == pytest.approx(ref.low, abs=0.08 * width)
        assert c.estimate_high == pytest.approx(ref.high, abs=0.08 * width)
    frame = t.clusters_frame()
    assert {"estimate", "estimate_low", "estimate_high"} <= set(frame.columns)
    assert "bootstrap" in str(t)
