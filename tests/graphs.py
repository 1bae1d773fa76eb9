"""Graphs for kernel tests, built with scipy.sparse (independent of the code under test)."""

import numpy as np
import scipy.sparse as sp


def lattice_graph(shape) -> sp.csr_matrix:
    """Face-neighbour lattice over a C-ordered array of ``shape`` (4-neighbour in 2-D)."""
    adj = None
    for d, n in enumerate(shape):
        factors = [sp.identity(m, format="csr") for m in shape]
        factors[d] = sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], format="csr")
        term = factors[0]
        for f in factors[1:]:
            term = sp.kron(term, f, format="csr")
        adj = term if adj is None else adj + term
    adj = sp.csr_matrix(adj)
    adj.sort_indices()
    return adj


def random_graph(n: int, n_edges: int, rng) -> sp.csr_matrix:
    """Symmetric random graph without self loops."""
    i = rng.integers(0, n, n_edges)
    j = rng.integers(0, n, n_edges)
    keep = i != j
    adj = sp.coo_matrix((np.ones(keep.sum()), (i[keep], j[keep])), shape=(n, n)).tocsr()
    adj = ((adj + adj.T) > 0).astype(np.float64).tocsr()
    adj.sort_indices()
    return adj


def csr(adj):
    return adj.indptr.astype(np.int64), adj.indices.astype(np.int64)
