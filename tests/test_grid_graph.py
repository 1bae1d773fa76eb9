"""The product form of the points graph gives the same neighbours and the same results.

Outside source: the points graph's definition (the Cartesian product of the sensor graph with
path graphs along frequency and time), built here independently with scipy.sparse Kronecker
products; every kernel must give bitwise the same results from the product form as from the
CSR arrays, since a point's set of neighbours is the same.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
import scipy.sparse as sp

from glmeeg.inference.clusters import (label_clusters, max_cluster_statistic, neighbour,
                                       neighbour_span)
from glmeeg.inference.corrections import TFCE, ClusterMass
from glmeeg.inference.graph import PointGraph, map_graph
from glmeeg.inference.permutation import permutation_test
from glmeeg.inference.tfce import max_tfce, tfce

SHAPES = [(7, 9), (7, 1), (7, 4, 6), (7, 1, 5), (7, 3, 1), (1, 4, 5)]


def random_sensors(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    a = rng.random((n, n)) < 0.35
    return np.triu(a, 1) | np.triu(a, 1).T


def kron_graph(s: np.ndarray, shape) -> sp.csr_matrix:
    """The definition, with scipy: S x I + I x P_F x I + I x I x P_T."""
    def path(n):
        return sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], shape=(n, n)) if n > 1 \
            else sp.csr_matrix((n, n))
    dims = (shape[0], 1, shape[1]) if len(shape) == 2 else shape
    C, F, T = dims
    a = (sp.kron(sp.kron(sp.csr_matrix(s.astype(float)), sp.identity(F)), sp.identity(T))
         + sp.kron(sp.kron(sp.identity(C), path(F)), sp.identity(T))
         + sp.kron(sp.identity(C), sp.kron(sp.identity(F), path(T))))
    return sp.csr_matrix(a)


@pytest.mark.parametrize("shape", SHAPES)
def test_grid_neighbours_are_the_csr_neighbours(shape):
    s = random_sensors(shape[0], seed=1)
    g = map_graph(s, shape)
    indptr, indices = g
    ref = kron_graph(s, shape)
    assert np.array_equal(indptr, ref.indptr) and np.array_equal(indices, ref.indices)
    cptr, cidx, nf, nt = g.grid
    for p in range(indptr.size - 1):
        lo, count, i, f, t = neighbour_span(p, indptr, cptr, nf, nt)
        got = [neighbour(p, e, lo, count, i, f, t, indices, cidx, nf, nt) for e in range(count)]
        got = sorted(q for q in got if q >= 0)
        assert got == indices[indptr[p]:indptr[p + 1]].tolist(), p


@pytest.mark.parametrize("shape", SHAPES)
def test_kernels_give_the_same_bits_from_the_grid(shape):
    rng = np.random.default_rng(2)
    g = map_graph(random_sensors(shape[0], seed=3), shape)
    indptr, indices = g
    maps = rng.standard_normal((9, indptr.size - 1)) * 2.0
    maps[0] = 0.0
    maps[1, ::2] = 1.5  # ties
    for E in (0.5, 0.7):
        a = max_tfce(maps, indptr, indices, extent_exponent=E)
        b = max_tfce(maps, indptr, indices, extent_exponent=E, grid=g.grid)
        assert a.tobytes() == b.tobytes()
        for x in maps[:3]:
            assert (tfce(x, indptr, indices, extent_exponent=E).tobytes()
                    == tfce(x, indptr, indices, extent_exponent=E, grid=g.grid).tobytes())
    for stat in ("mass", "extent"):
        a = max_cluster_statistic(maps, indptr, indices, 1.0, statistic=stat)
        b = max_cluster_statistic(maps, indptr, indices, 1.0, statistic=stat, grid=g.grid)
        assert a.tobytes() == b.tobytes()
    for x in maps:
        assert np.array_equal(label_clusters(x, indptr, indices, 0.8),
                              label_clusters(x, indptr, indices, 0.8, grid=g.grid))


def test_permutation_test_is_the_same_with_the_grid():
    shape = (6, 3, 8)
    g = map_graph(random_sensors(6, seed=4), shape)
    rng = np.random.default_rng(5)
    Y = rng.standard_normal((10, int(np.prod(shape)))) + 0.3
    G = np.ones((10, 1))
    L = np.ones((1, 1))
    for corr in (TFCE(permutations=200, seed=3), ClusterMass(permutations=200, seed=3)):
        a = permutation_test(Y, G, L, kind="t", df=(1.0, 9.0), correction=corr, graph=tuple(g))
        b = permutation_test(Y, G, L, kind="t", df=(1.0, 9.0), correction=corr, graph=g)
        assert a.null_distribution.tobytes() == b.null_distribution.tobytes()
        assert a.p_corrected.tobytes() == b.p_corrected.tobytes()


def test_point_graph_pickles_with_its_grid():
    g = map_graph(random_sensors(5, seed=6), (5, 2, 3))
    h = pickle.loads(pickle.dumps(g))
    assert isinstance(h, PointGraph) and h.grid is not None
    assert all(np.array_equal(a, b) for a, b in zip(h, g))
    assert all(np.array_equal(a, b) for a, b in zip(h.grid, g.grid))
    indptr, indices = h  # unpacks like the plain (indptr, indices) pair
    assert indptr.size == 31


def test_a_grid_of_another_graph_is_refused():
    g = map_graph(random_sensors(5, seed=7), (5, 2, 3))
    cptr, cidx, nf, nt = g.grid
    x = np.ones(30)
    with pytest.raises(ValueError, match="does not describe the graph"):
        tfce(x, *g, grid=(cptr, cidx, nf, nt + 1))      # more points
    assert cidx.size >= 2
    with pytest.raises(ValueError, match="must form a CSR graph"):
        label_clusters(x, *g, 0.5, grid=(cptr, cidx[:-2], nf, nt))   # links cut off
    fewer = np.minimum(cptr, cidx.size - 2)
    with pytest.raises(ValueError, match="does not describe the graph"):
        label_clusters(x, *g, 0.5, grid=(fewer, cidx[:-2], nf, nt))  # two links fewer
    with pytest.raises(ValueError, match="grid must be"):
        max_tfce(x[None], *g, grid=(1, 2))
