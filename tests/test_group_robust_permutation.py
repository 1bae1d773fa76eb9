"""Robust group tests (trimmed t, Yuen, Welch) with the permutation corrections.

Outside sources are named beside each check: ``scipy.stats.permutation_test`` by exact
enumeration, with scipy's own statistics (``scipy.stats.ttest_ind(..., trim=, equal_var=False)``
for Yuen, ``equal_var=False`` for Welch, ``scipy.stats.trim_mean`` with the winsorized SE of
``scipy.stats.mstats.winsorize`` for the one-sample trimmed t); the planted effect of the
glmeeg.testing study; scipy's t quantile for the cluster-forming threshold.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from typer.testing import CliRunner

import glmeeg
from glmeeg.testing import write_study
from glmeeg.cli import app
from glmeeg.errors import ModelError
from glmeeg.group_level.robust import trimmed_test, welch_test
from glmeeg.inference import permutation as perm
from glmeeg.inference import robust_resampling as rr
from glmeeg.inference.corrections import TFCE, ClusterMass, MaxStatistic
from glmeeg.inference.graph import graph_arrays, points_graph
from glmeeg.inference.permutation import permutation_test

CORRECTIONS = {"max": MaxStatistic, "cluster": ClusterMass, "tfce": TFCE}


def chain_graph(n_channels: int, n_times: int):
    s = np.zeros((n_channels, n_channels))
    i = np.arange(n_channels - 1)
    s[i, i + 1] = s[i + 1, i] = 1
    return graph_arrays(points_graph(s, (n_channels, n_times)))


def identity(scheme: str, n: int) -> np.ndarray:
    return (np.ones((1, n), dtype=np.int8) if scheme == "sign-flip"
            else np.arange(n, dtype=np.int32)[None, :])


# --- the engines' statistic at the identity is the parametric test's ---------------------------

def _identity_cases():
    n = 21
    g = np.r_[np.ones(9), np.zeros(12)]
    ones = np.ones(n)
    return {
        "one sample": (ones[:, None], [[1.0]]),
        "one sample, negative contrast": (ones[:, None], [[-2.0]]),
        "two groups": (np.column_stack([ones, g]), [[0.0, 1.0]]),
        "two groups, reversed": (np.column_stack([ones, g]), [[0.0, -1.0]]),
        # Indicator coded -1 / +1 (the +1 group first) and the first-listed group the smaller.
        "two groups, +-1 coding": (np.column_stack([ones, 2 * g[::-1] - 1]), [[0.0, 0.5]]),
    }


@pytest.mark.parametrize(("method", "case", "trim"),
                         [("trimmed", c, t) for c in _identity_cases() for t in (0.1, 0.2, 0.25)]
                         + [("welch", c, 0.2) for c in _identity_cases() if "two groups" in c])
def test_statistic_at_the_identity_equals_the_parametric_test(method, case, trim):
    G, L = _identity_cases()[case]
    rng = np.random.default_rng(23)
    # Heavy tails (where trimming matters) and effects of several sizes; two groups get a common
    # offset too (which the statistic ignores and the arithmetic must not mind).
    Y = rng.standard_t(3, size=(21, 40))
    if G.shape[1] == 1:
        Y += np.linspace(-1.0, 1.5, 40)
    else:
        Y += 3.0
        Y[G[:, 1] == G[:, 1].max()] += np.linspace(-1.5, 2.5, 40)
    scheme = perm.choose_resampling(G, np.asarray(L))
    engine = perm._robust_engine(Y[:, None, :], G, np.asarray(L), scheme, kind="t", method=method,
                                 trim=trim)
    got = engine.statistics(identity(scheme, 21))[0]
    ref = (trimmed_test(Y, G, L, trim=trim) if method == "trimmed" else welch_test(Y, G, L)).statistic
    # Same formulas, sums taken in another order (and Welch's means of centred data): rounding
    # only; atol for statistics near 0, where a difference of means has lost digits.
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-13)
    assert np.abs(ref).max() > 2 and np.abs(ref).min() < 0.5   # the check spans small and large t


def test_non_finite_points_give_nan_and_leave_the_others_alone():
    rng = np.random.default_rng(3)
    Y = rng.standard_normal((12, 5))
    Y[4, 2] = np.nan
    g = np.repeat([0.0, 1.0], 6)
    for G, L, method in ((np.ones((12, 1)), [[1.0]], "trimmed"),
                         (np.column_stack([np.ones(12), g]), [[0.0, 1.0]], "trimmed"),
                         (np.column_stack([np.ones(12), g]), [[0.0, 1.0]], "welch")):
        scheme = perm.choose_resampling(G, np.asarray(L))
        engine = perm._robust_engine(Y[:, None, :], G, np.asarray(L), scheme, kind="t", method=method,
                                     trim=0.2)
        got = engine.statistics(identity(scheme, 12))[0]
        ref = (trimmed_test if method == "trimmed" else welch_test)(np.delete(Y, 2, axis=1), G, L).statistic
        assert np.isnan(got[2])
        np.testing.assert_allclose(np.delete(got, 2), ref, rtol=1e-12)


# --- exhaustive enumeration against scipy.stats.permutation_test -------------------------------

def trimmed_one_sample_t(x, axis=-1, trim=0.2):
    # Tukey-McLaughlin: trimmed mean over the winsorized SD / ((1 - 2 trim) sqrt(n)); scipy's
    # trim_mean and mstats.winsorize cut floor(trim * n) values per tail (trim * n is an integer
    # here).
    n = x.shape[axis]
    w = scipy.stats.mstats.winsorize(x, limits=(trim, trim), axis=axis)
    se = np.asarray(w.std(axis=axis, ddof=1)) / ((1 - 2 * trim) * math.sqrt(n))
    return scipy.stats.trim_mean(x, trim, axis=axis) / se


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_exhaustive_sign_flips_of_the_trimmed_t_equal_scipy(alternative):
    rng = np.random.default_rng(41)
    n, P = 10, 4
    Y = rng.standard_t(4, size=(n, P)) + np.array([0.0, 0.5, 1.5, -1.5])
    res = permutation_test(Y, np.ones((n, 1)), [[1.0]], kind="t", df=(1.0, n - 5.0), method="trimmed",
                           trim=0.2, alternative=alternative, correction=MaxStatistic(permutations=2**n))
    assert res.exhaustive and res.n_resamplings == 2**n and res.scheme == "sign-flip"
    for p in range(P):
        # scipy: one sample with permutation_type="samples" flips the signs of the observations;
        # n_resamples=inf enumerates all 2^10 sign vectors, p = b / N. Two-sided through |t| and
        # "greater" (our definition; scipy doubles the smaller one-sided p).
        stat, alt = ((lambda x, axis: np.abs(trimmed_one_sample_t(x, axis)), "greater")
                     if alternative == "two-sided" else (trimmed_one_sample_t, alternative))
        ref = scipy.stats.permutation_test((Y[:, p],), stat, permutation_type="samples",
                                           n_resamples=np.inf, alternative=alt, vectorized=True)
        # Counts over the same 1024 resamplings divided by 1024: identical numbers.
        assert res.p_uncorrected[p] == ref.pvalue, (p, res.p_uncorrected[p], ref.pvalue)
    assert res.p_uncorrected.min() < 0.05 and res.p_uncorrected.max() > 0.2


@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
@pytest.mark.parametrize(("method", "g", "trim"), [
    ("trimmed", [0, 1, 1, 0, 1, 0, 0, 1], 0.25),   # 4 + 4, one value trimmed per tail
    ("trimmed", [1, 0, 0, 1, 0, 1, 0, 0], 0.2),    # 3 + 5: none trimmed in the 3, one in the 5
    ("welch", [0, 1, 1, 0, 1, 0, 0, 1], None),
    ("welch", [1, 0, 0, 1, 0, 1, 0, 0], None),
])
def test_exhaustive_permutations_of_yuen_and_welch_equal_scipy(method, g, trim, alternative):
    rng = np.random.default_rng(12)
    g = np.asarray(g, dtype=float)
    P = 3
    # Unequal spreads (SD 2 in the first group) and effects 0, +4, -4.
    Y = rng.standard_normal((8, P)) * (1 + g[:, None]) + np.outer(g, [0.0, 4.0, -4.0])
    G = np.column_stack([np.ones(8), g])
    res = permutation_test(Y, G, [[0.0, 1.0]], kind="t", df=(1.0, 5.0), alternative=alternative,
                           method=method, trim=0.2 if trim is None else trim,
                           correction=MaxStatistic(permutations=math.factorial(8)))
    assert res.scheme == "permute" and res.exhaustive and res.n_resamplings == math.factorial(8)
    extra = {} if trim is None else {"trim": trim}

    def t_diff(a, b, axis=-1):
        # scipy.stats.ttest_ind(equal_var=False): Welch (1947); with trim=: Yuen (1974).
        return scipy.stats.ttest_ind(a, b, axis=axis, equal_var=False, **extra).statistic

    for p in range(P):
        # scipy enumerates the C(8, n1) partitions; each is n1! n2! of our 8! orders, so both p
        # are (same count) / C(8, n1) exactly.
        stat, alt = ((lambda a, b, axis: np.abs(t_diff(a, b, axis)), "greater")
                     if alternative == "two-sided" else (t_diff, alternative))
        ref = scipy.stats.permutation_test((Y[g == 1, p], Y[g == 0, p]), stat,
                                           permutation_type="independent", n_resamples=np.inf,
                                           alternative=alt, vectorized=True)
        assert res.p_uncorrected[p] == pytest.approx(ref.pvalue, rel=1e-12, abs=0), (p, res.p_uncorrected[p], ref.pvalue)
    assert res.p_uncorrected.min() <= 0.15   # a small p is among those compared


def test_random_resamplings_give_phipson_smyth_p_of_the_trimmed_t():
    rng = np.random.default_rng(7)
    n, m, seed = 14, 999, 4321
    x = rng.standard_t(3, size=n) + 0.6
    res = permutation_test(x[:, None], np.ones((n, 1)), [[1.0]], kind="t", df=(1.0, 7.0),
                           method="trimmed", correction=MaxStatistic(permutations=m, seed=seed))
    assert not res.exhaustive and res.n_resamplings == m
    signs, _ = perm.resamplings("sign-flip", n, permutations=m, seed=seed)
    # Our draws, scipy's statistic; Phipson & Smyth (2010): p = (b + 1) / (m + 1).
    observed_t = abs(trimmed_one_sample_t(x, axis=-1, trim=0.2))
    t_null = np.abs(trimmed_one_sample_t(signs * x[None, :], axis=-1, trim=0.2))
    b = int(np.sum(t_null >= observed_t * (1 - 1e-12)))
    assert res.p_uncorrected[0] == (b + 1) / (m + 1)
    assert 0.001 < res.p_uncorrected[0] < 0.5


# --- batch independence ---------------------------------------------------------------------------

def _batch_case(method: str, layout: str, rng):
    n, C, T = 12, 3, 10
    Y = rng.standard_t(4, size=(n, C * T))
    Y[:, 4:8] += 0.9
    if layout == "one sample":
        return Y, np.ones((n, 1)), np.array([[1.0]])
    g = np.repeat([0.0, 1.0], n // 2)
    Y[g == 1] += 0.6
    Y[g == 1] *= 2.0
    return Y, np.column_stack([np.ones(n), g]), np.array([[0.0, -1.0]])


@pytest.mark.parametrize(("method", "layout", "engine"), [
    ("trimmed", "one sample", rr.TrimmedSignFlipEngine),
    ("trimmed", "two groups", rr.YuenPermutationEngine),
    ("welch", "two groups", rr.WelchPermutationEngine),
])
@pytest.mark.parametrize("correction", ["max", "cluster", "tfce"])
def test_results_are_bitwise_identical_for_any_batch_size(method, layout, engine, correction, monkeypatch):
    Y, G, L = _batch_case(method, layout, np.random.default_rng(31))
    P = Y.shape[1]
    graph = chain_graph(3, 10)
    df = (trimmed_test(Y, G, L) if method == "trimmed" else welch_test(Y, G, L)).df
    seen = []
    original = engine.statistics

    def spy(self, rows):
        seen.append(rows.shape[0])
        return original(self, rows)

    monkeypatch.setattr(engine, "statistics", spy)
    results = {}
    for batch in (1, 7, 1000):
        seen.clear()
        # permutation_test's rule: batch = memory_limit // engine.bytes_per_map (P * 8 * 4 here).
        results[batch] = permutation_test(Y, G, L, kind="t", df=df, method=method, graph=graph,
                                          correction=CORRECTIONS[correction](permutations=150, seed=8),
                                          memory_limit=batch * P * 8 * 4)
        assert max(seen[1:]) == min(batch, perm._MAX_BATCH, 150)  # seen[0]: the observed data alone
    ref = results[1]
    # 150 random resamplings: two seed blocks of BLOCK = 100, the second one partial.
    assert ref.n_resamplings == 150 and not ref.exhaustive
    assert ref.scheme == ("sign-flip" if layout == "one sample" else "permute")
    for batch in (7, 1000):
        r = results[batch]
        assert np.array_equal(r.null_distribution, ref.null_distribution)
        assert np.array_equal(r.p_corrected, ref.p_corrected, equal_nan=True)
        assert np.array_equal(r.p_uncorrected, ref.p_uncorrected, equal_nan=True)
        if correction == "tfce":
            assert np.array_equal(r.enhanced, ref.enhanced)
        if correction == "cluster":
            assert np.array_equal(r.cluster_labels, ref.cluster_labels)
    if correction == "cluster":
        assert ref.clusters, "the planted block should form at least one cluster"
        # Median df (what the parametric test reports) sets the two-sided p = 0.05 threshold.
        assert ref.threshold == pytest.approx(scipy.stats.t.isf(0.025, df[1]), rel=1e-12)


# --- API refusals ---------------------------------------------------------------------------------

def test_unsupported_requests_are_model_errors():
    rng = np.random.default_rng(0)
    Y = rng.standard_normal((10, 6))
    one, two = np.ones((10, 1)), np.column_stack([np.ones(10), np.repeat([0.0, 1.0], 5)])
    with pytest.raises(ModelError, match="resampling 'permute' cannot test"):
        permutation_test(Y, one, [[1.0]], kind="t", df=(1.0, 5.0), method="trimmed",
                         correction=MaxStatistic(resampling="permute"))
    with pytest.raises(ModelError, match="resampling 'sign-flip' does not suit"):
        permutation_test(Y, two, [[0.0, 1.0]], kind="t", df=(1.0, 7.0), method="welch",
                         correction=MaxStatistic(resampling="sign-flip"))
    with pytest.raises(ModelError, match="compares two groups"):
        permutation_test(Y, one, [[1.0]], kind="t", df=(1.0, 9.0), method="welch",
                         correction=MaxStatistic())
    with pytest.raises(ModelError, match="one subject contrast"):
        permutation_test(rng.standard_normal((10, 2, 6)), one, [[1.0]], kind="F", df=(2.0, 8.0),
                         method="trimmed", correction=MaxStatistic())
    with pytest.raises(ModelError, match="method must be one of"):
        permutation_test(Y, one, [[1.0]], kind="t", df=(1.0, 9.0), method="median",
                         correction=MaxStatistic())
    with pytest.raises(ModelError, match="leaves fewer than 2"):
        permutation_test(Y[:5], one[:5], [[1.0]], kind="t", df=(1.0, 1.0), method="trimmed", trim=0.45,
                         correction=MaxStatistic())


# --- through the design file ----------------------------------------------------------------------

PIPELINE_TESTS = """
[[test]]
name = "b-trimmed-tfce"
subject_contrast = "condition[T.b]"
group_method = "trimmed"
correction = "tfce"
permutations = 200
seed = 3

[[test]]
name = "b-yuen-cluster"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
group_method = "trimmed"
trim = 0.25
correction = "cluster"
permutations = 200
seed = 5

[[test]]
name = "b-welch-max"
subject_contrast = "condition[T.b]"
group_formula = "group"
group_contrast = "group[T.y]"
group_method = "welch"
correction = "max-statistic"
permutations = 200
seed = 6
"""


def invoke(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.mark.slow  # a run of six resampling tests
def test_design_file_runs_robust_tests_with_tfce_cluster_and_max(tmp_path):
    design = write_study(tmp_path / "study", n_subjects=12, n_trials=30, n_channels=8, n_times=8,
                         seed=4, effect=1.5, tests=PIPELINE_TESTS)
    out = tmp_path / "out"
    result = invoke("run", design, "--out", out, "-q")
    assert result.exit_code == 0, result.output

    folder = out / "b-trimmed-tfce"
    points = pd.read_csv(folder / "points.csv")
    summary = json.loads((folder / "summary.json").read_text())
    assert summary["resampling"]["scheme"] == "sign-flip" and summary["resampling"]["n_resamplings"] == 200
    assert "tfce" in points.columns
    # The planted effect (glmeeg.testing.write_study): condition b at Cz, samples 2-4; nothing elsewhere.
    assert points["significant"].any()
    assert set(points.loc[points["significant"], "channel"]) == {"Cz"}
    assert (np.sign(points["tfce"]) == np.sign(points["statistic"])).all()

    # In process, at full precision: the two-group tests against the functions they wrap.
    run = glmeeg.run_analysis(design)
    plan = glmeeg.plan_analysis(design)
    est = glmeeg.fit_subjects(plan)
    for test in plan.tests[1:]:
        idx = [est.subjects.index(s) for s in test.subjects]
        Y = est.estimates[idx][:, est.rows[test.spec.name], :][:, 0]
        G, L = test.group_matrix.matrix, test.group_contrast.matrix
        result = run.test(test.spec.name)
        assert result.resampling.scheme == "permute" and result.resampling.n_resamplings == 200
        stats = (trimmed_test(Y, G, L, trim=0.25) if test.spec.group_method == "trimmed"
                 else welch_test(Y, G, L))
        np.testing.assert_array_equal(result.statistic, stats.statistic)
        # The same call outside the pipeline gives the same p (the pipeline hands it the method).
        direct = permutation_test(Y, G, L, kind="t", df=stats.df, method=test.spec.group_method,
                                  trim=0.25, correction=test.correction, graph=plan.graph)
        np.testing.assert_array_equal(result.p_corrected, direct.p_corrected)
        np.testing.assert_array_equal(result.p_permutation, direct.p_uncorrected)
        if test.spec.correction == "cluster":
            # Median Yuen df, parametric two-sided p = 0.05 (scipy's t quantile).
            assert result.resampling.cluster_threshold == pytest.approx(
                scipy.stats.t.isf(0.025, stats.df[1]), rel=1e-12)
        # The planted effect is the same in both groups: the difference is noise.
        assert (result.p_corrected > 0.05).mean() > 0.9


@pytest.mark.parametrize(("group", "method", "resampling", "fragment"), [
    ("", "trimmed", "permute", "resampling 'permute' cannot test this contrast"),
    ('group_formula = "group"\ngroup_contrast = "group[T.y]"', "trimmed", "sign-flip",
     "resampling 'sign-flip' does not suit this contrast"),
    ('group_formula = "group"\ngroup_contrast = "group[T.y]"', "welch", "sign-flip",
     "resampling 'sign-flip' does not suit this contrast"),
])
def test_bad_resampling_for_a_robust_test_is_one_line_exit_2(tmp_path, group, method, resampling, fragment):
    tests = f"""
[[test]]
name = "robust"
subject_contrast = "condition[T.b]"
{group}
group_method = "{method}"
correction = "tfce"
resampling = "{resampling}"
"""
    design = write_study(tmp_path / "s", n_subjects=10, tests=tests)
    result = invoke("run", design, "--out", tmp_path / "out")
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0] and "test 'robust'" in lines[0]
    assert "Traceback" not in result.output and not (tmp_path / "out").exists()
