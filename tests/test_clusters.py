"""Cluster labelling, cluster tables and the batch max-cluster statistic.

Outside sources: ``scipy.ndimage.label`` on lattices (cross / face connectivity), and
``scipy.sparse.csgraph.connected_components`` on graphs, with masses and extents from
``np.bincount`` and ``math.fsum``; cluster mass and extent as defined by Maris & Oostenveld
(2007), J. Neurosci. Methods 164:177-190. Graphs are built here with scipy.sparse.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from scipy import ndimage
from scipy.sparse.csgraph import connected_components

from glmeeg.inference.clusters import cluster_table, label_clusters, max_cluster_statistic


# ---------------------------------------------------------------------------------------------
# graphs and references built with scipy (independent of the code under test)

from graphs import csr, lattice_graph, random_graph  # noqa: E402  (shared test helpers)


def by_lowest_index(labels):
    """Renumber a labelling (0 = background) so that clusters are 1..K in order of their
    lowest point index."""
    flat = np.asarray(labels).ravel()
    out = np.zeros(flat.size, dtype=np.int64)
    ids = flat[flat > 0]
    if ids.size == 0:
        return out
    first = {}
    for k in ids:
        first.setdefault(int(k), len(first) + 1)
    mapping = np.zeros(int(flat.max()) + 1, dtype=np.int64)
    for k, v in first.items():
        mapping[k] = v
    return mapping[flat]


def scipy_graph_labels(adj, mask):
    """Clusters of ``mask`` on ``adj`` from scipy connected_components, numbered by lowest
    index."""
    idx = np.flatnonzero(mask)
    lab = np.zeros(mask.size, dtype=np.int64)
    if idx.size:
        _, sub = connected_components(adj[idx][:, idx], directed=False)
        lab[idx] = sub + 1
    return by_lowest_index(lab)


def smooth_map(shape, rng, sigma=1.5, scale=3.0):
    x = ndimage.gaussian_filter(rng.standard_normal(shape), sigma)
    return scale * x / x.std()


# ---------------------------------------------------------------------------------------------
# labels

@pytest.mark.parametrize("shape", [(12, 30), (5, 6, 20)])
def test_labels_match_ndimage_on_lattices(shape):
    # scipy.ndimage.label with cross (2-D) / face (3-D) connectivity, i.e. rank-1 structure
    rng = np.random.default_rng(1)
    adj = lattice_graph(shape)
    indptr, indices = csr(adj)
    structure = ndimage.generate_binary_structure(len(shape), 1)
    for sigma in (0.8, 2.0):
        x = smooth_map(shape, rng, sigma)
        for threshold in rng.uniform(-1.0, 3.0, 4):
            want, n_want = ndimage.label(x > threshold, structure=structure)
            got = label_clusters(x.ravel(), indptr, indices, threshold)
            assert got.dtype == np.int32
            # exact: same partition, and our numbering is by lowest point index
            assert_array_equal(got, by_lowest_index(want))
            assert got.max() == n_want


def test_labels_match_connected_components_on_random_graphs():
    # scipy.sparse.csgraph.connected_components on the supra-threshold subgraph
    rng = np.random.default_rng(2)
    for n, n_edges in [(200, 150), (500, 600), (1000, 3000)]:
        adj = random_graph(n, n_edges, rng)
        indptr, indices = csr(adj)
        x = rng.standard_normal(n)
        for threshold in rng.uniform(-1.5, 1.5, 4):
            got = label_clusters(x, indptr, indices, threshold)
            assert_array_equal(got, scipy_graph_labels(adj, x > threshold))


def test_threshold_is_strict_and_isolated_points_form_clusters():
    # path 0-1-2-3, point 4 without neighbours (clusters by the definition: value > threshold)
    indptr = np.array([0, 1, 3, 5, 6, 6])
    indices = np.array([1, 0, 2, 1, 3, 2])
    x = np.array([2.0, 1.0, 3.0, 3.0, 5.0])
    assert_array_equal(label_clusters(x, indptr, indices, 1.0), [1, 0, 2, 2, 3])
    assert_array_equal(label_clusters(x, indptr, indices, 0.5), [1, 1, 1, 1, 2])
    assert_array_equal(label_clusters(x, indptr, indices, 5.0), [0, 0, 0, 0, 0])


# ---------------------------------------------------------------------------------------------
# cluster table

def test_cluster_table_matches_bincount_and_fsum():
    rng = np.random.default_rng(3)
    adj = lattice_graph((10, 40))
    indptr, indices = csr(adj)
    x = smooth_map((10, 40), rng, 0.8).ravel()
    labels = label_clusters(x, indptr, indices, 0.8)
    k = labels.max()
    assert k >= 3
    mass, extent = cluster_table(x, labels)
    # np.bincount on the labels
    assert_array_equal(extent, np.bincount(labels, minlength=k + 1)[1:])
    assert_array_equal(mass, np.bincount(labels, weights=x, minlength=k + 1)[1:])
    # math.fsum (correctly rounded sums); rtol: our sums are ordinary float64 sums
    assert_allclose(mass, [math.fsum(x[labels == c]) for c in range(1, k + 1)], rtol=1e-12,
                    atol=0)
    empty_mass, empty_extent = cluster_table(x, np.zeros(x.size, dtype=np.int32))
    assert empty_mass.shape == (0,) and empty_extent.shape == (0,)


# ---------------------------------------------------------------------------------------------
# batch null statistic

def direct_max_statistics(x, adj, threshold, statistic):
    """Largest positive / negative cluster statistic from scipy components and np.bincount."""
    res = []
    for y in (x, -x):
        lab = scipy_graph_labels(adj, y > threshold)
        if lab.max() == 0:
            res.append(0.0)
            continue
        w = y if statistic == "mass" else None
        res.append(float(np.bincount(lab, weights=w)[1:].max()))
    return np.array(res)


@pytest.mark.parametrize("statistic", ["mass", "extent"])
def test_max_cluster_statistic_matches_direct_computation(statistic):
    rng = np.random.default_rng(4)
    lat = lattice_graph((8, 50))
    rnd = random_graph(400, 500, rng)
    for adj in (lat, rnd):
        indptr, indices = csr(adj)
        maps = np.stack([smooth_map((8, 50), rng, s).ravel() for s in (0.7, 1.5, 3.0)]
                        + [rng.standard_normal(400), np.zeros(400)])
        for threshold in (0.0, 1.0, 2.5):
            got = max_cluster_statistic(maps, indptr, indices, threshold, statistic=statistic)
            want = np.stack([direct_max_statistics(x, adj, threshold, statistic)
                             for x in maps])
            # rtol: masses are summed in point order on both sides; a margin for the order
            assert_allclose(got, want, rtol=1e-12, atol=0)
            pos = max_cluster_statistic(maps, indptr, indices, threshold, statistic=statistic,
                                        tails="positive")
            neg = max_cluster_statistic(maps, indptr, indices, threshold, statistic=statistic,
                                        tails="negative")
            assert_array_equal(pos[:, 0], got[:, 0])
            assert_array_equal(neg[:, 1], got[:, 1])
            assert np.all(pos[:, 1] == 0) and np.all(neg[:, 0] == 0)


def test_max_cluster_mass_has_the_bits_of_cluster_table():
    # The observed map goes through label_clusters + cluster_table, the permuted maps through
    # max_cluster_statistic: the same map must give the same bits (so that ties between the
    # observed and a permuted statistic are real ties).
    rng = np.random.default_rng(5)
    adj = lattice_graph((16, 60))
    indptr, indices = csr(adj)
    x = smooth_map((16, 60), rng, 1.2).ravel()
    got = max_cluster_statistic(x[None, :], indptr, indices, 1.0)[0]
    pos_mass, _ = cluster_table(x, label_clusters(x, indptr, indices, 1.0))
    neg_mass, _ = cluster_table(-x, label_clusters(-x, indptr, indices, 1.0))
    assert got[0] == pos_mass.max() and got[1] == neg_mass.max()


def test_empty_maps_give_zero():
    adj = lattice_graph((4, 5))
    indptr, indices = csr(adj)
    maps = np.stack([np.zeros(20), np.full(20, 0.5), np.full(20, -0.5), np.full(20, 1.0)])
    for statistic in ("mass", "extent"):
        for tails in ("both", "positive", "negative"):
            got = max_cluster_statistic(maps, indptr, indices, 1.0, statistic=statistic,
                                        tails=tails)
            # strictly above 1.0: none of these maps has a cluster
            assert_array_equal(got, np.zeros((4, 2)))
            assert not np.signbit(got).any()


def test_results_do_not_depend_on_batching():
    rng = np.random.default_rng(6)
    adj = lattice_graph((8, 30))
    indptr, indices = csr(adj)
    maps = np.stack([smooth_map((8, 30), rng, 1.0).ravel() for _ in range(9)])
    for statistic in ("mass", "extent"):
        batch = max_cluster_statistic(maps, indptr, indices, 0.5, statistic=statistic)
        for b in range(maps.shape[0]):
            one = max_cluster_statistic(maps[b:b + 1], indptr, indices, 0.5, statistic=statistic)
            assert_array_equal(one, batch[b:b + 1])
        assert_array_equal(max_cluster_statistic(maps[3:7], indptr, indices, 0.5,
                                                 statistic=statistic), batch[3:7])


# ---------------------------------------------------------------------------------------------
# validation

def test_bad_arguments():
    indptr, indices = csr(lattice_graph((3,)))
    maps = np.ones((2, 3))
    cases = [
        (lambda: max_cluster_statistic(maps, indptr, indices, 1.0, statistic="size"),
         "statistic must be one of mass, extent, got 'size'"),
        (lambda: max_cluster_statistic(maps, indptr, indices, 1.0, tails="two-sided"),
         "tails must be one of both, positive, negative, got 'two-sided'"),
        (lambda: max_cluster_statistic(maps, indptr, indices, -1.0),
         "threshold must be >= 0 when tails is 'both', got -1.0"),
        (lambda: max_cluster_statistic(maps, indptr, indices, np.nan),
         "threshold must be a finite number, got nan"),
        (lambda: max_cluster_statistic(np.ones((2, 4)), indptr, indices, 1.0),
         r"maps must be a 2-D array \(n_maps, n_points = 3\), got shape \(2, 4\)"),
        (lambda: max_cluster_statistic(np.array([[1.0, np.nan, 0.0]]), indptr, indices, 1.0),
         r"maps must be finite, got nan at \(0, 1\)"),
        (lambda: label_clusters(np.ones(3), indptr, indices, "high"),
         "threshold must be a finite number, got 'high'"),
        (lambda: label_clusters(np.ones(3), np.array([0, 1, 3]), indices, 1.0),
         "indptr must have|indptr must start at 0"),
        (lambda: label_clusters(np.ones(3), indptr, indices.astype(float), 1.0),
         "indices must be a 1-D integer array"),
        (lambda: label_clusters(np.ones(3), indptr, np.array([1, 0, 2, 5]), 1.0),
         r"indices must lie in \[0, 3\)"),
        (lambda: cluster_table(np.ones(3), np.array([1, 0])),
         r"labels must have one entry per value \(3\), got 2"),
    ]
    for call, message in cases:
        with pytest.raises(ValueError, match=message) as e:
            call()
        assert "\n" not in str(e.value)
    with pytest.raises(TypeError):
        max_cluster_statistic(maps, indptr, indices, 1.0, "mass")  # options are keyword-only
    # a negative threshold is fine for one tail (clusters of value > -1)
    assert_array_equal(max_cluster_statistic(maps, indptr, indices, -1.0, tails="positive"),
                       [[3.0, 0.0], [3.0, 0.0]])
