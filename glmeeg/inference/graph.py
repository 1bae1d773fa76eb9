"""The neighbour graph of points, on which clusters and TFCE are computed.

A point is one channel x time sample, or one channel x frequency x time sample, numbered in flat
C order over ``(channel, time)`` or ``(channel, frequency, time)`` as in :class:`glmeeg.axes.Axes`:
point ``(c, t)`` is number ``c * T + t`` and point ``(c, f, t)`` is ``(c * F + f) * T + t``.

Two points are neighbours when they differ in exactly one coordinate, by one step:

- the same channel (and frequency) at the previous or next time sample;
- the same channel at the same time, at the previous or next frequency (time-frequency maps);
- neighbouring channels (an edge of the sensor graph) at the same time (and frequency).

There are no diagonal terms: ``(c, t)`` and ``(c', t + 1)`` are not neighbours even when ``c``
and ``c'`` are, and neither are two frequencies at different times. The graph is the Cartesian
product of the sensor graph with the path graphs along frequency and time, whose adjacency is a
sum of Kronecker products,

.. math::

    A = S \\otimes I_F \\otimes I_T + I_C \\otimes P_F \\otimes I_T + I_C \\otimes I_F \\otimes P_T,

with ``S`` the sensor adjacency, ``P_n`` the path graph on ``n`` nodes (ones above and below the
diagonal) and ``I_n`` the identity; for channel x time maps the middle term and the ``F``
factors are absent. Its number of edges (pairs, each counted once) is therefore
``E_S * T + C * (T - 1)`` for channel x time maps and
``E_S * F * T + C * (F - 1) * T + C * F * (T - 1)`` for channel x frequency x time maps, with
``E_S`` the number of sensor pairs. On a lattice (a sensor graph that is a path) this is the
cross-shaped ("face") connectivity of ``scipy.ndimage.generate_binary_structure(ndim, 1)``.

This is the channel-by-time neighbourhood of cluster-based permutation tests [1]_ and of
threshold-free cluster enhancement over EEG points [2]_.

References
----------
.. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
   MEG-data. Journal of Neuroscience Methods, 164, 177-190.
.. [2] Smith, S. M., & Nichols, T. E. (2009). Threshold-free cluster enhancement: addressing
   problems of smoothing, threshold dependence and localisation in cluster inference.
   NeuroImage, 44, 83-98.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

__all__ = ["PointGraph", "graph_arrays", "map_graph", "points_graph"]


def _path(n: int) -> sp.csr_matrix:
    """Adjacency of the path graph on ``n`` nodes (0 - 1 - ... - n-1)."""
    if n < 2:
        return sp.csr_matrix((n, n), dtype=bool)
    return sp.diags([np.ones(n - 1, dtype=bool), np.ones(n - 1, dtype=bool)], [-1, 1],
                    shape=(n, n), format="csr", dtype=bool)


def _eye(n: int) -> sp.csr_matrix:
    return sp.identity(n, dtype=bool, format="csr")


def _symmetric(s: sp.spmatrix) -> sp.csr_matrix:
    """A sensor adjacency made symmetric and boolean, without the diagonal."""
    s = sp.triu(s != 0, k=1) + sp.triu((s != 0).T, k=1)
    return (s + s.T).tocsr()


def points_graph(sensor_adjacency, shape) -> sp.csr_matrix:
    """Adjacency of all points of a map: neighbouring channels, adjacent times and frequencies.

    Parameters
    ----------
    sensor_adjacency : scipy.sparse matrix, array_like or SensorGraph
        ``(C, C)`` adjacency of the channels (e.g. ``SensorGraph.adjacency()``; a
        :class:`~glmeeg.sensors.SensorGraph` itself is accepted). Any non-zero entry ``(i, j)``
        or ``(j, i)`` makes channels ``i`` and ``j`` neighbours; the diagonal is ignored.
    shape : tuple of int
        Shape of one map, ``(channels, times)`` or ``(channels, frequencies, times)``
        (``Axes.shape``).

    Returns
    -------
    scipy.sparse.csr_matrix
        ``(n_points, n_points)`` boolean adjacency in flat C order: symmetric, no diagonal,
        sorted indices, no duplicate entries. Exact neighbourhood: see the module docstring.

    Raises
    ------
    ValueError
        ``shape`` is not 2 or 3 positive integers, or the adjacency is not ``(C, C)``. These are
        programming errors (the pipeline builds both from the same study), not input errors.

    Notes
    -----
    Built from sparse Kronecker products (the Cartesian product of the sensor graph and path
    graphs), with no loop over points. Memory is about 5 bytes per stored entry (int32 indices
    and a boolean) while the index range fits int32, 9 bytes beyond that.

    References
    ----------
    .. [1] Maris, E., & Oostenveld, R. (2007). Nonparametric statistical testing of EEG- and
       MEG-data. Journal of Neuroscience Methods, 164, 177-190.

    Examples
    --------
    >>> s = np.array([[0, 1], [1, 0]])          # two neighbouring channels
    >>> a = points_graph(s, (2, 3))             # 2 channels x 3 times
    >>> a.nnz // 2                              # 1 * 3 sensor pairs + 2 * 2 time pairs
    7
    >>> np.flatnonzero(a[1].toarray())          # point (channel 0, time 1)
    array([0, 2, 4])
    """
    if hasattr(sensor_adjacency, "adjacency") and callable(sensor_adjacency.adjacency):
        sensor_adjacency = sensor_adjacency.adjacency()
    dims = tuple(shape)
    if len(dims) not in (2, 3) or not all(isinstance(d, (int, np.integer)) and d >= 1 for d in dims):
        raise ValueError(f"shape must be (channels, times) or (channels, frequencies, times) of "
                         f"positive integers; got {shape!r}")
    dims = tuple(int(d) for d in dims)
    n_channels = dims[0]
    s = sp.csr_matrix(sensor_adjacency)
    if s.shape != (n_channels, n_channels):
        raise ValueError(f"sensor adjacency has shape {s.shape}; expected ({n_channels}, "
                         f"{n_channels}) for a map of shape {dims}")
    s = _symmetric(s)

    inner = int(np.prod(dims[1:]))
    if len(dims) == 2:
        lattice = _path(dims[1])
    else:
        n_freqs, n_times = dims[1], dims[2]
        lattice = (sp.kron(_path(n_freqs), _eye(n_times), format="csr")
                   + sp.kron(_eye(n_freqs), _path(n_times), format="csr"))
    a = (sp.kron(s, _eye(inner), format="csr")
         + sp.kron(_eye(n_channels), lattice, format="csr")).tocsr()
    a = sp.csr_matrix(a, dtype=bool)
    a.sum_duplicates()
    a.eliminate_zeros()
    a.sort_indices()
    return a


def graph_arrays(graph) -> tuple[np.ndarray, np.ndarray]:
    """The CSR structure of a graph as two contiguous arrays, for compiled kernels.

    Parameters
    ----------
    graph : scipy.sparse matrix
        Square adjacency, e.g. from :func:`points_graph`.

    Returns
    -------
    indptr : numpy.ndarray
        ``(n_points + 1,)`` int64: the neighbours of point ``i`` are
        ``indices[indptr[i]:indptr[i + 1]]``.
    indices : numpy.ndarray
        ``(nnz,)`` int32 (points are int32 in the kernels), sorted within each point. Half
        the bytes of int64, which the kernels' random reads of neighbours feel.

    Raises
    ------
    ValueError
        ``graph`` is not square.

    Notes
    -----
    Both arrays are fresh copies (changing them does not change ``graph``). Explicitly stored
    zeros are dropped, so every listed neighbour is a neighbour.

    Examples
    --------
    >>> indptr, indices = graph_arrays(points_graph(np.zeros((1, 1)), (1, 3)))
    >>> indptr.tolist(), indices.tolist()
    ([0, 1, 3, 4], [1, 0, 2, 1])
    """
    g = sp.csr_matrix(graph, copy=True)
    if g.shape[0] != g.shape[1]:
        raise ValueError(f"graph must be square; got shape {g.shape}")
    g.sum_duplicates()
    g.eliminate_zeros()
    g.sort_indices()
    if g.shape[0] >= 2**31 - 1:
        raise ValueError(f"the graph must have fewer than 2**31 - 1 points, got {g.shape[0]}")
    return (np.ascontiguousarray(g.indptr, dtype=np.int64),
            np.ascontiguousarray(g.indices, dtype=np.int32))


class PointGraph(tuple):
    """The points graph as ``(indptr, indices)`` CSR arrays, with its product form.

    A tuple of the two arrays of :func:`graph_arrays` (so it unpacks and indexes like one),
    plus ``grid = (channel_indptr, channel_indices, n_freqs, n_times)``: the sensor graph in CSR
    form and the lattice sizes (``n_freqs = 1`` for channel x time maps), or None. With the
    grid, the cluster and TFCE kernels enumerate a point's neighbours from the small sensor
    graph and the point's coordinates instead of reading the CSR arrays, whose random reads
    dominate the memory traffic of a large map; the results are the same bit for bit.
    Built by :func:`map_graph`.
    """

    grid: tuple | None

    def __new__(cls, indptr, indices, grid=None):
        self = super().__new__(cls, (indptr, indices))
        self.grid = grid
        return self

    def __reduce__(self):
        return (PointGraph, (self[0], self[1], self.grid))


def map_graph(sensor_adjacency, shape) -> PointGraph:
    """The neighbour graph of a map's points, in CSR form and in product form, for kernels.

    Parameters
    ----------
    sensor_adjacency, shape
        As :func:`points_graph`.

    Returns
    -------
    PointGraph
        ``graph_arrays(points_graph(sensor_adjacency, shape))`` with its ``grid``.

    Raises
    ------
    ValueError
        As :func:`points_graph`.

    Examples
    --------
    >>> g = map_graph(np.array([[0, 1], [1, 0]]), (2, 3))
    >>> indptr, indices = g
    >>> g.grid[2:], indices[indptr[1]:indptr[2]].tolist()
    ((1, 3), [0, 2, 4])
    """
    if hasattr(sensor_adjacency, "adjacency") and callable(sensor_adjacency.adjacency):
        sensor_adjacency = sensor_adjacency.adjacency()
    indptr, indices = graph_arrays(points_graph(sensor_adjacency, shape))
    dims = tuple(int(d) for d in shape)
    s = _symmetric(sp.csr_matrix(sensor_adjacency))
    s.sort_indices()
    n_freqs, n_times = (1, dims[1]) if len(dims) == 2 else (dims[1], dims[2])
    grid = (np.ascontiguousarray(s.indptr, dtype=np.int64),
            np.ascontiguousarray(s.indices, dtype=np.int32), n_freqs, n_times)
    return PointGraph(indptr, indices, grid)
