"""The neighbour graph of points (glmeeg.inference.graph).

Outside references: scipy.ndimage.label with the cross-shaped structuring element
(generate_binary_structure(ndim, 1)) for connected regions of a lattice, and
scipy.sparse.csgraph.connected_components for connected regions of a graph; the edge counts
are the closed forms of the Cartesian product of graphs.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import scipy.sparse as sp
from scipy import ndimage
from scipy.sparse.csgraph import connected_components

from glmeeg.axes import Axes
from glmeeg.inference.graph import graph_arrays, points_graph
from glmeeg.sensors.neighbours import neighbours_from_positions
from glmeeg.sensors import standard_positions

DEMO32 = ("Fp1 Fp2 AF3 AF4 F7 F3 Fz F4 F8 FC5 FC1 FC2 FC6 T7 C3 Cz C4 T8 CP5 CP1 CP2 CP6 "
          "P7 P3 Pz P4 P8 PO3 PO4 O1 Oz O2").split()


@pytest.fixture(scope="module")
def demo_sensors():
    return neighbours_from_positions(DEMO32, standard_positions(DEMO32))


def _path_adjacency(n: int) -> sp.csr_matrix:
    return sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], shape=(n, n), format="csr")


def _brute_force(sensor: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """The neighbourhood rule written out point by point (small shapes only)."""
    n = int(np.prod(shape))
    out = np.zeros((n, n), dtype=bool)
    for p in itertools.product(*[range(d) for d in shape]):
        i = np.ravel_multi_index(p, shape)
        for q in itertools.product(*[range(d) for d in shape]):
            diff = [a != b for a, b in zip(p, q)]
            if sum(diff) != 1:
                continue
            if diff[0]:
                ok = bool(sensor[p[0], q[0]])
            else:
                k = diff.index(True)
                ok = abs(p[k] - q[k]) == 1
            out[i, np.ravel_multi_index(q, shape)] = ok
    return out


def _same_partition(a: np.ndarray, b: np.ndarray) -> bool:
    pairs = set(zip(a.tolist(), b.tolist()))
    return len(pairs) == len(set(a.tolist())) == len(set(b.tolist()))


def _components_on_mask(graph: sp.csr_matrix, mask: np.ndarray) -> np.ndarray:
    keep = np.flatnonzero(mask.ravel())  # flat C order = point numbering
    _, labels = connected_components(graph[keep][:, keep], directed=False)
    return labels


# --- structure -------------------------------------------------------------------------------

@pytest.mark.parametrize("shape", [(32, 7), (32, 3, 5), (32, 1), (32, 1, 1), (32, 4, 1)])
def test_edge_count_closed_form(demo_sensors, shape):
    a = points_graph(demo_sensors.adjacency(), shape)
    e_s, c = demo_sensors.n_edges, shape[0]
    if len(shape) == 2:
        t = shape[1]
        expected = e_s * t + c * (t - 1)
    else:
        f, t = shape[1:]
        expected = e_s * f * t + c * (f - 1) * t + c * f * (t - 1)
    n = int(np.prod(shape))
    assert a.shape == (n, n)
    assert a.nnz == 2 * expected


@pytest.mark.parametrize("shape", [(32, 7), (32, 3, 5)])
def test_points_graph_is_a_clean_symmetric_adjacency(demo_sensors, shape):
    a = points_graph(demo_sensors.adjacency(), shape)
    assert isinstance(a, sp.csr_matrix) and a.dtype == bool
    assert (a != a.T).nnz == 0
    assert a.diagonal().sum() == 0
    assert a.has_sorted_indices
    assert np.all(a.data)  # no stored zeros
    assert connected_components(a, directed=False)[0] == 1


@pytest.mark.parametrize("shape", [(5, 4), (5, 3, 4), (1, 6), (4, 1, 3)])
def test_neighbourhood_matches_the_rule_point_by_point(shape):
    rng = np.random.default_rng(11)
    c = shape[0]
    s = np.triu(rng.random((c, c)) < 0.5, k=1)
    s = s | s.T
    a = points_graph(sp.csr_matrix(s), shape)
    assert np.array_equal(a.toarray(), _brute_force(s, shape))


def test_every_edge_changes_one_label_of_the_axes(demo_sensors):
    # Flat order is Axes' order: an edge joins two points that differ in exactly one of
    # channel / frequency / time.
    ax = Axes(channels=tuple(DEMO32), frequencies=(4.0, 6.0, 8.0), times=(0.0, 0.004, 0.008, 0.012))
    labels = ax.point_labels()
    a = points_graph(demo_sensors.adjacency(), ax.shape).tocoo()
    left, right = labels.iloc[a.row].reset_index(drop=True), labels.iloc[a.col].reset_index(drop=True)
    n_diff = sum((left[k] != right[k]).astype(int) for k in ("channel", "frequency", "time"))
    assert (n_diff == 1).all()
    same_time = left["time"] == right["time"]
    same_freq = left["frequency"] == right["frequency"]
    changed = ~(same_time & same_freq)
    assert (left["channel"][changed] == right["channel"][changed]).all()


def test_inputs_accepted_and_rejected(demo_sensors):
    dense = demo_sensors.adjacency().toarray().astype(float)
    ref = points_graph(demo_sensors.adjacency(), (32, 5))
    # A SensorGraph, a dense array, a one-sided (upper) matrix with a diagonal: same graph.
    one_sided = np.triu(dense) + np.eye(32)
    for s in (demo_sensors, dense, one_sided, sp.coo_matrix(one_sided)):
        assert (points_graph(s, (32, 5)) != ref).nnz == 0
    with pytest.raises(ValueError, match=r"expected \(31, 31\)"):
        points_graph(dense, (31, 5))
    for bad in [(32,), (32, 0), (32, 2, 3, 4), (32, 2.5)]:
        with pytest.raises(ValueError, match="shape must be"):
            points_graph(dense, bad)


# --- connected regions: against scipy.ndimage.label on lattices ----------------------------------

@pytest.mark.parametrize("density", [0.3, 0.45, 0.6])
def test_components_match_ndimage_label_2d(density):
    rng = np.random.default_rng(2024)
    shape = (9, 13)
    graph = points_graph(_path_adjacency(shape[0]), shape)
    structure = ndimage.generate_binary_structure(2, 1)  # cross: no diagonal neighbours
    for _ in range(20):
        mask = rng.random(shape) < density
        expected, _ = ndimage.label(mask, structure=structure)
        got = _components_on_mask(graph, mask)
        assert _same_partition(got, expected[mask])


@pytest.mark.parametrize("density", [0.25, 0.4, 0.55])
def test_components_match_ndimage_label_3d(density):
    rng = np.random.default_rng(77)
    shape = (5, 6, 7)  # channels on a line x frequencies x times
    graph = points_graph(_path_adjacency(shape[0]), shape)
    structure = ndimage.generate_binary_structure(3, 1)
    for _ in range(20):
        mask = rng.random(shape) < density
        expected, _ = ndimage.label(mask, structure=structure)
        got = _components_on_mask(graph, mask)
        assert _same_partition(got, expected[mask])


def test_no_diagonal_time_neighbours():
    # Channels 0 and 1 are neighbours; (0, t=0) and (1, t=1) touch only at a corner.
    a = points_graph(np.array([[0, 1], [1, 0]]), (2, 2))
    mask = np.array([[True, False], [False, True]])
    assert len(set(_components_on_mask(a, mask).tolist())) == 2


# --- arrays for compiled kernels ------------------------------------------------------------------

def test_graph_arrays(demo_sensors):
    a = points_graph(demo_sensors.adjacency(), (32, 3, 4))
    indptr, indices = graph_arrays(a)
    assert indptr.dtype == np.int64 and indices.dtype == np.int32
    assert indptr.flags.c_contiguous and indices.flags.c_contiguous
    assert np.array_equal(indptr, a.indptr) and np.array_equal(indices, a.indices)
    assert indptr[-1] == indices.size == a.nnz
    indices[0] = -1  # a copy: the matrix is untouched
    assert a.indices[0] != -1
    # Explicit zeros and unsorted input are cleaned.
    m = sp.csr_matrix((np.array([1.0, 0.0, 1.0]), np.array([1, 0, 0]), np.array([0, 2, 3])),
                      shape=(2, 2))
    indptr, indices = graph_arrays(m)
    assert indptr.tolist() == [0, 1, 2] and indices.tolist() == [1, 0]
    with pytest.raises(ValueError, match="square"):
        graph_arrays(sp.csr_matrix((2, 3)))
