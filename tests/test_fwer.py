"""Family-wise error rate of the permutation corrections, by a small null simulation.

Eklund, Nichols & Knutsson (2016) validate error control by simulating data with no effect and
counting how often a method declares anything significant. Here: 200 seeded null datasets of
smooth noise (12 subjects, 8 channels x 30 samples), a one-sample test with 199 random
sign-flips each, and the max-statistic, cluster-mass and TFCE corrections at alpha = 0.05.
Under the null hypothesis, with symmetric errors, p = (b + 1) / (m + 1) (Phipson & Smyth, 2010)
with m = 199 is at most 0.05 with probability exactly 10 / 200 = 0.05, so the number of
datasets with any significant point is Binomial(200, 0.05). The full-size simulation is
``benchmarks/null_simulation.py``.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
from scipy.ndimage import gaussian_filter1d

from glmeeg.inference.corrections import TFCE, ClusterMass, MaxStatistic
from glmeeg.inference.graph import graph_arrays, points_graph
from glmeeg.inference.permutation import permutation_test

N_SUBJECTS, N_CHANNELS, N_TIMES = 12, 8, 30
N_DATASETS, N_RESAMPLINGS, ALPHA = 200, 199, 0.05


def sensor_adjacency() -> np.ndarray:
    """A 2 x 4 grid of sensors, 4-neighbour adjacency (channel c = 4 * row + column)."""
    a = np.zeros((N_CHANNELS, N_CHANNELS))
    for c in range(N_CHANNELS):
        r, k = divmod(c, 4)
        if k < 3:
            a[c, c + 1] = a[c + 1, c] = 1
        if r == 0:
            a[c, c + 4] = a[c + 4, c] = 1
    return a


def smooth_noise(rng, adjacency: np.ndarray) -> np.ndarray:
    """(subjects, points) Gaussian noise, smoothed across neighbouring sensors and in time."""
    white = rng.standard_normal((N_SUBJECTS, N_CHANNELS, N_TIMES))
    spatial = np.einsum("cd,sdt->sct", np.eye(N_CHANNELS) + 0.5 * adjacency, white)
    smooth = gaussian_filter1d(spatial, sigma=2.0, axis=-1, mode="nearest")
    return smooth.reshape(N_SUBJECTS, -1)


def binomial_acceptance(n: int, p: float, level: float) -> tuple[int, int]:
    """Counts [lo, hi] with P(X < lo) <= (1 - level) / 2 and P(X > hi) <= (1 - level) / 2 for
    X ~ Binomial(n, p) (exact binomial quantiles from scipy.stats.binom)."""
    tail = (1 - level) / 2
    return int(scipy.stats.binom.ppf(tail, n, p)), int(scipy.stats.binom.isf(tail, n, p))


@pytest.fixture(scope="module")
def null_rejections() -> dict[str, int]:
    adjacency = sensor_adjacency()
    graph = graph_arrays(points_graph(adjacency, (N_CHANNELS, N_TIMES)))
    design, contrast = np.ones((N_SUBJECTS, 1)), np.array([[1.0]])
    rng = np.random.default_rng(20160707)
    hits = {"max": 0, "cluster": 0, "tfce": 0, "uncorrected": 0}
    for d in range(N_DATASETS):
        Y = smooth_noise(rng, adjacency)
        # A different resampling seed per dataset: p is exact over random draws of sign vectors.
        for name, cls in (("max", MaxStatistic), ("cluster", ClusterMass), ("tfce", TFCE)):
            res = permutation_test(Y, design, contrast, kind="t", df=(1.0, N_SUBJECTS - 1.0),
                                   correction=cls(permutations=N_RESAMPLINGS, seed=1000 + d),
                                   graph=graph)
            assert res.scheme == "sign-flip" and not res.exhaustive
            hits[name] += bool(np.any(res.p_corrected <= ALPHA))
            if name == "max":
                hits["uncorrected"] += bool(np.any(res.p_uncorrected <= ALPHA))
    return hits


@pytest.mark.parametrize("method", ["max", "cluster", "tfce"])
@pytest.mark.slow  # a null simulation of 600 permutation tests
def test_family_wise_error_rate_is_alpha(null_rejections, method):
    # Exact binomial 99.9 % acceptance interval around 0.05 for 200 datasets: 2 to 21
    # rejections (1 % to 10.5 %); three corrections checked, so a false alarm in well under 1 %
    # of seeds.
    lo, hi = binomial_acceptance(N_DATASETS, ALPHA, 0.999)
    assert (lo, hi) == (2, 21)
    assert lo <= null_rejections[method] <= hi, (method, null_rejections[method], (lo, hi))


@pytest.mark.slow  # a null simulation of 600 permutation tests
def test_uncorrected_error_rate_is_far_above_alpha(null_rejections):
    # 240 correlated points tested at 0.05 each: some point is "significant" in most null
    # datasets. Far above the upper end of the interval (21 of 200) is the point of correcting.
    _, hi = binomial_acceptance(N_DATASETS, ALPHA, 0.999)
    assert null_rejections["uncorrected"] > 3 * hi, null_rejections
    assert null_rejections["uncorrected"] > max(null_rejections[m] for m in ("max", "cluster", "tfce"))
