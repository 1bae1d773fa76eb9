"""TFCE and cluster kernels benchmark: exact TFCE vs the step-based computation, and the
throughput of the batch kernels that build permutation null distributions.

Graph: a simple stand-in for a sensor graph, enough for timing: 64 sensors on an 8 x 8 grid
with 4-neighbour adjacency, times a path graph over 500 time samples (each point is linked to
its grid neighbours at the same time and to itself at the previous and next samples), i.e. a
8 x 8 x 500 lattice of 32,000 points in channel x time C order. Maps: white noise smoothed with
a Gaussian (sigma 1 sensor, 1 sensor, 10 samples), scaled to a standard deviation of 2 (the
size of a t map), fixed seed.

Printed, all measured in this run (the machines are shared and noisy, so only ratios measured
side by side mean anything):

* exact TFCE of one map (glmeeg ``tfce``) vs a step-based computation at ``dh = 0.1``
  (midpoint rule over thresholds, components from ``scipy.sparse.csgraph.connected_components``
  at each threshold, vectorised): both times and the ratio (target >= 10x);
* the largest difference between the step-based values and the exact ones at dh = 0.1 and
  0.01: the step error, which shrinks with dh;
* ``max_tfce`` and ``max_cluster_statistic`` over a batch of maps: time per map and the
  projected time for 5,000 maps, with the number of threads numba uses, and the speed-up of
  ``max_tfce`` over one thread.

Run: ``python benchmarks/bench_tfce.py``
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from timing import best_of


def grid_by_time_graph(side: int, n_times: int):
    """CSR adjacency of a side x side sensor grid (4-neighbour) times a path over time."""
    import scipy.sparse as sp

    def path(n):
        return sp.diags([np.ones(n - 1), np.ones(n - 1)], [-1, 1], format="csr")

    eye = sp.identity
    sensors = sp.kron(path(side), eye(side)) + sp.kron(eye(side), path(side))
    adj = sp.kron(sensors, eye(n_times)) + sp.kron(eye(side * side), path(n_times))
    adj = sp.csr_matrix(adj)
    adj.sort_indices()
    return adj


def smooth_maps(n_maps: int, side: int, n_times: int, rng) -> np.ndarray:
    from scipy.ndimage import gaussian_filter

    out = np.empty((n_maps, side * side * n_times))
    for b in range(n_maps):
        x = gaussian_filter(rng.standard_normal((side, side, n_times)), (1.0, 1.0, 10.0))
        out[b] = 2.0 * (x / x.std()).ravel()
    return out


def sp_upper(adj):
    """Each undirected edge once (i < j), as row and column arrays."""
    coo = adj.tocoo()
    keep = coo.row < coo.col
    return coo.row[keep].astype(np.int64), coo.col[keep].astype(np.int64)


def tfce_by_steps(x, rows, cols, dh, e_exp=0.5, h_exp=2.0):
    """Step-based TFCE: sum over thresholds h = (k + 1/2) dh of e(h)^E h^H dh at the points
    of {x >= h}, components from scipy at each threshold (each undirected edge given once)."""
    import scipy.sparse as sp
    from scipy.sparse.csgraph import connected_components

    n = x.size
    out = np.zeros(n)
    for sign in (1.0, -1.0):
        y = np.maximum(sign * x, 0.0)
        top = y.max()
        k = 0
        while (h := (k + 0.5) * dh) < top:
            mask = y >= h
            keep = mask[rows] & mask[cols]
            g = sp.csr_matrix((np.ones(int(keep.sum()), dtype=np.int8),
                               (rows[keep], cols[keep])), shape=(n, n))
            _, lab = connected_components(g, directed=False)
            size = np.bincount(lab)[lab]
            out[mask] += sign * size[mask] ** e_exp * h**h_exp * dh
            k += 1
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--side", type=int, default=8, help="sensor grid side (side x side sensors)")
    ap.add_argument("--times", type=int, default=500)
    ap.add_argument("--maps", type=int, default=200, help="batch size for the batch kernels")
    ap.add_argument("--threshold", type=float, default=2.0, help="cluster-forming threshold")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--seed", type=int, default=12345)
    args = ap.parse_args()

    import numba

    from glmeeg.inference.clusters import max_cluster_statistic
    from glmeeg.inference.tfce import max_tfce, tfce

    rng = np.random.default_rng(args.seed)
    adj = grid_by_time_graph(args.side, args.times)
    indptr, indices = adj.indptr.astype(np.int64), adj.indices.astype(np.int64)
    n_points = adj.shape[0]
    upper = sp_upper(adj)  # edges for the step-based baseline
    x = smooth_maps(1, args.side, args.times, rng)[0]
    print(f"graph: {args.side}x{args.side} sensor grid (4-neighbour) x {args.times}-sample path, "
          f"{n_points} points, {indices.size // 2} edges; map range [{x.min():.2f}, "
          f"{x.max():.2f}]; numba threads: {numba.get_num_threads()}")

    # --- one map: exact vs step-based --------------------------------------------------------
    t0 = time.perf_counter()
    exact = tfce(x, indptr, indices)  # first call compiles (or loads the cached) kernel
    t_first = time.perf_counter() - t0
    t_exact = best_of(lambda: tfce(x, indptr, indices), args.repeats)
    t_steps = best_of(lambda: tfce_by_steps(x, *upper, 0.1), max(1, args.repeats // 2))
    print(f"\none map, exact TFCE:                  {t_exact * 1e3:9.2f} ms "
          f"(first call incl. compile/cache load: {t_first:.2f} s)")
    print(f"one map, step-based TFCE (dh = 0.1): {t_steps * 1e3:9.2f} ms")
    print(f"ratio step-based / exact:            {t_steps / t_exact:9.1f}x   (target >= 10x)")
    scale = np.abs(exact).max()
    for dh in (0.1, 0.01):
        t0 = time.perf_counter()
        diff = np.abs(tfce_by_steps(x, *upper, dh) - exact)
        t_dh = time.perf_counter() - t0
        print(f"step error at dh = {dh:<5}: max |step - exact| = {diff.max():.4g} "
              f"({diff.max() / scale:.2e} of max |TFCE| = {scale:.4g}); step-based time "
              f"{t_dh * 1e3:.0f} ms")

    # --- batches: null distributions ---------------------------------------------------------
    maps = smooth_maps(args.maps, args.side, args.times, rng)
    max_tfce(maps[:2], indptr, indices)  # warm-up (compile or load the cache)
    max_cluster_statistic(maps[:2], indptr, indices, args.threshold)
    t_tfce = best_of(lambda: max_tfce(maps, indptr, indices), max(1, args.repeats // 2))
    t_mass = best_of(lambda: max_cluster_statistic(maps, indptr, indices, args.threshold),
                     args.repeats)
    t_ext = best_of(lambda: max_cluster_statistic(maps, indptr, indices, args.threshold,
                                                  statistic="extent"), args.repeats)
    print(f"\nbatch of {args.maps} maps ({numba.get_num_threads()} threads):")
    for name, t in (("max_tfce", t_tfce),
                    (f"max_cluster_statistic mass, threshold {args.threshold}", t_mass),
                    (f"max_cluster_statistic extent, threshold {args.threshold}", t_ext)):
        per_map = t / args.maps
        print(f"  {name:<48} {per_map * 1e3:8.3f} ms/map; 5,000 maps: {per_map * 5000:7.1f} s")
    print(f"  single-map tfce for comparison:                  {t_exact * 1e3:8.3f} ms/map")
    n_threads = numba.get_num_threads()
    if n_threads > 1:
        numba.set_num_threads(1)
        t_one = best_of(lambda: max_tfce(maps, indptr, indices), max(1, args.repeats // 2))
        numba.set_num_threads(n_threads)
        print(f"  max_tfce on 1 thread: {t_one / args.maps * 1e3:.3f} ms/map; speed-up with "
              f"{n_threads} threads: {t_one / t_tfce:.2f}x")


if __name__ == "__main__":
    main()
