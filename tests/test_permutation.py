"""Permutation inference: sign-flipping and Freedman-Lane p-values against scipy, batch
independence, the engine's statistic against group_test, the choice of scheme, seeded blocks,
the pipeline's cluster / TFCE outputs, bad settings on the command line and a planted effect.

Outside sources are named beside each check: ``scipy.stats.permutation_test`` and
``scipy.stats.ttest_1samp`` / ``ttest_ind`` (exact enumeration on small cases), Phipson &
Smyth (2010) for p = (b + 1) / (m + 1), Freedman & Lane (1983) and Winkler et al. (2014) for
what each scheme may resample, the binomial distribution for Monte-Carlo tolerances.
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
from glmeeg.results.findings import CLUSTER_CAUTION
from glmeeg.inference import permutation as perm
from glmeeg.inference.corrections import TFCE, ClusterMass, MaxStatistic
from glmeeg.inference.graph import graph_arrays, points_graph
from glmeeg.inference.permutation import choose_resampling, permutation_test, resamplings

CORRECTIONS = {"max": MaxStatistic, "cluster": ClusterMass, "tfce": TFCE}


def one_sample_t(x, axis=0):
    return scipy.stats.ttest_1samp(x, 0.0, axis=axis).statistic


def abs_one_sample_t(x, axis=0):
    return np.abs(one_sample_t(x, axis=axis))


def chain_graph(n_channels: int, n_times: int):
    """CSR arrays of a chain of channels x a path over time."""
    s = np.zeros((n_channels, n_channels))
    i = np.arange(n_channels - 1)
    s[i, i + 1] = s[i + 1, i] = 1
    return graph_arrays(points_graph(s, (n_channels, n_times)))


# --- sign-flipping against scipy ----------------------------------------------------------------

@pytest.mark.parametrize("alternative", ["two-sided", "greater", "less"])
def test_exhaustive_sign_flip_equals_scipy_permutation_test(alternative):
    rng = np.random.default_rng(101)
    n, P = 10, 4
    # Effects of several sizes, so that p-values range from small to large.
    Y = rng.standard_normal((n, P)) + np.array([0.0, 0.3, 0.8, -0.6])
    res = permutation_test(Y, np.ones((n, 1)), np.array([[1.0]]), kind="t", df=(1.0, n - 1.0),
                           alternative=alternative, correction=MaxStatistic(permutations=2**n))
    assert res.exhaustive and res.n_resamplings == 2**n and res.scheme == "sign-flip"
    for p in range(P):
        # scipy: with one sample and permutation_type="samples" the null distribution is formed by
        # changing the sign of each observation; n_resamples=inf enumerates all 2^n sign vectors
        # and p = b / N, the identity included.
        # scipy's alternative="two-sided" doubles the smaller one-sided p; ours counts resamplings
        # with |t*| >= |t|. Two-sided is therefore compared through the statistic |t| with
        # alternative="greater", which is our definition exactly (for a sign-flip null, being
        # symmetric, the two definitions happen to agree as well, apart from ties).
        if alternative == "two-sided":
            ref = scipy.stats.permutation_test((Y[:, p],), abs_one_sample_t, permutation_type="samples",
                                               n_resamples=np.inf, alternative="greater", vectorized=True)
        else:
            ref = scipy.stats.permutation_test((Y[:, p],), one_sample_t, permutation_type="samples",
                                               n_resamples=np.inf, alternative=alternative, vectorized=True)
        # Both are counts over the same 1024 resamplings divided by 1024: identical numbers.
        assert res.p_uncorrected[p] == ref.pvalue, (p, res.p_uncorrected[p], ref.pvalue)


def test_random_sign_flips_give_phipson_smyth_p():
    rng = np.random.default_rng(7)
    n, m = 14, 999                        # 2^14 = 16384 sign vectors > 999: random resamplings
    x = rng.standard_normal(n) + 0.45
    seed = 4321
    res = permutation_test(x[:, None], np.ones((n, 1)), np.array([[1.0]]), kind="t",
                           df=(1.0, n - 1.0), correction=MaxStatistic(permutations=m, seed=seed))
    assert not res.exhaustive and res.n_resamplings == m

    # Recompute b from our own draws, the t statistics coming from scipy.stats.ttest_1samp.
    signs, exhaustive = resamplings("sign-flip", n, permutations=m, seed=seed)
    assert not exhaustive and signs.shape == (m, n)
    observed_t = abs(one_sample_t(x))
    t_null = np.abs(one_sample_t(signs * x[None, :], axis=1))
    # A relative tie tolerance far below the spacing of distinct t values.
    b = int(np.sum(t_null >= observed_t * (1 - 1e-12)))
    # Phipson & Smyth (2010): the observed data count once among m + 1.
    assert res.p_uncorrected[0] == (b + 1) / (m + 1)
    # One point: the max-statistic p is the same.
    assert res.p_corrected[0] == res.p_uncorrected[0]

    # Loose Monte-Carlo check against scipy's own random resampling (its p is also
    # (b + 1) / (m + 1) with random sign vectors). The exact p over all 2^14 sign vectors
    # comes from scipy's exhaustive enumeration.
    exact = scipy.stats.permutation_test((x,), abs_one_sample_t, permutation_type="samples",
                                         n_resamples=np.inf, alternative="greater", vectorized=True).pvalue
    mc = scipy.stats.permutation_test((x,), abs_one_sample_t, permutation_type="samples",
                                      n_resamples=m, alternative="greater", vectorized=True,
                                      rng=np.random.default_rng(99)).pvalue
    # Each estimate has binomial SD sqrt(p (1 - p) / m) (plus a bias of at most 1 / (m + 1));
    # the difference of two independent ones has sqrt(2) times that. 4 SD: a false alarm about
    # once in 16,000 seeds.
    sd = math.sqrt(exact * (1 - exact) / m)
    assert 0.005 < exact < 0.5  # a p where the check means something
    assert abs(res.p_uncorrected[0] - exact) <= 4 * sd + 1 / (m + 1)
    assert abs(mc - exact) <= 4 * sd + 1 / (m + 1)
    assert abs(res.p_uncorrected[0] - mc) <= 4 * math.sqrt(2) * sd + 1 / (m + 1)


# --- Freedman-Lane --------------------------------------------------------------------------------

@pytest.mark.parametrize("alternative", ["two-sided", "greater"])
def test_freedman_lane_without_nuisance_is_the_two_sample_permutation_test(alternative):
    rng = np.random.default_rng(12)
    g = np.array([0, 1, 1, 0, 1, 0, 0, 1], dtype=float)     # 4 + 4 subjects, interleaved
    P = 3
    Y = rng.standard_normal((8, P)) + np.outer(g, [0.0, 1.0, 2.0])
    G = np.column_stack([np.ones(8), g])
    res = permutation_test(Y, G, np.array([[0.0, 1.0]]), kind="t", df=(1.0, 6.0),
                           alternative=alternative, correction=MaxStatistic(permutations=40320))
    # The nuisance space is the constant alone: subjects are permuted, all 8! orderings.
    assert res.scheme == "permute" and res.exhaustive and res.n_resamplings == math.factorial(8)
    for p in range(P):
        y1, y0 = Y[g == 1, p], Y[g == 0, p]

        def t_diff(a, b, axis=0):
            # t of mean(a) - mean(b) with pooled variance (our contrast on g).
            return scipy.stats.ttest_ind(a, b, axis=axis).statistic

        def abs_t_diff(a, b, axis=0):
            return np.abs(t_diff(a, b, axis=axis))

        # scipy enumerates the C(8, 4) = 70 partitions into two groups; each partition is
        # 4! * 4! = 576 of our 40,320 orderings, so both p are (same count) / 70 exactly.
        # Two-sided through |t| with "greater", as for sign-flips (scipy doubles the smaller
        # one-sided p by default).
        stat, alt = (abs_t_diff, "greater") if alternative == "two-sided" else (t_diff, alternative)
        ref = scipy.stats.permutation_test((y1, y0), stat, permutation_type="independent",
                                           n_resamples=np.inf, alternative=alt, vectorized=True)
        assert res.p_uncorrected[p] == ref.pvalue, (p, res.p_uncorrected[p], ref.pvalue)


def test_freedman_lane_with_a_covariate_is_close_to_the_parametric_p():
    rng = np.random.default_rng(5)
    n, P = 30, 8
    g = np.repeat([0.0, 1.0], n // 2)
    age = rng.normal(40, 10, n) + 5 * g            # a covariate correlated with the groups
    G = np.column_stack([np.ones(n), g, age])
    effect = np.linspace(0.0, 1.2, P)
    Y = 0.05 * age[:, None] + np.outer(g, effect) + rng.standard_normal((n, P))
    L = np.array([[0.0, 1.0, 0.0]])
    stats = glmeeg.group_test(Y, G, L)
    res = permutation_test(Y, G, L, kind="t", df=stats.df, correction=MaxStatistic(permutations=4999, seed=3))
    assert res.scheme == "permute" and not res.exhaustive
    # Freedman & Lane (1983); Winkler et al. (2014): with Gaussian errors the permutation p of the
    # t statistic is close to the parametric (Student t) p. Loose: Monte-Carlo SD at most
    # sqrt(0.25 / 4999) = 0.007, plus the method's own approximation with a nuisance covariate.
    np.testing.assert_allclose(res.p_uncorrected, stats.p, atol=0.03)
    assert stats.p.min() < 0.01 and stats.p.max() > 0.3  # the check spans small and large p


# --- batch independence ---------------------------------------------------------------------------

def _case(scheme: str, k: int, rng):
    n, C, T = 12, 3, 10
    P = C * T
    shape = (n, P) if k == 1 else (n, k, P)
    Y = rng.standard_normal(shape)
    Y[..., 4:8] += 0.8          # something to form clusters
    if scheme == "sign-flip":
        G, L = np.ones((n, 1)), np.array([[1.0]])
    else:
        g = np.repeat([0.0, 1.0], n // 2)
        G, L = np.column_stack([np.ones(n), g]), np.array([[0.0, 1.0]])
        Y[g == 1] += 0.5
    stats = glmeeg.group_test(Y, G, L)
    return Y, G, L, stats, chain_graph(C, T)


@pytest.mark.parametrize("k", [1, 2])
@pytest.mark.parametrize("scheme", ["sign-flip", "permute"])
@pytest.mark.parametrize("method", ["max", "cluster", "tfce"])
def test_results_are_bitwise_identical_for_any_batch_size(method, scheme, k, monkeypatch):
    Y, G, L, stats, graph = _case(scheme, k, np.random.default_rng(31))
    P = Y.shape[-1]
    q = G.shape[1]
    # scipy's tests check that p does not depend on `batch`; we demand the same bits.
    seen = []
    original = perm._Engine.statistics

    def spy(self, rows):
        seen.append(rows.shape[0])
        return original(self, rows)

    monkeypatch.setattr(perm._Engine, "statistics", spy)
    results = {}
    for batch in (1, 7, 1000):
        seen.clear()
        # permutation_test's own rule: batch = memory_limit // (P * 8 * (q * k + 6)).
        limit = batch * P * 8 * (q * k + 6)
        results[batch] = permutation_test(Y, G, L, kind=stats.kind, df=stats.df,
                                          correction=CORRECTIONS[method](permutations=150, seed=8),
                                          graph=graph, memory_limit=limit)
        assert max(seen[1:]) == min(batch, perm._MAX_BATCH, 150)  # seen[0]: the observed data alone
    ref = results[1]
    # 150 random resamplings: two seed blocks of BLOCK = 100, the second one partial.
    assert ref.scheme == scheme and ref.n_resamplings == 150 and not ref.exhaustive
    for batch in (7, 1000):
        r = results[batch]
        assert np.array_equal(r.null_distribution, ref.null_distribution)
        assert np.array_equal(r.p_corrected, ref.p_corrected, equal_nan=True)
        assert np.array_equal(r.p_uncorrected, ref.p_uncorrected, equal_nan=True)
        if method == "tfce":
            assert np.array_equal(r.enhanced, ref.enhanced)
        if method == "cluster":
            assert np.array_equal(r.cluster_labels, ref.cluster_labels)
    if method == "cluster":
        assert ref.clusters, "the planted block should form at least one cluster"


# --- the engine's statistic is group_test's ---------------------------------------------------

def _designs(rng, n):
    g = np.repeat([0.0, 1.0], n // 2)
    age = rng.normal(40, 8, n)
    ones = np.ones(n)
    return {
        "one-sample": (ones[:, None], [[1.0]], 1),
        "intercept with covariate": (np.column_stack([ones, age]), [[1.0, 0.0]], 1),
        "group difference": (np.column_stack([ones, g]), [[0.0, 1.0]], 1),
        "covariate slope": (np.column_stack([ones, age]), [[0.0, 1.0]], 1),
        "group difference with covariate": (np.column_stack([ones, g, age]), [[0.0, 1.0, 0.0]], 1),
        "F of two group columns": (np.column_stack([ones, g, age]), [[0, 1, 0], [0, 0, 1]], 1),
        "Hotelling k=2": (ones[:, None], [[1.0]], 2),
        "Hotelling k=3 two groups": (np.column_stack([ones, g]), [[0.0, 1.0]], 3),
    }


@pytest.mark.parametrize("case", list(_designs(np.random.default_rng(0), 14)))
def test_engine_statistic_equals_group_test(case):
    rng = np.random.default_rng(17)
    n, P = 14, 25
    G, L, k = _designs(rng, n)[case]
    L = np.asarray(L, dtype=float)
    Y = rng.standard_normal((n, k, P)) + 0.4
    stats = glmeeg.group_test(Y if k > 1 else Y[:, 0], G, L)
    scheme = choose_resampling(G, L)
    engine = perm._Engine(Y, G, L, scheme)
    identity = (np.ones((1, n), dtype=np.int8) if scheme == "sign-flip"
                else np.arange(n, dtype=np.int32)[None, :])
    # Same algebra, different order of operations (residuals of the nuisance model first).
    np.testing.assert_allclose(engine.statistics(identity)[0], stats.statistic, rtol=1e-12)


def test_observed_statistic_is_row_zero_of_an_exhaustive_null():
    # Public-API view of the same fact: with all 2^n sign vectors, row 0 is the identity, so
    # with one point and alternative="greater" the first null value is group_test's t.
    rng = np.random.default_rng(3)
    x = rng.standard_normal((9, 1)) + 0.3
    res = permutation_test(x, np.ones((9, 1)), np.array([[1.0]]), kind="t", df=(1.0, 8.0),
                           alternative="greater", correction=MaxStatistic(permutations=512))
    assert res.exhaustive
    t = glmeeg.group_test(x, np.ones((9, 1)), [[1.0]]).statistic[0]
    # Rounding only: the same t by a different order of operations.
    np.testing.assert_allclose(res.null_distribution[0], t, rtol=1e-12)
    # scipy.stats.ttest_1samp as the outside value of the same t (rounding only).
    np.testing.assert_allclose(res.null_distribution[0], one_sample_t(x[:, 0]), rtol=1e-12)


# --- which scheme -----------------------------------------------------------------------------

def test_choose_resampling_follows_the_exchangeability_rule():
    # Winkler et al. (2014): sign-flipping when the test involves the mean (the constant is not
    # in the nuisance space), permutation of subjects when the constant is a nuisance.
    n = 12
    ones = np.ones(n)
    g = np.repeat([0.0, 1.0], n // 2)
    age = np.linspace(20, 60, n)
    cells = np.column_stack([1 - g, g])
    sign_flip = [(ones[:, None], [[1.0]]),                          # intercept only
                 (np.column_stack([ones, age]), [[1.0, 0.0]]),      # intercept, covariate kept
                 (cells, [[1.0, 0.0]])]                             # one group's cell mean
    permute = [(np.column_stack([ones, g]), [[0.0, 1.0]]),          # group difference
               (np.column_stack([ones, age]), [[0.0, 1.0]]),        # covariate slope
               (cells, [[1.0, -1.0]]),                              # difference of cell means
               (np.column_stack([ones, g, age]), [[0, 1, 0], [0, 0, 1]])]
    for G, L in sign_flip:
        L = np.asarray(L, dtype=float)
        assert choose_resampling(G, L) == "sign-flip"
        assert choose_resampling(G, L, requested="sign-flip") == "sign-flip"
        with pytest.raises(ModelError, match="permute"):
            choose_resampling(G, L, requested="permute")
    for G, L in permute:
        L = np.asarray(L, dtype=float)
        assert choose_resampling(G, L) == "permute"
        assert choose_resampling(G, L, requested="permute") == "permute"
        with pytest.raises(ModelError, match="sign-flip"):
            choose_resampling(G, L, requested="sign-flip")
    # permutation_test refuses the same way, and asks for a graph where it needs one.
    Y = np.random.default_rng(0).standard_normal((n, 5))
    with pytest.raises(ModelError):
        permutation_test(Y, ones[:, None], [[1.0]], kind="t", df=(1, n - 1),
                         correction=MaxStatistic(permutations=50, resampling="permute"))
    with pytest.raises(ModelError, match="graph"):
        permutation_test(Y, ones[:, None], [[1.0]], kind="t", df=(1, n - 1), correction=TFCE(permutations=50))


@pytest.mark.parametrize("scheme", ["sign-flip", "permute"])
def test_seeded_resamplings_are_reproducible_and_block_wise(scheme):
    n = 12
    a, ex_a = resamplings(scheme, n, permutations=250, seed=77)
    b, ex_b = resamplings(scheme, n, permutations=300, seed=77)
    again, _ = resamplings(scheme, n, permutations=250, seed=77)
    other, _ = resamplings(scheme, n, permutations=250, seed=78)
    assert not ex_a and not ex_b
    assert a.shape == (250, n) and b.shape == (300, n)
    assert np.array_equal(a, again)
    # One child stream of numpy.random.SeedSequence per block of BLOCK resamplings: asking for
    # more extends the list and keeps what came before.
    assert np.array_equal(a, b[:250])
    assert not np.array_equal(a, other)
    if scheme == "sign-flip":
        assert a.dtype == np.int8 and set(np.unique(a)) == {-1, 1}
    else:
        assert a.dtype == np.int32
        assert np.array_equal(np.sort(a, axis=1), np.broadcast_to(np.arange(n), a.shape))


def test_exhaustive_lists_start_with_the_identity_and_are_complete():
    # Closed forms: 2^n sign vectors and n! orderings, all distinct.
    signs, ex = resamplings("sign-flip", 5, permutations=32, seed=0)
    assert ex and signs.shape == (32, 5) and np.all(signs[0] == 1)
    assert len({tuple(r) for r in signs}) == 32
    orders, ex = resamplings("permute", 5, permutations=120, seed=0)
    assert ex and orders.shape == (120, 5) and np.array_equal(orders[0], np.arange(5))
    assert len({tuple(r) for r in orders}) == 120
    # One more than the full set is still the full set; one fewer is random.
    assert resamplings("sign-flip", 5, permutations=33, seed=0)[1]
    assert not resamplings("sign-flip", 5, permutations=31, seed=0)[1]


# --- through the pipeline -------------------------------------------------------------------------

PIPELINE_TESTS = """\
[[test]]
name = "b-max"
subject_contrast = "condition[T.b]"
correction = "max-statistic"
permutations = 200
seed = 1

[[test]]
name = "b-cluster"
subject_contrast = "condition[T.b]"
correction = "cluster"
permutations = 200
seed = 2

[[test]]
name = "b-tfce"
subject_contrast = "condition[T.b]"
correction = "tfce"
permutations = 200
seed = 3
"""
CLUSTER_COLUMNS = ["id", "kind", "sign", "mass", "extent", "first_time", "last_time", "channels",
                   "peak_channel", "peak_time", "peak_statistic", "p", "significant",
                   "effect_size", "effect_size_low", "effect_size_high",
                   "estimate", "estimate_low", "estimate_high"]


def invoke(*args):
    return CliRunner().invoke(app, [str(a) for a in args])


@pytest.fixture(scope="module")
def permutation_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("perm")
    design = write_study(root / "study", n_subjects=10, n_trials=30, n_channels=8, n_times=8,
                         seed=4, effect=1.5, tests=PIPELINE_TESTS)
    out = root / "out"
    result = invoke("run", design, "--out", out, "-q")
    assert result.exit_code == 0, result.output
    return out


@pytest.mark.slow  # a run of three resampling tests with its report
def test_pipeline_cluster_outputs(permutation_run):
    # The layout checked is the documented one (clusters.csv columns of glmeeg.results.findings); the
    # outside values are the planted effect (glmeeg.testing.write_study) and scipy's t quantile
    # for the threshold.
    folder = permutation_run / "b-cluster"
    clusters = pd.read_csv(folder / "clusters.csv")
    assert list(clusters.columns) == CLUSTER_COLUMNS
    assert (clusters["kind"] == "cluster").all()
    sig = clusters[clusters["significant"]]
    assert len(sig) >= 1
    # The planted effect: condition b at channel Cz (index 1), samples 2-4, i.e. -0.08 to
    # -0.06 s (write_study's time_start -0.1 s at 100 Hz).
    top = sig.iloc[0]
    assert top["sign"] == "positive" and "Cz" in top["channels"].split()
    assert top["first_time"] <= -0.08 + 1e-9 and top["last_time"] >= -0.06 - 1e-9

    points = pd.read_csv(folder / "points.csv")
    assert "cluster" in points.columns and "tfce" not in points.columns
    # Points outside every cluster have an empty cell; the others carry ids of clusters.csv.
    inside = points["cluster"].notna()
    assert (~inside).any() and inside.any()
    assert set(points.loc[inside, "cluster"].astype(int)) == set(clusters["id"])
    assert (points.groupby("cluster").size().sort_index().to_numpy()
            == clusters.set_index("id")["extent"].sort_index().to_numpy()).all()
    # A cluster's points share its p.
    for _, c in clusters.iterrows():
        np.testing.assert_array_equal(points.loc[points["cluster"] == c["id"], "p_corrected"], c["p"])

    summary = json.loads((folder / "summary.json").read_text())
    listed = summary["findings"]["clusters"]
    assert [c["id"] for c in listed] == sig["id"].tolist()
    assert all(c["significant"] for c in listed)
    assert CLUSTER_CAUTION in summary["cautions"] and "Sassenhagen" in CLUSTER_CAUTION
    assert summary["resampling"]["scheme"] == "sign-flip"
    assert summary["resampling"]["n_resamplings"] == 200
    assert summary["resampling"]["cluster_threshold"] == pytest.approx(
        scipy.stats.t.isf(0.025, 9), rel=1e-12)  # parametric two-sided p = 0.05 on 9 df

    shown = invoke("show", folder)
    assert shown.exit_code == 0, shown.output
    assert f"{len(sig)} significant clusters:" in shown.stdout
    assert f"#{int(top['id'])} positive" in shown.stdout
    assert "Sassenhagen" in shown.stdout


@pytest.mark.parametrize("name", ["b-tfce", "b-max"])
@pytest.mark.slow  # a run of three resampling tests with its report
def test_pipeline_tfce_and_max_outputs(permutation_run, name):
    folder = permutation_run / name
    points = pd.read_csv(folder / "points.csv")
    assert ("tfce" in points.columns) == (name == "b-tfce")
    assert points["significant"].any()
    assert set(points.loc[points["significant"], "channel"]) == {"Cz"}
    regions = pd.read_csv(folder / "clusters.csv")
    assert list(regions.columns) == CLUSTER_COLUMNS
    assert (regions["kind"] == "region").all() and regions["significant"].all()
    if name == "b-tfce":
        # TFCE is signed like the statistic and zero where the statistic is zero.
        assert (np.sign(points["tfce"]) == np.sign(points["statistic"])).all()
    summary = json.loads((folder / "summary.json").read_text())
    assert len(summary["findings"]["clusters"]) == len(regions)
    assert CLUSTER_CAUTION in summary["cautions"]
    shown = invoke("show", folder)
    assert shown.exit_code == 0 and "significant regions of significant points:" in shown.stdout


@pytest.mark.slow  # a run with its report
def test_time_frequency_study_with_tfce(tmp_path):
    # Channel x frequency x time maps take the same path; clusters.csv gains frequency columns.
    tests = ('[[test]]\nname = "b-tfce"\nsubject_contrast = "condition[T.b]"\ncorrection = "tfce"\n'
             'permutations = 100\nseed = 5\n')
    design = write_study(tmp_path / "study", n_subjects=10, n_trials=24, n_channels=4, n_times=6,
                         n_freqs=3, seed=9, effect=1.5, tests=tests)
    out = tmp_path / "out"
    result = invoke("run", design, "--out", out, "-q")
    assert result.exit_code == 0, result.output
    points = pd.read_csv(out / "b-tfce" / "points.csv")
    assert len(points) == 4 * 3 * 6 and {"frequency", "tfce"} <= set(points.columns)
    clusters = pd.read_csv(out / "b-tfce" / "clusters.csv")
    assert {"lowest_frequency", "highest_frequency", "peak_frequency"} <= set(clusters.columns)
    assert len(clusters) >= 1
    assert set(clusters["lowest_frequency"]) <= {4.0, 6.0, 8.0}


def _block(lines: str) -> str:
    return '[[test]]\nname = "t1"\nsubject_contrast = "condition[T.b]"\n' + lines + "\n"


BAD_SETTINGS = {
    "cluster-threshold-with-fdr": (_block('correction = "fdr"\ncluster_threshold = 2.0'),
                                   ["cluster_threshold", "fdr"], ""),
    "tfce-height-zero": (_block('correction = "tfce"\ntfce_height_exponent = 0'),
                         ["tfce_height_exponent"], ""),
    "tfce-height-negative": (_block('correction = "tfce"\ntfce_height_exponent = -1'),
                             ["tfce_height_exponent"], ""),
    "sign-flip-on-two-groups": (_block('group_formula = "group"\ngroup_contrast = "group[T.y]"\n'
                                       'correction = "max-statistic"\nresampling = "sign-flip"'),
                                ["t1", "sign-flip"], ""),
    "neighbour-file-unknown-channel": (_block('correction = "tfce"'), ["neighbours.csv", "Xq9"],
                                       'neighbours = "neighbours.csv"'),
    "unknown-correction": (_block('correction = "clustr"'), ["correction", "clustr"], ""),
}


@pytest.mark.parametrize("case", list(BAD_SETTINGS))
def test_bad_permutation_settings_are_one_line_exit_2(tmp_path, case):
    # The house rule (DEVELOPERS.md): every input error is one line on stderr and exit code 2.
    tests, fragments, extra = BAD_SETTINGS[case]
    root = tmp_path / "study"
    design = write_study(root, n_subjects=8, n_trials=12, n_channels=4, n_times=5, tests=tests,
                         extra_data=extra)
    pd.DataFrame({"channel": ["Fz", "Cz", "Xq9"], "neighbour": ["Cz", "Pz", "Oz"]}).to_csv(
        root / "neighbours.csv", index=False)
    out = tmp_path / "out"
    result = invoke("run", design, "--out", out)
    assert result.exit_code == 2, (result.output, result.exception)
    assert result.stdout == ""
    err = result.stderr
    assert err.count("\n") == 1 and err.startswith("error: "), repr(err)
    for f in fragments:
        assert f in err, (f, err)
    assert not out.exists()


# --- a planted effect -------------------------------------------------------------------------

@pytest.mark.slow  # the demo study, 1,000 TFCE sign-flips
def test_tfce_finds_the_planted_urgency_effect_and_nothing_remote(tmp_path):
    from glmeeg.pipeline import fit_subjects, plan_analysis, test_group
    from glmeeg.results import provenance
    from glmeeg.demo import DEMO_TRUTH, write_demo_study

    design = write_demo_study(tmp_path / "demo")           # 28 volunteers, as the demo
    header = design.read_text().split("[[test]]")[0]
    design.write_text(header + '[[test]]\nname = "urgency"\nsubject_contrast = "urgency[T.high]"\n'
                      'correction = "tfce"\npermutations = 1000\nseed = 11\n')
    plan = plan_analysis(design)
    result = test_group(plan, plan.tests[0], fit_subjects(plan), prov=provenance())
    assert result.resampling.scheme == "sign-flip" and result.resampling.n_resamplings == 1000
    sig = result.map("significant")                      # (32 channels, 250 samples)
    # Planted points: where the urgency pattern (spatial weight x Hann window) is above half
    # its peak (DEMO_TRUTH.urgency.pattern(), channels x samples).
    pattern = DEMO_TRUTH.urgency.pattern()
    planted = pattern > 0.5 * pattern.max()
    assert planted.sum() > 50
    assert (sig & planted).sum() > 0.5 * planted.sum(), ((sig & planted).sum(), planted.sum())
    # Remote noise-only channels: the occipital row, 60-90 degrees from the effect's centre
    # (CPz), and every channel with no planted signal and no neighbour carrying one (TFCE may
    # legitimately lend support to points next to an effect). FWER level: p_corrected <= 0.05.
    channels = list(DEMO_TRUTH.channels)
    near = set(DEMO_TRUTH.urgency.channels)
    for c in DEMO_TRUTH.urgency.channels:
        near |= set(plan.sensor_graph.neighbours(c))
    remote = {"O1", "Oz", "O2"} | {c for c in DEMO_TRUTH.noise_only if c not in near}
    assert remote <= set(DEMO_TRUTH.noise_only) and len(remote) >= 9
    for c in sorted(remote):
        assert not sig[channels.index(c)].any(), c
