"""Threshold-free cluster enhancement against closed forms and scipy-based references.

Outside sources: the definition and the closed forms of Smith & Nichols (2009), NeuroImage
44:83-98 (an isolated point of height h gives h^(H+1)/(H+1); a plateau of n points gives
n^E h^(H+1)/(H+1)); hand integration of small examples; the definition evaluated with
``scipy.sparse.csgraph.connected_components`` at every distinct level (exact) and at fine
threshold steps (midpoint rule). Graphs are built here with scipy.sparse.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from numpy.testing import assert_allclose, assert_array_equal
from scipy.ndimage import gaussian_filter
from scipy.sparse.csgraph import connected_components

from glmeeg.inference.tfce import max_tfce, tfce

E, H = 0.5, 2.0  # defaults of Smith & Nichols (2009)


# ---------------------------------------------------------------------------------------------
# graphs and references built with scipy (independent of the code under test)

from graphs import csr, lattice_graph, random_graph  # noqa: E402  (shared test helpers)


def path_graph(n: int) -> sp.csr_matrix:
    return lattice_graph((n,))


def component_sizes(adj, mask):
    """Size of the component of each point of ``mask`` in the subgraph induced by ``mask``
    (scipy connected_components); 0 outside ``mask``."""
    idx = np.flatnonzero(mask)
    _, lab = connected_components(adj[idx][:, idx], directed=False)
    out = np.zeros(mask.size)
    out[idx] = np.bincount(lab)[lab]
    return out


def tfce_by_levels(x, adj, e_exp=E, h_exp=H):
    """Exact TFCE from the definition: between two consecutive distinct values the component
    of every point is fixed, so the integral is a sum of closed-form pieces, with components
    taken from scipy at every distinct level."""
    a1 = h_exp + 1.0
    out = np.zeros(x.size)
    for sign in (1.0, -1.0):
        y = np.maximum(sign * x, 0.0)
        levels = np.unique(y[y > 0])[::-1]
        lower = np.r_[levels[1:], 0.0]
        for hi, lo in zip(levels, lower):
            mask = y >= hi
            size = component_sizes(adj, mask)
            out[mask] += sign * size[mask] ** e_exp * (hi**a1 - lo**a1) / a1
    return out


def tfce_by_steps(x, adj, dh, e_exp=E, h_exp=H):
    """Midpoint-rule TFCE over thresholds (k + 1/2) dh, k = 0, 1, ... (the usual step-based
    computation, with components from scipy)."""
    out = np.zeros(x.size)
    for sign in (1.0, -1.0):
        y = np.maximum(sign * x, 0.0)
        k = 0
        while (h := (k + 0.5) * dh) < y.max():
            mask = y >= h
            size = component_sizes(adj, mask)
            out[mask] += sign * size[mask] ** e_exp * h**h_exp * dh
            k += 1
    return out


def smooth_lattice_map(shape, rng, sigma, scale=3.0):
    x = gaussian_filter(rng.standard_normal(shape), sigma).ravel()
    return scale * x / x.std()


def smooth_graph_map(adj, rng, steps=3, scale=3.0):
    """Random map smoothed by averaging over neighbours a few times."""
    x = rng.standard_normal(adj.shape[0])
    deg = np.asarray(adj.sum(axis=1)).ravel()
    for _ in range(steps):
        x = (x + adj @ x) / (1.0 + deg)
    return scale * x / x.std()


# ---------------------------------------------------------------------------------------------
# closed forms

def test_isolated_points_closed_form():
    # Smith & Nichols (2009): an isolated point (e = 1 at every level) gives h^(H+1)/(H+1);
    # h = 3, H = 2: 27 / 3 = 9.
    x = np.array([3.0, -3.0, 0.0, 1.5, 0.2, -0.7])
    indptr, indices = csr(sp.csr_matrix((6, 6)))
    got = tfce(x, indptr, indices)
    assert got[0] == 9.0 and got[1] == -9.0 and got[2] == 0.0  # exact: 27 / 3 in float64
    # rtol: a few roundings of the power and the division.
    assert_allclose(got, np.sign(x) * np.abs(x) ** 3 / 3, rtol=1e-12, atol=0)


@pytest.mark.parametrize(("e_exp", "h_exp"), [(0.5, 2.0), (1.0, 1.0), (0.7, 3.3), (2.0, 0.5)])
def test_isolated_points_other_exponents(e_exp, h_exp):
    # closed form h^(H+1)/(H+1), Smith & Nichols (2009)
    x = np.array([3.0, -1.25, 0.4])
    indptr, indices = csr(sp.csr_matrix((3, 3)))
    got = tfce(x, indptr, indices, extent_exponent=e_exp, height_exponent=h_exp)
    assert_allclose(got, np.sign(x) * np.abs(x) ** (h_exp + 1) / (h_exp + 1), rtol=1e-12, atol=0)


def test_plateau_closed_form():
    # Smith & Nichols (2009): a connected plateau of n points at height h has e = n at every
    # level, TFCE = n^E h^(H+1)/(H+1); n = 4, h = 3, E = 0.5, H = 2: 2 * 27 / 3 = 18.
    indptr, indices = csr(path_graph(4))
    got = tfce(np.full(4, 3.0), indptr, indices)
    assert_allclose(got, 18.0, rtol=1e-12, atol=0)
    assert_allclose(tfce(np.full(4, -3.0), indptr, indices), -18.0, rtol=1e-12, atol=0)


@pytest.mark.parametrize(("shape", "h", "e_exp", "h_exp"),
                         [((3, 3), 2.0, 0.5, 2.0), ((2, 3, 4), 1.7, 0.8, 1.5),
                          ((7,), 0.3, 1.0, 3.0)])
def test_plateau_on_lattices(shape, h, e_exp, h_exp):
    # closed form n^E h^(H+1)/(H+1), Smith & Nichols (2009)
    adj = lattice_graph(shape)
    n = adj.shape[0]
    indptr, indices = csr(adj)
    got = tfce(np.full(n, h), indptr, indices, extent_exponent=e_exp, height_exponent=h_exp)
    assert_allclose(got, n**e_exp * h ** (h_exp + 1) / (h_exp + 1), rtol=1e-12, atol=0)


def test_two_level_chain_by_hand():
    # Chain 0 - 1 with heights 2 and 1 (hand integration of the definition):
    #   point 1 (h = 1): for 0 < h <= 1 both points are in {x >= h}: e = 2,
    #       TFCE = int_0^1 2^E h^H dh = 2^E / (H+1)                   = sqrt(2)/3
    #   point 0 (h = 2): e = 2 on (0, 1], e = 1 on (1, 2],
    #       TFCE = 2^E / (H+1) + int_1^2 h^H dh = 2^E/(H+1) + (2^(H+1) - 1)/(H+1)
    #                                                                 = sqrt(2)/3 + 7/3
    indptr, indices = csr(path_graph(2))
    got = tfce(np.array([2.0, 1.0]), indptr, indices)
    assert_allclose(got, [np.sqrt(2) / 3 + 7 / 3, np.sqrt(2) / 3], rtol=1e-12, atol=0)


def test_two_peaks_merging_by_hand():
    # Chain a - b - c with heights 3, 1, 2: two components merge through b at h = 1.
    #   c: e = 1 on (1, 2], e = 3 on (0, 1]: (2^3 - 1)/3 + 3^E/3 = 7/3 + sqrt(3)/3
    #   a: e = 1 on (1, 3], e = 3 on (0, 1]: (3^3 - 1)/3 + 3^E/3 = 26/3 + sqrt(3)/3
    #   b: e = 3 on (0, 1]:                                 3^E/3 = sqrt(3)/3
    indptr, indices = csr(path_graph(3))
    got = tfce(np.array([3.0, 1.0, 2.0]), indptr, indices)
    r3 = np.sqrt(3) / 3
    assert_allclose(got, [26 / 3 + r3, r3, 7 / 3 + r3], rtol=1e-12, atol=0)
    assert_allclose(tfce(-np.array([3.0, 1.0, 2.0]), indptr, indices), -got, rtol=1e-12, atol=0)


# ---------------------------------------------------------------------------------------------
# laws and ties

def _random_cases():
    rng = np.random.default_rng(20240611)
    lat = lattice_graph((8, 40))
    yield lat, smooth_lattice_map((8, 40), rng, sigma=2.0)
    rnd = random_graph(300, 450, rng)
    yield rnd, smooth_graph_map(rnd, rng)


@pytest.mark.parametrize("c", [2.5, 0.3])
def test_scaling_law(c):
    # tfce(c x) = c^(H+1) tfce(x): substitute h = c u in the definition (e is unchanged).
    for adj, x in _random_cases():
        indptr, indices = csr(adj)
        # rtol: each value is a sum of a few hundred non-negative rounded terms.
        assert_allclose(tfce(c * x, indptr, indices), c ** (H + 1) * tfce(x, indptr, indices),
                        rtol=1e-12, atol=0)


def test_negative_part_mirrors_positive_part():
    # definition: the negative part is the positive part of -x, negated
    for adj, x in _random_cases():
        indptr, indices = csr(adj)
        got = tfce(x, indptr, indices)
        # exact: the same heights go through the same arithmetic in both parts
        assert_array_equal(tfce(-x, indptr, indices), -got)
        assert np.all(np.sign(got) == np.sign(x))


def test_random_maps_match_exact_levels_reference():
    # scipy connected_components at every distinct level: the definition evaluated exactly
    for adj, x in _random_cases():
        indptr, indices = csr(adj)
        for e_exp, h_exp in [(E, H), (1.0, 1.0), (0.3, 2.7)]:
            got = tfce(x, indptr, indices, extent_exponent=e_exp, height_exponent=h_exp)
            want = tfce_by_levels(x, adj, e_exp, h_exp)
            # rtol: both are sums of a few hundred rounded non-negative pieces, summed in
            # different orders.
            assert_allclose(got, want, rtol=1e-12, atol=0)


def test_ties_plateaus_and_equal_heights_in_different_components():
    # Path 0-1-2-3-4-5 with heights 2, 2, 0, 2, 1, 2 (hand integration):
    #   {0, 1}: plateau of 2 at height 2: 2^E 2^3 / 3
    #   3 and 5: e = 1 on (1, 2], e = 3 on (0, 1]: 7/3 + 3^E/3;  4: 3^E/3
    indptr, indices = csr(path_graph(6))
    got = tfce(np.array([2.0, 2.0, 0.0, 2.0, 1.0, 2.0]), indptr, indices)
    r3 = np.sqrt(3) / 3
    want = [np.sqrt(2) * 8 / 3] * 2 + [0.0, 7 / 3 + r3, r3, 7 / 3 + r3]
    assert_allclose(got, want, rtol=1e-12, atol=0)


def test_integer_maps_with_many_ties():
    # integer-valued maps: most values are tied; compared with the exact levels reference
    # (scipy) and checked to be invariant under relabelling of the points, which changes the
    # order in which tied points are swept.
    rng = np.random.default_rng(7)
    adj = lattice_graph((6, 9))
    n = adj.shape[0]
    for _ in range(5):
        x = rng.integers(-3, 4, n).astype(np.float64)
        indptr, indices = csr(adj)
        got = tfce(x, indptr, indices)
        # rtol: sums of a few rounded pieces in different orders
        assert_allclose(got, tfce_by_levels(x, adj), rtol=1e-12, atol=0)
        perm = rng.permutation(n)
        adj_p = adj[perm][:, perm].tocsr()
        adj_p.sort_indices()
        got_p = tfce(x[perm], *csr(adj_p))
        assert_allclose(got_p, got[perm], rtol=1e-12, atol=0)


# ---------------------------------------------------------------------------------------------
# agreement with the step-based integral

@pytest.mark.parametrize("case", [0, 1], ids=["lattice-8x40", "random-graph"])
def test_fine_step_integral_converges_to_exact(case):
    # Midpoint rule over thresholds (the step-based computation) with scipy components.
    # Error bound, derived for each point p of height h_p: the integrand g = a b with
    # a(h) = e_p(h)^E non-increasing and b(h) = h^H increasing; over a step the midpoint value
    # is off by at most the oscillation of g there, which is <= a(0+) db + b(h_p) |da|;
    # summed over the steps that is <= 2 a(0+) h_p^H, and the last, partial step adds at most
    # dh/2 a(0+) h_p^H. So |step - exact| <= 2.5 dh e_p(0+)^E h_p^H, where e_p(0+) is the
    # size of p's cluster in {x > 0} (or {x < 0}). Relative to the value (>= h_p^(H+1)/(H+1))
    # this is <= 2.5 dh (H + 1) e_p(0+)^E / h_p: first order in dh.
    adj, x = list(_random_cases())[case]
    indptr, indices = csr(adj)
    exact = tfce(x, indptr, indices)
    e0 = np.maximum(component_sizes(adj, x > 0), component_sizes(adj, x < 0))
    errors = []
    for dh in (0.1, 0.01):
        err = np.abs(tfce_by_steps(x, adj, dh) - exact)
        bound = 2.5 * dh * e0**E * np.abs(x) ** H
        assert np.all(err <= bound)
        errors.append(err.max())
    # The step value converges to ours: the largest error falls by at least a factor of 4
    # when dh falls 10-fold (first order would give 10; 4 leaves room for the irregular
    # placement of the jumps of e within steps).
    assert errors[1] < errors[0] / 4


# ---------------------------------------------------------------------------------------------
# batch kernel

def test_max_tfce_equals_max_of_tfce_and_does_not_depend_on_batching():
    rng = np.random.default_rng(11)
    adj = lattice_graph((8, 40))
    indptr, indices = csr(adj)
    maps = np.stack([smooth_lattice_map((8, 40), rng, sigma=s) for s in (1.0, 2.0, 3.0, 1.5)]
                    + [np.zeros(320), np.full(320, 2.0), -np.abs(rng.standard_normal(320))])
    batch = max_tfce(maps, indptr, indices)
    assert batch.shape == (maps.shape[0], 2)
    for b, x in enumerate(maps):
        t = tfce(x, indptr, indices)
        # exact: same kernel, and rounding of the final division is monotone
        assert batch[b, 0] == max(t.max(), 0.0)
        assert batch[b, 1] == max(-t.min(), 0.0)
        assert_array_equal(max_tfce(x[None, :], indptr, indices), batch[b:b + 1])
    assert_array_equal(max_tfce(maps[2:5], indptr, indices), batch[2:5])
    assert_array_equal(batch[4], [0.0, 0.0])
    assert not np.signbit(batch).any()  # no -0.0 for an empty part
    # plateau of 320 points at 2: 320^E 2^3 / 3 (closed form, Smith & Nichols 2009)
    assert_allclose(batch[5], [np.sqrt(320) * 8 / 3, 0.0], rtol=1e-12, atol=0)


def test_max_tfce_exponents_are_passed_through():
    rng = np.random.default_rng(3)
    adj = random_graph(200, 300, rng)
    indptr, indices = csr(adj)
    maps = np.stack([smooth_graph_map(adj, rng) for _ in range(3)])
    got = max_tfce(maps, indptr, indices, extent_exponent=1.0, height_exponent=1.5)
    for b in range(3):
        t = tfce_by_levels(maps[b], adj, 1.0, 1.5)  # scipy levels reference
        assert_allclose(got[b], [t.max(), -t.min()], rtol=1e-12, atol=0)


# ---------------------------------------------------------------------------------------------
# validation

@pytest.mark.parametrize("name", ["extent_exponent", "height_exponent"])
@pytest.mark.parametrize("bad", [0, -0.5, np.nan, np.inf, "two"])
def test_bad_exponents(name, bad):
    indptr, indices = csr(path_graph(3))
    for call in (lambda: tfce(np.ones(3), indptr, indices, **{name: bad}),
                 lambda: max_tfce(np.ones((1, 3)), indptr, indices, **{name: bad})):
        with pytest.raises(ValueError, match=rf"^{name} must be a finite number > 0, got") as e:
            call()
        assert "\n" not in str(e.value)


def test_bad_values_and_graph():
    indptr, indices = csr(path_graph(3))
    with pytest.raises(ValueError, match="values must be finite, got nan at 1"):
        tfce(np.array([1.0, np.nan, 2.0]), indptr, indices)
    with pytest.raises(ValueError, match="maps must be finite, got inf at"):
        max_tfce(np.array([[1.0, 1.0, 2.0], [1.0, np.inf, 0.0]]), indptr, indices)
    with pytest.raises(ValueError, match="values must be a 1-D array of n_points = 3"):
        tfce(np.ones(4), indptr, indices)
    with pytest.raises(ValueError, match=r"maps must be a 2-D array \(n_maps, n_points = 3\)"):
        max_tfce(np.ones(3), indptr, indices)
    with pytest.raises(ValueError, match=r"indices must lie in \[0, 3\)"):
        tfce(np.ones(3), indptr, np.array([1, 0, 2, 3]))
    with pytest.raises(TypeError):
        tfce(np.ones(3), indptr, indices, 0.5)  # options are keyword-only
